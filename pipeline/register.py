"""Register: find every frame's origin ``(r0_k, c0_k)`` of SPEC section 5 and calibrate G.

Consecutive section topographs show *different* slices of the wafer, so whole-image correlation
is biased by the defects' own displacement (PHYSICS.md 1.7: a point's column moves by
``dX L / p_col`` from one frame to the next, a loop's chord ends move along the rows).
Registration therefore uses features that do not move with the slice.

Columns. The column profile (mean over rows) of the section band keeps its shape from frame to
frame. Neighbouring profiles are cross-correlated (scikit-image ``phase_cross_correlation`` with
``upsample_factor``; Guizar-Sicairos, Thurman & Fienup 2008, Opt. Lett. 33, 156) for the
relative column drift; the coarse half-maximum crossing of each frame's rising band edge enters
the same solve as a weak absolute anchor, so that errors cannot accumulate along the scan. The
absolute entrance-surface column is then found once, on the median of the aligned profiles, by
fitting :func:`surface_edge_model` (surface step integrated over a pixel, bright surface line,
decay with depth in reflection, convolved with the slit's box and a Gaussian): the plain
half-maximum crossing is biased by whatever lies just inside the surface (by ~1 px with a
bright surface line in a synthetic test). In transmission the same fit on the mirrored exit
edge gives the band width ``t G / p_col``: the calibration of G, with a warning when it differs
from the computed G by more than ``g_tolerance``.

Rows. The band's surfaces run along the rows, so the derivative along the rows of the band
region (:func:`row_feature_image`) keeps only structure along the slit: defects, slit ends, the
wafer edge. It is correlated in 2-D with the next ``neighbours`` frames (defects may move in
columns between slices without biasing the row shift); a pair counts when its correlation peak
is significant. A template of the aligned row profiles, when it has features, anchors the
frames absolutely, and a weak smoothness prior carries frames without features along with their
neighbours (they are reported). A frame without features along the slit has no measurable row
drift: that is a property of the data, stated in a warning.

Each axis has one robust global least-squares solve (``scipy.optimize.least_squares``, Huber
then Cauchy loss: outliers are down-weighted). Frames with no usable band (blank, corrupt, off
the wafer: quality below ``min_quality``) or whose equations disagree with the solution are
flagged; their origins are interpolated from the good neighbours and marked ``interpolated``.

Conventions: ``c0_k`` is the absolute entrance-surface column of frame k. ``r0_k`` is the row
where ``y = 0``. Images carry no absolute mark along the slit, so y is measured from row 0 of
the first good frame (``r0 = 0`` there) and ``r0_k`` is the drift along the slit since then;
``row_shift_px = r0_k - r0_first`` and ``col_shift_px = c0_k - c0_first``.
"""

from __future__ import annotations

import logging
import math
import warnings as _warnings
from dataclasses import dataclass, field
from pathlib import Path

import dask
import dask.array as da
import numpy as np
from scipy import ndimage as ndi
from scipy import sparse
from scipy.optimize import least_squares
from scipy.sparse import linalg as sparse_linalg
from skimage.registration import phase_cross_correlation

from pipeline import runfolder as rf
from pipeline.compute import run_tasks
from pipeline.config import RegisterConfig
from pipeline.errors import InputError
from pipeline.geometry import Geometry

log = logging.getLogger(__name__)

COLUMNS = (
    "frame", "position_um", "r0_px", "c0_px", "row_shift_px", "col_shift_px",
    "quality", "flagged", "interpolated",
)
_INT_COLUMNS = ("frame", "flagged", "interpolated")
#: Residual scale (pixels) of the robust losses: larger residuals are down-weighted.
HUBER_PX = 0.3
#: A frame whose equations disagree with the solution by more than this (pixels, median) is
#: flagged as inconsistent.
INCONSISTENT_PX = 1.0
#: Weight of the coarse per-frame edge (absolute) against a pairwise profile shift (1).
ANCHOR_WEIGHT = 0.05
#: Weight of the smoothness prior ``r_{k+1} - r_k = 0`` of the row drift.
SMOOTH_WEIGHT = 0.01
#: A row profile has features when its gradient peaks above this many noise sigmas.
MIN_FEATURE_SIGMA = 8.0
#: Smallest match score (1 - normalised RMS error) of a template row shift that is used.
MIN_MATCH = 0.3
#: A pairwise row shift is used when its correlation peak stands this many s.d. above the
#: rest of the cross-correlation (noise and the fixed pattern of the detector gave 8-15 on
#: synthetic series, a loop crossing the slice 24-34).
MIN_PEAK_SIGNIFICANCE = 20.0
#: Frames per registration task (a task computes their corrected images and keeps 1-D profiles).
FRAMES_PER_TASK = 8


# ---------------------------------------------------------------------------------------------
# result


@dataclass
class RegistrationResult:
    """Registration of a series.

    Attributes
    ----------
    table : dict of ndarray
        One array per ``registration.csv`` column (:data:`COLUMNS`), one value per frame.
    G_measured : float or None
        Depth magnification from the measured band width (transmission), else None.
    G_computed : float
        ``sin 2theta_B / (cos psi0 cos delta)`` (SPEC section 5).
    band_width_px : float or None
        Median measured band width (exit - entrance half-maximum crossings), columns.
    band_width_px_computed : float
        ``t G_computed / p_col``.
    warnings : list of str
    flagged : list of int
        Frames not trusted (origins interpolated, excluded from the volume).
    """

    table: dict[str, np.ndarray]
    G_measured: float | None
    G_computed: float
    band_width_px: float | None
    band_width_px_computed: float
    warnings: list[str] = field(default_factory=list)
    flagged: list[int] = field(default_factory=list)


# ---------------------------------------------------------------------------------------------
# 1-D kernels


@dataclass(frozen=True)
class BandEdges:
    """Half-maximum crossings of the section band in a column profile (columns, sub-pixel)."""

    entrance_col: float
    exit_col: float
    background: float
    top: float

    @property
    def found(self) -> bool:
        return math.isfinite(self.entrance_col)

    @property
    def contrast(self) -> float:
        return self.top - self.background if self.found else 0.0


_NO_EDGES = BandEdges(math.nan, math.nan, math.nan, math.nan)


def _crossing(p: np.ndarray, level: float, near: int, rising: bool, reach: int) -> float:
    """Sub-pixel crossing of ``level`` nearest to index ``near`` (linear interpolation)."""
    lo, hi = max(1, near - reach), min(p.size - 1, near + reach + 1)
    i = np.arange(lo, hi)
    if rising:
        hit = i[(p[i - 1] < level) & (p[i] >= level)]
    else:
        hit = i[(p[i - 1] >= level) & (p[i] < level)]
    if hit.size == 0:
        return math.nan
    j = int(hit[np.argmin(np.abs(hit - near))])
    a, b = p[j - 1], p[j]
    return float(j - 1 + (level - a) / (b - a))


def surface_edge_model(
    c: np.ndarray,
    c0: float,
    amplitude: float,
    line_amplitude: float,
    line_px: float,
    sigma_px: float,
    background: float,
    *,
    slit_px: float,
    decay_px: float | None = None,
    pixel_px: float = 1.0,
) -> np.ndarray:
    """Column profile of the band near its entrance surface (crystal at ``c > c0``).

    The depth profile in columns ``u = c - c0`` is a surface step integrated over one pixel
    (``pixel_px``), carrying a constant level (transmission) or ``exp(-u / decay_px)``
    (reflection), plus a bright surface line ``line_amplitude exp(-u^2 / 2 line_px^2)`` inside
    the crystal. It is convolved with the slit's box of ``slit_px`` columns (the ribbon's
    lateral extent, ``w |L| / (p_col cos psi0)``) and a Gaussian of ``sigma_px`` (detector blur
    and soft slit edges), numerically on a 0.05-column grid.
    """
    h = 0.05
    c = np.asarray(c, float)
    u = c - c0
    b = max(float(slit_px), h)
    reach = b / 2 + 5 * max(sigma_px, h) + 2 * h
    # cell centres with u = 0 on a cell boundary: the surface step is exact
    grid = (np.arange(math.floor((u.min() - reach) / h), math.ceil((u.max() + reach) / h) + 1) + 0.5) * h
    if pixel_px > 0:
        ramp = np.clip(grid / pixel_px + 0.5, 0.0, 1.0)
    else:
        ramp = (grid >= 0).astype(float)
    inside = np.maximum(grid, 0.0)
    level = amplitude * (np.exp(-inside / decay_px) if decay_px else 1.0)
    f = ramp * (level + line_amplitude * np.exp(-(inside**2) / (2 * max(line_px, h) ** 2)))
    # box of width b by a difference of the running integral, then the Gaussian
    F = np.concatenate([[0.0], np.cumsum(f) * h])
    gpos = np.concatenate([[grid[0] - h / 2], grid + h / 2])
    boxed = (np.interp(grid + b / 2, gpos, F) - np.interp(grid - b / 2, gpos, F)) / b
    if sigma_px > h / 4:
        boxed = ndi.gaussian_filter1d(boxed, sigma_px / h, mode="nearest")
    return background + np.interp(u, grid, boxed)


def fit_surface_edge(
    profile: np.ndarray, c_guess: float, *, slit_px: float, reflection: bool, half_band_px: float
) -> tuple[float, dict]:
    """Entrance column of a band by a least-squares fit of :func:`surface_edge_model` to the
    profile around ``c_guess`` (a half-maximum crossing).

    The half-maximum crossing is biased by whatever lies just inside the surface: a bright
    surface line moved it outward by ~1 px in a test with the synthetic series, an intensity
    decaying with depth (reflection) by ~sigma^2 / decay. The fit models both.

    Returns
    -------
    c0 : float
        The fitted entrance column (``c_guess`` when the fit fails).
    params : dict
        Fitted amplitude, line amplitude and width, blur, background (and decay), and
        ``rms`` of the residuals.
    """
    p = np.asarray(profile, float)
    p = np.where(np.isfinite(p), p, np.nanmedian(p))
    lam0 = None
    if reflection:
        # The half-maximum crossing of a decaying band lies up to half the slit box before the
        # surface (7 px with a 31-column box): start from the peak instead, which a box
        # convolved with a decay reaches at c0 + slit / 2, and take the decay from the tail's
        # log-slope.
        sm = ndi.gaussian_filter1d(p, 1.0, mode="nearest")
        a0 = int(max(0, math.floor(c_guess - 2)))
        a1 = int(min(p.size, math.ceil(c_guess + slit_px + 12)))
        peak = a0 + int(np.argmax(sm[a0:a1]))
        bg0 = float(np.percentile(sm, 5))
        height = sm[peak] - bg0
        tail = np.arange(peak, p.size)
        sel = tail[(sm[tail] - bg0 > 0.2 * height) & (sm[tail] - bg0 < 0.8 * height)]
        sel = sel[sel < peak + 4 * max(8, half_band_px)]
        if sel.size >= 3:
            slope = np.polyfit(sel, np.log(sm[sel] - bg0), 1)[0]
            lam0 = float(np.clip(-1.0 / slope if slope < 0 else half_band_px, 0.5, 10 * p.size))
        else:
            lam0 = max(1.0, half_band_px / 2)
        c_guess = peak - slit_px / 2
        lo = int(max(0, math.floor(c_guess - slit_px / 2 - 8)))
        hi = int(min(p.size, math.ceil(c_guess + slit_px / 2 + 5 * lam0 + 8)))
    else:
        lo = int(max(0, math.floor(c_guess - slit_px / 2 - 8)))
        # just past the ramp and a surface line: deeper contrast (fringes, defects) is not
        # part of the model
        hi = int(min(p.size, math.ceil(c_guess + slit_px / 2 + min(half_band_px, 8))))
    c = np.arange(lo, hi, dtype=float)
    y = p[lo:hi]
    if y.size < 8:
        return c_guess, {}
    bg = float(np.median(y[: max(3, min(6, y.size // 4))]))
    top = float(np.percentile(y, 90))
    reach = slit_px / 2 + 6
    x0 = [c_guess, max(top - bg, 1e-6), 0.3 * max(top - bg, 1e-6), 1.0, 1.0, bg]
    lower = [c_guess - reach, 0.0, 0.0, 0.05, 0.05, -np.inf]
    upper = [c_guess + reach, np.inf, np.inf, 8.0, 6.0, np.inf]
    decay = None
    if reflection:
        # a surface line wider than half the decay length would be indistinguishable from the
        # decay itself (a test fit traded one for the other and moved c0 by 0.7 px): in
        # reflection the line width is fitted as a fraction (<= 0.5) of the decay length
        x0[3], lower[3], upper[3] = 0.1, 0.005, 0.5
        x0.append(lam0)
        lower.append(0.2)
        upper.append(10.0 * p.size)

    def model(q):
        if reflection:
            return surface_edge_model(c, q[0], q[1], q[2], q[3] * q[6], q[4], q[5],
                                      slit_px=slit_px, decay_px=q[6])
        return surface_edge_model(c, *q[:6], slit_px=slit_px)

    # a few starts for the line's width (the fit has shallow local minima where the line and
    # the ramp or decay trade places); the best residual wins
    starts = (0.05, 0.2, 0.4) if reflection else (0.5, 1.5, 4.0)
    fit = None
    for w0 in starts:
        x_try = list(x0)
        x_try[3] = w0
        try:
            f = least_squares(lambda q: model(q) - y, x_try, bounds=(lower, upper), x_scale="jac")
        except ValueError:
            continue
        if f.success and (fit is None or f.cost < fit.cost):
            fit = f
    if fit is None:
        return c_guess, {}
    q = np.array(fit.x)
    if reflection:
        decay = float(q[6])
        q[3] *= decay
    names = ("c0", "amplitude", "line_amplitude", "line_px", "sigma_px", "background")
    params = {k: float(v) for k, v in zip(names, q[:6], strict=True)}
    params.update(decay_px=decay, rms=float(np.sqrt(np.mean(fit.fun**2))))
    return float(q[0]), params


def band_edges(profile: np.ndarray, *, transmission: bool, expected_width_px: float) -> BandEdges:
    """Entrance (rising) and exit (falling) half-maximum crossings of the section band.

    Parameters
    ----------
    profile : ndarray (cols,)
        Column profile of one frame (mean over rows).
    transmission : bool
        Transmission: the half level is taken between the background and the band's median
        (Pendellösung fringes make the maximum unrepresentative). Reflection: between the
        background and the peak (intensity decays with depth from the entrance surface).
        These crossings are coarse (biased by surface lines and decays); registration refines
        the entrance on the series template with :func:`fit_surface_edge`.
    expected_width_px : float
        ``t G / p_col`` (transmission), used to merge a band split by a dark fringe.

    Returns
    -------
    BandEdges
        ``entrance_col`` is NaN when no band is found.
    """
    p = np.asarray(profile, float)
    if p.size < 5 or not np.isfinite(p).any():
        return _NO_EDGES
    p = np.where(np.isfinite(p), p, np.nanmedian(p))
    s = ndi.gaussian_filter1d(p, 1.0, mode="nearest")
    bg0, top0 = float(np.percentile(s, 5)), float(s.max())
    if not top0 > bg0:
        return _NO_EDGES
    above = s > bg0 + 0.5 * (top0 - bg0)
    lab, nlab = ndi.label(above)
    # Merge runs split by a dark fringe (gap below a tenth of the expected width).
    gap = max(3, int(0.1 * expected_width_px)) if transmission else 3
    closed = ndi.binary_closing(above, structure=np.ones(2 * gap + 1, bool)) | above
    lab, nlab = ndi.label(closed)
    if nlab == 0:
        return _NO_EDGES
    weight = ndi.sum_labels(np.clip(s - bg0, 0, None), lab, index=np.arange(1, nlab + 1))
    run = np.nonzero(lab == int(np.argmax(weight)) + 1)[0]
    a, b = int(run[0]), int(run[-1])
    margin = max(5, int(0.2 * (b - a + 1)))
    outside = np.ones(p.size, bool)
    outside[max(0, a - margin) : b + margin + 1] = False
    bg = float(np.median(s[outside])) if outside.sum() >= 10 else bg0
    top = float(np.median(p[a : b + 1])) if transmission else float(s[a : b + 1].max())
    if not top > bg:
        return _NO_EDGES
    level = bg + 0.5 * (top - bg)
    reach = max(4, gap)
    ent = _crossing(p, level, a, rising=True, reach=reach)
    ext = _crossing(p, level, b + 1, rising=False, reach=reach)
    return BandEdges(ent, ext, bg, top)


def _prepare_1d(signal: np.ndarray, *, gradient: bool) -> np.ndarray:
    """Zero-mean, tapered (Tukey, 10 %), zero-padded signal for FFT correlation."""
    s = np.asarray(signal, float)
    s = np.where(np.isfinite(s), s, 0.0)
    if gradient:
        s = np.gradient(ndi.gaussian_filter1d(s, 1.0, mode="nearest"))
    else:
        s = s - np.median(s)
    n = s.size
    taper = np.ones(n)
    m = max(1, n // 10)
    ramp = 0.5 * (1 - np.cos(np.pi * np.arange(m) / m))
    taper[:m], taper[n - m :] = ramp, ramp[::-1]
    out = np.zeros(2 * n)
    out[:n] = s * taper
    return out


def feature_strength(signal: np.ndarray) -> float:
    """Largest gradient of a (lightly smoothed) profile in robust noise sigmas of the gradient:
    ~4-5 for pure noise of a few hundred samples, far more with a defect or slit end."""
    s = np.asarray(signal, float)
    s = np.where(np.isfinite(s), s, np.nanmedian(s) if np.isfinite(s).any() else 0.0)
    g = np.gradient(ndi.gaussian_filter1d(s, 1.0, mode="nearest"))
    dev = np.abs(g - np.median(g))
    sigma = 1.4826 * float(np.median(dev))
    peak = float(dev.max()) if dev.size else 0.0
    if sigma <= 0:
        return math.inf if peak > 0 else 0.0
    return peak / sigma


def _pad(signal: np.ndarray) -> np.ndarray:
    """Signal (background ~0 at both ends) zero-padded to twice its length: no wrap-around."""
    s = np.nan_to_num(np.asarray(signal, float))
    return np.concatenate([s, np.zeros_like(s)])


def shift_1d(reference: np.ndarray, moving: np.ndarray, upsample_factor: int) -> tuple[float, float]:
    """Displacement ``d`` of ``moving`` relative to ``reference`` (``moving(x) ~ reference(x - d)``)
    and a match score in [0, 1] (1 - the normalised RMS error of scikit-image)."""
    with _warnings.catch_warnings():
        _warnings.simplefilter("ignore", UserWarning)  # blank profiles: the error is undefined
        shift, error, _ = phase_cross_correlation(
            reference, moving, upsample_factor=upsample_factor, normalization=None
        )
    error = float(error) if np.isfinite(error) else 1.0
    return -float(shift[0]), float(max(0.0, 1.0 - error))


# ---------------------------------------------------------------------------------------------
# per-frame features (one task per batch of frames)


def row_feature_image(image: np.ndarray, col_lo: int, width: int) -> np.ndarray:
    """What row registration correlates: the derivative along the rows (the slit direction) of
    the band region, low-passed and tapered.

    The band's surfaces run along the rows, so they vanish from this image; what is left is
    structure *along the slit* (defects, slit ends, the wafer edge), which does not move between
    slices in rows, while defects do move in columns from one slice to the next (``dX L / p``):
    correlating in 2-D lets them move there without biasing the row shift.
    """
    rows, cols = image.shape
    lo = int(np.clip(col_lo, 0, max(0, cols - width)))
    x = np.asarray(image[:, lo : lo + width], float)
    x = np.where(np.isfinite(x), x, 0.0)
    g = np.gradient(ndi.gaussian_filter(x, (1.0, 1.5), mode="nearest"), axis=0)
    g -= g.mean()
    g *= np.hanning(rows + 2)[1:-1, None] * np.hanning(g.shape[1] + 2)[None, 1:-1]
    # zero-padded: without it the circular correlation mixed wrapped features in and moved the
    # first frame of a test series by 1.3 px
    out = np.zeros((2 * rows, 2 * g.shape[1]))
    out[:rows, : g.shape[1]] = g
    return out


def shift_rows_2d(reference: np.ndarray, moving: np.ndarray, upsample_factor: int) -> tuple[float, float]:
    """Row displacement of ``moving`` relative to ``reference`` (2-D feature images of
    :func:`row_feature_image`) and the significance of the correlation peak (peak-to-sidelobe
    ratio: the peak over the mean and s.d. of the cross-correlation away from it; ~5 for noise)."""
    cc = np.fft.irfft2(np.fft.rfft2(reference) * np.conj(np.fft.rfft2(moving)), s=reference.shape)
    i, j = np.unravel_index(int(np.argmax(cc)), cc.shape)
    mask = np.ones(cc.shape, bool)
    mask[np.ix_(np.arange(i - 3, i + 4) % cc.shape[0], np.arange(j - 3, j + 4) % cc.shape[1])] = False
    side = cc[mask]
    sd = float(side.std())
    psr = float((cc[i, j] - side.mean()) / sd) if sd > 0 else 0.0
    with _warnings.catch_warnings():
        _warnings.simplefilter("ignore", UserWarning)  # blank frames: the error is undefined
        shift, _, _ = phase_cross_correlation(
            reference, moving, upsample_factor=upsample_factor, normalization=None
        )
    return -float(shift[0]), psr


def _frame_features(
    block: np.ndarray,
    transmission: bool,
    expected_width_px: float,
    margin_px: int,
    width_px: int,
    n_own: int,
    neighbours: int,
    upsample_factor: int,
):
    """Features of a batch of frames: column profile, coarse edges, row profile, and the row
    shifts between each of the first ``n_own`` frames and its next ``neighbours`` frames (the
    block carries ``neighbours`` frames of the next batch for that)."""
    out = []
    images = []
    for img in np.asarray(block, np.float32):
        with np.errstate(invalid="ignore"), _warnings.catch_warnings():
            _warnings.simplefilter("ignore", RuntimeWarning)
            prof = np.nanmean(np.where(np.isfinite(img), img, np.nan), axis=0)
        edges = band_edges(prof, transmission=transmission, expected_width_px=expected_width_px)
        if edges.found:
            hi = edges.exit_col if math.isfinite(edges.exit_col) else edges.entrance_col + expected_width_px
            c_lo = max(0, int(math.floor(edges.entrance_col)) - margin_px)
            c_hi = min(img.shape[1], int(math.ceil(hi)) + margin_px + 1)
            start = int(math.floor(edges.entrance_col)) - margin_px
        else:
            c_lo, c_hi, start = 0, img.shape[1], 0
        with np.errstate(invalid="ignore"), _warnings.catch_warnings():
            _warnings.simplefilter("ignore", RuntimeWarning)
            rows = np.nanmean(img[:, c_lo:c_hi], axis=1)
        images.append(row_feature_image(img, start, width_px))
        out.append([prof.astype(np.float32), edges, rows.astype(np.float32), []])
    for i in range(min(n_own, len(images))):
        for j in range(i + 1, min(len(images), i + 1 + neighbours)):
            d, psr = shift_rows_2d(images[i], images[j], upsample_factor)
            out[i][3].append((j - i, d, psr))
    return out[:n_own]


# ---------------------------------------------------------------------------------------------
# global solve


def robust_solve(
    n: int,
    pairs: list[tuple[int, int, float, float]],
    absolute: list[tuple[int, float, float]],
    *,
    huber_px: float = HUBER_PX,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Least squares for ``n`` unknowns from pairwise differences and absolute values.

    Parameters
    ----------
    pairs : list of (k, j, d, w)
        Equations ``x_j - x_k = d`` with weight ``w``.
    absolute : list of (k, v, w)
        Equations ``x_k = v`` with weight ``w`` (at least one; they fix the gauge).

    Returns
    -------
    x : ndarray (n,)
    residual_per_frame : ndarray (n,)
        Median absolute residual (pixels) of each unknown's equations (NaN when it has none).
    n_equations : ndarray (n,) int
    """
    if not absolute:
        raise ValueError("robust_solve needs at least one absolute equation (gauge)")
    m = len(pairs) + len(absolute)
    rows, cols, vals = [], [], []
    rhs = np.empty(m)
    w = np.empty(m)
    for e, (k, j, d, wt) in enumerate(pairs):
        rows += [e, e]
        cols += [j, k]
        vals += [1.0, -1.0]
        rhs[e], w[e] = d, wt
    for e, (k, v, wt) in enumerate(absolute, start=len(pairs)):
        rows.append(e)
        cols.append(k)
        vals.append(1.0)
        rhs[e], w[e] = v, wt
    sw = np.sqrt(w)
    A = sparse.csr_matrix((vals, (rows, cols)), shape=(m, n))
    Aw = sparse.diags(sw) @ A
    bw = sw * rhs
    # Plain weighted least squares, then Huber (convex: no false minima), then Cauchy from
    # there (redescending: a gross outlier keeps almost no pull; with Huber alone a 10 px
    # outlier still moved its neighbours by 0.09 px in a test).
    x0 = sparse_linalg.lsqr(Aw, bw, atol=1e-12, btol=1e-12)[0]
    for loss in ("huber", "cauchy"):
        res = least_squares(
            lambda x: Aw @ x - bw, x0, jac=lambda x: Aw, loss=loss, f_scale=huber_px,
            method="trf", tr_solver="lsmr",
        )
        x0 = res.x
    x = res.x
    r = np.abs(A @ x - rhs)
    per: list[list[float]] = [[] for _ in range(n)]
    for e, (k, j, _, _) in enumerate(pairs):
        per[k].append(r[e])
        per[j].append(r[e])
    for e, (k, _, _) in enumerate(absolute, start=len(pairs)):
        per[k].append(r[e])
    med = np.array([np.median(v) if v else np.nan for v in per])
    cnt = np.array([len(v) for v in per])
    return x, med, cnt


def _interp_flagged(values: np.ndarray, good: np.ndarray) -> np.ndarray:
    idx = np.arange(values.size)
    if good.sum() == 0:
        return values
    return np.where(good, values, np.interp(idx, idx[good], values[good]))


def _align(profile: np.ndarray, shift: float) -> np.ndarray:
    """Profile shifted by ``-shift`` (so a feature at ``x + shift`` comes to ``x``)."""
    x = np.arange(profile.size, dtype=float)
    return np.interp(x + shift, x, profile, left=np.nan, right=np.nan)


def _ncc(a: np.ndarray, b: np.ndarray) -> float:
    ok = np.isfinite(a) & np.isfinite(b)
    if ok.sum() < 5:
        return 0.0
    a, b = a[ok] - a[ok].mean(), b[ok] - b[ok].mean()
    den = math.sqrt(float((a * a).sum() * (b * b).sum()))
    return float((a * b).sum() / den) if den > 0 else 0.0


# ---------------------------------------------------------------------------------------------
# public


def register_frames(
    corrected: da.Array, geom: Geometry, positions_um: np.ndarray, cfg: RegisterConfig
) -> RegistrationResult:
    """Register a corrected series: per-frame origins, quality, flags and the G calibration.

    Parameters
    ----------
    corrected : dask.array.Array
        (n, rows, cols) corrected frames (:func:`pipeline.correct.correct_series`).
    geom : Geometry
    positions_um : ndarray (n,)
        Stage positions X_k, um.
    cfg : RegisterConfig
        ``upsample_factor``, ``neighbours``, ``min_quality``, ``g_tolerance``.

    Returns
    -------
    RegistrationResult

    Raises
    ------
    InputError
        When positions and frames disagree in number, or no frame shows a section band.
    """
    n, n_rows, n_cols = (int(s) for s in corrected.shape)
    pos = np.asarray(positions_um, float)
    if pos.shape != (n,):
        raise InputError(f"scan positions: {pos.size} values for {n} frames; give one per frame")
    if n < 2:
        raise InputError(f"frames: registration needs at least 2 frames (got {n})")
    transmission = geom.geometry == "transmission"
    width_calc = float(geom.band_width_px) if transmission else float("nan")
    expected = width_calc if transmission else 0.0
    # the ribbon spans w / cos(psi0) in x at constant depth; on the detector |L| / p_col per um
    slit_px = abs(geom.slit_width_um / math.cos(math.radians(geom.psi0_deg)) * geom.L / geom.p_col_um)
    margin = int(math.ceil(slit_px)) + 3
    warnings: list[str] = []

    # 1. per-frame profiles, edges and row shifts to the next frames, in batches of frames
    #    (each batch also reads the first `neighbours` frames of the next one)
    width = int(math.ceil(expected)) + 2 * margin + 8 if transmission else 4 * margin + 48
    width = min(width, n_cols)
    tasks = []
    for k0 in range(0, n, FRAMES_PER_TASK):
        k1 = min(n, k0 + FRAMES_PER_TASK)
        blk = corrected[k0 : min(n, k1 + cfg.neighbours)]
        tasks.append(dask.delayed(_frame_features)(
            blk, transmission, expected, margin, width, k1 - k0, cfg.neighbours, cfg.upsample_factor
        ))
    feats = [f for batch in run_tasks(tasks, "register") for f in batch]
    profiles = np.stack([f[0] for f in feats])
    edges = [f[1] for f in feats]
    row_prof = np.stack([f[2] for f in feats])
    row_shift_next = [f[3] for f in feats]

    # 2. quality: shape agreement with the median aligned profile, times relative contrast
    found = np.array([e.found for e in edges])
    if not found.any():
        raise InputError(
            "frames: no section band found in any frame (check frames.dark / frames.flat, "
            "detector.orientation: columns must run with depth)"
        )
    ent = np.array([e.entrance_col for e in edges])
    ext = np.array([e.exit_col for e in edges])
    contrast = np.array([e.contrast for e in edges])
    ref_ent = float(np.median(ent[found]))
    aligned = np.stack([_align(profiles[k], ent[k] - ref_ent) if found[k] else profiles[k] * np.nan
                        for k in range(n)])
    with _warnings.catch_warnings():
        _warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN columns at the ends
        template = np.nanmedian(aligned[found], axis=0)
    hi_c = float(np.nanmedian(ext[found])) if np.isfinite(ext[found]).any() else ref_ent + expected
    win = slice(max(0, int(ref_ent) - 3 * margin), min(n_cols, int(math.ceil(hi_c)) + 3 * margin + 1))
    med_contrast = float(np.median(contrast[found]))
    background = np.array([e.background for e in edges])
    med_bg = float(np.median(background[found]))
    quality = np.zeros(n)
    for k in np.nonzero(found)[0]:
        rel = contrast[k] / med_contrast if med_contrast > 0 else 0.0
        off = abs(background[k] - med_bg) / med_contrast if med_contrast > 0 else math.inf
        # shape agreement, lowered when the band is much weaker or stronger than the typical one
        # or sits on a different background (a frame of uniform garbage: background 17 band
        # levels, and its noise matched the template with a correlation of 0.24 in a test)
        quality[k] = (
            max(0.0, _ncc(aligned[k, win], template[win]))
            * min(1.0, 2.0 * rel, 2.0 / max(rel, 1e-9))
            * min(1.0, 0.5 / max(off, 1e-9))
        )
    good = quality >= cfg.min_quality
    if good.sum() < 2:
        raise InputError(
            f"frames: only {int(good.sum())} of {n} frames have a usable section band "
            f"(quality >= registration.min_quality = {cfg.min_quality})"
        )

    # 3. columns: pairwise profile shifts (precise, relative) + the coarse edges as weak
    #    absolute anchors (so errors cannot accumulate along the scan), one robust solve
    gidx = np.nonzero(good)[0]
    win_prof = [_pad(profiles[k, win] - edges[k].background) for k in range(n)]
    col_pairs = []
    for a_i, k in enumerate(gidx):
        for j in gidx[a_i + 1 : a_i + 1 + cfg.neighbours]:
            d, _ = shift_1d(win_prof[k], win_prof[j], cfg.upsample_factor)
            col_pairs.append((int(k), int(j), d, 1.0))
    col_abs = [(int(k), float(ent[k]), ANCHOR_WEIGHT) for k in gidx if np.isfinite(ent[k])]
    s_col, c_res, _ = robust_solve(n, col_pairs, col_abs)

    # 4. the absolute entrance (and exit) from one model fit on the aligned median profile
    s_ref = float(np.median(s_col[gidx]))
    with _warnings.catch_warnings():
        _warnings.simplefilter("ignore", RuntimeWarning)
        col_template = np.nanmedian(np.stack([_align(profiles[k], s_col[k] - s_ref) for k in gidx]), axis=0)
    col_template = np.where(np.isfinite(col_template), col_template, np.nanmedian(col_template))
    t_edges = band_edges(col_template, transmission=transmission, expected_width_px=expected)
    half_band = 0.5 * (t_edges.exit_col - t_edges.entrance_col) if math.isfinite(t_edges.exit_col) else 20.0
    ent_t, _ = fit_surface_edge(col_template, t_edges.entrance_col, slit_px=slit_px,
                                reflection=not transmission, half_band_px=half_band)
    ext_t = math.nan
    if transmission and math.isfinite(t_edges.exit_col):
        e_f, _ = fit_surface_edge(col_template[::-1], n_cols - 1 - t_edges.exit_col, slit_px=slit_px,
                                  reflection=False, half_band_px=half_band)
        ext_t = n_cols - 1 - e_f
    c0 = ent_t + (s_col - s_ref)

    # 5. rows: pairwise shifts of the 2-D row-feature images where the correlation peak is
    #    significant, a template of the aligned row profiles when it has features, and a weak
    #    smoothness prior that carries featureless frames along with their neighbours
    row_pairs = []
    for k in gidx:
        for step, d, psr in row_shift_next[k]:
            j = int(k) + step
            if j < n and good[j] and psr >= MIN_PEAK_SIGNIFICANCE:
                row_pairs.append((int(k), j, d, 1.0))
    measured = np.zeros(n, bool)
    for k, j, _, _ in row_pairs:
        measured[k] = measured[j] = True
    smooth = [(int(k), int(j), 0.0, SMOOTH_WEIGHT) for k, j in zip(gidx[:-1], gidx[1:], strict=True)]
    first = int(gidx[0])
    r_pre, _, _ = robust_solve(n, row_pairs + smooth, [(first, 0.0, 1.0)])
    row_abs = [(first, 0.0, 1.0)]
    with _warnings.catch_warnings():
        _warnings.simplefilter("ignore", RuntimeWarning)
        row_template = np.nanmedian(np.stack([_align(row_prof[k], r_pre[k]) for k in gidx]), axis=0)
    row_template = np.where(np.isfinite(row_template), row_template, np.nanmedian(row_template))
    if feature_strength(row_template) >= MIN_FEATURE_SIGMA:
        t_feat = _prepare_1d(row_template, gradient=True)
        for k in gidx:
            if feature_strength(row_prof[k]) < MIN_FEATURE_SIGMA:
                continue
            d, q = shift_1d(t_feat, _prepare_1d(row_prof[k], gradient=True), cfg.upsample_factor)
            if q >= MIN_MATCH:
                row_abs.append((int(k), d, q * q))
                measured[k] = True
    r, r_res, _ = robust_solve(n, row_pairs + smooth, row_abs)
    unmeasured = int((good & ~measured).sum())
    if unmeasured:
        warnings.append(
            f"row drift not measurable in {unmeasured} of {int(good.sum())} frames (no features "
            "along the slit); those frames follow their neighbours"
        )

    # 6. flag frames whose equations disagree with the solution, re-solve without them
    inconsistent = good & (
        (np.nan_to_num(c_res) > INCONSISTENT_PX) | (measured & (np.nan_to_num(r_res) > INCONSISTENT_PX))
    )
    if inconsistent.any() and (good & ~inconsistent).sum() >= 2:
        keep = good & ~inconsistent
        kk = set(np.nonzero(keep)[0].tolist())
        s_col, _, _ = robust_solve(
            n, [q for q in col_pairs if q[0] in kk and q[1] in kk], [q for q in col_abs if q[0] in kk]
        )
        c0 = ent_t + (s_col - s_ref)
        kept = np.nonzero(keep)[0]
        smooth = [(int(k), int(j), 0.0, SMOOTH_WEIGHT) for k, j in zip(kept[:-1], kept[1:], strict=True)]
        first = int(kept[0])
        r, _, _ = robust_solve(
            n, [q for q in row_pairs if q[0] in kk and q[1] in kk] + smooth,
            [q for q in row_abs if q[0] in kk] + [(first, 0.0, 1.0)],
        )
        good = keep
    flagged = ~good
    c0 = _interp_flagged(c0, good)
    r = _interp_flagged(r, good)
    first = int(np.nonzero(good)[0][0])
    r0 = r - r[first]
    n_flag = int(flagged.sum())
    if n_flag:
        shown = ", ".join(str(int(i)) for i in np.nonzero(flagged)[0][:12])
        warnings.append(
            f"{n_flag} of {n} frames flagged (no usable band or inconsistent shifts): {shown}"
            f"{' ...' if n_flag > 12 else ''}; their origins are interpolated"
        )

    # 7. G calibration from the band width (transmission): the fitted exit - entrance
    g_meas = width_meas = None
    if transmission and math.isfinite(ext_t):
        width_meas = float(ext_t - ent_t)
        g_meas = width_meas * geom.p_col_um / geom.thickness_um
        dev = g_meas / geom.G_computed - 1.0
        if abs(dev) > cfg.g_tolerance:
            warnings.append(
                f"depth magnification: measured G = {g_meas:.4f} (band width {width_meas:.2f} px) "
                f"differs from the computed G = {geom.G_computed:.4f} by {100 * dev:+.1f} % "
                f"(> {100 * cfg.g_tolerance:.0f} %); check thickness, energy, reflection, tilt "
                "or set detector.depth_magnification"
            )
    for w in warnings:
        log.warning("register: %s", w)
    table = {
        "frame": np.arange(n),
        "position_um": pos,
        "r0_px": r0,
        "c0_px": c0,
        "row_shift_px": r0 - r0[first],
        "col_shift_px": c0 - c0[first],
        "quality": quality,
        "flagged": flagged.astype(int),
        "interpolated": flagged.astype(int),
    }
    return RegistrationResult(
        table=table,
        G_measured=g_meas,
        G_computed=float(geom.G_computed),
        band_width_px=width_meas,
        band_width_px_computed=float(geom.thickness_um * geom.G_computed / geom.p_col_um),
        warnings=warnings,
        flagged=[int(i) for i in np.nonzero(flagged)[0]],
    )


def write_registration_csv(path: str | Path, result: RegistrationResult | dict) -> Path:
    """Write ``registration.csv`` (atomically) from a result or a table."""
    table = result.table if isinstance(result, RegistrationResult) else result
    n = len(table["frame"])
    rows = []
    for i in range(n):
        row = []
        for c in COLUMNS:
            v = table[c][i]
            row.append(str(int(v)) if c in _INT_COLUMNS else f"{float(v):.6f}")
        rows.append(row)
    return rf.write_csv_atomic(path, list(COLUMNS), rows)


def read_registration_csv(path: str | Path) -> dict[str, np.ndarray]:
    """Read ``registration.csv`` into a table (dict of arrays, one per column).

    Raises
    ------
    InputError
        Missing file or columns, or a value that is not a number (naming the line).
    """
    import csv

    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: registration table not found (run the register stage first)")
    with path.open(newline="") as fh:
        reader = csv.reader(fh)
        header = next(reader, None)
        if header is None:
            raise InputError(f"{path}: empty registration table")
        missing = [c for c in COLUMNS if c not in header]
        if missing:
            raise InputError(f"{path}: missing columns {missing} (expected {list(COLUMNS)})")
        idx = [header.index(c) for c in COLUMNS]
        data: list[list[float]] = [[] for _ in COLUMNS]
        for line_no, row in enumerate(reader, start=2):
            if not row:
                continue
            try:
                for d, i in zip(data, idx, strict=True):
                    d.append(float(row[i]))
            except (ValueError, IndexError):
                raise InputError(f"{path}: line {line_no}: not a row of numbers ({','.join(row)[:80]})") from None
    table = {}
    for c, d in zip(COLUMNS, data, strict=True):
        arr = np.asarray(d, float)
        table[c] = arr.astype(int) if c in _INT_COLUMNS else arr
    if table["frame"].size and not np.array_equal(table["frame"], np.arange(table["frame"].size)):
        raise InputError(f"{path}: column frame must run 0, 1, 2, ... in order")
    return table

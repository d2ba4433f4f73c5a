"""Register: find every frame's origin ``(r0_k, c0_k)`` of SPEC section 5 and calibrate G.

Consecutive section topographs show *different* slices of the wafer, so whole-image correlation
is biased by the defects' own displacement (PHYSICS.md 1.7: a point's column moves by
``dX L / p_col`` from one frame to the next, a loop's chord ends move along the rows).
Registration therefore uses features that do not move with the slice, and robust statistics
over many rows, pairs and frames. One pass over the frames (Dask tasks of
:data:`FRAMES_PER_TASK` frames plus the next ``neighbours``) keeps 1-D profiles, the pairwise
measurements and a small binned feature image per frame; everything after that is cheap.

Plain rows. Where the wafer edge crosses the band, rows beyond it are dark and rows on it see
part of the slit; a defect near the entrance surface brightens its rows. Only rows whose level
just inside the entrance lies within :data:`LIT_TOLERANCE` of the frame's typical level enter
the column profiles (:func:`lit_rows`), and a frame's column profile is the *median* over them,
so a defect in a minority of rows leaves it unchanged.

Columns. The entrance region of the band (the rising edge and what lies just inside the
surface) is fixed to the beam. Each frame's entrance region is matched to the series template
(median of the aligned profiles: absolute, errors cannot accumulate) and to its next frames
(relative); both enter one robust solve, and the template is rebuilt once from the solution.
The 1-D shifts are upsampled cross-correlations (the matrix-multiply DFT of Guizar-Sicairos,
Thurman & Fienup 2008, Opt. Lett. 33, 156, as in scikit-image's ``phase_cross_correlation``,
written out for 1-D: :func:`shift_1d`). Frames whose entrance region no longer resembles the
template (quality below :data:`MIN_COLUMN_QUALITY`, e.g. the edge cuts the band just below the
entrance) take their column origin from their neighbours and are marked ``interpolated``, not
flagged. A defect at the entrance surface that crosses most rows (a surface crack whose trace
runs along the slit) survives the median over rows and moves the entrance edge of the frames
that light it (0.61-0.68 px in an evaluation scan): each frame's equations are weighted by how
far its entrance region's shape departs from the template's against the series' median frame
(:func:`shape_weights`), in transmission the exit region (the band's width is the wafer's
thickness, so it moves with the entrance) adds one absolute equation per frame with its own
shape weight, and a weak smoothness prior carries a frame disturbed at both surfaces (or at the
entrance with the exit off the wafer) with its neighbours. The absolute entrance-surface column
is then found once, on the median of the aligned mean profiles, by fitting
:func:`surface_edge_model` (surface step integrated over a pixel, bright surface line, decay
with depth in reflection, convolved with the slit's box and a Gaussian): the plain half-maximum
crossing is biased by whatever lies just inside the surface (by ~1 px with a bright surface line
in a synthetic test). In transmission the same fit on the mirrored exit edge gives the band
width ``t G / p_col``: the calibration of G, with a warning when it differs from the computed G
by more than ``g_tolerance``.

Rows. The band's surfaces run along the rows, so the derivative along the rows of the band
region (:func:`row_feature_image`) keeps only structure along the slit; the region beyond the
wafer edge is masked out (its border slides along the slit from slice to slice), columns are
binned to at most :data:`ROW_IMAGE_BINS`. Pairs with the next ``neighbours`` frames are
cross-correlated with the column displacement fixed to what a wafer feature fixed in y can do
between slices: stay (a feature invariant along x; only the column drift moves it) or move like
a point (``-dX L / p_col``) (:func:`shift_rows_2d`). A pair's row shift is accepted only within
the step the drift can make: :data:`ROW_STEP_SIGMAS` times the robust s.d. of the measured
column drift steps (at least :data:`ROW_STEP_FLOOR_PX`, at most ``max_row_step_px``): stage,
beam and detector move both axes, while an inclined slip line slid 2.1 px a frame along the slit
in an evaluation scan whose drift steps were 0.04 px. A smoothness prior, weighted by the same
drift scale, carries frames without features along with their neighbours. Finally every frame is
matched to the median of all aligned feature images, in which moving defects are smeared out,
as an absolute anchor. A frame without features along the slit has no measurable row drift:
that is a property of the data, stated in a warning; its row then follows its neighbours, so
its error stays within the true drift's own excursion.

Each solve is iteratively reweighted least squares on the sparse normal equations
(:func:`robust_solve`: Huber, then Cauchy weights). Only frames with no usable band (blank,
corrupt, off the wafer: quality below ``min_quality``) are flagged; a frame is never dropped
because its measurements disagree with the solution (a defect changes its slice's image, and a
frame with a defect is what the scan is for): such frames are reported in a warning. Flagged
frames' origins are interpolated from the good neighbours and marked ``interpolated``.

Known limitation: a strong crack whose line covers most rows of the band is taken for the
entrance surface in the frames that show it (column origin off by up to 32 px in a test
series, ``tests/test_register.py::test_crack_frames_origins``), and it biases their row shifts.

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

from pipeline import runfolder as rf
from pipeline.compute import InTask, compute_here, in_task, materialize, run_tasks
from pipeline.config import RegisterConfig
from pipeline.errors import InputError
from pipeline.geometry import Geometry

log = logging.getLogger(__name__)

COLUMNS = (
    "frame", "position_um", "r0_px", "c0_px", "row_shift_px", "col_shift_px",
    "quality", "flagged", "interpolated",
)
_INT_COLUMNS = ("frame", "flagged", "interpolated")
#: Residual scale (pixels) of the robust weights: larger residuals are down-weighted.
HUBER_PX = 0.3
#: Reweighting iterations of :func:`robust_solve` (half Huber, half Cauchy).
IRLS_ITERATIONS = 12
#: A frame whose equations disagree with the solution by more than this (pixels, median) is
#: reported as inconsistent (not flagged: its measurements are down-weighted by the solve).
INCONSISTENT_PX = 1.0
#: Weight of the coarse per-frame edge (absolute) against a pairwise profile shift (1), used
#: only when no frame matches the template.
ANCHOR_WEIGHT = 0.05
#: Smallest weight of the smoothness prior ``r_{k+1} - r_k = 0`` of the row drift (against 1
#: for a pairwise shift; it grows to 1 as the drift steps seen in columns shrink), and the
#: fixed weight of the columns' prior (it matters only for frames whose own column equations
#: are down-weighted, :func:`shape_weights`).
SMOOTH_WEIGHT = 0.01
#: Frames whose quality (shape agreement of the entrance region) is below this, or with fewer
#: plain rows than this fraction (:func:`lit_rows`), take their column origin from their
#: neighbours (a demo frame at the wafer edge with 33 of 256 plain rows and quality 0.44 was
#: 2 px off).
MIN_COLUMN_QUALITY = 0.5
MIN_PLAIN_ROWS = 0.25
#: A frame's column equations from a surface region lose half their weight where its shape
#: disagrees with the template this many times more than the series' median frame
#: (:func:`shape_weights`).
SHAPE_RATIO = 5.0
#: Smallest match score (1 - normalised RMS error) of a column shift that is used.
MIN_MATCH = 0.3
#: A pairwise row shift is used when the normalised correlation at its peak reaches this
#: (noise ~0.1).
MIN_ROW_MATCH = 0.3
#: A row's entrance region counts as plain band when its level is within this fraction of the
#: typical level (:func:`lit_rows`).
LIT_TOLERANCE = 0.15
#: Column bins of the row-feature image (at most).
ROW_IMAGE_BINS = 96
#: Frames sampled to place the column windows.
WINDOW_SAMPLES = 9
#: Candidate row peaks kept per pair and column hypothesis.
MAX_PEAKS = 2
#: Row steps accepted between neighbouring frames: at least this (pixels) ...
ROW_STEP_FLOOR_PX = 0.25
#: ... or this many times the robust s.d. of the column drift steps (times sqrt of the frame
#: separation), at most ``registration.max_row_step_px``.
ROW_STEP_SIGMAS = 4.0
#: Measurement noise of a pairwise row shift (pixels) that, against the drift step, sets the
#: weight of the smoothness prior.
ROW_NOISE_PX = 0.1
#: Smallest normalised correlation of a frame with the row template that is used (the median
#: template carries less noise than a frame: 0.2-0.27 for frames that share a weak fixed line
#: with it in an evaluation scan, ~0.05-0.1 for noise).
MIN_TEMPLATE_MATCH = 0.15
#: Weight of a frame's absolute row match to the series template against a pairwise shift.
TEMPLATE_WEIGHT = 2.0
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


def _refine_peak(v: np.ndarray, n: int, i0: int, upsample_factor: int) -> tuple[float, float]:
    """Peak of the correlation ``ifft(v)`` near the integer lag ``i0``, on a
    ``1 / upsample_factor`` grid by a direct DFT of the cross-power spectrum ``v`` (the
    matrix-multiply DFT of Guizar-Sicairos, Thurman & Fienup 2008, Opt. Lett. 33, 156),
    evaluated around a parabolic estimate from the three integer samples (+-3 grid steps,
    widened to +-1 px when the best point lies on the border)."""
    k = np.fft.fftfreq(n) * n
    up = max(1, int(upsample_factor))

    def at(x: np.ndarray) -> np.ndarray:
        ang = (2 * math.pi / n) * np.outer(x, k)
        return (np.cos(ang) @ v.real - np.sin(ang) @ v.imag) / n

    a, b, c = at(np.array([i0 - 1.0, i0, i0 + 1.0]))
    den = a - 2 * b + c
    guess = i0 + (float(np.clip(0.5 * (a - c) / den, -0.5, 0.5)) if den < 0 else 0.0)
    fine = round(guess * up) / up + np.arange(-3, 4) / up
    cc = at(fine)
    f = int(np.argmax(cc))
    if f in (0, fine.size - 1):
        fine = i0 + np.arange(-up, up + 1) / up
        cc = at(fine)
        f = int(np.argmax(cc))
    return float(fine[f]), float(cc[f])


def shift_1d(
    reference: np.ndarray,
    moving: np.ndarray,
    upsample_factor: int,
    *,
    center: float = 0.0,
    max_lag: float | None = None,
) -> tuple[float, float]:
    """Displacement ``d`` of ``moving`` relative to ``reference`` (``moving(x) ~ reference(x - d)``)
    and a match score in [0, 1] (1 - the normalised RMS error, as scikit-image's
    ``phase_cross_correlation`` with ``normalization=None`` defines it).

    The same upsampled cross-correlation as scikit-image's, written out for 1-D signals: the
    library call took 9 ms per pair of 200-sample profiles here (its general n-D DFT setup),
    this one ~0.2 ms, and registration makes ~4 of them per frame. With ``max_lag`` the peak is
    searched only within ``center +- max_lag`` (samples).
    """
    a = np.nan_to_num(np.asarray(reference, float))
    b = np.nan_to_num(np.asarray(moving, float))
    n = a.size
    v = np.conj(np.fft.fft(a)) * np.fft.fft(b)
    cc = np.fft.ifft(v).real
    if max_lag is None:
        i0 = int(np.argmax(cc))
        if i0 > n // 2:
            i0 -= n
    else:
        lags = np.arange(math.floor(center - max_lag), math.ceil(center + max_lag) + 1)
        i0 = int(lags[np.argmax(cc[lags % n])])
    d, peak = _refine_peak(v, n, i0, upsample_factor)
    energy = math.sqrt(float((a * a).sum() * (b * b).sum()))
    if energy <= 0:
        return 0.0, 0.0
    error = math.sqrt(max(0.0, 1.0 - min(1.0, peak / energy) ** 2)) if peak > 0 else 1.0
    return d, float(max(0.0, 1.0 - error))


# ---------------------------------------------------------------------------------------------
# per-frame features (one task per batch of frames)


@dataclass(frozen=True)
class _Windows:
    """Column windows shared by all frames of a series (from a few sample frames)."""

    ent_lo: int  # entrance window: the rising edge and what lies just inside the surface
    ent_hi: int
    band_lo: int  # band window of the row-feature images
    band_hi: int
    lit_lo: int  # just inside the entrance: a row is lit (inside the wafer) when bright here
    lit_hi: int
    bin_cols: int  # columns summed into one bin of the row-feature image
    edge_erode: tuple[int, int]  # (rows, cols) erosion of the inside-the-wafer mask


def lit_rows(level: np.ndarray) -> np.ndarray:
    """Rows whose entrance region shows the plain band: their level just inside the entrance
    surface lies within :data:`LIT_TOLERANCE` of the typical level of the lit rows (the median
    of the rows above half the 90th percentile). Rows beyond the wafer edge are dark, rows on it
    see only part of the slit, rows crossed by a defect near the surface are brighter (an
    inclined surface crack lifted half the demo's rows by 30 %): each would change the band's
    column profile. All rows when fewer than 4 qualify."""
    level = np.nan_to_num(np.asarray(level, float))
    top = float(np.percentile(level, 90)) if level.size else 0.0
    lit = np.zeros(level.size, bool)
    if top > 0:
        ref = float(np.median(level[level > 0.5 * top]))
        lit = np.abs(level / ref - 1.0) <= LIT_TOLERANCE
    if lit.sum() < 4:
        lit = np.ones(level.size, bool)
    return lit


def _tukey(n: int, fraction: float = 0.1) -> np.ndarray:
    """Tukey window: 1 in the middle, a raised cosine over ``fraction`` of ``n`` at each end."""
    w = np.ones(n)
    m = max(1, int(fraction * n))
    ramp = 0.5 * (1 - np.cos(np.pi * (np.arange(m) + 0.5) / m))
    w[:m], w[n - m :] = ramp, ramp[::-1]
    return w


def row_feature_image(
    image: np.ndarray, win: _Windows, inside: np.ndarray | None, smoothed_band: np.ndarray | None = None
) -> np.ndarray:
    """What row registration correlates: the derivative along the rows (the slit direction) of
    the band window, masked to the inside of the wafer, summed over ``win.bin_cols`` columns,
    tapered and zero-padded.

    The band's surfaces run along the rows, so they vanish from this image; what is left is
    structure *along the slit* (defects, slit ends). The mask removes the wafer edge: where it
    crosses the band it is a wafer feature that moves by many pixels from one slice to the next.
    Columns are binned because the row shift needs the row axis only (and 4 bins of the demo's
    0.8 um pixels are still finer than a defect's image). ``smoothed_band``: the band window
    already smoothed by a Gaussian of 1 px (computed here when not given).
    """
    if smoothed_band is None:
        smoothed_band = ndi.gaussian_filter(np.asarray(image[:, win.band_lo : win.band_hi], float), 1.0,
                                            mode="nearest")
    g = np.gradient(np.asarray(smoothed_band, float), axis=0)
    if inside is not None:
        g = g * inside[:, win.band_lo : win.band_hi]
    b = win.bin_cols
    nb = g.shape[1] // b
    g = g[:, : nb * b].reshape(g.shape[0], nb, b).sum(axis=2)
    g -= g.mean()
    rows = g.shape[0]
    # a Tukey taper (cosine over the outer 10 %): a full Hann window, fixed to the detector,
    # pulled the row shifts of a series with features near the top rows by ~0.1 px per frame
    g *= _tukey(rows)[:, None] * _tukey(nb)[None, :]
    # zero-padded: circular correlation must not mix wrapped features in
    out = np.zeros((2 * rows, 2 * nb))
    out[:rows, :nb] = g
    return out


def shift_rows_2d(
    ref_fft: np.ndarray,
    mov_fft: np.ndarray,
    shape: tuple[int, int],
    col_lags_bins: list[float],
    max_row_lag: int,
    upsample_factor: int,
    energy: float,
) -> list[tuple[float, float]]:
    """Candidate row displacements of a feature image relative to another, with the column
    displacement fixed to one of the given hypotheses, and their normalised correlations.

    Between two slices, what is fixed to the wafer in y either keeps its column (a feature
    invariant along x, e.g. a line along the scan axis: only the column drift moves it) or moves
    like a point (``-dX L / p_col``); a generic line or crack front moves in both rows and
    columns, and outside these hypotheses it cannot pass for a row shift. The cross-correlation
    is evaluated exactly at each hypothesis' (sub-pixel) column lag, by a phase ramp on the
    cross-power spectrum: on the integer column grid the row peak of a slanted line slid along
    the line by up to 0.8 px in a test. The best row lag within ``max_row_lag`` is refined by
    the matrix-multiply DFT of Guizar-Sicairos, Thurman & Fienup (2008) on a
    ``1 / upsample_factor`` grid.

    Parameters
    ----------
    ref_fft, mov_fft : ndarray
        ``numpy.fft.rfft2`` of the two feature images (:func:`row_feature_image`).
    shape : (int, int)
        Shape of the feature images.
    col_lags_bins : list of float
        Column displacement hypotheses, in column bins of the feature images.
    energy : float
        ``sqrt(sum(ref**2) sum(mov**2))`` of the feature images.

    Returns
    -------
    list of (d_rows, match)
        The local maxima of the correlation inside ``|d| < max_row_lag`` (up to
        :data:`MAX_PEAKS` per hypothesis), best first: ``moving(r) ~ reference(r - d_rows)`` in
        pixels, and the normalised correlation there (the peak over ``energy``, the geometric
        mean of the two images' sums of squares): ~0.1 for noise, 0.6-0.9 between slices that
        share a strong defect. The caller picks the best one inside the step it accepts.
    """
    nr, nc = shape
    cross = np.conj(ref_fft) * mov_fft
    nk = cross.shape[1]
    kc = np.arange(nk)
    wk = np.full(nk, 2.0)
    wk[0] = 1.0
    if nc % 2 == 0:
        wk[-1] = 1.0
    peaks: list[tuple[float, float]] = []
    lags = np.arange(-max_row_lag, max_row_lag + 1)
    for h in col_lags_bins:
        if not math.isfinite(h):
            continue
        v = cross @ (wk * np.exp(2j * math.pi * kc * h / nc))
        cc = np.fft.ifft(v).real[lags % nr]
        # local maxima inside the search range (a peak on its border belongs to a larger shift)
        inner = np.nonzero((cc[1:-1] >= cc[:-2]) & (cc[1:-1] >= cc[2:]))[0] + 1
        for i in inner[np.argsort(cc[inner])[::-1][:MAX_PEAKS]]:
            d, peak = _refine_peak(v, nr, int(lags[i]), upsample_factor)
            peaks.append((d, peak / nc / energy if energy > 0 else 0.0))
    return sorted(peaks, key=lambda t: -t[1])


def _entrance_signal(profile: np.ndarray, win: _Windows) -> np.ndarray:
    return _prepare_1d(profile[win.ent_lo : win.ent_hi], gradient=True)


def _frame_features(
    block: np.ndarray | InTask,
    positions_um: np.ndarray,
    win: _Windows,
    n_own: int,
    neighbours: int,
    point_px_per_um: float,
    max_row_lag: int,
    upsample_factor: int,
):
    """Features of a batch of frames and of its pairs with the next ``neighbours`` frames (the
    block carries that many frames of the next batch).

    Per frame: the column profile of the rows that show the plain band at the entrance (the
    mean over them, and the median: a defect in a minority of the rows does not change that),
    the number of such rows, the pairs (step, column shift, its match score, candidate row
    shifts with their matches) and the unpadded row-feature image. ``block`` is the frames, or
    their Dask slice wrapped by :func:`pipeline.compute.in_task` (read here, in the task)."""
    out = []
    spectra = []
    energies = []
    ent_sig = []
    shape = None
    for img in np.asarray(materialize(block), np.float32):
        img = np.where(np.isfinite(img), img, 0.0).astype(np.float32)
        level = img[:, win.lit_lo : win.lit_hi].mean(axis=1)
        lit = lit_rows(level)
        prof_lit = np.median(img[lit], axis=0)
        # the mean over the same rows: the surface-edge fit and the band width (the G
        # calibration) read the template made of these (a median profile measured the band
        # 0.6 % narrower on a test series)
        prof_lit_mean = img[lit].mean(axis=0)
        # inside the wafer: at least half of the plain band's level of the same column (the
        # lit rows' median profile), tested only where the band is bright; eroded so that the
        # slit-wide fade at the wafer edge goes too
        band = ndi.gaussian_filter(img[:, win.band_lo : win.band_hi], 1.0, mode="nearest")
        expect = prof_lit[win.band_lo : win.band_hi]
        tested = expect > 0.2 * max(float(expect.max()), 1e-12)
        inside = np.ones(img.shape, bool)
        inside[:, win.band_lo : win.band_hi] = ndi.minimum_filter(
            ((band > 0.5 * expect) | ~tested).astype(np.uint8),
            size=(2 * win.edge_erode[0] + 1, 2 * win.edge_erode[1] + 1), mode="nearest",
        ).astype(bool)
        fimg = row_feature_image(img, win, inside, band)
        shape = fimg.shape
        spectra.append(np.fft.rfft2(fimg))
        energies.append(float(np.sum(fimg**2)))
        ent_sig.append(_entrance_signal(prof_lit, win))
        rows, nb = img.shape[0], fimg.shape[1] // 2
        out.append([prof_lit_mean.astype(np.float32), prof_lit.astype(np.float32), int(lit.sum()), [],
                    fimg[:rows, :nb].astype(np.float32)])
    for i in range(min(n_own, len(spectra))):
        for j in range(i + 1, min(len(spectra), i + 1 + neighbours)):
            dc, qc = shift_1d(ent_sig[i], ent_sig[j], upsample_factor)
            dx = float(positions_um[j] - positions_um[i])
            hyp = [dc / win.bin_cols, (dc - dx * point_px_per_um) / win.bin_cols]
            peaks = shift_rows_2d(spectra[i], spectra[j], shape, hyp, max_row_lag, upsample_factor,
                                  math.sqrt(energies[i] * energies[j]))
            out[i][3].append((j - i, dc, qc, peaks))
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
    """Robust least squares for ``n`` unknowns from pairwise differences and absolute values.

    Iteratively reweighted least squares on the sparse normal equations (a banded n x n system:
    one sparse LU solve per iteration): plain weighted least squares, then Huber weights
    (convex: no false minima), then Cauchy weights from there (redescending: a gross outlier
    keeps almost no pull; with Huber alone a 10 px outlier still moved its neighbours by
    0.09 px in a test). Beaton & Tukey (1974), Technometrics 16, 147; Holland & Welsch (1977),
    Commun. Stat. 6, 813. It replaced ``scipy.optimize.least_squares`` with a robust loss, which
    took 99 s of the demo's 160 s registration for the same minimum.

    Parameters
    ----------
    pairs : list of (k, j, d, w)
        Equations ``x_j - x_k = d`` with weight ``w``.
    absolute : list of (k, v, w)
        Equations ``x_k = v`` with weight ``w`` (at least one; they fix the gauge).
    huber_px : float
        Residual scale of the robust weights, pixels.

    Returns
    -------
    x : ndarray (n,)
        Unknowns without any equation are 0.
    residual_per_frame : ndarray (n,)
        Median absolute residual (pixels) of each unknown's equations (NaN when it has none).
    n_equations : ndarray (n,) int
    """
    if not absolute:
        raise ValueError("robust_solve needs at least one absolute equation (gauge)")
    npair, nabs = len(pairs), len(absolute)
    m = npair + nabs
    pk = np.array([p[0] for p in pairs], int)
    pj = np.array([p[1] for p in pairs], int)
    ak = np.array([a[0] for a in absolute], int)
    rows = np.concatenate([np.arange(npair), np.arange(npair), npair + np.arange(nabs)])
    cols = np.concatenate([pj, pk, ak])
    vals = np.concatenate([np.ones(npair), -np.ones(npair), np.ones(nabs)])
    A = sparse.csr_matrix((vals, (rows, cols)), shape=(m, n))
    rhs = np.array([p[2] for p in pairs] + [a[1] for a in absolute], float)
    w0 = np.array([p[3] for p in pairs] + [a[2] for a in absolute], float)
    used = np.zeros(n, bool)
    used[cols] = True
    # unknowns without equations are pinned to 0 (a ridge on their diagonal only)
    ridge = sparse.diags(np.where(used, 0.0, 1.0))
    At = A.T.tocsr()

    def solve(w: np.ndarray) -> np.ndarray:
        N = (At @ sparse.diags(w) @ A + ridge).tocsc()
        return sparse_linalg.spsolve(N, At @ (w * rhs))

    x = solve(w0)
    for it in range(IRLS_ITERATIONS):
        u = np.abs(A @ x - rhs) / huber_px
        if it < IRLS_ITERATIONS // 2:
            rw = np.minimum(1.0, 1.0 / np.maximum(u, 1e-12))  # Huber
        else:
            rw = 1.0 / (1.0 + u * u)  # Cauchy
        x_new = solve(w0 * rw)
        done = float(np.max(np.abs(x_new - x))) < 1e-6 if n else True
        x = x_new
        if done and it >= IRLS_ITERATIONS // 2:
            break
    r = np.abs(A @ x - rhs)
    per: list[list[float]] = [[] for _ in range(n)]
    for e in range(npair):
        per[pk[e]].append(r[e])
        per[pj[e]].append(r[e])
    for e in range(nabs):
        per[ak[e]].append(r[npair + e])
    med = np.array([np.median(v) if v else np.nan for v in per])
    cnt = np.array([len(v) for v in per])
    return np.asarray(x, float), med, cnt


def shape_weights(disagreement: np.ndarray, ok: np.ndarray, ratio: float = SHAPE_RATIO) -> np.ndarray:
    """Weights (0..1] of frames' column equations from their shape disagreement with the
    template (1 - normalised correlation): ``1 / (1 + (d / (ratio * d_typ))^2)`` with ``d_typ``
    the median over the ``ok`` frames (the noise level of the series, at least 1e-6).

    Noise lowers every frame's correlation alike; a defect at the surface changes the shape of
    a few frames by tens to hundreds of times that (67-271 times in five frames of an
    evaluation scan whose entrance a crack crossed over most rows)."""
    d = np.nan_to_num(np.asarray(disagreement, float), nan=1.0)
    typ = max(float(np.median(d[ok])) if ok.any() else 1.0, 1e-6)
    return 1.0 / (1.0 + (np.maximum(d, 0.0) / (ratio * typ)) ** 2)


def _exit_window(
    edges: list[BandEdges], found: np.ndarray, ewin: slice, margin: int, n_cols: int
) -> slice | None:
    """Column window of the exit region (the entrance window mirrored about the exit), or None
    when the exit is not seen or the window would reach the entrance's."""
    ext = np.array([e.exit_col for e in edges], float)[found]
    ext = ext[np.isfinite(ext)]
    if ext.size == 0:
        return None
    ref = float(np.median(ext))
    lo, hi = math.floor(ref) - 2 * margin - 24, math.ceil(ref) + 2 * margin + 4
    if lo < ewin.stop or hi > n_cols:
        return None
    return slice(lo, hi)


def _exit_equations(
    profiles: np.ndarray, template: np.ndarray, xwin: slice, idx: np.ndarray, upsample_factor: int
) -> list[tuple[int, float, float]]:
    """Absolute column equations from the exit region: each frame's shift to the template
    there, weighted by the exit region's own shape agreement (:func:`shape_weights`).

    The band's width is the wafer's thickness (uniform over a scan), so the exit moves with
    the entrance; what lies at the exit surface disturbs only this region."""
    t_sig = _prepare_1d(template[xwin], gradient=True)
    shifts = np.full(len(profiles), np.nan)
    dis = np.full(len(profiles), np.nan)
    for k in idx:
        d, q = shift_1d(t_sig, _prepare_1d(profiles[k][xwin], gradient=True), upsample_factor)
        if q >= MIN_MATCH:
            shifts[k] = d
            dis[k] = 1.0 - _ncc(_align(profiles[k], d)[xwin], template[xwin])
    ok = np.isfinite(shifts)
    if not ok.any():
        return []
    w = shape_weights(dis, ok)
    return [(int(k), float(shifts[k]), float(w[k])) for k in np.nonzero(ok)[0]]


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


def _nanmedian_rows(stack: np.ndarray) -> np.ndarray:
    with _warnings.catch_warnings():
        _warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN columns at the ends
        t = np.nanmedian(stack, axis=0)
    return np.where(np.isfinite(t), t, np.nanmedian(t) if np.isfinite(t).any() else 0.0)


def _windows(
    corrected: da.Array, geom: Geometry, transmission: bool, expected: float, slit_px: float, margin: int
) -> _Windows:
    """Column windows from the median entrance / exit of a few frames spread over the scan."""
    n, n_rows, n_cols = (int(s) for s in corrected.shape)
    idx = np.unique(np.linspace(0, n - 1, min(n, WINDOW_SAMPLES)).round().astype(int))
    sample = np.asarray(compute_here(corrected[idx]), np.float32)
    ents, exts = [], []
    for img in sample:
        img = np.where(np.isfinite(img), img, 0.0)
        e = band_edges(img.mean(axis=0), transmission=transmission, expected_width_px=expected)
        if e.found:
            ents.append(e.entrance_col)
            exts.append(e.exit_col)
    if not ents:
        # the sample may miss the band (frames off the wafer): try every frame's mean profile
        prof = np.asarray(corrected.mean(axis=1).compute(), float)
        for p in prof:
            e = band_edges(np.nan_to_num(p), transmission=transmission, expected_width_px=expected)
            if e.found:
                ents.append(e.entrance_col)
                exts.append(e.exit_col)
    if not ents:
        raise InputError(
            "frames: no section band found in any frame (check frames.dark / frames.flat, "
            "detector.orientation: columns must run with depth)"
        )
    ent = float(np.median(ents))
    ext_f = [v for v in exts if math.isfinite(v)]
    if transmission:
        ext = float(np.median(ext_f)) if ext_f else ent + expected
    else:
        ext = ent + 3 * margin + 48
    clip = lambda v: int(np.clip(v, 0, n_cols))  # noqa: E731
    ent_lo, ent_hi = clip(math.floor(ent) - 2 * margin - 4), clip(math.ceil(ent) + 2 * margin + 24)
    band_lo, band_hi = clip(math.floor(ent) - margin), clip(math.ceil(ext) + margin + 1)
    lit_lo = clip(math.floor(ent + slit_px / 2) + 2)
    lit_hi = clip(max(lit_lo + 4, math.ceil(ent + slit_px / 2) + 2 + max(6, margin)))
    if transmission:
        lit_hi = min(lit_hi, clip(math.floor(ext - slit_px / 2) - 2))
    lit_lo = min(lit_lo, max(0, lit_hi - 4))
    bin_cols = max(1, math.ceil((band_hi - band_lo) / ROW_IMAGE_BINS))
    return _Windows(ent_lo, ent_hi, band_lo, band_hi, lit_lo, lit_hi, bin_cols,
                    (3, int(math.ceil(slit_px / 2)) + 2))


def _row_template_anchors(
    images: list[np.ndarray],
    gidx: np.ndarray,
    r_pre: np.ndarray,
    col_shift_bins: np.ndarray,
    cfg: RegisterConfig,
) -> list[tuple[int, float, float]]:
    """Absolute row equations ``r_k = d`` from matching each frame's feature image to the
    median of all of them aligned by the current solution ``r_pre`` (rows) and the column drift.
    A match is used when its peak lies within ``registration.max_row_step_px`` of ``r_pre`` and
    its normalised correlation reaches :data:`MIN_TEMPLATE_MATCH`; its weight is
    :data:`TEMPLATE_WEIGHT`."""
    if gidx.size < 3:
        return []
    rows, nb = images[int(gidx[0])].shape
    aligned = np.stack([ndi.shift(images[k], (-r_pre[k], -col_shift_bins[k]), order=1, mode="constant")
                        for k in gidx])
    template = np.median(aligned, axis=0)
    del aligned
    pad = np.zeros((2 * rows, 2 * nb))
    pad[:rows, :nb] = template
    t_fft = np.fft.rfft2(pad)
    t_energy = float(np.sum(template.astype(float) ** 2))
    if t_energy <= 0:
        return []
    # searched around the pairwise solution by the largest accepted drift step: that solution
    # may itself have followed a moving defect for a while
    cap = cfg.max_row_step_px
    out = []
    for k in gidx:
        pad[:] = 0.0
        pad[:rows, :nb] = images[k]
        e = float(np.sum(images[k].astype(float) ** 2))
        if e <= 0:
            continue
        lag = int(math.ceil(abs(r_pre[k]) + cap)) + 1
        peaks = shift_rows_2d(t_fft, np.fft.rfft2(pad), pad.shape, [float(col_shift_bins[k])],
                              lag, cfg.upsample_factor, math.sqrt(t_energy * e))
        ok = [(d, q) for d, q in peaks if abs(d - r_pre[k]) <= cap]
        if ok and ok[0][1] >= MIN_TEMPLATE_MATCH:
            out.append((int(k), ok[0][0], TEMPLATE_WEIGHT))
    return out


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
        ``upsample_factor``, ``neighbours``, ``min_quality``, ``g_tolerance``,
        ``max_row_step_px``.

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
    expected = float(geom.band_width_px) if transmission else 0.0
    # the ribbon spans w / cos(psi0) in x at constant depth; on the detector |L| / p_col per um
    slit_px = abs(geom.slit_width_um / math.cos(math.radians(geom.psi0_deg)) * geom.L / geom.p_col_um)
    margin = int(math.ceil(slit_px)) + 3
    warnings: list[str] = []
    win = _windows(corrected, geom, transmission, expected, slit_px, margin)

    # 1. per-frame profiles and the pairs with the next frames, in batches of frames (each
    #    batch also reads the first `neighbours` frames of the next one)
    max_lag = int(math.ceil(cfg.max_row_step_px)) + 1
    tasks = []
    for k0 in range(0, n, FRAMES_PER_TASK):
        k1 = min(n, k0 + FRAMES_PER_TASK)
        k2 = min(n, k1 + cfg.neighbours)
        tasks.append(dask.delayed(_frame_features)(
            in_task(corrected[k0:k2]), pos[k0:k2], win, k1 - k0, cfg.neighbours, geom.L / geom.p_col_um,
            max_lag, cfg.upsample_factor,
        ))
    feats = [f for batch in run_tasks(tasks, "register") for f in batch]
    profiles = np.stack([f[1] for f in feats]).astype(float)
    n_lit = np.array([f[2] for f in feats])
    pair_meas = [f[3] for f in feats]
    row_images = [f[4] for f in feats]
    mean_profiles = np.stack([f[0] for f in feats]).astype(float)
    edges = [band_edges(p, transmission=transmission, expected_width_px=expected) for p in profiles]

    # 2. quality: shape agreement of the entrance region with the median aligned profile, times
    #    relative contrast and background
    found = np.array([e.found for e in edges])
    if not found.any():
        raise InputError(
            "frames: no section band found in any frame (check frames.dark / frames.flat, "
            "detector.orientation: columns must run with depth)"
        )
    ent = np.array([e.entrance_col for e in edges])
    contrast = np.array([e.contrast for e in edges])
    background = np.array([e.background for e in edges])
    ref_ent = float(np.median(ent[found]))
    template = _nanmedian_rows(np.stack([_align(profiles[k], ent[k] - ref_ent) for k in np.nonzero(found)[0]]))
    # shape agreement over the entrance region, in transmission at most half the band deep: a
    # strong crack near the exit surface took a test frame's quality to 0 over the long window
    q_hi = win.ent_hi if not transmission else min(win.ent_hi, int(ref_ent + max(margin + 4, expected / 2)))
    ewin = slice(win.ent_lo, max(win.ent_lo + 8, q_hi))
    med_contrast = float(np.median(contrast[found]))
    med_bg = float(np.median(background[found]))
    # each frame aligned to the template by its entrance region (the coarse half-maximum edge
    # of a frame crossed by a strong crack can belong to the crack's line)
    t_sig = _prepare_1d(template[ewin], gradient=True)
    align = ent - ref_ent
    for k in np.nonzero(found)[0]:
        d, q = shift_1d(t_sig, _prepare_1d(profiles[k][ewin], gradient=True), cfg.upsample_factor)
        if q >= MIN_MATCH:
            align[k] = d
    quality = np.zeros(n)
    for k in np.nonzero(found)[0]:
        rel = contrast[k] / med_contrast if med_contrast > 0 else 0.0
        off = abs(background[k] - med_bg) / med_contrast if med_contrast > 0 else math.inf
        # shape agreement, lowered when the band is much weaker or stronger than the typical one
        # or sits on a different background (a frame of uniform garbage: background 17 band
        # levels, and its noise matched the template with a correlation of 0.24 in a test)
        quality[k] = (
            max(0.0, _ncc(_align(profiles[k], align[k])[ewin], template[ewin]))
            * min(1.0, 2.0 * rel, 2.0 / max(rel, 1e-9))
            * min(1.0, 0.5 / max(off, 1e-9))
        )
    good = quality >= cfg.min_quality
    if good.sum() < 2:
        raise InputError(
            f"frames: only {int(good.sum())} of {n} frames have a usable section band "
            f"(quality >= registration.min_quality = {cfg.min_quality})"
        )
    gidx = np.nonzero(good)[0]

    # 3. columns: pairwise shifts of the entrance region (relative, precise) and the shift of
    #    every frame to the series template (absolute: errors cannot accumulate), one robust
    #    solve; the template is rebuilt from the solved shifts and the solve repeated once
    #    Frames whose entrance region no longer looks like the template (the wafer edge cuts
    #    the band just below the entrance: quality 0.24 and a 2.2 px error in an evaluation
    #    scan) take their column from their neighbours (interpolated, not flagged)
    col_ok = good & (quality >= MIN_COLUMN_QUALITY) & (n_lit >= MIN_PLAIN_ROWS * n_rows)
    if col_ok.sum() < 2:
        col_ok = good.copy()
    cidx = np.nonzero(col_ok)[0]
    #    Entrance equations weighted by the region's shape agreement, exit equations with
    #    theirs, a weak smoothness prior (module docstring, "Columns")
    w_ent = shape_weights(1.0 - quality, col_ok)
    xwin = _exit_window(edges, found, ewin, margin, n_cols) if transmission else None
    col_pairs = [(int(k), int(k) + m, dc, float(min(w_ent[k], w_ent[int(k) + m])))
                 for k in cidx for (m, dc, qc, _) in pair_meas[k]
                 if col_ok[int(k) + m] and qc >= MIN_MATCH]
    col_pairs += [(int(k), int(j), 0.0, SMOOTH_WEIGHT / max(1, int(j - k)))
                  for k, j in zip(cidx[:-1], cidx[1:], strict=True)]
    shift0 = ent - ref_ent
    for _ in range(2):
        t_sig = _entrance_signal(template, win)
        col_abs = []
        for k in cidx:
            d, q = shift_1d(t_sig, _entrance_signal(profiles[k], win), cfg.upsample_factor)
            if q >= MIN_MATCH:
                col_abs.append((int(k), d, float(w_ent[k])))
        if not col_abs:
            col_abs = [(int(k), float(shift0[k]), ANCHOR_WEIGHT) for k in cidx if math.isfinite(shift0[k])]
        if xwin is not None:
            col_abs += _exit_equations(profiles, template, xwin, cidx, cfg.upsample_factor)
        s_col, c_res, _ = robust_solve(n, col_pairs, col_abs)
        s_col = _interp_flagged(s_col, col_ok)
        s_ref = float(np.median(s_col[cidx]))
        s_col = s_col - s_ref
        template = _nanmedian_rows(np.stack([_align(profiles[k], s_col[k]) for k in cidx]))

    # 4. the absolute entrance (and exit) from one model fit on the aligned median of the
    #    frames' mean profiles over their plain rows
    template = _nanmedian_rows(np.stack([_align(mean_profiles[k], s_col[k]) for k in cidx]))
    t_edges = band_edges(template, transmission=transmission, expected_width_px=expected)
    half_band = 0.5 * (t_edges.exit_col - t_edges.entrance_col) if math.isfinite(t_edges.exit_col) else 20.0
    ent_t, _ = fit_surface_edge(template, t_edges.entrance_col, slit_px=slit_px,
                                reflection=not transmission, half_band_px=half_band)
    ext_t = math.nan
    if transmission and math.isfinite(t_edges.exit_col):
        e_f, _ = fit_surface_edge(template[::-1], n_cols - 1 - t_edges.exit_col, slit_px=slit_px,
                                  reflection=False, half_band_px=half_band)
        ext_t = n_cols - 1 - e_f
    c0 = ent_t + s_col

    # 5. rows: pairwise shifts of the row-feature images where the correlation peak is
    #    significant and inside the search range, and a weak smoothness prior that carries
    #    frames without features along with their neighbours
    #    The accepted step follows the drift seen in columns (the same stage, beam and detector
    #    move both): a defect whose image slides along the slit from slice to slice (an
    #    inclined slip line moved 2.1 px a frame in an evaluation scan whose drift steps were
    #    0.04 px) must not pass for drift. The prior's weight follows the same scale.
    steps = np.diff(s_col[cidx]) / np.sqrt(np.diff(cidx))
    sigma_step = 1.4826 * float(np.median(np.abs(steps - np.median(steps)))) if steps.size else 0.0
    smooth_w = float(np.clip((ROW_NOISE_PX / max(sigma_step, 1e-3)) ** 2, SMOOTH_WEIGHT, 1.0))
    row_pairs = []
    for k in gidx:
        for m, _, _, peaks in pair_meas[k]:
            j = int(k) + m
            cap = min(cfg.max_row_step_px, max(ROW_STEP_FLOOR_PX, ROW_STEP_SIGMAS * sigma_step * math.sqrt(m)))
            ok = [(d, q) for d, q in peaks if abs(d) <= cap]
            if good[j] and ok and ok[0][1] >= MIN_ROW_MATCH:
                row_pairs.append((int(k), j, ok[0][0], 1.0))
    measured = np.zeros(n, bool)
    for k, j, _, _ in row_pairs:
        measured[k] = measured[j] = True
    smooth = [(int(k), int(j), 0.0, smooth_w / max(1, j - k)) for k, j in zip(gidx[:-1], gidx[1:], strict=True)]
    first = int(gidx[0])
    r_pre, _, _ = robust_solve(n, row_pairs + smooth, [(first, 0.0, 1.0)])
    # absolute anchors: each frame against the median of all aligned feature images, in which
    # what moves from slice to slice (loops, inclined lines) is smeared out and what is fixed
    # in y stays; a frame's own moving defect then finds no partner in the template
    row_abs = _row_template_anchors(row_images, gidx, r_pre, s_col / win.bin_cols, cfg)
    r, r_res, _ = robust_solve(n, row_pairs + smooth, [(first, 0.0, 1.0)] + row_abs)
    for k, _, _ in row_abs:
        measured[k] = True
    unmeasured = int((good & ~measured).sum())
    if unmeasured:
        warnings.append(
            f"row drift not measurable in {unmeasured} of {int(good.sum())} frames (no features "
            "along the slit); those frames follow their neighbours"
        )

    # 6. frames whose equations disagree with the solution are reported, not dropped: a defect
    #    changes its slice's image, and a frame with a defect is what the scan is for
    inconsistent = good & (
        (np.nan_to_num(c_res) > INCONSISTENT_PX) | (measured & (np.nan_to_num(r_res) > INCONSISTENT_PX))
    )
    if inconsistent.any():
        shown = ", ".join(str(int(i)) for i in np.nonzero(inconsistent)[0][:12])
        warnings.append(
            f"{int(inconsistent.sum())} frames have shift measurements that disagree with the "
            f"solution by > {INCONSISTENT_PX} px (robustly down-weighted, kept): {shown}"
            f"{' ...' if inconsistent.sum() > 12 else ''}"
        )
    flagged = ~good
    c0 = _interp_flagged(c0, good)
    r = _interp_flagged(r, good)
    r0 = r - r[first]
    n_flag = int(flagged.sum())
    if n_flag:
        shown = ", ".join(str(int(i)) for i in np.nonzero(flagged)[0][:12])
        warnings.append(
            f"{n_flag} of {n} frames flagged (no usable band): {shown}"
            f"{' ...' if n_flag > 12 else ''}; their origins are interpolated"
        )
    n_ci = int((good & ~col_ok).sum())
    if n_ci:
        warnings.append(
            f"column origin interpolated from the neighbours in {n_ci} frames whose entrance region "
            f"differs from the series' (quality < {MIN_COLUMN_QUALITY} or under {100 * MIN_PLAIN_ROWS:.0f} % "
            "plain rows; e.g. the wafer edge cuts the band)"
        )
    partial = int((good & (n_lit < n_rows)).sum())
    if partial:
        log.info("register: %d frames have rows outside the wafer (masked in both axes)", partial)

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
        "interpolated": (flagged | ~col_ok).astype(int),
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

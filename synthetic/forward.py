"""Forward model: a section-topograph series of a scenario, frame by frame, with exact ground truth.

Projection (SPEC section 5, through :class:`pipeline.geometry.Geometry`)
-----------------------------------------------------------------------
Frame ``k`` has its ribbon at stage position ``X_k`` and origin ``(r0_k, c0_k)`` = base origin
(``acquisition.frame``) + a recorded random walk (drift). A wafer point at lateral offset
``D = x - X_k - z tan(psi0)`` from the ribbon centre lands at ``r = r0_k + y / p_row`` and
``c = c0_k + (z G + D L) / p_col``, weighted by the slit profile at ``D``. The renderer works
backwards from the pixels: for each of a set of offsets ``D_j`` across the slit, every pixel
centre ``(r, c)`` sees exactly one wafer point (the inverse of ``Geometry.project`` at fixed
``D``), the contrast there is evaluated, and the samples are summed with the slit weights. A
pixel thus integrates the scene along the diffracted ray through the lit slab, which is what the
projection says. The band uses offsets ``contrast.d_step_um`` and at most one column apart; each
defect is sampled finer where needed, so that its sharp core is met at least every 0.8 sigma
along the ray.

The slit profile across x is a top hat of width ``w / cos(psi0)`` (the ribbon of width ``w``,
measured perpendicular to the incident beam, cut at constant depth) with Gaussian edges of
``contrast.slit_edge_um / cos(psi0)``.

Contrast (relative to the perfect-crystal band level, ``contrast.band_level``)
----------------------------------------------------------------------------
- Transmission: the band spans z = 0..t (``t G`` on the detector). It carries
  Pendellosung-like fringes ``1 + V sin(2 pi t/Lambda_0 sqrt(1 - beta^2))``, ``beta = 1 - 2z/t``,
  the phase of Kato's spherical-wave intensity ``J0^2(pi t/Lambda_0 sqrt(1 - beta^2))``
  (Kato & Lang 1959, Acta Cryst. 12, 787; Authier 2001, ch. 14) whose edges, where the fringes
  crowd, are tapered to keep them above 2.5 px; plus bright entrance and exit surface lines.
- Reflection: only a near-surface slab contributes, ``exp(-z / z_abs)`` with
  ``z_abs = 1 / (mu (1/gamma_0 + 1/|gamma_h|))``, plus a bright entrance-surface line; defect
  contrast is attenuated the same way.
- Defects (see :mod:`synthetic.defects`): a sharp core plus a halo decaying with distance:
  cracks are bright sheets, loops and slip lines tubes, indents a bright damaged zone.
- Beyond the wafer edge (a vertical cylinder) and outside 0 <= z <= t nothing diffracts (dark).

Instrument
----------
Detector blur (Gaussian), gain pattern (flat field), dark offset with a fixed column/row pattern,
beam-monitor variation per frame, Poisson noise at ``photons_per_px`` counts for the band level,
Gaussian read noise, hot pixels (fixed positions, random high values each frame, absent from the
dark), drift (in the origins, so sub-pixel and exact), dropped frames (files not written; the
acquisition file then lists ``positions_um``) and corrupt frames (all zeros or uniform garbage).

What the model leaves out (simplifications)
-------------------------------------------
- No dynamical diffraction: the band and fringes are a phenomenological profile in depth, not a
  Takagi-Taupin solution; no Borrmann-fan intensity from the defects (no dynamical shadow or
  intermediary images), no g.b invisibility, the same contrast in every reflection.
- The band is uniform in transmission (no absorption gradient across the thickness, no
  anomalous transmission); the fringes belong to depth, so the slit width washes out the fine
  ones, as it does in real data.
- Defect strain fields are isotropic halos around the defect geometry, not elastic solutions;
  crack faces do not cut the wavefields (no shadow behind a crack); crack opening is not
  modelled.
- The wafer edge is a vertical cylinder (no bevel or edge profile); the wafer is flat and of
  uniform thickness (no bow, TTV or lattice tilt); no surface scratches or particles.
- Pixels sample the scene at their centres before the blur (no pixel-area integration, except
  for the surface steps, which are box-integrated over one column).
- A parallel, monochromatic beam: no source size, divergence or harmonics; no air scatter or
  fluorescence background; the beam is uniform along the slit.
- Detector: no gain non-linearity, afterglow, cross-talk or saturation other than the 16-bit
  clip.
- Edge cracks: the mouth is the line through the edge point along the mouth direction;
  exact when the crack's surface trace runs normal to the edge (the usual case), a tangent-plane
  approximation otherwise.
"""

from __future__ import annotations

import csv
import io
import logging
import math
import os
import time
import uuid
from dataclasses import dataclass
from pathlib import Path

import dask
import numpy as np
import tifffile
import yaml
from scipy import ndimage
from scipy.special import erf
from skimage.transform import resize

from pipeline import __version__
from pipeline.compute import n_workers, run_tasks
from pipeline.config import Orientation, load_acquisition
from pipeline.errors import InputError
from pipeline.geometry import Geometry, natural_voxel_um
from pipeline.runfolder import validate_defects, write_json_atomic, write_text_atomic
from synthetic import physics
from synthetic.defects import Expanded, Primitive, expand
from synthetic.scenario import Scenario

log = logging.getLogger(__name__)

FRAME_NAME = "frame_{:05d}.tif"
FRAME_GLOB = "frame_*.tif"
ACQUISITION_YAML = "acquisition.yaml"
GROUND_TRUTH_JSON = "ground_truth.json"
DARK_TIF = "dark.tif"
FLAT_TIF = "flat.tif"
MONITOR_CSV = "monitor.csv"
HEADER = "# synthetic section-topograph series written by crackstack synth\n"

#: softness of the wafer edge in x, um (anti-aliasing only)
_EDGE_SOFT_UM = 0.5
#: most elements held by one evaluation chunk (float32 arrays of this size are temporaries)
_CHUNK_ELEMENTS = 1_000_000
#: corner pairs of a box (indices into Primitive.vertices) that form its 12 edges
_BOX_EDGES = [(i, j) for i in range(8) for j in range(i + 1, 8) if bin(i ^ j).count("1") == 1]


@dataclass(frozen=True)
class Band:
    level: float
    visibility: float
    pendellosung_um: float | None
    line_amplitude: float
    line_um: float


@dataclass(frozen=True)
class Plan:
    """Everything one frame needs (picklable; shared by all tasks)."""

    geom: Geometry
    rows: int
    cols: int
    positions: np.ndarray
    r0: np.ndarray
    c0: np.ndarray
    D: np.ndarray
    Dw: np.ndarray
    slit: Slit
    ray_per_D: np.ndarray
    thickness_um: float
    z_max_um: float
    absorption_depth_um: float | None
    wafer_center_um: np.ndarray
    wafer_radius_um: float
    band: Band
    primitives: tuple[Primitive, ...]
    photons: float
    noise: bool
    read_noise: float
    blur_px: float
    gain: np.ndarray | None
    dark: np.ndarray
    monitor: np.ndarray
    hot_index: np.ndarray
    corrupt: dict
    seed: int
    orientation: Orientation


def _rng(seed: int, *key: int) -> np.random.Generator:
    """An independent random stream per purpose (and per frame): results do not depend on how
    frames are batched or scheduled."""
    return np.random.default_rng(np.random.SeedSequence(seed, spawn_key=key))


# --- geometry helpers --------------------------------------------------------------------------


@dataclass(frozen=True)
class Slit:
    """The slit profile across x and its sampling.

    A top hat of width ``w / cos(psi0)`` in x (the ribbon of width ``w``, measured perpendicular
    to the incident beam, cut at constant depth) with Gaussian edges ``edge_um / cos(psi0)``.
    ``D`` are midpoint samples ``step_um`` apart over the support, ``w`` their weights (sum 1).
    """

    width_um: float
    soft_um: float
    D: np.ndarray
    w: np.ndarray
    step_um: float
    norm: float

    @property
    def support(self) -> tuple[float, float]:
        return float(self.D[0] - self.step_um / 2), float(self.D[-1] + self.step_um / 2)

    def profile(self, D: np.ndarray) -> np.ndarray:
        """Un-normalised transmission of the slit at lateral offset ``D`` (um)."""
        if self.soft_um > 0:
            r = math.sqrt(2) * self.soft_um
            return 0.5 * (erf((D + self.width_um / 2) / r) - erf((D - self.width_um / 2) / r))
        return (np.abs(D) <= self.width_um / 2).astype(float)

    def refined(self, lo: float, hi: float, max_step_um: float) -> tuple[np.ndarray, np.ndarray]:
        """Midpoint samples over ``[lo, hi]`` (clipped to the support) at most ``max_step_um``
        apart, with weights on the same scale as ``w`` (so sums over any grid agree)."""
        s_lo, s_hi = self.support
        lo, hi = max(lo, s_lo), min(hi, s_hi)
        if hi <= lo:
            return np.zeros(0), np.zeros(0)
        n = max(1, int(math.ceil((hi - lo) / max_step_um)))
        step = (hi - lo) / n
        D = lo + (np.arange(n) + 0.5) * step
        return D, self.profile(D) * step / self.norm


def slit_samples(geom: Geometry, edge_um: float, step_um: float) -> Slit:
    """Sample the slit profile: midpoints at most ``step_um`` and at most one detector column
    (``p_col / |L|``) apart."""
    cpsi = math.cos(math.radians(geom.psi0_deg))
    width = geom.slit_width_um / cpsi
    soft = edge_um / cpsi
    half = width / 2 + 3 * soft
    step = step_um
    if abs(geom.L) > 1e-9:
        step = min(step, geom.p_col_um / abs(geom.L))
    n = max(3, int(math.ceil(2 * half / step)))
    if n > 400:
        log.warning("slit sampling capped at 400 offsets (%.1f um step wanted)", step)
        n = 400
    step = 2 * half / n
    D = -half + (np.arange(n) + 0.5) * step
    slit = Slit(width, soft, D, np.ones(n) / n, step, 1.0)
    prof = slit.profile(D)
    norm = float(prof.sum() * step)
    return Slit(width, soft, D, prof * step / norm, step, norm)


def ray_per_offset(geom: Geometry) -> np.ndarray:
    """How the point a pixel sees moves with the lateral offset: ``d(x, y, z) / dD`` at fixed
    pixel (along the diffracted ray), from :func:`lit_points`."""
    x, _, z = lit_points(geom, 0.0, 0.0, 0.0, np.array([0.0, 1.0]), np.zeros(1), np.zeros(1))
    return np.array([x[1, 0] - x[0, 0], 0.0, z[1, 0] - z[0, 0]])


def lit_points(
    geom: Geometry,
    X_k: float,
    r0_k: float,
    c0_k: float,
    D: np.ndarray,
    rows_idx: np.ndarray,
    cols_idx: np.ndarray,
):
    """Wafer points that pixel centres see at lateral offsets ``D`` (the inverse of
    :meth:`Geometry.project` at fixed ``D``).

    Returns
    -------
    x, z : ndarray (len(D), len(cols_idx)), um
    y : ndarray (len(rows_idx),), um
    """
    z = ((cols_idx[None, :] - c0_k) * geom.p_col_um - D[:, None] * geom.L) / geom.G
    x = X_k + D[:, None] + z * geom.tan_psi0
    y = (rows_idx - r0_k) * geom.p_row_um
    return x, y, z


def _zbox(z: np.ndarray, plan: Plan) -> np.ndarray:
    """Inside 0 <= z <= t, box-integrated over one column at each surface."""
    dz = plan.geom.p_col_um / plan.geom.G
    t = plan.thickness_um
    return np.clip(z / dz + 0.5, 0, 1) * np.clip((t - z) / dz + 0.5, 0, 1)


def band_profile(z: np.ndarray, plan: Plan) -> np.ndarray:
    """Perfect-crystal intensity at depth ``z`` (um), band units (see the module docstring)."""
    g, b, t = plan.geom, plan.band, plan.thickness_um
    dz = g.p_col_um / g.G
    s_eff = math.sqrt(b.line_um**2 + dz * dz / 12.0)
    amp = b.line_amplitude * b.line_um / s_eff  # keep the line's integral when it is sub-pixel
    inside = _zbox(z, plan)
    if g.geometry == "transmission":
        lines = np.exp(-(z * z) / (2 * s_eff**2)) + np.exp(-((t - z) ** 2) / (2 * s_eff**2))
        fr = 1.0
        if b.visibility > 0 and b.pendellosung_um:
            beta = np.clip(1.0 - 2.0 * z / t, -1.0, 1.0)
            root = np.sqrt(1.0 - beta * beta)
            big_a = math.pi * t / b.pendellosung_um
            with np.errstate(divide="ignore", invalid="ignore"):
                cycles_per_px = np.abs(4.0 * big_a * beta / (t * root)) / (2 * math.pi) * dz
                period_px = np.where(root > 0, 1.0 / cycles_per_px, 0.0)
            taper = np.clip((period_px - 2.5) / 2.5, 0.0, 1.0)
            fr = 1.0 + b.visibility * np.sin(2.0 * big_a * root) * taper
        return b.level * inside * (fr + amp * lines)
    za = plan.absorption_depth_um
    return (
        b.level
        * inside
        * (np.exp(-np.maximum(z, 0.0) / za) + amp * np.exp(-(z * z) / (2 * s_eff**2)))
    )


def _edge_inside(x: np.ndarray, y: np.ndarray, plan: Plan) -> np.ndarray:
    """1 inside the wafer edge (a cylinder of radius R about the centre), 0 beyond it."""
    xc, yc = plan.wafer_center_um
    R = plan.wafer_radius_um
    s = np.sqrt(np.maximum(R * R - (y - yc) ** 2, 0.0))
    return np.clip((s - np.abs(x - xc)) / _EDGE_SOFT_UM + 0.5, 0.0, 1.0).astype(np.float32)


def _edge_status(plan: Plan, xlo: float, xhi: float, ylo: float, yhi: float) -> str:
    """'inside', 'outside' or 'mixed' for the rectangle [xlo, xhi] x [ylo, yhi]."""
    xc, yc = plan.wafer_center_um
    R = plan.wafer_radius_um
    far = max(math.hypot(px - xc, py - yc) for px in (xlo, xhi) for py in (ylo, yhi))
    near = math.hypot(min(max(xc, xlo), xhi) - xc, min(max(yc, ylo), yhi) - yc)
    margin = 3 * _EDGE_SOFT_UM
    if far <= R - margin:
        return "inside"
    if near >= R + margin:
        return "outside"
    return "mixed"


def _band_across_edge(plan: Plan, x: np.ndarray, y: np.ndarray, wb: np.ndarray) -> np.ndarray:
    """Slit-weighted band of a frame that the wafer edge crosses, (rows, cols) float32.

    Along a pixel's ray the lit point moves linearly with ``D`` (``x = alpha(col) + beta D``),
    so the part inside the edge is one interval of ``D`` per pixel, and the weighted sum over
    the slit samples is a difference of a cumulative table, interpolated linearly between
    samples (which anti-aliases the edge). Hand-written instead of a per-sample mask because the
    mask costs ~5 passes over (n_D, rows, cols): 40 ms for a 256 x 512 frame with 25 offsets and
    about 1.5 s for 2048 x 2048, against 2 passes over (rows, cols) here.
    """
    D = plan.D
    xc, yc = plan.wafer_center_um
    R = plan.wafer_radius_um
    s = np.sqrt(np.maximum(R * R - (y - yc) ** 2, 0.0))
    x_lo, x_hi = xc - s, xc + s  # inside the cylinder along each row
    beta = (x[-1, 0] - x[0, 0]) / (D[-1] - D[0])
    alpha = x[0, :] - beta * D[0]
    total = wb.sum(axis=0)
    if abs(beta) < 1e-9:  # the lit point does not move with D
        soft = np.clip(
            (np.minimum(alpha[None, :] - x_lo[:, None], x_hi[:, None] - alpha[None, :]))
            / _EDGE_SOFT_UM
            + 0.5,
            0.0,
            1.0,
        )
        return (total[None, :] * soft).astype(np.float32)
    t1 = (x_lo[:, None] - alpha[None, :]) / beta
    t2 = (x_hi[:, None] - alpha[None, :]) / beta
    d_lo, d_hi = np.minimum(t1, t2), np.maximum(t1, t2)
    n = len(D)
    h = D[1] - D[0]
    cum = np.zeros((n + 1, wb.shape[1]), np.float64)
    np.cumsum(wb, axis=0, out=cum[1:])
    cols = np.arange(wb.shape[1])[None, :]

    def cumulative(T: np.ndarray) -> np.ndarray:
        u = np.clip((T - (D[0] - h / 2)) / h, 0.0, float(n))
        i = np.minimum(u.astype(np.int64), n - 1)
        return cum[i, cols] + (u - i) * wb[i, cols]

    return (cumulative(d_hi) - cumulative(d_lo)).astype(np.float32)


def _chunk(n_per_d: int) -> int:
    return max(1, _CHUNK_ELEMENTS // max(1, n_per_d))


# --- one frame ---------------------------------------------------------------------------------


def expected_frame(plan: Plan, k: int, *, with_defects: bool = True) -> np.ndarray:
    """Noise-free intensity of frame ``k`` (band units) before the detector, (rows, cols) float32."""
    g = plan.geom
    X, r0, c0 = float(plan.positions[k]), float(plan.r0[k]), float(plan.c0[k])
    rows_idx = np.arange(plan.rows, dtype=float)
    cols_idx = np.arange(plan.cols, dtype=float)
    x, y, z = lit_points(g, X, r0, c0, plan.D, rows_idx, cols_idx)
    wb = (plan.Dw[:, None] * band_profile(z, plan)).astype(np.float32)
    lit = wb.any(axis=0)
    if lit.any():
        xs = x[:, lit]
        status = _edge_status(
            plan, float(xs.min()), float(xs.max()), float(y.min()), float(y.max())
        )
    else:
        status = "outside"
    if status == "inside":
        img = np.repeat(wb.sum(axis=0)[None, :], plan.rows, axis=0)
    elif status == "outside":
        img = np.zeros((plan.rows, plan.cols), np.float32)
    else:
        img = _band_across_edge(plan, x, y, wb)
    if with_defects:
        for prim in plan.primitives:
            _add_primitive(img, prim, plan, k)
    return img


def _reached_pixels(
    V: np.ndarray, s: np.ndarray, lo: float, hi: float, plan: Plan, X: float, r0: float, c0: float
) -> tuple[int, int, int, int] | None:
    """Pixel bounds (r_lo, r_hi, c_lo, c_hi) that a box (vertices ``V``, lateral offsets ``s``)
    can reach through the slab of offsets ``[lo, hi]``; None when it reaches none.

    The vertices of box ∩ slab are the box corners inside the slab and the crossings of its 12
    edges with the slab faces; the projection is affine, so their images bound the pixels.
    """
    g = plan.geom
    pts = [V[i] for i in range(8) if lo <= s[i] <= hi]
    for i, j in _BOX_EDGES:
        for lev in (lo, hi):
            if (s[i] - lev) * (s[j] - lev) < 0:
                pts.append(V[i] + (lev - s[i]) / (s[j] - s[i]) * (V[j] - V[i]))
    if not pts:
        return None
    P = np.asarray(pts)
    row, col, _ = g.project(P[:, 0], P[:, 1], P[:, 2], X, r0, c0)
    dl = (lo * g.L, hi * g.L)
    col_z_lo = c0 + min(dl) / g.p_col_um
    col_z_hi = c0 + (plan.z_max_um * g.G + max(dl)) / g.p_col_um
    r_lo = max(0, math.floor(row.min()) - 1)
    r_hi = min(plan.rows, math.ceil(row.max()) + 2)
    c_lo = max(0, math.floor(max(col.min(), col_z_lo)) - 1)
    c_hi = min(plan.cols, math.ceil(min(col.max(), col_z_hi)) + 2)
    if r_lo >= r_hi or c_lo >= c_hi:
        return None
    return r_lo, r_hi, c_lo, c_hi


def _add_primitive(img: np.ndarray, prim: Primitive, plan: Plan, k: int) -> None:
    """Add one primitive's contrast to frame ``k``.

    The slit offsets that reach the primitive's box are taken in groups spanning about 2 um;
    each group is evaluated only on the pixels its thin slab can reach (an oblique sheet or loop
    covers a small part of its full bounding box at any one offset).
    """
    g = plan.geom
    X, r0, c0 = float(plan.positions[k]), float(plan.r0[k]), float(plan.c0[k])
    V = prim.vertices()
    s = V[:, 0] - X - V[:, 2] * g.tan_psi0
    d_lo, d_hi = plan.slit.support
    if s.max() < d_lo or s.min() > d_hi:
        return
    D_all, W_all = plan.slit.refined(float(s.min()), float(s.max()), _offset_step(prim, plan))
    if D_all.size == 0:
        return
    c = prim.center
    if prim.point_like:
        scale = float(_zbox(np.array(c[2]), plan))
        if plan.absorption_depth_um is not None:
            scale *= math.exp(-max(c[2], 0.0) / plan.absorption_depth_um)
        scale *= float(_edge_inside(np.array(c[0]), np.array(c[1]), plan))
        W_all = W_all * scale
        edge = "inside"
    else:
        edge = _edge_status(
            plan,
            float(V[:, 0].min()),
            float(V[:, 0].max()),
            float(V[:, 1].min()),
            float(V[:, 1].max()),
        )
        if edge == "outside":
            return
    h = float(D_all[1] - D_all[0]) if D_all.size > 1 else plan.slit.step_um
    per_group = max(4, int(round(2.0 / h)))
    A = prim.axes
    for g0 in range(0, D_all.size, per_group):
        D, Dw = D_all[g0 : g0 + per_group], W_all[g0 : g0 + per_group]
        roi = _reached_pixels(V, s, float(D[0] - h / 2), float(D[-1] + h / 2), plan, X, r0, c0)
        if roi is None:
            continue
        r_lo, r_hi, c_lo, c_hi = roi
        rows_idx = np.arange(r_lo, r_hi, dtype=float)
        cols_idx = np.arange(c_lo, c_hi, dtype=float)
        x, y, z = lit_points(g, X, r0, c0, D, rows_idx, cols_idx)
        if prim.point_like:
            W = np.broadcast_to(Dw[:, None], x.shape)
        else:
            W = Dw[:, None] * _zbox(z, plan)
            if plan.absorption_depth_um is not None:
                W = W * np.exp(-np.maximum(z, 0.0) / plan.absorption_depth_um)
        W = W.astype(np.float32)
        dx, dy, dz = x - c[0], y - c[1], z - c[2]
        acc = np.zeros((rows_idx.size, cols_idx.size), np.float32)
        step = _chunk(acc.size)
        for j in range(0, D.size, step):
            sl = slice(j, j + step)
            if not W[sl].any():
                continue
            loc = [
                (A[i, 0] * dx[sl] + A[i, 2] * dz[sl]).astype(np.float32)[:, None, :]
                + (A[i, 1] * dy).astype(np.float32)[None, :, None]
                for i in range(3)
            ]
            f = prim.field(*loc)
            if edge == "mixed":
                f *= _edge_inside(x[sl][:, None, :], y[None, :, None], plan)
            acc += np.einsum("dc,drc->rc", W[sl], f)
        img[r_lo:r_hi, c_lo:c_hi] += acc


def _offset_step(prim: Primitive, plan: Plan) -> float:
    """Slit sampling step for one primitive: its sharp core must be sampled at least every
    0.8 sigma along the pixel rays (0.75 um in D moves the seen point 2 um along the ray in
    symmetric Laue, which aliases a 1 um core and biased point centroids by 0.1-0.15 px)."""
    v = plan.ray_per_D
    speed = float(np.linalg.norm(v))
    if prim.kind == "sheet":  # across a sheet only the normal component matters
        speed = max(abs(float(prim.axes[2] @ v)), 0.5 * speed)
    step = plan.slit.step_um
    if speed > 0:
        step = min(step, 0.8 * prim.sigma_um / speed)
    return step


def detector_frame(plan: Plan, k: int) -> np.ndarray:
    """Frame ``k`` as the detector records it: uint16 counts, rows along y, columns with depth."""
    rng = _rng(plan.seed, 100, k)
    kind = plan.corrupt.get(k)
    if kind == "zeros":
        return np.zeros((plan.rows, plan.cols), np.uint16)
    if kind == "garbage":
        return rng.integers(0, 65536, size=(plan.rows, plan.cols), dtype=np.uint16)
    img = expected_frame(plan, k)
    if plan.blur_px > 0:
        img = ndimage.gaussian_filter(img, plan.blur_px, mode="nearest")
    lam = img * np.float32(plan.photons * plan.monitor[k])
    if plan.gain is not None:
        lam *= plan.gain
    np.maximum(lam, 0, out=lam)
    if plan.noise:
        counts = rng.poisson(lam).astype(np.float32)
        if plan.read_noise > 0:
            counts += np.float32(plan.read_noise) * rng.standard_normal(counts.shape, np.float32)
    else:
        counts = lam
    counts += plan.dark
    if plan.hot_index.size:
        flat = counts.reshape(-1)
        flat[plan.hot_index] = plan.dark.reshape(-1)[plan.hot_index] + plan.photons * rng.uniform(
            3.0, 8.0, plan.hot_index.size
        )
    return np.clip(np.rint(counts), 0, 65535).astype(np.uint16)


def to_stored(img: np.ndarray, o: Orientation) -> np.ndarray:
    """Undo the acquisition's ``orientation`` so that reading applies it and gets ``img`` back.

    Reading is assumed to apply ``transpose``, then ``flip_rows``, then ``flip_columns``.
    """
    if o.flip_columns:
        img = img[:, ::-1]
    if o.flip_rows:
        img = img[::-1, :]
    if o.transpose:
        img = img.T
    return np.ascontiguousarray(img)


def _write_tiff(path: Path, img: np.ndarray) -> None:
    tmp = path.with_name(path.name + ".partial")
    tifffile.imwrite(tmp, img, photometric="minisblack")
    os.replace(tmp, path)


def _render_batch(plan: Plan, frames: list[int], out_dir: str) -> int:
    out = Path(out_dir)
    for k in frames:
        _write_tiff(
            out / FRAME_NAME.format(k), to_stored(detector_frame(plan, k), plan.orientation)
        )
    return len(frames)


# --- planning ----------------------------------------------------------------------------------


def _instrument_patterns(scn: Scenario, seed: int, n: int):
    ins = scn.instrument
    rows, cols = scn.acquisition.frame.rows, scn.acquisition.frame.cols
    gain = None
    if ins.flat_amplitude > 0:
        r = _rng(seed, 3)
        coarse = r.standard_normal((6, 10))
        smooth = resize(coarse, (rows, cols), order=3, mode="reflect", anti_aliasing=False)
        smooth = (smooth - smooth.mean()) / max(smooth.std(), 1e-12)
        white = r.standard_normal((rows, cols))
        pattern = (0.95 * smooth + 0.3 * white) / math.hypot(0.95, 0.3)
        gain = np.clip(1.0 + ins.flat_amplitude * pattern, 0.05, None).astype(np.float32)
    dark = np.zeros((rows, cols), np.float32)
    if ins.dark_offset > 0:
        r = _rng(seed, 4)
        fpn = min(2.0, 0.02 * ins.dark_offset)
        dark += np.float32(ins.dark_offset)
        dark += (fpn * r.standard_normal(cols)).astype(np.float32)[None, :]
        dark += (0.5 * fpn * r.standard_normal(rows)).astype(np.float32)[:, None]
        np.maximum(dark, 0, out=dark)
    monitor = np.ones(n)
    if ins.monitor_variation > 0:
        r = _rng(seed, 2)
        slow = ndimage.gaussian_filter1d(np.cumsum(r.standard_normal(n)), max(1.0, n / 30))
        slow = (slow - slow.mean()) / max(slow.std(), 1e-12)
        white = r.standard_normal(n)
        monitor = np.clip(1.0 + ins.monitor_variation * (0.8 * slow + 0.6 * white), 0.2, None)
    hot = np.zeros(0, np.int64)
    if ins.hot_pixels > 0:
        hot = np.sort(
            _rng(seed, 5).choice(rows * cols, size=min(ins.hot_pixels, rows * cols), replace=False)
        )
    return gain, dark, monitor, hot


def build_plan(scn: Scenario, *, seed: int | None = None, source: str = "scenario"):
    """Geometry, drift, patterns and primitives of a scenario.

    Returns
    -------
    plan : Plan
    expanded : :class:`synthetic.defects.Expanded`
    written : list of int
        Frame numbers whose files are written (dropped ones left out), in order.
    """
    geom = scn.geometry()
    ins, con, acq = scn.instrument, scn.contrast, scn.acquisition
    seed = ins.seed if seed is None else int(seed)
    n = acq.scan.count
    positions = acq.scan.positions()
    steps = _rng(seed, 1).standard_normal((n, 2)) * np.asarray(ins.drift_step_px, float)
    steps[0] = 0.0
    drift = np.cumsum(steps, axis=0)
    r0 = acq.frame.origin_row_px + drift[:, 0]
    c0 = acq.frame.margin_px + drift[:, 1]
    slit = slit_samples(geom, con.slit_edge_um, con.d_step_um)
    t = scn.wafer.thickness_um
    pend = None
    z_abs = None
    z_max = t
    if geom.geometry == "transmission":
        if con.fringe_visibility > 0:
            pend = con.pendellosung_um or physics.pendellosung_um(geom, acq.beam.reflection)
    else:
        att = con.attenuation_length_um or physics.attenuation_length_um(geom.energy_keV)
        z_abs = physics.absorption_depth_um(geom, att)
        z_max = min(t, 12.0 * z_abs)
    expanded = expand(scn, source)
    gain, dark, monitor, hot = _instrument_patterns(scn, seed, n)
    plan = Plan(
        geom=geom,
        rows=acq.frame.rows,
        cols=acq.frame.cols,
        positions=positions,
        r0=r0,
        c0=c0,
        D=slit.D,
        Dw=slit.w,
        slit=slit,
        ray_per_D=ray_per_offset(geom),
        thickness_um=t,
        z_max_um=z_max,
        absorption_depth_um=z_abs,
        wafer_center_um=scn.wafer.center_um,
        wafer_radius_um=scn.wafer.radius_um,
        band=Band(
            con.band_level,
            con.fringe_visibility,
            pend,
            con.surface_line_amplitude,
            con.surface_line_um,
        ),
        primitives=tuple(expanded.primitives),
        photons=ins.photons_per_px,
        noise=ins.noise,
        read_noise=ins.read_noise if ins.noise else 0.0,
        blur_px=ins.blur_px,
        gain=gain,
        dark=dark,
        monitor=monitor,
        hot_index=hot,
        corrupt={c.frame: c.kind for c in ins.corrupt_frames},
        seed=seed,
        orientation=acq.detector.orientation,
    )
    dropped = set(ins.dropped_frames)
    written = [k for k in range(n) if k not in dropped]
    return plan, expanded, written


def _check_layout(scn: Scenario, plan: Plan, source: str) -> list[str]:
    """Warnings about a band that leaves the frame or defects that no frame sees."""
    g = plan.geom
    notes = []
    dl = sorted((plan.D[0] * g.L / g.p_col_um, plan.D[-1] * g.L / g.p_col_um))
    first = float(plan.c0.min()) + dl[0]
    last = float(plan.c0.max()) + plan.z_max_um * g.G / g.p_col_um + dl[1]
    if g.geometry == "transmission" and (first < 0 or last > plan.cols - 1):
        notes.append(
            f"{source}: the section band spans columns {first:.1f}..{last:.1f} but frames have "
            f"{plan.cols} columns; change acquisition.frame.margin_px, cols or the pixel size"
        )
    x_lo = float(plan.positions.min()) + min(0.0, plan.z_max_um * g.tan_psi0) + plan.D[0]
    x_hi = float(plan.positions.max()) + max(0.0, plan.z_max_um * g.tan_psi0) + plan.D[-1]
    y_lo = (0 - float(plan.r0.max())) * g.p_row_um
    y_hi = (plan.rows - 1 - float(plan.r0.min())) * g.p_row_um
    for prim in plan.primitives:
        V = prim.vertices()
        if (
            V[:, 0].max() < x_lo
            or V[:, 0].min() > x_hi
            or V[:, 1].max() < y_lo
            or V[:, 1].min() > y_hi
            or V[:, 2].max() < 0
            or V[:, 2].min() > plan.z_max_um
        ):
            notes.append(
                f"{source}: {prim.label} lies outside the imaged region "
                f"(x {x_lo:.0f}..{x_hi:.0f}, y {y_lo:.0f}..{y_hi:.0f} um)"
            )
    return notes


# --- files -------------------------------------------------------------------------------------


def _prepare_out_dir(out: Path) -> None:
    if out.exists() and not out.is_dir():
        raise InputError(f"{out}: exists and is not a folder; give a folder for the series")
    out.mkdir(parents=True, exist_ok=True)
    if not any(out.iterdir()):
        return
    acq = out / ACQUISITION_YAML
    ours = acq.is_file() and acq.read_text(errors="replace").startswith(HEADER)
    if not ours:
        raise InputError(
            f"{out}: the folder is not empty and holds no synthetic series; give an empty or new "
            "folder (an earlier synthetic series there is replaced)"
        )
    for p in [*out.glob(FRAME_GLOB), *out.glob("*.partial")]:
        p.unlink()
    for name in (GROUND_TRUTH_JSON, DARK_TIF, FLAT_TIF, MONITOR_CSV):
        (out / name).unlink(missing_ok=True)


def _acquisition_yaml(scn: Scenario, plan: Plan, written: list[int], has: dict) -> str:
    dropped = len(written) != len(plan.positions)
    acq = scn.acquisition_model(
        positions_um=[float(plan.positions[k]) for k in written] if dropped else None
    )
    doc = acq.model_dump(mode="json")
    doc["frames"] = {
        "pattern": FRAME_GLOB,
        "dark": DARK_TIF if has["dark"] else None,
        "flat": FLAT_TIF if has["flat"] else None,
        "monitor": MONITOR_CSV if has["monitor"] else None,
    }
    for key in ("energy_keV", "wavelength_A", "incidence_deg", "exit_deg"):
        if doc["beam"].get(key) is None:
            doc["beam"].pop(key, None)
    if doc["detector"].get("depth_magnification") is None:
        doc["detector"].pop("depth_magnification")
    if doc["scan"].get("positions_um") is None:
        doc["scan"].pop("positions_um")
    else:
        doc["scan"].pop("step_um", None)
    body = yaml.safe_dump(doc, sort_keys=False, default_flow_style=None, width=100)
    return HEADER + f"# scenario: {scn.name}\n" + body


def _ground_truth(scn: Scenario, plan: Plan, ex: Expanded, written: list[int]) -> dict:
    g = plan.geom
    pos = plan.positions
    step = float(np.median(np.abs(np.diff(pos))))
    series_of = {k: i for i, k in enumerate(written)}
    corrupt = [
        {"series_index": series_of[k], "frame_number": k, "kind": kind}
        for k, kind in sorted(plan.corrupt.items())
    ]
    base_r = scn.acquisition.frame.origin_row_px
    base_c = scn.acquisition.frame.margin_px
    return {
        "schema_version": 1,
        "software": {"name": "crackstack synthetic", "version": __version__},
        "wafer": {
            "diameter_mm": scn.wafer.diameter_mm,
            "thickness_um": scn.wafer.thickness_um,
            "crystal": {
                "z_uvw": list(scn.wafer.crystal.z_uvw),
                "x_uvw": list(scn.wafer.crystal.x_uvw),
            },
            "center_xy_mm": [float(v) for v in scn.wafer.center_xy_mm],
            "center_source": "acquisition",
        },
        "acquisition": {
            "energy_keV": g.energy_keV,
            "reflection": list(scn.acquisition.beam.reflection),
            "geometry": g.geometry,
            "voxel_um": list(natural_voxel_um(g, step)),
        },
        "cracks": ex.cracks,
        "dislocation_loops": ex.loops,
        "slip_bands": ex.slip_bands,
        "points": ex.points,
        "indents": [{k: v for k, v in ind.items() if k != "index"} for ind in ex.indents],
        "frame_numbers": list(written),
        "positions_um": [float(pos[k]) for k in written],
        "drift": {
            "row_px": [float(plan.r0[k] - base_r) for k in written],
            "col_px": [float(plan.c0[k] - base_c) for k in written],
        },
        "origins": {
            "r0_px": [float(plan.r0[k]) for k in written],
            "c0_px": [float(plan.c0[k]) for k in written],
        },
        "monitor": [float(plan.monitor[k]) for k in written],
        "frames_dropped": sorted(set(range(len(pos))) - set(written)),
        "frames_corrupt": [c["series_index"] for c in corrupt],
        "corrupt": corrupt,
        "geometry": {
            "theta_B_deg": g.theta_B_deg,
            "psi0_deg": g.psi0_deg,
            "psi_h_deg": g.psi_h_deg,
            "G": g.G,
            "L": g.L,
            "p_row_um": g.p_row_um,
            "p_col_um": g.p_col_um,
            "band_width_px": g.band_width_px,
            "slit_width_um": g.slit_width_um,
            "slit_offsets_um": [float(plan.D[0]), float(plan.D[-1])],
            "absorption_depth_um": plan.absorption_depth_um,
            "pendellosung_um": plan.band.pendellosung_um,
        },
        "frame_shape": [plan.rows, plan.cols],
        "scenario": scn.model_dump(mode="json"),
    }


def _batches(frames: list[int], per_task: int | None) -> list[list[int]]:
    if per_task is None:
        per_task = int(np.clip(math.ceil(len(frames) / (4 * n_workers())), 1, 32))
    return [frames[i : i + per_task] for i in range(0, len(frames), per_task)]


def render_series(
    scenario: Scenario,
    out_dir: str | Path,
    *,
    seed: int | None = None,
    frames_per_task: int | None = None,
) -> Path:
    """Render a scenario into a folder the pipeline reads.

    Writes ``frame_00000.tif`` ... (uint16; dropped frames have no file), ``acquisition.yaml``
    (a valid :class:`pipeline.config.Acquisition`; paths relative to ``out_dir``), ``dark.tif``,
    ``flat.tif`` and ``monitor.csv`` when the instrument makes them, and ``ground_truth.json``
    (a defect export per SPEC section 7 plus drift, origins, points and frame bookkeeping).
    Frames are made and written by Dask tasks of ``frames_per_task`` frames (default: about four
    tasks per worker, at most 32 frames each), so memory does not grow with the series.

    Parameters
    ----------
    scenario : Scenario
    out_dir : path
        Created if missing; must be empty or hold an earlier synthetic series (replaced).
    seed : int, optional
        Overrides ``instrument.seed``.

    Returns
    -------
    Path
        ``out_dir``.
    """
    t0 = time.perf_counter()
    out = Path(out_dir)
    _prepare_out_dir(out)
    plan, ex, written = build_plan(scenario, seed=seed)
    for note in _check_layout(scenario, plan, "scenario"):
        log.warning(note)
    ins = scenario.instrument
    has = {
        "dark": ins.dark_offset > 0,
        "flat": ins.flat_amplitude > 0,
        "monitor": ins.monitor_variation > 0,
    }
    write_text_atomic(out / ACQUISITION_YAML, _acquisition_yaml(scenario, plan, written, has))
    o = plan.orientation
    if has["dark"]:
        _write_tiff(out / DARK_TIF, to_stored(plan.dark, o))
    if has["flat"]:
        flat = plan.photons * plan.gain
        if plan.noise:  # an average of 16 open-beam exposures
            flat = flat + np.sqrt(flat / 16.0) * _rng(plan.seed, 6).standard_normal(flat.shape)
        _write_tiff(out / FLAT_TIF, to_stored((plan.dark + flat).astype(np.float32), o))
    if has["monitor"]:
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerow(["frame", "monitor"])
        w.writerows([i, f"{plan.monitor[k]:.6f}"] for i, k in enumerate(written))
        write_text_atomic(out / MONITOR_CSV, buf.getvalue())
    token = uuid.uuid4().hex[:8]
    plan_d = dask.delayed(plan, name=f"synth-plan-{token}")
    render = dask.delayed(_render_batch, pure=False)
    tasks = [
        render(plan_d, b, str(out), dask_key_name=f"synth-frames-{i}-{token}")
        for i, b in enumerate(_batches(written, frames_per_task))
    ]
    run_tasks(tasks, "synth")
    truth = _ground_truth(scenario, plan, ex, written)
    validate_defects(truth, str(out / GROUND_TRUTH_JSON))
    write_json_atomic(out / GROUND_TRUTH_JSON, truth)
    load_acquisition(out / ACQUISITION_YAML)  # what we wrote must read back
    log.info(
        "synth: %d frames of %d x %d px written to %s in %.1f s",
        len(written),
        plan.rows,
        plan.cols,
        out,
        time.perf_counter() - t0,
    )
    return out

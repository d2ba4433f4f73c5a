"""Segment crack surfaces, dislocation loops and slip bands in the reconstructed volume.

Input: ``volume.ome.zarr`` level 0 (float32 corrected intensity, axes z, y, x, anisotropic voxels).
Output: ``labels/defects`` in the same OME-Zarr (ids match the component table) and the
component table (``components.json``, written by the orchestrator) for the measure stage.

Method, in the order the data flow through it
---------------------------------------------
1. **Background.** The perfect crystal is a band ~1 with Pendelloesung fringes that vary with
   depth and bright entrance/exit surface lines: layers parallel to the surface, constant along
   the scan axis x. The background ``B(z, y)`` is the lower quartile along x of each (z, y)
   row's wafer voxels plus the depth's typical quartile-to-median gap (a defect covering less
   than 3/4 of the row does not move it; a plain median was lifted by two cracks on one plane
   over 53 % of their rows), median-filtered over 5 rows in y (so that a hot-pixel streak
   longer than 3/4 of a row cannot lift its row).
2. **Wafer mask and residual.** Voxels brighter than half their row background after a 1-voxel
   Gaussian, eroded laterally by :data:`EDGE_ERODE_VOX` voxels (the last voxels of the blurred
   edge step, whose residual is a bright rim of ~3 noise sigmas): ``R = V - B`` inside the mask,
   0 outside. ``R`` is clipped at -4 noise sigmas (the flanks of a dark structure would respond
   like bright sheets). The **edge zone** is the band of ``segment.edge_zone_um`` inside the
   mask's lateral border; its edge normal is the gradient of the laterally smoothed mask.
3. **Hot-pixel streaks** (lines along x one voxel thin in z and y) are replaced by their (z, y)
   neighbours (:func:`_destreak`).
4. **Hessian responses** at each scale (um, converted per axis; :mod:`pipeline.hessian`):
   a plate measure for crack sheets (Frangi et al. 1998, plate variant) and a line measure for
   dislocations (Sato et al. 1998). Sheets whose normal lies within ``segment.surface_gate_deg``
   of z (residual surface lines, fringes) are zeroed voxel by voxel, and so are, in the edge
   zone, sheets whose normal lies within ``segment.edge_gate_deg`` of the edge normal (the edge
   face; an edge crack's normal is perpendicular to it), and every response in the band of the
   same width beyond the mask (flanks of the edge step). Noise unit of each response: the
   1.4826 x median absolute deviation (MAD) of its signed form inside the wafer, times the
   tail-to-MAD ratio the same response has on white noise (:func:`_tail_ratios`). The defect
   response is the maximum over measures and scales, in these units. Blocks are computed with a
   halo (``dask.array.overlap``, ``boundary="none"``) covering the Gaussian, the stencils and
   steps 2-3, so chunked results equal whole-array results (tested).
5. **Hysteresis** (Canny 1986): components (26-connected) of ``response > low`` that contain a
   voxel ``> high``. Thresholds default to :data:`DEFAULT_HIGH_SIGMA` / :data:`DEFAULT_LOW_SIGMA`
   noise units, overridden by ``segment.high_sigma`` / ``segment.low_sigma``.
6. **Components across chunks**, in three phases: label each block (``scipy.ndimage.label``)
   and keep only components that are seeded or touch an inner block face, as sparse voxel lists;
   join the labels of 26-adjacent voxels on either side of block borders (faces, edges and
   corners) with ``scipy.sparse.csgraph.connected_components``; relabel. Our own merge rather
   than ``dask_image.ndmeasure.label`` because it needs no dense label volume in memory and keeps
   the per-voxel response for the shape step.
7. **Size filter** on the largest extent (``segment.min_size_um``) and :data:`MIN_VOXELS`.
8. **Boundaries first** (:func:`_classify`). Loops and slip bands lie inside the crystal, so
   a sheet-like component that reaches within ``segment.boundary_contact_um`` of the entrance
   or exit surface (the first / last z row with a background in its y rows) or of the edge is
   a crack opening there, whatever its size or shape (small {111} surface cracks were taken for
   loops before). Components mostly in the edge zone must peak at
   :data:`EDGE_SCORE_FACTOR` x the high threshold (the edge step's residual leaves faint
   pieces), sheets among them that face the edge are the edge face (rejected), and the rest
   that meet the edge are edge cracks (also when thin: a crack not much deeper than the zone).
   **Shape and class** of the interior components from principal axes of the voxel boxes in um
   (linearity, planarity: Demantke et al. 2011, "Dimensionality based scale selection in 3D
   lidar point clouds", ISPRS Archives 38-5/W12), the 3D skeleton's topology
   (``skimage.morphology.skeletonize`` with Lee et al. 1994 thinning, and its Euler number: a
   loop closes) and the hole it encloses, and the fraction of line-dominated seed voxels (a
   loop that the resolution fills into a disc). The skeleton decides only ring versus line: it thins
   sheets to a few voxels or nothing (PHYSICS.md 6.4). Parallel straight lines near each other
   form one slip band (``segment.slip_family_angle_deg``, ``segment.slip_family_gap_um``).
   Parallel lines that the resolution merges into one ribbon look like a loop or a sheet; they
   are told apart by the coherence of their voxels' least-curvature directions once the
   diffracted ray (along which the slit draws everything out) is projected out
   (:func:`_ribbon_coherence`, ``segment.slip_coherence_min``; needs ``ray_zyx``, which
   :func:`segment_volume` takes from the volume's geometry).
   **Loops beside a boundary crack** (:func:`_peel_loops`): loops around a contact indent touch
   the blurred response of its surface cracks and join their component. A crack component that
   meets a boundary is cut into watershed basins of its response around maxima of dynamic
   :data:`PEEL_DYNAMIC_SIGMA` (Beucher & Meyer 1993, "The morphological approach to
   segmentation: the watershed transformation"); basins that meet no boundary and classify as
   loops are split off, the rest stays one crack (a crack is never cut into several).
9. **Ids** 1..N sorted by centroid (x, then y, then z), so reruns and chunkings give the same ids.

Limitations: a crack parallel to the surface (normal within 20 deg of z) is suppressed with the
surface lines; a loop or slip band that touches a surface or lies within
``segment.boundary_contact_um`` of it or of the edge is reported as a crack; the edge is taken to
be nearly vertical (its normal lateral); an edge crack whose plane faces the edge (normal within
``segment.edge_gate_deg`` of the edge normal) is removed with the edge face; interior cracks are
told from loops only by the shape rules of step 8 (the evaluation scans hold none); a defect
line along x one voxel thin in z and y is taken for a hot-pixel streak; a defect covering more
than 3/4 of the rows of 5 neighbouring (z, y) rows along x, or of a (z, x) column along y, is
taken for background. The shape rules were tuned on invented volumes with
voxels near (6.8, 2.5, 10) um; the boundary, edge and ribbon rules on the 21 random evaluation
scans of docs/accuracy.md (voxels (4.06, 1.5, 4) um) and checked on 9 fresh ones.
"""

from __future__ import annotations

import logging
import math
import time
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path

import dask
import dask.array as da
import numpy as np
from scipy import ndimage as ndi
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from pipeline import omezarr
from pipeline.compute import (
    current_client,
    fetch,
    in_task,
    keep_tasks,
    materialize,
    run_tasks,
    shares_memory,
)
from pipeline.config import SegmentConfig
from pipeline.errors import InputError
from pipeline.hessian import (
    eigvalsh3,
    halo_voxels,
    hessian_um,
    line_from_eigs,
    line_measure,
    sheet_from_eigs,
    sheet_measure,
    sheet_normal_lateral,
    sheet_normal_z2,
    slabs,
)

__all__ = [
    "segment_volume",
    "segment_array",
    "sheet_measure",
    "line_measure",
    "bench_cases",
    "labels_from_result",
]

log = logging.getLogger(__name__)

CRACK, LOOP, SLIP = "crack", "dislocation_loop", "slip_band"

#: Hysteresis thresholds when the config leaves them null, in noise units of the response.
#: Chosen on clean invented wafers (band, fringes, surfaces, edge, streaks, Poisson noise at 10
#: to 3000 counts per voxel): 32 volumes of 0.5 M voxels gave no component at 6 / 3.5
#: (tests/test_segment.py::test_clean_wafer_has_no_defects repeats three of them).
DEFAULT_HIGH_SIGMA = 6.0
DEFAULT_LOW_SIGMA = 3.5
#: Lateral erosion of the wafer mask at the wafer edge, voxels: the last voxel of the blurred
#: edge step. Wider erosion erases edge cracks (a 20 um margin left 0-17 um of the 20-37 um
#: deep edge cracks of the random evaluation); the edge face itself is removed by its
#: orientation instead (``segment.edge_gate_deg``).
EDGE_ERODE_VOX = 2
#: A sheet with at least this fraction of its voxels in the edge zone and its normal within
#: ``segment.edge_gate_deg`` of the edge normal is the edge face (rejected).
EDGE_FACE_FRACTION = 0.5
#: Components mostly in the edge zone need a peak response of this many times the high
#: threshold (the edge step's residual leaves pieces just above it).
EDGE_SCORE_FACTOR = 2.0
#: Components that meet no boundary need a peak response of this many times the high threshold.
#: The reconstructed noise is correlated (interpolation between frames), so the white-noise
#: tail of the noise unit understates its far tail: on the 30 evaluation scans, pieces of noise
#: and fringes peaked at 6-7.4 noise units, interior defects at >= 14 (loops), 45 (slip bands).
INTERIOR_SCORE_FACTOR = 1.5
#: The ribbon (merged slip lines) test needs voxels no coarser than this many finest line scales.
RIBBON_MAX_VOXEL_FACTOR = 1.5
#: Wafer mask: smoothed intensity above this fraction of the row background.
MASK_FRACTION = 0.5
#: Rough mask for the row medians: intensity above this fraction of the band level.
ROUGH_FRACTION = 0.25
#: Rows with fewer wafer voxels than this have no background (treated as outside the wafer).
MIN_ROW_VOXELS = 8
#: Rows (along y) of the median filter on the row backgrounds (odd).
BG_Y_WINDOW = 5
#: Residuals darker than this many noise sigmas are clipped: the flanks of a dark structure
#: (an over-subtracted row, a hole in the mask) would otherwise respond as bright sheets.
NEG_CLIP_SIGMA = 4.0
#: Gaussian scale of the mask smoothing, voxels.
MASK_SMOOTH_VOX = 1.0
#: Streak test (see _destreak): significance in noise sigmas of a run mean, run length along x
#: (voxels), and the fraction of the value the neighbours must leave to the centre.
STREAK_SIGMA = 4.0
STREAK_RUN_VOX = 9
STREAK_THIN = 0.75
#: Thin-line width factor (see _line_width_um; lines measured 6.9-8.5 um, cracks >= 9.2 um on
#: invented volumes with voxels (6.8, 2.5, 10) um and sigma 4 um, where the formula gives 9.0).
LINE_WIDTH_FACTOR = 1.4
#: A line is straight when its linearity (sigma1 - sigma2) / sigma1 is at least this.
STRAIGHT_LINEARITY = 0.6
#: Blob (unresolved small loop): sigma3 / sigma1 at least this, sigma1 at most this (um).
BLOB_THICKNESS = 0.3
BLOB_SIZE_UM = 25.0
#: A sheet-like component no larger than a loop (largest principal width <= LOOP_MAX_SD_UM; a
#: ring of 100 um diameter has 35 um) is a loop filled in by the resolution when at least this
#: fraction of its seed voxels respond more significantly as a line than as a sheet. Measured on
#: 60 forward-model series (voxels 6.8 x 2.5 x 10 um): cracks 0-0.049 (the one above 0.04 has a
#: width of 63 um), loops 0.049-0.39 but for 2 small ones at 0; invented volumes of
#: tests/test_segment.py: cracks <= 0.09, those above 0.04 wider than 60 um. A tight margin.
LOOP_LINE_FRACTION = 0.04
LOOP_MAX_SD_UM = 40.0
#: A closed skeleton is a loop when the projected hole is at least this fraction of its area.
RING_HOLE_FRACTION = 0.1
#: Components with fewer voxels are dropped with the size filter (noise specks).
MIN_VOXELS = 10
#: Line-dominated components with fewer voxels are fragments: joined to a slip line they
#: continue (within FRAGMENT_AXIS_UM of its axis), dropped otherwise.
MIN_LINE_VOXELS = 40
FRAGMENT_AXIS_UM = 15.0
#: Loops split off boundary cracks (:func:`_peel_loops`): components of at least this many
#: voxels are tried; basins around maxima of at least this dynamic (noise units) with at least
#: this many voxels are the candidates. On the demo indent the loops' basins peak at 28-39
#: noise units over saddles near 10-20 and hold ~3000 voxels.
PEEL_MIN_COMPONENT_VOXELS = 2000
PEEL_DYNAMIC_SIGMA = 10.0
PEEL_MIN_VOXELS = 200
#: Dask compute chunk (z, y, x) voxels; clipped to the volume, grown to at least the halo.
COMPUTE_CHUNKS = (256, 256, 256)
#: Volumes up to this many voxels keep their raw responses between the statistics and the
#: labelling (about 4 x (responses + 2) bytes per voxel: ~1.3 GB at 64 M voxels with the
#: default three responses), so the filter bank runs once and the response statistics cover
#: every wafer voxel; larger ones take the statistics on lateral windows and compute the
#: responses again for labelling.
KEEP_RESPONSES_MAX_VOXELS = 64_000_000
#: Lateral window size (voxels) and grid for the noise statistics.
SAMPLE_WINDOW = 96
SAMPLE_GRID = 3

CLASS_COLOURS: dict[str, tuple[int, int, int, int]] = {
    CRACK: (230, 57, 70, 255),
    LOOP: (69, 123, 230, 255),
    SLIP: (244, 196, 48, 255),
}
MAD_TO_SIGMA = 1.4826  # 1 / Phi^-1(3/4): MAD of a normal distribution -> its sigma
#: Response noise unit: the lower-tail quantile of the signed response over Phi^-1(1 - q).
TAIL_QUANTILE = 1e-3
TAIL_Z = 3.0902  # Phi^-1(0.999), standard normal quantile (Abramowitz & Stegun 1964, table 26.5)
#: White-noise block (interior voxels) for the tail ratios.
NOISE_BLOCK = (40, 112, 80)


# ---------------------------------------------------------------------------------------------
# Parameters derived once per run


@dataclass(frozen=True)
class _Params:
    voxel_um: tuple[float, float, float]
    sheet_sigmas_um: tuple[float, ...]
    line_sigmas_um: tuple[float, ...]
    high: float
    low: float
    min_size_um: float
    erosion_vox: tuple[int, int]  # (y, x)
    depth: tuple[int, int, int]
    surface_gate_deg: float = 20.0
    edge_zone_vox: tuple[int, int] = (0, 0)  # (y, x)
    edge_zone_um: float = 0.0
    edge_gate_deg: float = 30.0
    contact_vox: int = 3  # z voxels
    contact_yx_vox: tuple[int, int] = (0, 0)
    slip_angle_deg: float = 12.0
    slip_gap_um: float = 120.0
    slip_coherence_min: float = 0.74

    @property
    def sigmas(self) -> tuple[float, ...]:
        return tuple(sorted(set(self.sheet_sigmas_um) | set(self.line_sigmas_um)))


@dataclass
class _Stats:
    band: float
    noise_sigma: float
    response: dict[tuple[str, float], tuple[float, float]] = field(default_factory=dict)
    spread: dict[tuple[str, float], float] = field(default_factory=dict)


def _params(cfg: SegmentConfig, voxel_um: tuple[float, float, float]) -> _Params:
    if not cfg.sheet_sigmas_um:
        raise InputError("segment.sheet_sigmas_um: list at least one scale in um (e.g. [4.0, 8.0])")
    if any(not (d > 0 and math.isfinite(d)) for d in voxel_um):
        raise InputError(f"volume voxel_um {list(voxel_um)}: every voxel size must be a positive number of um")
    high = DEFAULT_HIGH_SIGMA if cfg.high_sigma is None else float(cfg.high_sigma)
    low = DEFAULT_LOW_SIGMA if cfg.low_sigma is None else float(cfg.low_sigma)
    # One threshold given: the other default follows it rather than contradict it.
    if cfg.low_sigma is None:
        low = min(low, high)
    elif cfg.high_sigma is None:
        high = max(high, low)
    if low > high:
        raise InputError(
            f"segment.low_sigma ({low}) is above segment.high_sigma ({high}): the low "
            "(growing) threshold must be <= the high (seed) threshold"
        )
    ey = ex = EDGE_ERODE_VOX
    zy = int(math.ceil(cfg.edge_zone_um / voxel_um[1]))
    zx = int(math.ceil(cfg.edge_zone_um / voxel_um[2]))
    sig = sorted(set(cfg.sheet_sigmas_um) | set(cfg.line_sigmas_um))
    hess = np.max([halo_voxels(s, voxel_um) for s in sig], axis=0)
    mask_reach = int(math.ceil(4.0 * MASK_SMOOTH_VOX))
    # Reach of steps 2-3 (mask smoothing, lateral erosion, streak neighbours and runs) plus the
    # Hessian's: the residual at a voxel depends on that many neighbours. The edge zone and the
    # edge normal (smoothed mask) add their own reach on top of the mask's.
    ny_, nx_ = (int(math.ceil(TRUNCATE_EDGE * v)) + 1 for v in _edge_smooth_vox(cfg.edge_zone_um, voxel_um))
    pre = (mask_reach + 1,
           mask_reach + ey + 1 + max(zy, ny_),
           mask_reach + ex + max(2 * STREAK_RUN_VOX, zx, nx_))
    depth = tuple(int(h + p) for h, p in zip(hess, pre, strict=True))
    return _Params(
        voxel_um=tuple(float(v) for v in voxel_um),  # type: ignore[arg-type]
        sheet_sigmas_um=tuple(float(s) for s in cfg.sheet_sigmas_um),
        line_sigmas_um=tuple(float(s) for s in cfg.line_sigmas_um),
        high=high,
        low=low,
        min_size_um=float(cfg.min_size_um),
        erosion_vox=(ey, ex),
        depth=depth,  # type: ignore[arg-type]
        surface_gate_deg=float(cfg.surface_gate_deg),
        edge_zone_vox=(zy, zx),
        edge_zone_um=float(cfg.edge_zone_um),
        edge_gate_deg=float(cfg.edge_gate_deg),
        contact_vox=int(math.ceil(cfg.boundary_contact_um / voxel_um[0])),
        contact_yx_vox=(min(zy, int(math.ceil(cfg.boundary_contact_um / voxel_um[1]))),
                        min(zx, int(math.ceil(cfg.boundary_contact_um / voxel_um[2])))),
        slip_angle_deg=float(cfg.slip_family_angle_deg),
        slip_gap_um=float(cfg.slip_family_gap_um),
        slip_coherence_min=float(cfg.slip_coherence_min),
    )


#: Gaussian truncation (sigmas) of the smoothed mask that gives the edge normal.
TRUNCATE_EDGE = 3.0


def _edge_smooth_vox(edge_zone_um: float, voxel_um) -> tuple[float, float]:
    """(y, x) Gaussian scale, voxels, of the mask smoothing for the edge normal: half the edge
    zone (at least one voxel), so that the normal is the edge's over the zone, not the noise's."""
    s = max(0.5 * float(edge_zone_um), 1e-6)
    return max(s / float(voxel_um[1]), 1.0), max(s / float(voxel_um[2]), 1.0)


# ---------------------------------------------------------------------------------------------
# Block kernels (NumPy, one block with its halo)


def _masked_quantile(values: np.ndarray, valid: np.ndarray, q: float) -> np.ndarray:
    """Quantile ``q`` (linear interpolation) along the last axis of the valid entries (NaN where
    none), without NaN warnings: sort with the invalid ones pushed to the end (+inf) and
    interpolate between the valid ones."""
    srt = np.sort(np.where(valid, values, np.inf).astype(np.float32), axis=-1)
    cnt = valid.sum(axis=-1)
    pos = q * np.maximum(cnt - 1, 0)
    lo_i = np.floor(pos).astype(np.int64)
    hi_i = np.minimum(lo_i + 1, np.maximum(cnt - 1, 0))
    lo = np.take_along_axis(srt, lo_i[..., None], axis=-1)[..., 0]
    hi = np.take_along_axis(srt, hi_i[..., None], axis=-1)[..., 0]
    frac = (pos - lo_i).astype(np.float32)
    with np.errstate(invalid="ignore"):
        out = lo + frac * (hi - lo)
    out = np.where(frac > 0, out, lo)
    out[cnt == 0] = np.nan
    return out.astype(np.float32)


def _masked_median(values: np.ndarray, valid: np.ndarray) -> np.ndarray:
    """Median along the last axis of the valid entries (NaN where none)."""
    return _masked_quantile(values, valid, 0.5)


def _row_quantiles_block(block: np.ndarray, band: float) -> np.ndarray:
    """Lower quartile and median along x of the wafer voxels of each (z, y) row, stacked as
    (z, 2 y): the inputs of :func:`_background`; NaN for rows outside the wafer."""
    rough = block > ROUGH_FRACTION * band
    q25, q50 = _masked_quantile(block, rough, 0.25), _masked_quantile(block, rough, 0.5)
    few = rough.sum(axis=2) < MIN_ROW_VOXELS
    q25[few] = np.nan
    q50[few] = np.nan
    return np.concatenate([q25, q50], axis=1)


def _column_quantiles_block(block: np.ndarray, bg_zy: np.ndarray, band: float) -> np.ndarray:
    """Lower quartile and median along y of ``V - B(z, y)`` over the wafer voxels of each (z, x)
    column, stacked as (z, 2 x): the inputs of :func:`_column_background`. Columns with fewer
    than half their voxels well inside the wafer (above half the row background) get NaN."""
    bg_zy = np.asarray(bg_zy)
    if bg_zy.ndim == 3:  # broadcast along x by map_blocks
        bg_zy = bg_zy[:, :, 0]
    b = np.nan_to_num(bg_zy)[:, :, None]
    inside = (block > MASK_FRACTION * b) & (bg_zy >= ROUGH_FRACTION * band)[:, :, None]
    # Only voxels clear of the wafer edge's blurred step: where the edge runs obliquely to the
    # voxel columns, one x column holds the step's dim voxels in some rows and crystal in
    # others, and a column term taken over both, subtracted from the crystal rows, left a
    # bright sheet along the edge (+15 noise sigmas; seven false edge cracks in one scan of
    # the harness, seed 200). mode="nearest": a block's own border is no edge (an edge
    # within this margin of an x block border keeps its step voxels, as before).
    e = EDGE_ERODE_VOX + 1
    inside = ndi.minimum_filter(inside, size=(1, 2 * e + 1, 2 * e + 1), mode="nearest")
    few = inside.sum(axis=1) < max(MIN_ROW_VOXELS, block.shape[1] // 2)
    diff = np.swapaxes(block - b, 1, 2)  # (z, x, y)
    ok = np.swapaxes(inside, 1, 2)
    q25, q50 = _masked_quantile(diff, ok, 0.25), _masked_quantile(diff, ok, 0.5)
    q25[few] = np.nan
    q50[few] = np.nan
    return np.concatenate([q25, q50], axis=1)


def _quartile_level(q25: np.ndarray, q50: np.ndarray) -> np.ndarray:
    """Lower quartile plus the depth's typical quartile-to-median gap (``q25``, ``q50``: (z, n)
    per-line statistics; the gap is the median over the n lines of each depth, 0.674 noise
    sigma): a level that a bright defect covering up to 3/4 of a line does not lift."""
    gap = _masked_median(q50 - q25, np.isfinite(q50 - q25))
    return q25 + np.nan_to_num(gap)[:, None]


def _unstack_quartiles(stacked: np.ndarray, chunks: tuple[int, ...]) -> tuple[np.ndarray, np.ndarray]:
    """Undo the per-block stacking [q25 | q50] along axis 1 of blocks ``chunks`` long."""
    parts = np.split(stacked, np.cumsum([2 * c for c in chunks])[:-1], axis=1)
    return (np.concatenate([q[:, : q.shape[1] // 2] for q in parts], axis=1),
            np.concatenate([q[:, q.shape[1] // 2:] for q in parts], axis=1))


def _column_background(q25: np.ndarray, q50: np.ndarray) -> np.ndarray:
    """Background C(z, x): what is constant along the slit at one (z, x), i.e. the errors of
    single frames (beam-monitor residuals; a sub-pixel depth-origin error shifts that frame's
    fringes). A second sweep of a median polish (Tukey 1977, "Exploratory Data Analysis",
    ch. 11), but on the lower quartile plus the depth's typical quartile-to-median gap
    ``median_x(q50 - q25)`` (0.674 noise sigma): a bright defect covering up to 3/4 of a column
    does not lift it (a plain median would, and leave a dark ghost beside the defect)."""
    out = _quartile_level(q25, q50)
    return np.where(np.isfinite(out), out, 0.0).astype(np.float32)


def _background(q25: np.ndarray, q50: np.ndarray) -> np.ndarray:
    """Background B(z, y): each (z, y) row's lower quartile along x plus the depth's typical
    quartile-to-median gap ``median_y(q50 - q25)`` (0.674 noise sigma), median-filtered along y
    over :data:`BG_Y_WINDOW` rows; rows outside the wafer stay NaN.

    As for the column term (:func:`_column_background`), a bright defect covering up to 3/4 of
    a row does not lift it. A plain median did when defects covered more than half of the rows
    (a through crack and a corner crack on the same plane, 156 of 296 um of their rows, seed 208
    of the harness): the lifted background left a dark line along x beside them whose flanks
    the sheet measure took for four false cracks, 17 um either side in y. The filter along y
    puts a single row lifted by a hot-pixel streak back to its neighbours' level (the streak
    itself is then removed by :func:`_destreak`)."""
    rows = _quartile_level(q25, q50)
    h = BG_Y_WINDOW // 2
    pad = np.pad(rows, ((0, 0), (h, h)), constant_values=np.nan)
    stack = np.stack([pad[:, k:k + rows.shape[1]] for k in range(2 * h + 1)], axis=-1)
    out = _masked_median(stack, np.isfinite(stack))
    out[~np.isfinite(rows)] = np.nan
    return out


def _residual(
    block: np.ndarray, bg_zy: np.ndarray, bg_zx: np.ndarray, band: float, erosion_vox: tuple[int, int]
) -> tuple[np.ndarray, np.ndarray]:
    """Residual ``V - B(z, y) - C(z, x)`` inside the (laterally eroded) wafer mask, 0 elsewhere.

    ``bg_zy`` (rows of the block) and ``bg_zx`` (columns of the block) are the two background
    terms of :func:`_background` and :func:`_column_background`."""
    block = np.asarray(block, dtype=np.float32)
    valid = np.isfinite(bg_zy) & (bg_zy >= ROUGH_FRACTION * band)
    b = np.where(valid, bg_zy, 0).astype(np.float32)[:, :, None]
    smooth = ndi.gaussian_filter(block, MASK_SMOOTH_VOX, mode="nearest")
    mask = (smooth > MASK_FRACTION * b) & valid[:, :, None]
    ey, ex = erosion_vox
    if ey or ex:
        # mode="nearest": the array's own border is not a wafer edge.
        mask = ndi.minimum_filter(mask, size=(1, 2 * ey + 1, 2 * ex + 1), mode="nearest")
    col = np.nan_to_num(np.asarray(bg_zx, np.float32))[:, None, :]
    res = block - b
    res -= col
    res[~mask] = 0
    return res, mask


def _destreak(res: np.ndarray, noise_sigma: float) -> np.ndarray:
    """Replace hot-pixel streaks (lines along x one voxel thin in z and y) by the mean of their
    four (z, y) neighbours, and clip dark residuals at ``-NEG_CLIP_SIGMA`` noise sigmas.

    Test, on running means over :data:`STREAK_RUN_VOX` voxels along x: the excess over the
    neighbour mean is significant (> :data:`STREAK_SIGMA` sigmas of that mean) and carries at
    least :data:`STREAK_THIN` of the centre's value. A streak keeps ~all of its value; a real
    line along x (point-spread >= 0.6 voxel) or a sheet containing x keeps about half or less,
    because its neighbours are bright too.
    """
    res = np.maximum(res, np.float32(-NEG_CLIP_SIGMA * noise_sigma))
    pad = np.pad(res, ((1, 1), (1, 1), (0, 0)), mode="edge")
    mean4 = pad[:-2, 1:-1] + pad[2:, 1:-1]
    mean4 += pad[1:-1, :-2]
    mean4 += pad[1:-1, 2:]
    mean4 *= np.float32(0.25)
    excess = res - mean4
    n = STREAK_RUN_VOX
    e_run = ndi.uniform_filter1d(excess, n, axis=2, mode="nearest")
    r_run = ndi.uniform_filter1d(res, n, axis=2, mode="nearest")
    # std of (r - mean of 4 neighbours) is sqrt(1 + 1/4) sigma for white noise; /sqrt(n) for the run.
    sig_run = STREAK_SIGMA * noise_sigma * math.sqrt(1.25 / n)
    hit = (e_run > sig_run) & (e_run > STREAK_THIN * r_run)
    if not hit.any():
        return res
    hit = ndi.maximum_filter1d(hit.view(np.uint8), n, axis=2, mode="constant", cval=0).astype(bool)
    hit &= excess > 0
    out = res.copy()
    out[hit] = mean4[hit]
    return out


def _edge_zone(mask: np.ndarray, p: _Params) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Edge zone of a block's wafer mask, the lateral edge normal there, and the band beyond.

    The zone: mask voxels within ``edge_zone_vox`` (y, x) of a voxel outside the mask in the
    same z slice (the array border is no edge: ``mode="nearest"``); the band beyond: voxels
    outside the mask as near to it. The normal ``(e_y, e_x)`` (unit, physical): the gradient
    in um of the mask smoothed laterally over half the zone; 0 outside zone and band."""
    zy, zx = p.edge_zone_vox
    if zy == 0 and zx == 0:
        zero = np.zeros(mask.shape, np.float32)
        return np.zeros(mask.shape, bool), zero, zero, np.zeros(mask.shape, bool)
    size = (1, 2 * zy + 1, 2 * zx + 1)
    inner = ndi.minimum_filter(mask, size=size, mode="nearest")
    zone = mask & ~inner
    beyond = ndi.maximum_filter(mask, size=size, mode="nearest") & ~mask
    if not zone.any():
        zero = np.zeros(mask.shape, np.float32)
        return zone, zero, zero, beyond
    sy, sx = _edge_smooth_vox(p.edge_zone_um, p.voxel_um)
    # The normal is needed in the zone and the band beyond only: smooth the box around them
    # grown by the Gaussian's radius and the gradient's stencil (the values there are those of
    # the whole block; the edge is usually one side of a block, so this saves most of a
    # 70-100 tap filter over the block).
    need = zone | beyond
    zi = np.nonzero(need.any(axis=(1, 2)))[0]
    yi = np.nonzero(need.any(axis=(0, 2)))[0]
    xi = np.nonzero(need.any(axis=(0, 1)))[0]
    ry, rx = (int(TRUNCATE_EDGE * v + 0.5) + 2 for v in (sy, sx))
    crop = (slice(int(zi[0]), int(zi[-1]) + 1),
            slice(max(int(yi[0]) - ry, 0), min(int(yi[-1]) + 1 + ry, mask.shape[1])),
            slice(max(int(xi[0]) - rx, 0), min(int(xi[-1]) + 1 + rx, mask.shape[2])))
    g = ndi.gaussian_filter(mask[crop].astype(np.float32), (0, sy, sx), mode="nearest",
                            truncate=TRUNCATE_EDGE)
    gy = np.gradient(g, axis=1) / np.float32(p.voxel_um[1])
    gx = np.gradient(g, axis=2) / np.float32(p.voxel_um[2])
    norm = np.hypot(gy, gx)
    ok = need[crop] & (norm > 0)
    ey = np.zeros(mask.shape, np.float32)
    ex = np.zeros(mask.shape, np.float32)
    ey[crop] = np.where(ok, gy / np.where(ok, norm, 1), 0)
    ex[crop] = np.where(ok, gx / np.where(ok, norm, 1), 0)
    return zone, ey, ex, beyond


def _edge_zone_only(mask: np.ndarray, p: _Params) -> np.ndarray:
    """The edge zone of :func:`_edge_zone` alone (no edge normal: a third of its time)."""
    zy, zx = p.edge_zone_vox
    if zy == 0 and zx == 0:
        return np.zeros(mask.shape, bool)
    return mask & ~ndi.minimum_filter(mask, size=(1, 2 * zy + 1, 2 * zx + 1), mode="nearest")


def _raw_responses(res: np.ndarray, p: _Params, edge: tuple[np.ndarray, np.ndarray] | None = None
                   ) -> dict[tuple[str, float], np.ndarray]:
    """Signed sheet and line responses per scale (sheets parallel to the surface zeroed; with
    ``edge`` = the lateral edge normal (e_y, e_x) of :func:`_edge_zone`, sheets facing the edge
    zeroed too).

    The eigenvalue step runs slab by slab along z (:func:`pipeline.hessian.slabs`) so that its
    temporaries stay small next to the six Hessian arrays."""
    cos2 = np.float32(math.cos(math.radians(p.surface_gate_deg)) ** 2)
    cos2e = np.float32(math.cos(math.radians(p.edge_gate_deg)) ** 2)
    use_edge = edge is not None and bool(np.any(edge[0]) or np.any(edge[1]))
    out: dict[tuple[str, float], np.ndarray] = {}
    for s in p.sigmas:
        h = hessian_um(res, sigma_um=s, voxel_um=p.voxel_um, mode="constant")
        do_sheet, do_line = s in p.sheet_sigmas_um, s in p.line_sigmas_um
        sheet = np.empty(res.shape, np.float32) if do_sheet else None
        line = np.empty(res.shape, np.float32) if do_line else None
        for sl in slabs(res.shape):
            hs = tuple(c[sl] for c in h)
            e = eigvalsh3(*hs)
            if sheet is not None:
                v = sheet_from_eigs(*e, signed=True)
                v[sheet_normal_z2(hs, *e) > cos2] = 0
                if use_edge:
                    # Only where the edge normal is set (the edge zone and the band beyond):
                    # elsewhere the projection is 0 and nothing is gated.
                    at = np.nonzero((edge[0][sl] != 0) | (edge[1][sl] != 0))
                    if at[0].size:
                        ey, ex = edge[0][sl][at], edge[1][sl][at]
                        pyy, pyx, pxx = sheet_normal_lateral(tuple(c[at] for c in hs), *(x[at] for x in e))
                        gate = ey * ey * pyy + 2 * ey * ex * pyx + ex * ex * pxx > cos2e
                        v[tuple(i[gate] for i in at)] = 0
                sheet[sl] = v
            if line is not None:
                line[sl] = line_from_eigs(*e, signed=True)
        if sheet is not None:
            out[("sheet", s)] = sheet
        if line is not None:
            out[("line", s)] = line
        del h
    return out


def _response(raw: dict, stats: _Stats, shape) -> tuple[np.ndarray, np.ndarray]:
    """Defect response per voxel: the largest sheet or line response over the scales, in noise
    units (each response minus its median, over its noise unit); and where the line response is
    the larger of the two (used for the shape of a component)."""
    zs = np.full(shape, -np.inf, np.float32)
    zl = np.full(shape, -np.inf, np.float32)
    for key, arr in raw.items():
        med, unit = stats.response[key]
        tgt = zs if key[0] == "sheet" else zl
        np.maximum(tgt, (arr - np.float32(med)) / np.float32(unit), out=tgt)
    return np.maximum(zs, zl), zl > zs


def _block_geometry(block, bg_zy, bg_zx, band: float, p: _Params) -> dict:
    """What one block with its halo gives before the noise level is known: the residual
    (``res``, before :func:`_destreak`), the wafer mask less the edge zone (``sample``: where the
    noise and the response statistics are taken), the band beyond the edge (``beyond``) and
    ``edge`` = ``(e_y, e_x, contact)``: the lateral edge normal in the edge zone ((0, 0)
    elsewhere) and whether the voxel lies within ``boundary_contact_um`` of the wafer edge."""
    res, mask = _residual(block, bg_zy, bg_zx, band, p.erosion_vox)
    zone, ey, ex, beyond = _edge_zone(mask, p)
    # Contact with the wafer edge: within boundary_contact_um (plus the eroded rim) of a voxel
    # that is lit but holds no crystal (dark, not exactly 0). The borders of the lit region
    # (voxels no frame lights are exactly 0, SPEC run-folder contract) are no edge.
    cy, cx = p.contact_yx_vox
    bgr = np.nan_to_num(np.asarray(bg_zy, np.float32))[:, :, None]
    dark_lit = (np.asarray(block) != 0) & (np.asarray(block) < MASK_FRACTION * bgr) & (bgr > 0)
    reach = (1, 2 * (cy + EDGE_ERODE_VOX + 1) + 1, 2 * (cx + EDGE_ERODE_VOX + 1) + 1)
    contact = zone & ndi.maximum_filter(dark_lit, size=reach, mode="constant", cval=False)
    return {"res": res, "sample": mask & ~zone, "beyond": beyond, "edge": (ey, ex, contact)}


def _geometry_raw(g: dict, noise_sigma: float, p: _Params) -> dict[tuple[str, float], np.ndarray]:
    """Signed raw responses (edge-gated) of a block from :func:`_block_geometry`. The edge gate
    only acts where the edge normal is set (zone and band beyond), so outside the edge zone
    they equal the ungated responses the statistics are defined on."""
    return _raw_responses(_destreak(g["res"], noise_sigma), p, g["edge"][:2])


def _block_fields(block, bg_zy, bg_zx, band: float, noise_sigma: float, p: _Params) -> dict:
    """:func:`_block_geometry` plus the raw responses (``raw``) of one block with its halo."""
    g = _block_geometry(block, bg_zy, bg_zx, band, p)
    return {**g, "raw": _geometry_raw(g, noise_sigma, p)}


def _fields_response(f: dict, stats: _Stats) -> tuple[np.ndarray, np.ndarray, tuple]:
    """Defect response (noise units), line-dominated flag and edge arrays from
    :func:`_block_fields`."""
    resp, line = _response(f["raw"], stats, f["beyond"].shape)
    # Beyond the edge the residual is 0 by construction: what responds there is the flank of
    # the edge step, not a defect.
    resp[f["beyond"]] = 0
    # Per voxel: the edge normal (0, 0 outside the zone and the band beyond it, where the
    # response is 0) and the contact flag; kept as three arrays (a stacked copy would triple
    # the block's memory), picked at the kept voxels only by _label_response.
    return resp, line, f["edge"]


def _response_block(block, bg_zy, bg_zx, stats: _Stats, p: _Params
                    ) -> tuple[np.ndarray, np.ndarray, tuple[np.ndarray, np.ndarray, np.ndarray]]:
    """Defect response (noise units) of one block with its halo, the line-dominated flag and
    ``(e_y, e_x, contact)`` (see :func:`_block_fields`)."""
    return _fields_response(_block_fields(block, bg_zy, bg_zx, stats.band, stats.noise_sigma, p), stats)


# ---------------------------------------------------------------------------------------------
# Global statistics


def _band_level(vol: da.Array) -> float:
    """Perfect-crystal band level: median of the bright part of a strided subsample."""
    step = max(1, int(round((float(np.prod(vol.shape)) / 4e6) ** (1 / 3))))  # ~4 M voxels
    sub = np.asarray(vol[::step, ::step, ::step].compute(), dtype=np.float32)
    finite = sub[np.isfinite(sub)]
    if finite.size == 0 or float(np.percentile(finite, 99)) <= 0:
        raise InputError("volume: no bright perfect-crystal band found (all voxels <= 0 or NaN); "
                         "segment expects corrected intensity with the band near 1")
    bright = finite[finite > ROUGH_FRACTION * float(np.percentile(finite, 99))]
    return float(np.median(bright))


def _windows(shape: tuple[int, int, int]) -> list[tuple[slice, slice, slice]]:
    """Lateral sample windows (full depth) on a regular grid; the whole volume when small."""
    nz, ny, nx = shape
    w = SAMPLE_WINDOW

    def starts(n):
        if n <= SAMPLE_GRID * w:
            return [(0, n)]
        c = np.linspace(w / 2, n - w / 2, SAMPLE_GRID)
        return [(int(round(v - w / 2)), int(round(v - w / 2)) + w) for v in c]

    return [(slice(0, nz), slice(a, b), slice(c, d)) for a, b in starts(ny) for c, d in starts(nx)]


def _windows_yx(shape: tuple[int, int, int]) -> np.ndarray:
    """(y, x) columns covered by the sample windows of :func:`_windows` (full depth)."""
    out = np.zeros(shape[1:], bool)
    for _, sy, sx in _windows(shape):
        out[sy, sx] = True
    return out


def _read_with_halo(vol: da.Array, win, depth) -> tuple[np.ndarray, tuple[slice, ...], list, list]:
    """The window plus its halo (clipped to the array), the window inside it, and the bounds."""
    lo = [max(0, s.start - d) for s, d in zip(win, depth, strict=True)]
    hi = [min(n, s.stop + d) for s, d, n in zip(win, depth, vol.shape, strict=True)]
    block = np.asarray(vol[tuple(slice(a, b) for a, b in zip(lo, hi, strict=True))].compute(), np.float32)
    inner = tuple(slice(s.start - a, s.stop - a) for s, a in zip(win, lo, strict=True))
    return block, inner, lo, hi


def _window_residuals(vol: da.Array, bg: tuple[np.ndarray, np.ndarray], band: float, p: _Params
                      ) -> tuple[float, list]:
    """Noise level of the residual inside the wafer (1.4826 MAD, away from the edge zone: the
    blurred edge step there is no noise), measured on lateral windows placed independently of
    the chunking (so chunked == unchunked); and the windows' residuals, masks and inner parts."""
    pieces_r, blocks = [], []
    for win in _windows(vol.shape):
        block, inner, lo, hi = _read_with_halo(vol, win, p.depth)
        res, mask = _residual(block, bg[0][lo[0]:hi[0], lo[1]:hi[1]], bg[1][lo[0]:hi[0], lo[2]:hi[2]],
                              band, p.erosion_vox)
        mask = mask & ~_edge_zone_only(mask, p)
        blocks.append((res, mask, inner))
        pieces_r.append(res[inner][mask[inner]])
    return _noise_sigma(np.concatenate(pieces_r)), blocks


def _noise_sigma(r: np.ndarray) -> float:
    """1.4826 MAD of the residual sample ``r`` (InputError when too small or constant)."""
    if r.size < 1000:
        raise InputError(f"volume: only {r.size} voxels inside the wafer in the sampled windows; "
                         "segment needs the perfect-crystal band (intensity ~1) in the volume")
    noise = float(MAD_TO_SIGMA * np.median(np.abs(r - np.median(r))))
    if not noise > 0:
        raise InputError("volume: the residual inside the wafer has zero spread (constant values?); "
                         "segment needs a measured volume with noise to set its thresholds")
    return noise


def _response_stats(stats: _Stats, pieces: dict[tuple[str, float], list[np.ndarray]], p: _Params) -> _Stats:
    """Median and noise unit (MAD times the white-noise tail ratio) of every signed response
    from its values at the sampled wafer voxels."""
    ratios = _tail_ratios(p)
    for key, parts in pieces.items():
        v = np.concatenate(parts)
        med = float(np.median(v))
        spread = float(MAD_TO_SIGMA * np.median(np.abs(v - med)))
        stats.spread[key] = spread
        unit = spread * ratios[key]
        stats.response[key] = (med, unit if unit > 0 else 1e-12)
    return stats


def _statistics(vol: da.Array, bg: tuple[np.ndarray, np.ndarray], band: float, p: _Params) -> _Stats:
    """Noise level of the residual and median / spread of every signed response, measured on
    lateral windows placed independently of the chunking (so chunked == unchunked). Used for
    volumes too large to keep their responses (:data:`KEEP_RESPONSES_MAX_VOXELS`)."""
    noise, blocks = _window_residuals(vol, bg, band, p)
    stats = _Stats(band=band, noise_sigma=noise)
    pieces: dict = {}
    for res, mask, inner in blocks:
        raw = _raw_responses(_destreak(res, noise), p)
        sel = mask[inner]
        for key, arr in raw.items():
            pieces.setdefault(key, []).append(arr[inner][sel])
    return _response_stats(stats, pieces, p)


def _tail_ratios(p: _Params) -> dict[tuple[str, float], float]:
    """Tail-to-MAD ratio of every signed response to white Gaussian noise on these voxels.

    The responses are far from normal (a sheet measure is small on most noise voxels and large on
    a few), so 1.4826 MAD understates their tails by 2-10x. We keep the MAD of the volume's own
    response (robust: defects, and the dark flanks every bright defect has, barely move it) and
    scale it by this ratio, measured once on seeded white noise: the response's 0.1 % quantile
    over the normal 0.1 % quantile (3.09), divided by its 1.4826 MAD. One noise unit is then a
    normal-equivalent sigma in the far tail, where the thresholds sit."""
    return _tail_ratios_cached(p.voxel_um, p.sheet_sigmas_um, p.line_sigmas_um, p.surface_gate_deg)


@lru_cache(maxsize=16)
def _tail_ratios_cached(voxel_um, sheet_sigmas_um, line_sigmas_um, surface_gate_deg) -> dict:
    # Only the scales and the voxel matter for white noise (no surface in it, no edge).
    p = _Params(voxel_um, sheet_sigmas_um, line_sigmas_um, 0.0, 0.0, 0.0, (0, 0), (0, 0, 0),
                surface_gate_deg=surface_gate_deg)
    rng = np.random.default_rng(20240607)
    halo = np.max([halo_voxels(s, voxel_um) for s in p.sigmas], axis=0)
    shape = tuple(int(2 * h + n) for h, n in zip(halo, NOISE_BLOCK, strict=True))
    noise = rng.standard_normal(shape, dtype=np.float32)
    inner = tuple(slice(h, -h) for h in halo)
    out = {}
    for key, arr in _raw_responses(noise, p).items():
        v = arr[inner].ravel()
        med = float(np.median(v))
        spread = MAD_TO_SIGMA * float(np.median(np.abs(v - med)))
        tail = 0.5 * float(np.quantile(v, 1 - TAIL_QUANTILE) - np.quantile(v, TAIL_QUANTILE)) / TAIL_Z
        out[key] = tail / spread
    return out


# ---------------------------------------------------------------------------------------------
# Chunked driver: phase 1 (label blocks)


def _compute_chunks(shape, depth, chunks) -> tuple[tuple[int, ...], ...]:
    """Chunk sizes per axis: pieces of ``chunks``, the last merged when thinner than the halo."""
    out = []
    for n, d, c in zip(shape, depth, chunks, strict=True):
        c = max(int(c), d, 1)
        sizes = [c] * (n // c) + ([n % c] if n % c else [])
        if len(sizes) > 1 and sizes[-1] < d:
            last = sizes.pop()  # with two pieces, sizes[-2] would not survive the pop
            sizes[-1] += last
        out.append(tuple(sizes))
    return tuple(out)


def _label_block(block, bg_zy, bg_zx, index, nblocks, lo_g, trim_lo, trim_hi, stats: _Stats,
                 p: _Params) -> dict:
    """Phase 1 for one block with its halo: the defect response, then :func:`_label_response`."""
    block = materialize(block)
    inner = tuple(slice(a, n - b) for a, b, n in zip(trim_lo, trim_hi, block.shape, strict=True))
    resp, line, zone = _response_block(block, bg_zy, bg_zx, stats, p)
    return _label_response(resp[inner], index, nblocks, lo_g, p.low, p.high, line[inner],
                           tuple(a[inner] for a in zone))


def _trim(trim_lo, trim_hi, shape) -> tuple[slice, ...]:
    return tuple(slice(a, n - b) for a, b, n in zip(trim_lo, trim_hi, shape, strict=True))


def _geometry_block(block, bg_zy, bg_zx, trim_lo, trim_hi, band: float, p: _Params,
                    windows_yx: np.ndarray) -> tuple[dict, np.ndarray]:
    """:func:`_block_geometry` of one block with its halo, and the residual at the block's
    wafer voxels outside the edge zone in the (y, x) columns of the sample windows
    (``windows_yx``, the block's part of :func:`_windows_yx`): the noise sample, the same voxels
    and values as :func:`_window_residuals` takes, whatever the chunking."""
    block = materialize(block)
    g = _block_geometry(block, bg_zy, bg_zx, band, p)
    inner = _trim(trim_lo, trim_hi, block.shape)
    return g, g["res"][inner][g["sample"][inner] & windows_yx[None, :, :]]


def _second(pair: tuple[dict, np.ndarray]) -> np.ndarray:
    return pair[1]


def _sampled_raw(f: dict) -> dict[str, np.ndarray]:
    """The statistics' sample of one block's raw responses (:func:`_fields_block`)."""
    return {key: arr[f["sample"]] for key, arr in f["raw"].items()}


def _fields_block(geo: tuple[dict, np.ndarray], trim_lo, trim_hi, noise_sigma: float, p: _Params,
                  windows_yx: np.ndarray) -> dict:
    """Raw responses of one block from :func:`_geometry_block`'s result, everything trimmed to the block
    (copies, so that the halo's memory is freed while the fields wait for the statistics).
    The statistics' sample is restricted to the sample windows' columns as the noise's."""
    g = geo[0]
    inner = _trim(trim_lo, trim_hi, g["res"].shape)
    raw = _geometry_raw(g, noise_sigma, p)
    return {"raw": {k: np.ascontiguousarray(v[inner]) for k, v in raw.items()},
            "sample": g["sample"][inner] & windows_yx[None, :, :],
            "beyond": np.ascontiguousarray(g["beyond"][inner]),
            "edge": tuple(np.ascontiguousarray(a[inner]) for a in g["edge"])}


def _label_fields(f: dict, index, nblocks, lo_g, stats: _Stats, p: _Params) -> dict:
    """Phase 1 from kept fields (:func:`_fields_block`): the response, then
    :func:`_label_response`."""
    resp, line, edge = _fields_response(f, stats)
    return _label_response(resp, index, nblocks, lo_g, p.low, p.high, line, edge)


def _label_response(resp: np.ndarray, index, nblocks, lo_g, low: float, high: float,
                    line: np.ndarray | None = None, edge: tuple | None = None) -> dict:
    """Hysteresis candidates and local labels (26-connected) of one block's response.

    Returns sparse voxel lists (global indices ``coords``, local label ``lab``, response ``z``)
    of the components that are seeded (contain a voxel > ``high``) or touch an inner block face
    (they may get a seed from a neighbour); ``seeded[lab - 1]`` per local label; ``line``: the
    line-dominated flag of each kept voxel and ``edge`` (shape (n, 3)) its edge normal
    (e_y, e_x) and edge-contact flag, from the three arrays of the ``edge`` argument (zeros when
    not given)."""
    if line is None:
        line = np.zeros(resp.shape, bool)
    lab, n = ndi.label(resp > low, structure=np.ones((3, 3, 3), bool))
    if n == 0:
        return {"coords": np.zeros((0, 3), np.int32), "lab": np.zeros(0, np.int32),
                "z": np.zeros(0, np.float32), "line": np.zeros(0, bool), "edge": np.zeros((0, 3), np.float32),
                "seeded": np.zeros(0, bool), "n": 0}
    # A component is seeded when any of its voxels exceeds ``high`` (the same as its maximum
    # doing so; ndi.maximum per label sorts all labelled voxels and took ~10 s on 30 M voxels).
    seeded = np.zeros(n + 1, bool)
    seeded[lab[resp > high]] = True
    seeded = seeded[1:]
    touch = np.zeros(n + 1, bool)
    for ax in range(3):
        if index[ax] > 0:
            touch[np.unique(np.take(lab, 0, axis=ax))] = True
        if index[ax] < nblocks[ax] - 1:
            touch[np.unique(np.take(lab, -1, axis=ax))] = True
    keep = np.concatenate([[False], seeded]) | touch
    keep[0] = False
    idx = np.nonzero(keep[lab])
    coords = np.stack(idx, axis=1).astype(np.int32) + np.asarray(lo_g, np.int32)
    return {"coords": coords, "lab": lab[idx].astype(np.int32), "z": resp[idx].astype(np.float32),
            "line": line[idx],
            "edge": (np.stack([np.asarray(a[idx], np.float32) for a in edge], axis=1) if edge is not None
                     else np.zeros((idx[0].size, 3), np.float32)),
            "seeded": seeded, "n": int(n)}


# Phase 2 (join faces) and 3 (relabel)

_HALF_OFFSETS = np.array(
    [o for o in np.ndindex(3, 3, 3) if o > (1, 1, 1)], dtype=np.int64
) - 1  # 13 of the 26 neighbour offsets; the other 13 are their negatives


def _merge_blocks(parts: list[dict], bounds: list[tuple], shape) -> list[dict]:
    """Join block labels across block borders (26-connectivity) and keep seeded components.

    ``bounds[i] = (lo, hi)`` of block i in global voxels. Returns one dict per component with
    ``coords`` (sorted lexicographically), ``z`` (the response of each voxel) and ``line``."""
    offsets = np.cumsum([0] + [pt["n"] for pt in parts])
    total = int(offsets[-1])
    if total == 0:
        return []
    coords = np.concatenate([pt["coords"] for pt in parts])
    gid = np.concatenate([pt["lab"].astype(np.int64) - 1 + offsets[i] for i, pt in enumerate(parts)])
    zval = np.concatenate([pt["z"] for pt in parts])
    lval = np.concatenate([pt["line"] for pt in parts])
    eval_ = np.concatenate([pt["edge"] for pt in parts]).reshape(-1, 3)
    seeded = np.concatenate([pt["seeded"] for pt in parts])
    if coords.shape[0] == 0:
        return []
    shape = np.asarray(shape, np.int64)
    # Voxels on a block border that faces another block.
    on_border = np.zeros(coords.shape[0], bool)
    start = 0
    for pt, (lo, hi) in zip(parts, bounds, strict=True):
        c = pt["coords"]
        m = np.zeros(c.shape[0], bool)
        for ax in range(3):
            if lo[ax] > 0:
                m |= c[:, ax] == lo[ax]
            if hi[ax] < shape[ax]:
                m |= c[:, ax] == hi[ax] - 1
        on_border[start:start + c.shape[0]] = m
        start += c.shape[0]
    bc = coords[on_border].astype(np.int64)
    bgid = gid[on_border]
    lin = (bc[:, 0] * shape[1] + bc[:, 1]) * shape[2] + bc[:, 2]
    order = np.argsort(lin)
    lin_s, gid_s = lin[order], bgid[order]
    ea, eb = [], []
    for off in _HALF_OFFSETS:
        nb = bc + off
        ok = np.all((nb >= 0) & (nb < shape), axis=1)
        nlin = (nb[ok, 0] * shape[1] + nb[ok, 1]) * shape[2] + nb[ok, 2]
        pos = np.searchsorted(lin_s, nlin)
        pos = np.minimum(pos, lin_s.size - 1)
        hit = lin_s[pos] == nlin
        ea.append(bgid[ok][hit])
        eb.append(gid_s[pos[hit]])
    a = np.concatenate(ea) if ea else np.zeros(0, np.int64)
    b = np.concatenate(eb) if eb else np.zeros(0, np.int64)
    graph = coo_matrix((np.ones(a.size, np.int8), (a, b)), shape=(total, total))
    ncomp, comp = connected_components(graph, directed=False)
    comp_seeded = np.bincount(comp[np.nonzero(seeded)[0]], minlength=ncomp) > 0
    vcomp = comp[gid]
    keep = comp_seeded[vcomp]
    order = np.nonzero(keep)[0]
    order = order[np.argsort(vcomp[order], kind="stable")]
    vcomp, coords, zval, lval, eval_ = vcomp[order], coords[order], zval[order], lval[order], eval_[order]
    cuts = np.nonzero(np.diff(vcomp))[0] + 1
    out = []
    for piece in np.split(np.arange(vcomp.size), cuts):
        if piece.size == 0:
            continue
        c = coords[piece]
        o = np.lexsort((c[:, 2], c[:, 1], c[:, 0]))
        out.append({"coords": c[o], "z": zval[piece][o], "line": lval[piece][o],
                    "edge": eval_[piece][o]})
    return out


# ---------------------------------------------------------------------------------------------
# Shape description and classification


def _principal_axes(coords: np.ndarray, voxel_um) -> tuple[np.ndarray, np.ndarray]:
    """Standard deviations (descending, um) and axes (rows, (z, y, x)) of the union of voxel
    boxes: covariance of the centres plus d^2/12 per axis (second moment of a uniform box)."""
    pts = coords.astype(np.float64) * np.asarray(voxel_um)
    cov = np.cov(pts.T, bias=True) if pts.shape[0] > 1 else np.zeros((3, 3))
    cov = cov + np.diag(np.asarray(voxel_um, float) ** 2 / 12.0)
    w, v = np.linalg.eigh(cov)
    order = np.argsort(w)[::-1]
    return np.sqrt(np.maximum(w[order], 0)), v[:, order].T


def _unit_xyz(v_zyx: np.ndarray) -> list[float]:
    """Unit vector in (x, y, z) order with a deterministic sign (largest component positive)."""
    v = np.asarray(v_zyx, float)[::-1]
    v = v / np.linalg.norm(v)
    if v[np.argmax(np.abs(v))] < 0:
        v = -v
    return [float(round(c, 6)) for c in v]


def _skeleton_closed(coords: np.ndarray) -> tuple[bool, int]:
    """Does the component's 3D skeleton close (Euler number <= 0: at least one tunnel)?

    ``skimage.morphology.skeletonize`` (Lee et al. 1994) preserves topology, so a ring stays a
    closed curve (Euler number 0) and an open line a simple arc (1)."""
    from skimage.measure import euler_number
    from skimage.morphology import skeletonize

    lo = coords.min(axis=0)
    m = np.zeros(tuple(coords.max(axis=0) - lo + 3), bool)
    c = coords - lo + 1
    m[c[:, 0], c[:, 1], c[:, 2]] = True
    # Enclosed background bubbles (cavities) would add to the Euler number and hide a tunnel.
    skel = skeletonize(ndi.binary_fill_holes(m))
    if not skel.any():
        return False, 0
    return int(euler_number(skel, connectivity=3)) <= 0, int(skel.sum())


def _hole_fraction(coords: np.ndarray, axes: np.ndarray, voxel_um) -> float:
    """Area fraction of the enclosed hole when the component is projected on its own plane.

    The plane is spanned by the two largest principal axes; pixels are the median voxel size, and
    a 3x3 closing bridges the gaps that coarse voxels leave. A ring (loop) leaves a large hole; a
    noise pinhole that gives a thick line a tunnel in 3D leaves almost none."""
    pts = coords.astype(np.float64) * np.asarray(voxel_um)
    pts -= pts.mean(axis=0)
    uv = pts @ axes[:2].T
    px = float(np.median(voxel_um))
    ij = np.floor((uv - uv.min(axis=0)) / px).astype(int) + 2
    img = np.zeros(tuple(ij.max(axis=0) + 3), bool)
    img[ij[:, 0], ij[:, 1]] = True
    img = ndi.binary_closing(img, structure=np.ones((3, 3), bool))
    filled = ndi.binary_fill_holes(img)
    return float((filled & ~img).sum() / max(int(filled.sum()), 1))


def _describe(comp: dict, voxel_um, high: float) -> dict:
    c = comp["coords"]
    sd, axes = _principal_axes(c, voxel_um)
    s1 = max(sd[0], 1e-9)
    lo, hi = c.min(axis=0), c.max(axis=0) + 1
    ext_zyx = (hi - lo) * np.asarray(voxel_um)
    return {
        "voxels": int(c.shape[0]),
        "bbox_zyx": [int(v) for v in lo] + [int(v) for v in hi],
        "centroid_idx": c.mean(axis=0),
        "extent_um": [float(round(v, 3)) for v in ext_zyx[::-1]],
        "max_extent_um": float(ext_zyx.max()),
        "planarity": float((sd[1] - sd[2]) / s1),
        "linearity": float((sd[0] - sd[1]) / s1),
        "score": float(comp["z"].max()),
        # Over the seed voxels: where the line measure is the more significant one.
        "line_fraction": float(np.mean(comp["line"][comp["z"] > high])) if (comp["z"] > high).any() else 0.0,
        "normal": _unit_xyz(axes[2]),
        "direction": _unit_xyz(axes[0]),
        "sd_um": [float(v) for v in sd],
        "axes_zyx": axes,
    }


def _line_width_um(p: _Params) -> float:
    """Largest cross-section standard deviation (um) of the voxels segmented around a thin line:
    :data:`LINE_WIDTH_FACTOR` x sqrt(sigma_min^2 + (largest voxel / 2)^2)."""
    return LINE_WIDTH_FACTOR * math.hypot(min(p.sigmas), max(p.voxel_um) / 2)


def _surface_rows(bg_zy: np.ndarray, band: float) -> tuple[np.ndarray, np.ndarray]:
    """First and last z index of the wafer in each y row (the rows with a background), -1 and
    -1 where the row has none."""
    valid = np.isfinite(bg_zy) & (np.nan_to_num(bg_zy) >= ROUGH_FRACTION * band)
    any_ = valid.any(axis=0)
    top = np.where(any_, np.argmax(valid, axis=0), -1)
    bot = np.where(any_, valid.shape[0] - 1 - np.argmax(valid[::-1], axis=0), -1)
    return top.astype(np.int64), bot.astype(np.int64)


def _meets_surface(coords: np.ndarray, rows: tuple[np.ndarray, np.ndarray], contact_vox: int) -> bool:
    """Whether a component reaches within ``contact_vox`` z voxels of the entrance or exit
    surface of its own y rows."""
    top, bot = rows[0][coords[:, 1]], rows[1][coords[:, 1]]
    ok = top >= 0
    z = coords[:, 0]
    return bool(np.any(ok & ((z <= top + contact_vox) | (z >= bot - contact_vox))))


def _classify(comp: dict, d: dict, p: _Params) -> tuple[str | None, str | None]:
    """(class, None) or (None, rejection reason), from the component's place and shape.

    Boundaries first (``d["meets_surface"]``, ``d["meets_edge"]``, ``d["edge_fraction"]`` and
    ``d["edge_normal_yx"]``, set by :func:`segment_array`): a component mostly in the edge zone
    is rejected when faint (peak < :data:`EDGE_SCORE_FACTOR` x high) or when it is a sheet
    facing the edge, and is an edge crack when it meets the edge; any other component that meets
    a boundary and is not a thin line is a crack (or, parallel to the surface and thin, a
    surface line); a component that meets none and peaks below :data:`INTERIOR_SCORE_FACTOR` x
    high is rejected as noise. Then, for the interior ones, in this order: a ring (closed skeleton around a visible hole) is a loop; a thin component
    (second principal width <= ``line_width_um``) is a line: straight -> slip line, curved ->
    loop (an arc of a loop whose contrast vanishes in part); a small thick blob (smallest over
    largest principal width >= :data:`BLOB_THICKNESS`, largest <= :data:`BLOB_SIZE_UM`) is an
    unresolved small loop; a loop-sized component of which at least :data:`LOOP_LINE_FRACTION`
    of the seed voxels respond more as a line than as a sheet is a loop filled in by the
    resolution;
    everything else is a sheet: a crack unless it is a thin layer parallel to the surface."""
    sd = d["sd_um"]
    voxel_um, line_width_um = p.voxel_um, _line_width_um(p)
    thin_layer = (abs(d["normal"][2]) > math.cos(math.radians(p.surface_gate_deg))
                  and sd[2] <= line_width_um)
    if d.get("edge_fraction", 0.0) >= EDGE_FACE_FRACTION:
        # Mostly in the edge zone. The residual of the blurred edge step leaves faint pieces
        # there (peaks of 6-9 noise units on the evaluation scans, edge cracks 85-220).
        if d["score"] < EDGE_SCORE_FACTOR * p.high:
            return None, "faint component along the wafer edge"
        n_yx = np.asarray(d["normal"], float)[[1, 0]]
        if abs(float(n_yx @ d["edge_normal_yx"])) >= math.cos(math.radians(p.edge_gate_deg)):
            return None, "sheet facing the wafer edge (edge face)"
        if d.get("meets_edge"):
            # A crack from the edge, thin when its radial depth is not much more than the zone.
            d["hole_fraction"], d["closed"] = 0.0, False
            return CRACK, None
    boundary = bool(d.get("meets_surface") or d.get("meets_edge"))
    fragment = sd[1] <= line_width_um and d["voxels"] < MIN_LINE_VOXELS
    if not boundary and not fragment and d["score"] < INTERIOR_SCORE_FACTOR * p.high:
        return None, "faint component inside the wafer"
    if boundary and sd[1] > line_width_um:
        # Loops and slip bands lie inside the crystal; a sheet that meets the entrance or exit
        # surface or the edge is a crack opening there.
        if thin_layer:
            return None, "thin layer parallel to the surface (surface line or fringe)"
        d["hole_fraction"] = 0.0
        d["closed"] = False
        return CRACK, None
    hole = _hole_fraction(comp["coords"], d["axes_zyx"], voxel_um)
    # The skeleton only for ring candidates: it is slow on large sheets and says nothing there.
    d["closed"] = bool(hole >= RING_HOLE_FRACTION and _skeleton_closed(comp["coords"])[0])
    d["hole_fraction"] = hole
    if d["closed"]:
        return LOOP, None
    if sd[1] <= line_width_um:
        if d["voxels"] < MIN_LINE_VOXELS:
            return None, "line fragment"
        return (SLIP if d["linearity"] >= STRAIGHT_LINEARITY else LOOP), None
    if sd[2] >= BLOB_THICKNESS * sd[0] and sd[0] <= BLOB_SIZE_UM:
        return LOOP, None
    if d["line_fraction"] >= LOOP_LINE_FRACTION and sd[0] <= LOOP_MAX_SD_UM:
        # A sheet-like patch that is partly a tube: a loop filled in by the resolution.
        return LOOP, None
    if thin_layer:
        return None, "thin layer parallel to the surface (surface line or fringe)"
    return CRACK, None


def _place(comp: dict, d: dict, surf_rows: tuple[np.ndarray, np.ndarray], p: _Params) -> None:
    """Set the boundary keys of ``d`` that :func:`_classify` reads: ``meets_surface``,
    ``meets_edge``, ``edge_fraction`` and ``edge_normal_yx``."""
    d["meets_surface"] = _meets_surface(comp["coords"], surf_rows, p.contact_vox)
    in_zone = np.any(comp["edge"][:, :2] != 0, axis=1)
    d["meets_edge"] = bool(np.any(comp["edge"][:, 2] > 0))
    d["edge_fraction"] = float(in_zone.mean())
    en = comp["edge"][in_zone, :2].mean(axis=0) if in_zone.any() else np.zeros(2)
    d["edge_normal_yx"] = en / max(float(np.linalg.norm(en)), 1e-12)


def _peel_loops(comp: dict, d: dict, surf_rows: tuple[np.ndarray, np.ndarray], p: _Params
                ) -> tuple[dict, dict, list[tuple[dict, dict]]]:
    """Split interior loops off a crack component that meets a boundary.

    Loops next to a surface crack (around a contact indent) touch the crack's blurred response
    and join its component, which then is one crack. The component's response is cut into
    catchment basins around its maxima of dynamic >= :data:`PEEL_DYNAMIC_SIGMA` noise units
    (``skimage.morphology.h_maxima`` and a marker watershed, ``skimage.segmentation.watershed``,
    Beucher & Meyer 1993); a basin of at least :data:`PEEL_MIN_VOXELS` voxels that meets no
    boundary and that :func:`_classify` calls a loop is split off. Everything else stays with
    the crack, so a crack is never cut into several cracks.

    Returns the (possibly smaller) crack component with its description and the loops as
    (component, description) pairs."""
    from skimage.morphology import h_maxima
    from skimage.segmentation import watershed

    c = comp["coords"]
    lo = c.min(axis=0)
    idx = tuple((c - lo).T)
    img = np.zeros(tuple(c.max(axis=0) - lo + 1), np.float32)
    img[idx] = comp["z"]
    fp = np.ones((3, 3, 3), bool)
    markers, n = ndi.label(h_maxima(img, PEEL_DYNAMIC_SIGMA, footprint=fp), structure=fp)
    if n < 2:
        return comp, d, []
    mask = np.zeros(img.shape, bool)
    mask[idx] = True
    basin = watershed(-img, markers, mask=mask, connectivity=3)[idx]
    sizes = np.bincount(basin, minlength=n + 1)

    def as_loop(sel: np.ndarray) -> tuple[dict, dict] | None:
        part = {key: v[sel] for key, v in comp.items()}
        dp = _describe(part, p.voxel_um, p.high)
        if dp["max_extent_um"] < p.min_size_um:
            return None
        _place(part, dp, surf_rows, p)
        if dp["meets_surface"] or dp["meets_edge"]:
            return None
        return (part, dp) if _classify(part, dp, p)[0] == LOOP else None

    cand = [k for k in np.nonzero(sizes >= PEEL_MIN_VOXELS)[0] if k > 0 and as_loop(basin == k)]
    if not cand:
        return comp, d, []
    # A loop with several maxima is cut into several basins: loop basins that touch are joined
    # when together they still are one interior loop.
    lab = np.zeros(img.shape, np.int64)
    lab[idx] = np.where(np.isin(basin, cand), basin, 0)
    group = {int(k): int(k) for k in cand}

    def root(k: int) -> int:
        while group[k] != k:
            k = group[k]
        return k

    for k in cand:
        near = np.unique(lab[ndi.binary_dilation(lab == k, structure=fp)])
        for j in near[(near > 0) & (near != k)]:
            a, b = root(int(j)), root(int(k))
            group[max(a, b)] = min(a, b)
    keep = np.ones(c.shape[0], bool)
    loops = []
    for r in sorted({root(k) for k in cand}):
        members = [k for k in cand if root(k) == r]
        joined = as_loop(np.isin(basin, members)) if len(members) > 1 else None
        pieces = [joined] if joined else [as_loop(basin == k) for k in members]
        loops.extend(pieces)
        keep &= ~np.isin(basin, members)
    rest = {key: v[keep] for key, v in comp.items()}
    dr = _describe(rest, p.voxel_um, p.high)
    _place(rest, dr, surf_rows, p)
    cls, _ = _classify(rest, dr, p)
    if cls != CRACK:
        # The rest is no crack on its own: keep the component whole.
        return comp, d, []
    log.info("segment: %d loop(s) split off a crack of %d voxels", len(loops), d["voxels"])
    return rest, dr, loops


def ray_direction_zyx(psi_h_deg: float) -> tuple[float, float, float]:
    """Unit direction (z, y, x) of the diffracted ray in the wafer, at ``psi_h_deg`` from the
    surface normal in the scattering plane (x, z) (PHYSICS.md: the scan axis x lies in the
    scattering plane): ``(cos psi_h, 0, sin psi_h)``. Each detector pixel integrates the lit
    slab along this ray, so every reconstructed feature is drawn out along it."""
    a = math.radians(float(psi_h_deg))
    return (math.cos(a), 0.0, math.sin(a))


def _ribbon_resolved(p: _Params) -> bool:
    """Whether the voxels are fine enough for :func:`_ribbon_coherence`: every voxel edge at
    most :data:`RIBBON_MAX_VOXEL_FACTOR` x the finest line scale. On coarser voxels the
    direction of least curvature lines up with the coarsest axis (a loop on voxels of
    (6.8, 2.5, 10) um gave a coherence of 0.77 along x)."""
    s = min(p.line_sigmas_um) if p.line_sigmas_um else min(p.sheet_sigmas_um)
    return max(p.voxel_um) <= RIBBON_MAX_VOXEL_FACTOR * s


def _ribbon_coherence(vol: da.Array, bg: tuple[np.ndarray, np.ndarray], coords: np.ndarray,
                      weights: np.ndarray, stats: _Stats, p: _Params,
                      ray_zyx: tuple[float, float, float]) -> tuple[float, np.ndarray]:
    """How well the component's voxels agree on one line direction across the ray.

    Per voxel, the direction of least curvature (eigenvector of the Hessian eigenvalue of
    smallest magnitude, at the finest line scale, of the same residual the responses use): along
    the line for a tube, in the plane for a sheet. The slit draws every feature out along the
    diffracted ray ``b``, so that direction is taken out first (``v - (v.b) b``). The
    orientation tensor of the rest, ``T = sum w v v^T / sum w |v|^2`` (w: the response), has
    its largest eigenvalue near 1 when the voxels share one direction (the parallel lines of a
    slip band, also when the resolution merges them into one ribbon) and near 1/2 when the
    directions turn (the tangent of a loop, the in-plane directions of a sheet). On the 21
    random evaluation scans (docs/accuracy.md) the 36 interior loops gave 0.51-0.71 and 4 of
    the 5 slip bands 0.75-0.93. Returns (that eigenvalue, its unit eigenvector (z, y, x))."""
    lo = np.maximum(coords.min(axis=0) - np.asarray(p.depth), 0)
    hi = np.minimum(coords.max(axis=0) + 1 + np.asarray(p.depth), vol.shape)
    sl = tuple(slice(int(a), int(b)) for a, b in zip(lo, hi, strict=True))
    block = np.asarray(vol[sl].compute(), np.float32)
    res, _ = _residual(block, bg[0][sl[0], sl[1]], bg[1][sl[0], sl[2]], stats.band, p.erosion_vox)
    res = _destreak(res, stats.noise_sigma)
    s = min(p.line_sigmas_um) if p.line_sigmas_um else min(p.sheet_sigmas_um)
    h = hessian_um(res, sigma_um=s, voxel_um=p.voxel_um, mode="constant")
    loc = coords - lo
    hz = [c[loc[:, 0], loc[:, 1], loc[:, 2]] for c in h]
    m = np.empty((loc.shape[0], 3, 3), np.float64)
    m[:, 0, 0], m[:, 0, 1], m[:, 0, 2] = hz[0], hz[1], hz[2]
    m[:, 1, 0], m[:, 1, 1], m[:, 1, 2] = hz[1], hz[3], hz[4]
    m[:, 2, 0], m[:, 2, 1], m[:, 2, 2] = hz[2], hz[4], hz[5]
    w, v = np.linalg.eigh(m)
    k = np.argmin(np.abs(w), axis=1)
    vec = v[np.arange(v.shape[0]), :, k]
    wt = np.clip(np.asarray(weights, np.float64), 0, None)
    if wt.sum() <= 0:
        wt = np.ones_like(wt)
    b = np.asarray(ray_zyx, float)
    b = b / np.linalg.norm(b)
    vp = vec - np.outer(vec @ b, b)
    norm = float((wt * np.einsum("ni,ni->n", vp, vp)).sum())
    if norm <= 0:
        return 0.0, b
    t = np.einsum("n,ni,nj->ij", wt, vp, vp) / norm
    tw, tv = np.linalg.eigh(t)
    return float(tw[-1]), tv[:, -1]


def _slip_families(lines: list[dict], angle_deg: float, gap_um: float) -> list[list[int]]:
    """Group straight lines that are parallel and near each other (union-find on pairs)."""
    n = len(lines)
    parent = list(range(n))

    def find(i):
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return i

    cos_max = math.cos(math.radians(angle_deg))
    for i in range(n):
        for j in range(i + 1, n):
            di, dj = np.asarray(lines[i]["direction"]), np.asarray(lines[j]["direction"])
            if abs(float(di @ dj)) < cos_max:
                continue
            sep = np.asarray(lines[j]["centroid_xyz_um"]) - np.asarray(lines[i]["centroid_xyz_um"])
            along = abs(float(sep @ di))
            perp = float(np.linalg.norm(sep - (sep @ di) * di))
            half = 0.5 * (lines[i]["length_um"] + lines[j]["length_um"])
            if perp <= gap_um and along <= half + gap_um:
                parent[find(i)] = find(j)
    groups: dict[int, list[int]] = {}
    for i in range(n):
        groups.setdefault(find(i), []).append(i)
    return list(groups.values())


# ---------------------------------------------------------------------------------------------
# Public entry points


@dataclass
class SegmentResult:
    """What :func:`segment_array` found: one entry per labelled defect (ids 1..N) and per
    rejected component, with the voxel coordinates of every labelled defect."""

    shape: tuple[int, int, int]
    voxel_um: tuple[float, float, float]
    noise_sigma: float
    band_level: float
    thresholds: dict
    components: list[dict]
    voxels: list[np.ndarray]  # voxels[i]: (n, 3) (z, y, x) indices of the defect with id i + 1
    rejected: list[dict]


def segment_array(
    volume: np.ndarray | da.Array,
    *,
    voxel_um: tuple[float, float, float],
    cfg: SegmentConfig | None = None,
    chunks: tuple[int, int, int] | None = None,
    ray_zyx: tuple[float, float, float] | None = None,
) -> SegmentResult:
    """Segment cracks, dislocation loops and slip bands in a volume (see the module notes).

    Parameters
    ----------
    volume : ndarray or dask array, shape (nz, ny, nx)
        Corrected intensity (band ~1, outside the wafer ~0); not modified.
    voxel_um : (dz, dy, dx)
        Voxel size, um.
    cfg : SegmentConfig, optional
        The ``segment`` config section (defaults when None).
    chunks : (cz, cy, cx), optional
        Dask compute chunk in voxels (default :data:`COMPUTE_CHUNKS`); results do not depend on it.
    ray_zyx : (z, y, x), optional
        Direction of the diffracted ray in the volume (the direction along which the slit
        blurs every feature, :func:`ray_direction_zyx`). Needed to tell a slip band merged
        into one ribbon from a loop (:func:`_ribbon_coherence`); without it such ribbons keep
        the class of their shape.

    Returns
    -------
    SegmentResult
        Components have ``id``, ``class``, ``voxels``, ``bbox_zyx`` (voxel index, end exclusive),
        ``centroid_idx`` (z, y, x voxel index), ``extent_um`` [ex, ey, ez], ``planarity``,
        ``linearity``, ``sheet_fraction``, ``score`` (peak response, noise sigmas), ``normal``
        and ``direction`` (unit [x, y, z]), ``meets_surface`` and ``meets_edge`` (bool);
        interior sheets and loops add ``ribbon_coherence`` (when ``ray_zyx`` is given); loops
        add ``closed``; slip bands add ``lines``.

    Raises
    ------
    InputError
        Not a 3D volume, no wafer band, bad voxel size or inconsistent thresholds.
    """
    cfg = cfg or SegmentConfig()
    t0 = time.monotonic()
    vol = volume if isinstance(volume, da.Array) else da.from_array(np.asarray(volume))
    if vol.ndim != 3:
        raise InputError(f"volume: expected a 3D (z, y, x) array, got shape {tuple(vol.shape)}")
    if not np.issubdtype(vol.dtype, np.number):
        raise InputError(f"volume: expected numbers (float32 intensity), got dtype {vol.dtype}")
    p = _params(cfg, tuple(voxel_um))
    shape = tuple(int(n) for n in vol.shape)

    band = _band_level(vol)
    vx = vol.rechunk({0: min(shape[0], 64), 1: min(shape[1], 128), 2: -1})
    qr = da.map_blocks(_row_quantiles_block, vx, band, drop_axis=2,
                       chunks=(vx.chunks[0], tuple(2 * c for c in vx.chunks[1])), dtype=np.float32)
    qr = run_tasks([qr], "segment: background rows")[0]
    bg_zy = _background(*_unstack_quartiles(qr, vx.chunks[1]))
    vy = vol.rechunk({0: min(shape[0], 64), 1: -1, 2: min(shape[2], 128)})
    bzy = da.from_array(bg_zy, chunks=(vy.chunks[0], vy.chunks[1]))
    qs = da.map_blocks(_column_quantiles_block, vy, bzy[:, :, None], band, drop_axis=1,
                       chunks=(vy.chunks[0], tuple(2 * c for c in vy.chunks[2])), dtype=np.float32)
    qs = run_tasks([qs], "segment: background columns")[0]
    bg_zx = _column_background(*_unstack_quartiles(qs, vy.chunks[2]))
    bg = (bg_zy, bg_zx)
    cchunks = _compute_chunks(shape, p.depth, chunks or COMPUTE_CHUNKS)
    # Under a distributed client each task reads its block with the halo itself (in_task), as
    # register and measure do, instead of receiving the overlap pieces as tasks of their own
    # from other workers. Not timed against that form: with it, the scaling bench volume's
    # segment on 2 workers spent 0.13 s of 16 s of task time on transfers. "tasks": the P2P
    # rechunk such a client picks by default cannot run inside a task. On the local
    # schedulers the shared graph reads every chunk once (in-task reads of the bench's
    # full-y chunks read each chunk about 8 times and were slower).
    read_in_task = current_client() is not None
    vc = vol.rechunk(cchunks, method="tasks") if read_in_task else vol.rechunk(cchunks)
    depth = {ax: (p.depth[ax] if len(cchunks[ax]) > 1 else 0) for ax in range(3)}
    vo = da.overlap.overlap(vc, depth=depth, boundary="none")
    nblocks = tuple(len(c) for c in cchunks)
    starts = [np.concatenate([[0], np.cumsum(c)]) for c in cchunks]
    if read_in_task:
        delayed_blocks = {index: in_task(vo.blocks[index]) for index in np.ndindex(*nblocks)}
    else:
        delayed_blocks = vo.to_delayed()
    blocks = []
    for index in np.ndindex(*nblocks):
        lo = [int(starts[a][index[a]]) for a in range(3)]
        hi = [int(starts[a][index[a] + 1]) for a in range(3)]
        tlo = [depth[a] if index[a] > 0 else 0 for a in range(3)]
        thi = [depth[a] if index[a] < nblocks[a] - 1 else 0 for a in range(3)]
        zs = slice(lo[0] - tlo[0], hi[0] + thi[0])
        bzy = bg_zy[zs, lo[1] - tlo[1]:hi[1] + thi[1]]
        bzx = bg_zx[zs, lo[2] - tlo[2]:hi[2] + thi[2]]
        blocks.append((index, lo, hi, tlo, thi, bzy, bzx))
    bounds = [(lo, hi) for _, lo, hi, *_ in blocks]
    # Kept responses save the second run of the filter bank (51.6 -> 19.0 s on the demo volume).
    # On the threads scheduler they stay in this process; under a distributed client on the
    # workers that made them (only the noise and statistics samples travel to the client); on
    # the processes scheduler, which keeps nothing between calls, the bank runs twice.
    keep = float(np.prod(shape)) <= KEEP_RESPONSES_MAX_VOXELS and (shares_memory() or current_client() is not None)
    if keep:
        # One pass of the filter bank: the residual of every block is kept while the noise
        # level is taken, then the responses while their statistics are taken, then they are
        # labelled. Both statistics use the wafer voxels outside the edge zone in the sample
        # windows' columns: the same voxels and values as :func:`_statistics`.
        win_yx = _windows_yx(shape)
        wins = [win_yx[lo[1]:hi[1], lo[2]:hi[2]] for _, lo, hi, *_ in blocks]
        geo = keep_tasks([dask.delayed(_geometry_block)(delayed_blocks[index], bzy, bzx, tlo, thi,
                                                        band, p, w)
                          for (index, _, _, tlo, thi, bzy, bzx), w in zip(blocks, wins, strict=True)],
                         "segment: residual")
        noise = _noise_sigma(np.concatenate(fetch(geo, _second, "segment: noise sample")))
        fields = keep_tasks([dask.delayed(_fields_block)(g, b[3], b[4], noise, p, w)
                             for g, b, w in zip(geo, blocks, wins, strict=True)],
                            "segment: responses")
        del geo
        pieces: dict = {}
        for sampled in fetch(fields, _sampled_raw, "segment: response sample"):
            for key, arr in sampled.items():
                pieces.setdefault(key, []).append(arr)
        stats = _response_stats(_Stats(band=band, noise_sigma=noise), pieces, p)
        del pieces
        tasks = [dask.delayed(_label_fields)(f, b[0], nblocks, b[1], stats, p)
                 for f, b in zip(fields, blocks, strict=True)]
    else:
        stats = _statistics(vol, bg, band, p)
        tasks = [dask.delayed(_label_block)(delayed_blocks[index], bzy, bzx, index, nblocks, lo,
                                            tlo, thi, stats, p)
                 for index, lo, _, tlo, thi, bzy, bzx in blocks]
    log.info("segment: band %.3f, noise sigma %.4f, thresholds high %.1f / low %.1f noise sigmas",
             band, stats.noise_sigma, p.high, p.low)
    parts = run_tasks(tasks, "segment")
    comps = _merge_blocks(parts, bounds, shape)

    found, rejected, fragments = [], [], []
    surf_rows = _surface_rows(bg_zy, band)
    for comp in comps:
        d = _describe(comp, p.voxel_um, p.high)
        if d["max_extent_um"] < p.min_size_um or d["voxels"] < MIN_VOXELS:
            continue
        _place(comp, d, surf_rows, p)
        cls, why = _classify(comp, d, p)
        if cls == CRACK and (d["meets_surface"] or d["meets_edge"]) and d["voxels"] >= PEEL_MIN_COMPONENT_VOXELS:
            comp, d, loops = _peel_loops(comp, d, surf_rows, p)
            found.extend((LOOP, dl, cl["coords"]) for cl, dl in loops)
        if (cls in (CRACK, LOOP) and ray_zyx is not None and not d["meets_surface"]
                and not d["meets_edge"] and _ribbon_resolved(p)):
            coh, dvec = _ribbon_coherence(vol, bg, comp["coords"], comp["z"], stats, p, ray_zyx)
            d["ribbon_coherence"] = coh
            if coh >= p.slip_coherence_min:
                # Parallel lines merged by the resolution into one ribbon: a slip band.
                cls = SLIP
                d["direction"] = _unit_xyz(dvec)
        if why == "line fragment":
            fragments.append((d, comp["coords"]))
        elif cls is None:
            rejected.append({**_public(d), "reason": why})
        else:
            found.append((cls, d, comp["coords"]))

    objects = _assemble(found, fragments, p)
    objects.sort(key=lambda o: tuple(round(float(v), 6) for v in o[1]["centroid_idx"][::-1]))
    components, voxels = [], []
    for i, (cls, d, coords) in enumerate(objects, start=1):
        components.append({"id": i, "class": cls, **_public(d)})
        voxels.append(coords)
    thresholds = {
        "high_sigma": p.high,
        "low_sigma": p.low,
        "unit": "noise sigmas of each response (1.4826 MAD inside the wafer)",
        "responses": [
            {"measure": k, "sigma_um": s, "median": m, "mad_sigma": stats.spread[(k, s)], "unit": u}
            for (k, s), (m, u) in sorted(stats.response.items())
        ],
    }
    log.info("segment: %d defects (%s), %d rejected, %.1f s", len(components),
             ", ".join(f"{sum(c['class'] == k for c in components)} {k}" for k in (CRACK, LOOP, SLIP)),
             len(rejected), time.monotonic() - t0)
    return SegmentResult(shape, p.voxel_um, stats.noise_sigma, band, thresholds, components, voxels,
                         rejected)


def _public(d: dict) -> dict:
    keys = ("voxels", "bbox_zyx", "centroid_idx", "extent_um", "planarity", "linearity",
            "sd_um", "score", "line_fraction", "normal", "direction", "closed", "hole_fraction",
            "lines", "meets_surface", "meets_edge", "ribbon_coherence")
    out = {k: d[k] for k in keys if k in d}
    if "ribbon_coherence" in out:
        out["ribbon_coherence"] = float(round(out["ribbon_coherence"], 4))
    out["centroid_idx"] = [float(v) for v in d["centroid_idx"]]
    out["planarity"] = float(round(out["planarity"], 4))
    out["linearity"] = float(round(out["linearity"], 4))
    out["sd_um"] = [float(round(v, 3)) for v in out["sd_um"]]
    out["line_fraction"] = float(round(out["line_fraction"], 4))
    if "hole_fraction" in out:
        out["hole_fraction"] = float(round(out["hole_fraction"], 4))
    out["score"] = float(round(out["score"], 3))
    return out


def _assemble(found: list, fragments: list, p: _Params) -> list:
    """Cracks and loops as they are; straight lines (with the fragments that continue them)
    grouped into slip bands."""
    voxel_um = p.voxel_um
    out = [(c, d, x) for c, d, x in found if c != SLIP]
    lines = [[d, x] for c, d, x in found if c == SLIP]
    info = [{"direction": d["direction"],
             "centroid_xyz_um": (d["centroid_idx"] * np.asarray(voxel_um))[::-1],
             "length_um": 2 * math.sqrt(3) * d["sd_um"][0]} for d, _ in lines]
    for fd, fx in fragments:
        f = (fd["centroid_idx"] * np.asarray(voxel_um))[::-1]
        best, best_perp = None, FRAGMENT_AXIS_UM
        for k, li in enumerate(info):
            dvec = np.asarray(li["direction"])
            sep = f - li["centroid_xyz_um"]
            along = abs(float(sep @ dvec))
            perp = float(np.linalg.norm(sep - (sep @ dvec) * dvec))
            if perp <= best_perp and along <= li["length_um"] / 2 + p.slip_gap_um / 2:
                best, best_perp = k, perp
        if best is not None:
            lines[best][1] = np.concatenate([lines[best][1], fx])
    for group in _slip_families(info, p.slip_angle_deg, p.slip_gap_um):
        coords = np.concatenate([lines[i][1] for i in group])
        coords = coords[np.lexsort((coords[:, 2], coords[:, 1], coords[:, 0]))]
        d = _describe({"coords": coords, "z": np.zeros(coords.shape[0], np.float32),
                       "line": np.zeros(coords.shape[0], bool)}, voxel_um, 0.0)
        # Family direction: the lines' mean direction (the family's own principal axis may run
        # across the lines when they are short and many).
        dirs = np.array([lines[i][0]["direction"] for i in group])
        dirs *= np.sign(dirs @ dirs[0])[:, None]
        d["direction"] = _unit_xyz(dirs.mean(axis=0)[::-1])
        d["score"] = float(max(lines[i][0]["score"] for i in group))
        d["lines"] = len(group)
        out.append((SLIP, d, coords))
    return out


def labels_from_result(result: SegmentResult) -> np.ndarray:
    """Dense uint32 label image of a :class:`SegmentResult` (ids 1..N, 0 = background)."""
    lab = np.zeros(result.shape, np.uint32)
    for i, c in enumerate(result.voxels, start=1):
        lab[c[:, 0], c[:, 1], c[:, 2]] = i
    return lab


def _write_labels(volume_path: Path, result: SegmentResult) -> None:
    colours = {c["id"]: CLASS_COLOURS[c["class"]] for c in result.components}
    props = {c["id"]: {"class": c["class"], "score": c["score"]} for c in result.components}
    grp = omezarr.create_labels(volume_path, name="defects", dtype="uint32", colors=colours or None,
                                properties=props or None)
    arr = grp["0"]
    ch = np.asarray(arr.chunks)
    if result.voxels:
        coords = np.concatenate(result.voxels)
        ids = np.concatenate([np.full(c.shape[0], i, np.uint32) for i, c in enumerate(result.voxels, 1)])
        key = coords // ch
        order = np.lexsort((key[:, 2], key[:, 1], key[:, 0]))
        coords, ids, key = coords[order], ids[order], key[order]
        cuts = np.nonzero(np.any(np.diff(key, axis=0) != 0, axis=1))[0] + 1
        for c, i, k in zip(np.split(coords, cuts), np.split(ids, cuts), np.split(key, cuts), strict=True):
            lo = k[0] * ch
            hi = np.minimum(lo + ch, arr.shape)
            block = np.zeros(tuple(hi - lo), np.uint32)
            loc = c - lo
            block[loc[:, 0], loc[:, 1], loc[:, 2]] = i
            arr[lo[0]:hi[0], lo[1]:hi[1], lo[2]:hi[2]] = block
    omezarr.build_pyramid(Path(volume_path) / "labels" / "defects", method="max")


def segment_volume(volume_path: Path, cfg: SegmentConfig, *, chunks: tuple[int, int, int] | None = None) -> dict:
    """Segment ``volume.ome.zarr``, write ``labels/defects`` and return the component table.

    Parameters
    ----------
    volume_path : Path
        The run's ``volume.ome.zarr`` (level 0 is read).
    cfg : SegmentConfig
        The ``segment`` config section.
    chunks : (cz, cy, cx), optional
        Dask compute chunk in voxels (default :data:`COMPUTE_CHUNKS`).

    Returns
    -------
    dict
        The ``components.json`` document: ``voxel_um`` [dz, dy, dx], ``origin_um`` [z0, y0, x0],
        ``noise_sigma`` (intensity units), ``thresholds``, ``components`` (``id``, ``class``,
        ``voxels``, ``bbox_zyx``, ``centroid_um`` [x, y, z], ``extent_um`` [ex, ey, ez],
        ``planarity``, ``score`` and the extra shape keys of :func:`segment_array`) and
        ``rejected`` (components dropped by the rejection rules, with ``reason``).

    Raises
    ------
    InputError
        Missing or unreadable volume, or the problems listed in :func:`segment_array`.
    """
    volume_path = Path(volume_path)
    vol, meta = omezarr.open_image(volume_path, 0)
    gp = (meta.get("crackstack") or {}).get("geometry_params") or {}
    ray = ray_direction_zyx(gp["psi_h_deg"]) if gp.get("psi_h_deg") is not None else None
    result = segment_array(vol, voxel_um=tuple(meta["voxel_um"]), cfg=cfg, chunks=chunks, ray_zyx=ray)
    _write_labels(volume_path, result)

    def wafer(d: dict) -> dict:
        out = dict(d)
        out["centroid_um"] = [float(round(v, 3)) for v in omezarr.voxel_to_wafer(np.asarray(d["centroid_idx"]), meta)]
        del out["centroid_idx"]
        return out

    return {
        "voxel_um": [float(v) for v in meta["voxel_um"]],
        "origin_um": [float(v) for v in meta["origin_um"]],
        "shape_zyx": list(result.shape),
        "band_level": float(round(result.band_level, 6)),
        "noise_sigma": float(result.noise_sigma),
        "thresholds": result.thresholds,
        "components": [wafer(c) for c in result.components],
        "rejected": [wafer(c) for c in result.rejected],
    }


# ---------------------------------------------------------------------------------------------
# Benchmark rows for `crackstack bench`


#: Bench volumes (z, y, x): the full one is about 80 MB of float32, the quick one 2.4 MB.
BENCH_SHAPE_FULL = (112, 512, 352)
BENCH_SHAPE_QUICK = (48, 128, 96)
BENCH_VOXEL_UM = (6.8, 2.5, 10.0)


def _bench_volume(shape: tuple[int, int, int], seed: int = 0) -> np.ndarray:
    """Invented volume for timing: band 1 with Poisson noise (300 counts) and a few bright
    sheets at several orientations (content matters little for the timing)."""
    rng = np.random.default_rng(seed)
    z, y, x = (np.arange(n, dtype=np.float32) * d for n, d in zip(shape, BENCH_VOXEL_UM, strict=True))
    vol = np.ones(shape, np.float32)
    for k, n in enumerate(([1, 0, 0], [0, 1, 0], [0.577, 0, 0.816], [0.707, 0.707, 0])):
        nx_, ny_, nz_ = (float(v) for v in n)
        c = [z[-1] * (k + 1) / 5, y[-1] * (k + 1) / 5, x[-1] * (k + 1) / 5]
        d = (z[:, None, None] - c[0]) * nz_ + (y[None, :, None] - c[1]) * ny_ + (x[None, None, :] - c[2]) * nx_
        vol += np.float32(0.8) * np.exp(-0.5 * (d / 6.0) ** 2).astype(np.float32)
    return (rng.poisson(vol * 300.0) / 300.0).astype(np.float32)


def _plate_ours(vol: np.ndarray, sigmas_um, voxel_um, chunks) -> np.ndarray:
    """Our sheet filter: per-block Hessian + closed-form eigenvalues through Dask map_overlap."""
    depth = tuple(int(v) for v in np.max([halo_voxels(s, voxel_um) for s in sigmas_um], axis=0))
    arr = da.from_array(vol, chunks=_compute_chunks(vol.shape, depth, chunks))

    def block(b):
        return np.max([sheet_measure(b, sigma_um=s, voxel_um=voxel_um) for s in sigmas_um], axis=0)

    return arr.map_overlap(block, depth=depth, boundary="none", dtype=np.float32).compute()


def _plate_skimage(vol: np.ndarray, sigmas_um, voxel_um) -> np.ndarray:
    """The same plate measure from ``skimage.feature.hessian_matrix`` (finite differences on the
    Gaussian-smoothed whole array, per-axis sigma in voxels) and ``hessian_matrix_eigvals``."""
    from itertools import combinations_with_replacement

    from skimage.feature import hessian_matrix, hessian_matrix_eigvals

    from pipeline.hessian import sigma_voxels

    out = None
    for s in sigmas_um:
        h = hessian_matrix(vol, sigma=sigma_voxels(s, voxel_um), mode="nearest", cval=0,
                           order="rc", use_gaussian_derivatives=False)
        for k, (i, j) in enumerate(combinations_with_replacement(range(3), 2)):
            h[k] *= np.float32(s * s / (voxel_um[i] * voxel_um[j]))  # voxel units -> um, x sigma^2
        e = hessian_matrix_eigvals(h)
        del h
        m = sheet_from_eigs(e[0], e[1], e[2])
        del e
        out = m if out is None else np.maximum(out, m)
    return out


def _bench_child(spec_json: str) -> None:
    """Subprocess body: run one filter on the saved bench volume; print its seconds and its
    ``tracemalloc`` peak (bytes allocated beyond the loaded volume; numpy registers its
    buffers with tracemalloc, whose overhead on a few hundred large arrays is negligible) as
    JSON. Imports and thread pools are warmed on a tiny array first."""
    import json
    import tracemalloc

    import dask as _dask

    spec = json.loads(spec_json)
    vol = np.load(spec["volume"])
    sig, vox = tuple(spec["sigmas_um"]), tuple(spec["voxel_um"])
    if spec["method"] == "ours":
        def run(v):
            return _plate_ours(v, sig, vox, tuple(spec["chunks"]))
    else:
        def run(v):
            return _plate_skimage(v, sig, vox)
    with _dask.config.set(scheduler="threads", num_workers=spec["workers"]):
        run(np.ascontiguousarray(vol[:24, :48, :24]))
        tracemalloc.start()
        t0 = time.perf_counter()
        run(vol)
        seconds = time.perf_counter() - t0
        peak = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
    print(json.dumps({"seconds": seconds, "peak_bytes": peak}))


def _bench_run(spec: dict) -> dict:
    import json
    import subprocess
    import sys

    code = "import sys; from pipeline.segment import _bench_child; _bench_child(sys.argv[1])"
    proc = subprocess.run([sys.executable, "-c", code, json.dumps(spec)], capture_output=True, text=True)
    if proc.returncode != 0:
        raise RuntimeError(f"bench subprocess ({spec['method']}) failed: {proc.stderr[-2000:]}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def bench_cases(quick: bool) -> list[dict]:
    """Benchmark rows for ``crackstack bench``: our sheet filter against the same plate measure
    computed with scikit-image on the whole array (same volume, sigmas and voxels).

    Each method runs in a fresh subprocess that reports its time and its ``tracemalloc`` peak
    (memory allocated beyond the loaded volume). The peak resident set size is no good here: it
    is a high-water mark that includes whatever the imports freed. scikit-image's ``frangi``/``sato`` cannot serve as the reference: they respond
    with zero to sheets (PHYSICS.md 6.2), so the reference is ``hessian_matrix`` +
    ``hessian_matrix_eigvals`` followed by the same plate formula.

    Parameters
    ----------
    quick : bool
        Small volume (seconds) instead of the full one (about a minute).

    Returns
    -------
    list of dict
        Rows ``{name, value, target, unit, passed}`` with ``target`` as ``">= v"`` / ``"<= v"``:
        ``segment_sheet_speedup`` (skimage time / ours, >= 2), ``segment_sheet_memory_ratio``
        (our peak / skimage's, <= 0.5), ``segment_eigvals_speedup`` (closed form vs
        ``hessian_matrix_eigvals`` on the same Hessian, >= 1: the closed form is kept only if it
        wins) and the raw seconds and peaks for the record.
    """
    import os
    import tempfile

    from skimage.feature import hessian_matrix_eigvals

    from pipeline.bench import figure
    from pipeline.compute import n_workers

    shape = BENCH_SHAPE_QUICK if quick else BENCH_SHAPE_FULL
    sigmas = tuple(SegmentConfig().sheet_sigmas_um)
    rows = []
    with tempfile.TemporaryDirectory(prefix="crackstack-segbench-") as tmp:
        path = os.path.join(tmp, "volume.npy")
        vol = _bench_volume(shape)
        np.save(path, vol)
        base = {"volume": path, "sigmas_um": list(sigmas), "voxel_um": list(BENCH_VOXEL_UM),
                "workers": n_workers(), "chunks": list(COMPUTE_CHUNKS)}
        res = {}
        for method in ("ours", "skimage"):
            r = _bench_run({**base, "method": method})
            res[method] = (r["seconds"], r["peak_bytes"])
        # Eigenvalue step alone, on the Hessian of the same volume at the first scale.
        h = hessian_um(vol, sigma_um=sigmas[0], voxel_um=BENCH_VOXEL_UM)
        t0 = time.perf_counter()
        eigvalsh3(*h)
        t_ours = time.perf_counter() - t0
        t0 = time.perf_counter()
        hessian_matrix_eigvals(list(h))
        t_sk = time.perf_counter() - t0
    (t_o, m_o), (t_s, m_s) = res["ours"], res["skimage"]
    tag = f"{'x'.join(map(str, shape))} voxels, sigmas {list(sigmas)} um"
    log.info("segment bench (%s): ours %.2f s / %.0f MB, skimage %.2f s / %.0f MB", tag, t_o,
             m_o / 1e6, t_s, m_s / 1e6)
    rows.append(figure("segment_sheet_speedup", t_s / t_o, ">= 2.0", "x"))
    rows.append(figure("segment_sheet_memory_ratio", m_o / m_s, "<= 0.5", "x"))
    rows.append(figure("segment_eigvals_speedup", t_sk / t_ours, ">= 1.0", "x"))
    rows.append(figure("segment_sheet_seconds_ours", t_o, f"<= {t_s:.3g}", "s"))
    rows.append(figure("segment_sheet_peak_MB_ours", m_o / 1e6, f"<= {m_s / 1e6:.4g}", "MB"))
    for r in rows:
        r["detail"] = tag
    return rows

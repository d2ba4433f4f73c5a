"""Measure every segmented defect and write the export for fracture calculators (SPEC 6-7).

Inputs (run folder): ``volume.ome.zarr`` (the corrected intensity, ~1 inside the wafer, ~0
outside), its ``labels/defects`` (uint32, ids = component ids) and ``components.json`` (class and
bounding box of each component). Outputs: ``defects.json`` (schema-validated) and
``defects.csv`` (one row per defect, same ids), both written atomically.

Method, per crack, with the volume (the stage)
----------------------------------------------
The reconstructed volume is the defects' contrast smeared by a point-spread that follows from
the acquisition's geometry (:func:`volume_point_spread`): each detector column integrates the
lit ribbon across the slit, so a point is spread along the diffracted beam over
``w |L| / (G cos psi0)`` in depth (+-12..17 um for the 10-15 um slits of the random scans,
psi_h = 10.6 deg from z), plus the interpolation between frames and the detector's sampling
and blur (``measure.detector_blur_px``, ``measure.slit_edge_um``). Labels thresholded on that
smear reach about one half-length beyond a crack's tip and lean along the beam, so the crack is
measured from its contrast instead:

1. Contrast mass (:func:`contrast_mass`): the excess intensity over the local band (median per
   depth slice outside the defect; times the band's lateral profile where the wafer edge is
   near, corrected by depth and distance to the edge for the corners where the edge meets a
   surface, :func:`_edge_background`) in the label grown by the smear segment and a one-voxel
   shell.
2. Moments (:func:`_mass_moments`): a convolution adds the point-spread's covariance to the
   object's and keeps its mean, so the crack's own second moments are the mass's less the
   point-spread's. Plane normal: the least-variance axis; where the smear lies in the plane
   (vertical cracks with the normal along y), the labels' plane is unbiased too and is averaged
   in by inverse variance. Shallow surface cracks (extent down the dip within a few slit
   widths, :data:`FORWARD_DIP_MAX_SLITS`), where subtracting the point-spread's covariance
   amplifies the noise, get their plane from a forward model instead
   (:func:`_crack_forward_fit`): their patch smeared by the point-spread, fitted to the
   mass voxels by least squares from the moments' plane.
3. Kind and shape from the labels (which boundaries they touch, steps 2-4 below). Depth and
   length (:func:`_crack_from_mass`) from the moments of a uniform patch: a semi-ellipse of
   depth a has its mean distance from the boundary at 4 a / (3 pi), and variance c^2 / 4 along
   the mouth (c the half-length); a quarter ellipse the same means along both boundaries; a
   through crack's band of length l has variance l^2 / 12. The reach of the crack's own
   contrast beyond its front (``CONTRAST_REACH_UM``) comes off each free end; for half and
   quarter ellipses the semi-axes are those whose footprint grown by that reach along the whole
   front has the observed moments (:func:`_invert_footprint`: on a long thin front the reach
   along the flanks moves the moment along the long axis, 2.9 um on a 26 x 173 um corner
   crack). An edge crack at mid-thickness takes its length (along z, the smear's direction,
   where the second moment weights the contrast's soft tail and the region's background most)
   from the forward model's patch instead (:func:`_crack_forward_fit`,
   :data:`FORWARD_EDGE_LENGTH`). An edge crack whose labels come near a surface is a corner
   crack only if its mass agrees (:func:`_mass_reaches_face`: the depth smear carries the
   labels of a crack that ends tens of um short of the surface to within the touch
   tolerance). The front is the
   ellipse of those axes on the boundary; ``front.fit_rms_um`` stays the labelled outline's rms
   about its own ellipse fit (a shape check).
4. One-sigma (``uncertainty.method`` says which path ran): bootstrap over the mass voxels
   (``measure.bootstrap`` resamples, Efron & Tibshirani 1993) of depth, length and inclination,
   plus a model error calibrated on the residuals of the exact-registration harness
   (``MODEL_SIGMA_DEPTH_UM`` along the boundary normal, ``MODEL_SIGMA_LENGTH_UM`` along the
   mouth, ``MODEL_SIGMA_TILT_UM`` across the plane over the crack's extent down the dip) and a
   noise term ``MASS_NOISE_UM / snr`` on depth and length (the mass's signal-to-noise).

Loops from the mass as well: the deconvolved covariance of a ring is its centre line's
(R^2 / 2 along both in-plane axes) plus the tube's (the same on every axis), so the normal is
the least-variance axis and R = sqrt(l1 + l2 - 2 l0). Defects whose mass is not clearly above
the noise (``MIN_MASS_SNR``), and calls without a volume (invented labels), fall back to the
labels alone:

Method, per crack, from labels alone
------------------------------------
1. The component's voxel centres are taken in the wafer frame (um).
2. Outliers: RANSAC (Fischler & Bolles 1981) with :class:`PlaneModel` (SVD of the centred
   points: the normal is the singular vector of the smallest singular value) through
   :func:`skimage.measure.ransac`, then least-squares refits on the inliers.
3. The segmentation covers the crack sheet thickened by the resolution. We model the labelled
   set as the crack surface dilated by an ellipsoid with semi-axes ``k * shape``: ``shape`` is
   the voxel size (resolution and voxel scale together under natural sampling) or, when
   ``components.json`` names the segmentation's sheet filter scale sigma,
   ``sqrt(sigma^2 + voxel^2)`` per axis (:func:`thickening_shape_um`). In thickening units
   (``p / shape``) that ellipsoid is a ball, so the rest is done there: the sheet is symmetric
   about its plane (in um an anisotropic thickening leans to one side beyond the crack's edge
   and would tilt the fit), ``k`` follows from the sheet's thickness (variance of the distances
   from the plane, with Sheppard's correction for layered voxel centres), and one isotropic
   blur of half the voxel spacing removes the lattice pattern.
4. Kind: which wafer boundaries the labelled set touches (entrance surface z = 0, exit surface
   z = t, the wafer edge from a circle fit to the imaged edge or from ``sample.center_xy_mm``).
   Plane: SVD fit without the wedges where a boundary cut the sheet obliquely (selected by the
   voxels' feet on the mid-plane, which keeps the selection symmetric across the sheet).
5. Front: the outline of the crack in its plane is the half-plateau contour of the blurred,
   projected voxel density, moved inward by ``TAPER * k`` (where half of the thickened sheet's
   thickness is reached beyond its edge); the parts along cut boundaries are dropped. A
   constrained least-squares ellipse (centred on the boundary line, axes along and normal to
   it; quarter-elliptical: centred at the corner) gives a, c, a/c and the RMS residual, after
   a correction for the inward shift of a blurred curved outline (sigma^2 kappa / 2). Internal
   cracks get a free ellipse (:class:`skimage.measure.EllipseModel`, Halir & Flusser 1998).
6. Depth a = deepest reach normal to the boundary the crack starts from; length = extent along
   that boundary (2c for a semi-elliptical crack; the one-sided extent along the edge for a
   quarter-elliptical corner crack); both from the ellipse when it describes the front, else
   from the raw outline. Thickness span [z_min, z_max].
7. One-sigma (labels alone): inclination by bootstrap over voxels of the plane fit
   (``measure.bootstrap`` resamples, ``measure.seed``); depth and length by propagation: the
   ellipse-fit covariance (front points correlated over one voxel), the thickening's bootstrap
   spread, and a residual model error of ``SYSTEMATIC_VOXELS`` per free end.

Loops from labels alone: plane fit as above, then a circle
(:class:`skimage.measure.CircleModel`, refined to the geometric least-squares circle) in the
plane gives centre and diameter; ``meets_surface`` when
the loop touches z = 0 or z = t. Slip bands: 26-connected pieces that are lines give the
direction (their mean principal axis) and the count; touching lines fall back to a RANSAC line
(:class:`skimage.measure.LineModelND`) and blobs of the projection across it. Extent along the
direction, less the thickening.

References
----------
Fischler & Bolles (1981), Random sample consensus, Commun. ACM 24(6), 381-395. Halir & Flusser
(1998), Numerically stable direct least squares fitting of ellipses, WSCG, 125-132. Sheppard
(1898), On the calculation of the most probable values of frequency constants, Proc. London
Math. Soc. 29, 353-380 (the h^2/12 grouping correction). Efron & Tibshirani (1993), An
Introduction to the Bootstrap, Chapman & Hall (bootstrap standard errors).
"""

from __future__ import annotations

import json
import logging
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import dask
import numpy as np
from scipy import ndimage as ndi
from scipy.optimize import least_squares
from scipy.special import ndtr
from skimage.measure import CircleModel, EllipseModel, LineModelND, find_contours, ransac

from pipeline import omezarr
from pipeline import runfolder as rf
from pipeline.compute import InTask, in_task, materialize, run_tasks
from pipeline.config import Acquisition, MeasureConfig
from pipeline.crystal import canonical_normal, nearest_plane
from pipeline.crystal import plane_angles as plane_angles_deg
from pipeline.errors import InputError
from pipeline.geometry import Geometry, ellipse_outside_d2

log = logging.getLogger(__name__)

CLASSES = ("crack", "dislocation_loop", "slip_band")
#: Fewest voxels a component needs for a plane fit.
MIN_VOXELS = 6
#: Most voxel centres used in one RANSAC run (the refit uses all inliers).
RANSAC_MAX_POINTS = 20000

EZ = np.array([0.0, 0.0, 1.0])


# ---------------------------------------------------------------------------------------------
# Small vector helpers


def _unit(v: np.ndarray) -> np.ndarray:
    n = float(np.linalg.norm(v))
    return v / n if n > 0 else v


def _support(vx: np.ndarray, d: np.ndarray) -> float:
    """Support of the ellipsoid with semi-axes ``vx`` (um, x y z) in unit direction ``d``."""
    return float(np.linalg.norm(vx * d))


def _layer_step(values: np.ndarray, tol: float) -> float:
    """Mean spacing of the distinct layers among sorted-descending ``values`` (0 when dense).

    Voxel centres projected on a direction close to a lattice axis fall on layers one voxel
    apart; on an oblique direction they are quasi-continuous. Gaps smaller than ``tol`` join a
    layer.
    """
    if values.size < 2:
        return 0.0
    v = np.sort(values)[::-1]
    gaps = -np.diff(v)
    big = gaps[gaps > tol]
    return float(np.mean(big[:3])) if big.size else 0.0


def _reach(
    values: np.ndarray, d: np.ndarray, vx: np.ndarray, k: float, *, clipped: bool = False
) -> tuple[float, float]:
    """Where the crack surface ends along ``d``, from projections ``values`` of its voxels.

    Returns ``(reach_um, step_um)``: the maximum projection plus half the layer step near it
    (the mean inset of the last voxel centre) minus the thickening support ``k |vx d|``
    (skipped when ``clipped``: the labelled set was cut there by a wafer boundary).
    """
    box = float(np.sum(np.abs(vx * d)))
    top = values.max()
    step = _layer_step(values[values >= top - 2.5 * box], 0.15 * float(vx.min()))
    thick = 0.0 if clipped else k * _support(vx, d)
    return float(top + 0.5 * step - thick), step


# ---------------------------------------------------------------------------------------------
# Wafer edge


@dataclass(frozen=True)
class WaferEdge:
    """Wafer centre and radius in the scan frame (um); ``center_xy_um`` None when unknown."""

    center_xy_um: tuple[float, float] | None
    radius_um: float
    source: str = "unknown"  # "acquisition" | "edge_fit" | "unknown"
    n_points: int = 0
    fit_rms_um: float = 0.0
    free_radius_um: float | None = None

    def radius_of(self, xy_um: np.ndarray) -> np.ndarray:
        """Distance of points (..., >=2: x, y, ...) from the wafer centre, um."""
        c = np.asarray(self.center_xy_um, float)
        return np.hypot(xy_um[..., 0] - c[0], xy_um[..., 1] - c[1])


def edge_points_from_slice(
    image_yx: np.ndarray, *, voxel_yx_um: tuple[float, float], origin_yx_um: tuple[float, float]
) -> np.ndarray:
    """Sub-pixel points (N, 2: x, y um) of the imaged wafer edge in one depth slice.

    The wafer is ~1 and the outside ~0: Otsu's threshold separates them; holes inside the wafer
    (defect contrast) are filled and only the largest wafer part is kept. The edge is the 0.5
    contour of that mask (midway between inside and outside pixel centres), without the parts
    that run along the scan limits. Returns an empty array when no edge is imaged.
    """
    from skimage.filters import threshold_otsu

    img = np.nan_to_num(np.asarray(image_yx, float))
    if img.ndim != 2 or min(img.shape) < 4 or np.ptp(img) <= 0:
        return np.empty((0, 2))
    thr = threshold_otsu(img)
    inside = img > thr
    lo, hi = img[~inside], img[inside]
    # a real edge: the outside is dark compared with the wafer, and a sizeable part of the scan
    if (
        lo.size < 0.01 * img.size
        or hi.size < 0.01 * img.size
        or np.median(lo) > 0.3 * np.median(hi)
    ):
        return np.empty((0, 2))
    inside = ndi.binary_fill_holes(inside)
    lab, n = ndi.label(inside)
    if n == 0:
        return np.empty((0, 2))
    sizes = np.bincount(lab.ravel())[1:]
    inside = lab == (1 + int(np.argmax(sizes)))
    pts = []
    for c in find_contours(inside.astype(float), 0.5):
        keep = (
            (c[:, 0] > 0.75)
            & (c[:, 0] < img.shape[0] - 1.75)
            & (c[:, 1] > 0.75)
            & (c[:, 1] < img.shape[1] - 1.75)
        )
        pts.append(c[keep])
    if not pts:
        return np.empty((0, 2))
    yx = np.concatenate(pts)
    x = origin_yx_um[1] + yx[:, 1] * voxel_yx_um[1]
    y = origin_yx_um[0] + yx[:, 0] * voxel_yx_um[0]
    return np.column_stack([x, y])


def fit_edge_circle(
    points_xy_um: np.ndarray, radius_um: float, inside_xy_um: np.ndarray
) -> WaferEdge | None:
    """Least-squares wafer centre from edge points, with the radius fixed to ``radius_um``.

    Over a scan of a few mm the imaged edge of a 100-450 mm wafer is a short, nearly straight
    arc, on which a free circle fit (:class:`skimage.measure.CircleModel`) is ill-conditioned;
    the nominal diameter is known, so only the centre is fitted
    (:func:`scipy.optimize.least_squares` on ``|p - c| - R``). The free fit's radius is kept for
    the log. ``inside_xy_um`` is any point inside the wafer (picks the side of the centre).
    """
    p = np.asarray(points_xy_um, float)
    if len(p) < 20:
        return None
    mean = p.mean(axis=0)
    _, s, vt = np.linalg.svd(p - mean, full_matrices=False)
    if s[0] <= 0:
        return None
    tangent = vt[0]
    normal = np.array([-tangent[1], tangent[0]])
    if normal @ (np.asarray(inside_xy_um, float) - mean) < 0:
        normal = -normal
    c0 = mean + radius_um * normal
    free = CircleModel.from_estimate(p)
    free_r = float(free.radius) if free else None
    res = least_squares(
        lambda c: np.hypot(p[:, 0] - c[0], p[:, 1] - c[1]) - radius_um, c0, x_scale=radius_um
    )
    rms = float(np.sqrt(np.mean(res.fun**2)))
    return WaferEdge((float(res.x[0]), float(res.x[1])), radius_um, "edge_fit", len(p), rms, free_r)


def wafer_edge(volume_path: Path, acq: Acquisition, thickness_um: float) -> WaferEdge:
    """The wafer edge: ``sample.center_xy_mm`` if given, else a fit to the imaged edge."""
    radius_um = acq.sample.diameter_mm * 500.0
    if acq.sample.center_xy_mm is not None:
        cx, cy = acq.sample.center_xy_mm
        return WaferEdge((cx * 1000.0, cy * 1000.0), radius_um, "acquisition")
    img, meta = omezarr.open_image(volume_path, 0)
    dz = meta["voxel_um"][0]
    z0 = meta["origin_um"][0]
    nz = img.shape[0]
    # middle of the imaged depth range inside the wafer (the whole thickness in transmission,
    # the near-surface slab in reflection)
    z_lo = max(0.0, z0)
    z_hi = min(thickness_um, z0 + dz * (nz - 1))
    zc = int(round(((z_lo + z_hi) / 2 - z0) / dz))
    zc = min(max(zc, 0), nz - 1)
    sl = img[max(0, zc - 2) : zc + 3].mean(axis=0).compute()
    vy, vx = meta["voxel_um"][1], meta["voxel_um"][2]
    oy, ox = meta["origin_um"][1], meta["origin_um"][2]
    pts = edge_points_from_slice(sl, voxel_yx_um=(vy, vx), origin_yx_um=(oy, ox))
    if len(pts) < 20:
        log.info("measure: no wafer edge imaged and no sample.center_xy_mm; positions left empty")
        return WaferEdge(None, radius_um, "unknown")
    thr = np.median(sl)
    iy, ix = np.nonzero(sl > thr)
    inside = np.array([ox + ix.mean() * vx, oy + iy.mean() * vy])
    edge = fit_edge_circle(pts, radius_um, inside)
    if edge is None:
        return WaferEdge(None, radius_um, "unknown")
    log.info(
        "measure: wafer edge fitted to %d points, centre (%.3f, %.3f) mm, rms %.2f um%s",
        edge.n_points,
        edge.center_xy_um[0] / 1000,
        edge.center_xy_um[1] / 1000,
        edge.fit_rms_um,
        f", free-fit radius {edge.free_radius_um / 1000:.1f} mm" if edge.free_radius_um else "",
    )
    return edge


# ---------------------------------------------------------------------------------------------
# Plane fit


class PlaneModel:
    """A plane through 3D points, for :func:`skimage.measure.ransac` (``RansacModelProtocol``).

    ``from_estimate(points)`` fits by SVD of the centred points (normal = right singular vector
    of the smallest singular value, the total-least-squares plane); ``residuals(points)`` are
    the signed distances to the plane (ransac takes their absolute value).
    """

    def __init__(self, centroid: np.ndarray, normal: np.ndarray, ok: bool = True):
        self.centroid = np.asarray(centroid, float)
        self.normal = np.asarray(normal, float)
        self.ok = ok

    def __bool__(self) -> bool:
        return self.ok

    @classmethod
    def from_estimate(cls, data: np.ndarray) -> PlaneModel:
        p = np.asarray(data, float)
        if p.shape[0] < 3:
            return cls(np.zeros(3), EZ, ok=False)
        c = p.mean(axis=0)
        _, s, vt = np.linalg.svd(p - c, full_matrices=False)
        # three (nearly) collinear points do not define a plane
        if s.size < 2 or s[1] <= 1e-9 * max(s[0], 1e-30):
            return cls(c, EZ, ok=False)
        return cls(c, vt[-1] if vt.shape[0] == 3 else np.cross(vt[0], vt[1]))

    def residuals(self, data: np.ndarray) -> np.ndarray:
        return (np.asarray(data, float) - self.centroid) @ self.normal


@dataclass
class PlaneFit:
    centroid: np.ndarray
    normal: np.ndarray
    inliers: np.ndarray
    rms_um: float


def _orient(n: np.ndarray) -> np.ndarray:
    """Sign convention for unoriented plane normals, the one the synthetic truth and the export
    use (:func:`pipeline.crystal.canonical_normal`): n_z > 0, else n_x > 0, else n_y > 0."""
    return canonical_normal(n)


def fit_plane(
    points_um: np.ndarray, vx: np.ndarray, *, rng: np.random.Generator, max_trials: int = 200
) -> PlaneFit:
    """Robust plane through a thickened sheet of voxel centres (um, [x, y, z]).

    RANSAC (:func:`skimage.measure.ransac` with :class:`PlaneModel`), then least-squares
    refits on the inliers until the inlier set settles. The residual threshold is 2.5 robust
    sigmas of the distances to the current plane (sigma = 1.4826 x the median absolute
    distance; a uniform slab of half-thickness h has sigma 0.74 h, so the threshold keeps the
    whole sheet), and never less than the voxel size along the normal.
    """
    p = np.asarray(points_um, float)
    first = PlaneModel.from_estimate(p)
    if not first:
        raise ValueError("voxels are collinear: no plane")

    def threshold(model: PlaneModel, sel: np.ndarray | None = None) -> float:
        r = np.abs(model.residuals(p if sel is None else p[sel]))
        return max(2.5 * 1.4826 * float(np.median(r)), _support(vx, model.normal), 1e-6)

    thr = threshold(first)
    sub = (
        p
        if len(p) <= RANSAC_MAX_POINTS
        else p[rng.choice(len(p), RANSAC_MAX_POINTS, replace=False)]
    )
    model, _ = ransac(
        sub,
        PlaneModel,
        3,
        thr,
        max_trials=max_trials,
        stop_probability=0.999,
        rng=rng,
        initial_inliers=np.ones(len(sub), bool),
    )
    if model is None or not model:
        model = first
    inl = np.abs(model.residuals(p)) < threshold(model)
    for _ in range(10):
        if inl.sum() < 3:
            inl = np.ones(len(p), bool)
        refit = PlaneModel.from_estimate(p[inl])
        if not refit:
            break
        model = refit
        new = np.abs(model.residuals(p)) < threshold(model, inl)
        if np.array_equal(new, inl):
            break
        inl = new
    r = model.residuals(p)
    return PlaneFit(
        model.centroid, _orient(_unit(model.normal)), inl, float(np.sqrt(np.mean(r[inl] ** 2)))
    )


def plane_record(normal: np.ndarray, fit_rms_um: float, z_uvw, x_uvw) -> dict:
    """The ``plane`` object of the export: normal, angles, nearest low-index plane."""
    n = _orient(_unit(np.asarray(normal, float)))
    incl, az = plane_angles_deg(n)
    hkl, fam, misfit = nearest_plane(n, z_uvw, x_uvw)
    return {
        "normal": [float(v) for v in n],
        "inclination_deg": incl,
        "azimuth_deg": az,
        "nearest_hkl": [int(v) for v in hkl],
        "family": fam,
        "misfit_deg": misfit,
        "fit_rms_um": fit_rms_um,
    }


def _in_plane_axes(n: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``e_u`` along the surface trace (horizontal), ``e_v`` down the dip (e_v . z >= 0)."""
    t = np.cross(n, EZ)
    if np.linalg.norm(t) < 1e-6:  # plane parallel to the surface: any horizontal direction
        t = np.array([1.0, 0.0, 0.0]) - n[0] * n
    e_u = _unit(t)
    e_v = _unit(np.cross(e_u, n))
    if e_v[2] < 0 or (abs(e_v[2]) < 1e-12 and e_v @ np.array([0.0, 1.0, 0.0]) < 0):
        e_v = -e_v
    return e_u, e_v


# ---------------------------------------------------------------------------------------------
# Boundaries


@dataclass(frozen=True)
class _Boundary:
    name: str  # "top" | "bottom" | "edge"
    m: np.ndarray  # unit inward normal of the boundary (at the defect)

    def distance(self, p: np.ndarray, thickness_um: float, edge: WaferEdge) -> np.ndarray:
        """Distance of points from the boundary, um (positive inside the wafer)."""
        if self.name == "top":
            return p[:, 2]
        if self.name == "bottom":
            return thickness_um - p[:, 2]
        return edge.radius_um - edge.radius_of(p)


def _boundaries(centroid: np.ndarray, edge: WaferEdge) -> dict[str, _Boundary]:
    out = {
        "top": _Boundary("top", EZ.copy()),
        "bottom": _Boundary("bottom", -EZ),
    }
    if edge.center_xy_um is not None:
        c = np.asarray(edge.center_xy_um, float)
        radial = np.array([centroid[0] - c[0], centroid[1] - c[1], 0.0])
        out["edge"] = _Boundary("edge", -_unit(radial))
    return out


def _touches(
    p: np.ndarray,
    b: _Boundary,
    vx: np.ndarray,
    k: float,
    thickness_um: float,
    edge: WaferEdge,
    shape: np.ndarray | None = None,
) -> bool:
    """Whether the labelled set reaches boundary ``b`` (within two thickening lengths: the
    thickening is the ellipsoid ``k * shape``, ``shape`` defaulting to the voxel)."""
    d = b.distance(p, thickness_um, edge)
    sup = _support(vx if shape is None else shape, b.m)
    gap, _ = _reach(-d, -b.m, vx, 0.0, clipped=True)  # -(min distance) + half step
    tol = max(float(np.sum(np.abs(vx * b.m))), 2.0 * k * sup) + (
        2.0 * edge.fit_rms_um if b.name == "edge" else 0.0
    )
    return -gap <= tol


# ---------------------------------------------------------------------------------------------
# Crack front: the half-density contour of the crack's footprint in its plane

#: Where the half-density contour of a thickened sheet sits beyond the sheet's true edge, as a
#: fraction of the thickening support: the labelled thickness beyond an edge dilated by a ball
#: of radius h falls as 2 sqrt(h^2 - x^2), so half of the full thickness is reached at
#: x = (sqrt(3)/2) h = 0.866 h; blurring moves the half-density point toward the
#: area-equivalent edge pi/4 h = 0.785 h. We use the middle value.
TAPER = 0.82
#: Residual model error of a crack's reach at one free end, in voxels (one sigma): the part
#: of the error that neither the front-fit covariance nor the thickening's bootstrap spread
#: sees (lattice moire, the thickening profile). Sized on 80 invented round-trip cracks
#: (random orientation, size, voxel shape 2-6 um, thickening 0.9-1.9 voxels, ragged labels) so
#: that the reported one-sigma covers about 68 % of the true errors; checked on 40 others in
#: tests/test_measure.py.
SYSTEMATIC_VOXELS = 0.07


#: Mass-equivalent reach of a crack's own contrast beyond its front, um: the strain field about
#: the crack edge adds contrast outside the crack area, which the mass moments count as crack.
#: For a contrast f(r) isotropic about the crack edge it is ``pi int f r dr / (2 int f dr)``;
#: the forward model's crack contrast (core 1.5 exp(-r^2 / 2 (1.2 um)^2) + halo
#: 0.3 exp(-r / 4 um), synthetic.scenario.FeatureContrast) gives 3.2 um, and the mean excess of
#: the deconvolved extents over 36 cracks of the exact-registration harness run 3.3 um. A
#: property of the contrast model (of real crack tips), not of the instrument.
CONTRAST_REACH_UM = 3.3
#: Model error (one sigma) of the contrast-mass measurement beyond its bootstrap spread, per
#: direction: depth (along the boundary normal, z for surface cracks) and length (along the
#: mouth) in um; the plane's tilt as a displacement (um) of one end of the crack across its
#: plane over the crack's extent down the dip (so a 775 um tall through crack gets 0.02 deg, a
#: 20 um deep one 0.7 deg). First calibrated on the exact-registration harness (synthetic.evaluate
#: --registration truth, seeds 0-20) with the 37 cracks an older segment found; recalibrated on
#: the same 21 scans with all 52 cracks found (shallow {111} and edge cracks included): the
#: exact-registration run and the end-to-end run (register stage) of the same volumes. Tilt
#: unchanged (coverage 73 % / 69 % there); length 0.3 -> 0.4 um, and the noise term below added.
MODEL_SIGMA_DEPTH_UM = 0.4
MODEL_SIGMA_LENGTH_UM = 0.4
MODEL_SIGMA_TILT_UM = 0.25
#: Noise term of depth and length, um at unit mass signal-to-noise: ``MASS_NOISE_UM / snr``
#: (``ContrastMass.snr``). A mass moment's noise is its lever arm over the signal-to-noise, so
#: it falls as 1 / snr; the bootstrap over voxels does not see it, we think because the noise
#: is correlated over the point-spread (many voxels per independent sample; not checked
#: separately). Calibrated on the harness runs above, one value for both directions: depth
#: covers 69 % / 78 % of 36 surface and edge cracks (low photons 42 % / 75 % of 12; before:
#: 58 % / 61 %, low 25 % / 33 %), length 67 % / 67 % of 52 (before 58 % / 46 %), exact
#: registration / end to end. 0.25 um at snr 1000 (high photons), 1.5 um at snr 170 (low).
#: Not fitted per photon level: the exact run's typical-photon depths are then covered 15/15.
MASS_NOISE_UM = 250.0
#: Least signal-to-noise of a defect's contrast mass (total excess over its noise) for the
#: intensity measurement; below it (or without a volume) the labels alone are measured.
MIN_MASS_SNR = 10.0
#: A crack plane holds the smear direction when |n . smear| (n: the labels' plane normal) is
#: below this (3 deg); the labels' normal is then unbiased and joins the mass's
#: (inverse-variance weights).
SMEAR_IN_PLANE = math.sin(math.radians(3.0))
#: Fit the forward model (:func:`_crack_forward_fit`) to shallow surface cracks.
FORWARD_FIT = True
#: Least one-sigma given to the labels' plane normal in that average, deg (the voxel lattice).
LABEL_TILT_FLOOR_DEG = 0.3
#: Room around a defect's smear from which its background is taken, um.
BACKGROUND_MARGIN_UM = 24.0
#: Strip along the wafer edge over which a defect's region reaches out to the edge, um (more
#: than segment's 20 um edge margin, so that an edge crack's mass is complete).
EDGE_GAP_UM = 24.0


def _weighted_plane(p: np.ndarray, wts: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
    """Total-least-squares plane (centroid, oriented unit normal) of weighted points."""
    if wts is None:
        c = p.mean(axis=0)
        x = p - c
        cov = x.T @ x
    else:
        c = (wts[:, None] * p).sum(axis=0) / wts.sum()
        x = p - c
        cov = (wts[:, None] * x).T @ x
    _, vec = np.linalg.eigh(cov)
    return c, _orient(_unit(vec[:, 0]))


def _weighted_var(w: np.ndarray, wts: np.ndarray | None) -> float:
    if wts is None:
        return float(np.var(w))
    m = float(np.sum(wts * w) / wts.sum())
    return float(np.sum(wts * (w - m) ** 2) / wts.sum())


@dataclass
class _Footprint:
    """Blurred density of voxel centres projected into the crack plane, on a fine (u, v) grid."""

    dens: np.ndarray
    lo: np.ndarray
    pix: float
    level: float
    sigma_um: float

    def contour(self) -> tuple[np.ndarray, np.ndarray]:
        """Outer half-plateau contour (M, 2: u, v um) and its outward unit normals."""
        contours = find_contours(self.dens, self.level)
        if not contours:
            raise ValueError("no footprint contour")
        c = max(contours, key=len)
        gu, gv = np.gradient(self.dens)
        g = np.column_stack(
            [ndi.map_coordinates(gu, c.T, order=1), ndi.map_coordinates(gv, c.T, order=1)]
        )
        nrm = -g / np.maximum(np.linalg.norm(g, axis=1, keepdims=True), 1e-30)
        return self.lo + (c + 0.5) * self.pix, nrm

    def depth_inside(self, uv: np.ndarray) -> np.ndarray:
        """Distance (um) of points inside the footprint from its outline (0 outside)."""
        inside = self.dens >= self.level
        dist = ndi.distance_transform_edt(inside) * self.pix
        ij = np.clip(((uv - self.lo) / self.pix).astype(int), 0, np.array(dist.shape) - 1)
        return dist[ij[:, 0], ij[:, 1]]


def _footprint(uv: np.ndarray, spacing: float, wts: np.ndarray | None = None) -> _Footprint:
    """Blurred footprint density of voxel centres projected into their plane.

    ``spacing`` is the largest voxel spacing (in the units of ``uv``). The projected centres
    are binned on a grid of a sixth of it and blurred with a Gaussian of half of it, which
    removes the lattice pattern (a comb of spacing s blurred with sigma s/2 keeps
    exp(-2 pi^2 / 4) = 0.7 % of its first harmonic), so the level set does not depend on how
    the lattice is aligned with the crack. The level is half of the interior plateau (the
    plateau is proportional to the sheet's thickness).
    """
    sig = 0.5 * float(spacing)
    pix = sig / 3.0
    pad = 4.0 * sig + float(spacing)
    lo = uv.min(axis=0) - pad
    span = uv.max(axis=0) + pad - lo
    nbin = np.ceil(span / pix).astype(int)
    if nbin.prod() > 2_000_000:  # keep the grid small for very large cracks
        pix *= math.sqrt(nbin.prod() / 2_000_000)
        nbin = np.ceil(span / pix).astype(int)
    rng_ = [[lo[0], lo[0] + nbin[0] * pix], [lo[1], lo[1] + nbin[1] * pix]]
    hist, _, _ = np.histogram2d(uv[:, 0], uv[:, 1], bins=nbin, range=rng_, weights=wts)
    dens = ndi.gaussian_filter(hist, sig / pix, mode="constant", truncate=3.0)
    top = float(np.percentile(dens[dens > 0], 99)) if np.any(dens > 0) else 0.0
    core = dens >= 0.5 * top
    deep = ndi.binary_erosion(core, iterations=max(1, int(round(2 * sig / pix))))
    plateau = float(np.median(dens[deep])) if deep.any() else float(np.median(dens[core]))
    return _Footprint(dens, lo, pix, 0.5 * plateau, sig)


def _ellipse_radius(phi: np.ndarray, c: float, a: float) -> np.ndarray:
    """Radius of the axis-aligned ellipse (q1/c)^2 + (q2/a)^2 = 1 in direction ``phi``."""
    return 1.0 / np.sqrt((np.cos(phi) / c) ** 2 + (np.sin(phi) / a) ** 2)


def _fit_centred_ellipse(
    q: np.ndarray, free_shift: bool, corr_len: float
) -> tuple[float, float, float, float, np.ndarray]:
    """Least-squares axis-aligned ellipse centred at (s, 0) (``s`` fitted when ``free_shift``).

    The constrained fit of a semi- or quarter-elliptical front: the centre lies on the boundary
    line (semi) or at the corner (quarter), the axes along and normal to the boundary. Residuals
    are radial distances, within a few per cent of the normal distance for a/c in 0.2-5.

    Returns ``(c, a, s, rms_um, cov)``: ``cov`` is the covariance of (c, a[, s]) from the
    Jacobian, ``inv(J^T J) * s^2``, inflated by ``m / m_eff`` because the front points are
    sampled far more densely than their errors are independent (``m_eff`` = front length /
    ``corr_len``).
    """
    s0 = float(np.median(q[:, 0])) if free_shift else 0.0
    c0 = max(float(np.max(np.abs(q[:, 0] - s0))), 1e-3)
    a0 = max(float(np.max(q[:, 1])), 1e-3)

    def resid(x):
        s = x[2] if free_shift else 0.0
        qq = q - np.array([s, 0.0])
        phi = np.arctan2(qq[:, 1], qq[:, 0])
        return np.hypot(qq[:, 0], qq[:, 1]) - _ellipse_radius(phi, x[0], x[1])

    x0 = [c0, a0] + ([s0] if free_shift else [])
    lo = [1e-6, 1e-6] + ([-np.inf] if free_shift else [])
    res = least_squares(resid, x0, bounds=(lo, [np.inf] * len(x0)))
    s = float(res.x[2]) if free_shift else 0.0
    m, npar = len(q), len(x0)
    rms = float(np.sqrt(np.mean(res.fun**2)))
    seg = np.linalg.norm(np.diff(q, axis=0), axis=1)
    length = float(np.sum(seg[seg < 5 * max(float(np.median(seg)), 1e-9)])) if m > 1 else 0.0
    m_eff = max(npar + 1.0, length / max(corr_len, 1e-9))
    var = float(np.sum(res.fun**2)) / max(m - npar, 1)
    try:
        cov = np.linalg.inv(res.jac.T @ res.jac) * var * max(1.0, m / m_eff)
    except np.linalg.LinAlgError:
        cov = np.full((npar, npar), np.inf)
    return float(res.x[0]), float(res.x[1]), s, rms, cov


def _ellipse_curvature(q: np.ndarray, c: float, a: float) -> np.ndarray:
    """Curvature (1/um) of the axis-aligned ellipse at the points nearest in angle to ``q``."""
    t = np.arctan2(q[:, 1] / a, q[:, 0] / c)
    return a * c / ((a * np.sin(t)) ** 2 + (c * np.cos(t)) ** 2) ** 1.5


def _ellipse_normal(q: np.ndarray, c: float, a: float) -> np.ndarray:
    """Outward unit normals of the axis-aligned ellipse at the points nearest in angle to ``q``."""
    t = np.arctan2(q[:, 1] / a, q[:, 0] / c)
    g = np.column_stack([np.cos(t) / c, np.sin(t) / a])
    return g / np.linalg.norm(g, axis=1, keepdims=True)


def _shape_of(kind: str, touches: dict[str, bool]) -> str:
    if kind == "edge":
        if touches["top"] and touches["bottom"]:
            return "through"
        return "quarter_elliptical" if (touches["top"] or touches["bottom"]) else "semi_elliptical"
    return {
        "surface_top": "semi_elliptical",
        "surface_bottom": "semi_elliptical",
        "through": "through",
    }.get(kind, "elliptical")


@dataclass
class _CrackCtx:
    vx: np.ndarray  # voxel size (x, y, z) um
    shape: np.ndarray  # thickening shape (x, y, z) um: labels = crack dilated by k * shape
    thickness_um: float
    edge: WaferEdge
    kind: str
    touches: dict[str, bool]
    bnds: dict[str, _Boundary]

    def dist(self, name: str, p: np.ndarray) -> np.ndarray:
        return self.bnds[name].distance(p, self.thickness_um, self.edge)

    @property
    def lattice(self) -> np.ndarray:
        """Voxel spacing in thickening units (x, y, z)."""
        return self.vx / self.shape


def _scaled_normal(m: np.ndarray, shape: np.ndarray) -> tuple[np.ndarray, float]:
    """Unit normal, in thickening units (``p / shape``), of the plane with unit normal ``m``
    (um), and the factor ``|m * shape|`` that turns a distance from it in um into those units
    (divide by it)."""
    ms = m * shape
    g = float(np.linalg.norm(ms))
    return ms / g, g


def _boundary_band_um(
    name: str, ctx: _CrackCtx, n_s: np.ndarray, k: float, extra_voxels: float
) -> float:
    """Distance from a cut boundary (um) over which the thickened sheet is cut obliquely.

    In thickening units the thickening is a ball of radius k, and a sheet with unit normal
    ``n_s`` cut by a boundary with unit normal ``m_s`` keeps a wedge of partial thickness whose
    foot on the mid-plane reaches ``k |n_s . m_s|`` from the boundary; plus ``extra_voxels``
    voxels (measured along ``m_s``).
    """
    m_s, g = _scaled_normal(ctx.bnds[name].m, ctx.shape)
    vox = float(np.sum(np.abs(ctx.lattice * m_s)))
    return (k * abs(float(n_s @ m_s)) + extra_voxels * vox) * g


def _trim_clipped(
    ps: np.ndarray, c_s: np.ndarray, n_s: np.ndarray, k: float, ctx: _CrackCtx
) -> np.ndarray:
    """Mask of voxels outside the wedges where a wafer boundary cut the thickened sheet.

    Where the sheet meets a boundary at an angle, the cut leaves a wedge of partial thickness
    that would tilt a plane fit toward the boundary. The selection goes by each voxel's foot on
    the mid-plane (a cut by the voxel's own distance would itself be lopsided across the
    sheet): the wedge reaches ``k |n_s . m_s|`` from the boundary (thickening units), plus half
    a voxel.
    """
    foot = (ps - np.outer((ps - c_s) @ n_s, n_s)) * ctx.shape
    keep = np.ones(len(ps), bool)
    for name in ctx.bnds:
        if ctx.touches.get(name):
            keep &= ctx.dist(name, foot) >= _boundary_band_um(name, ctx, n_s, k, 0.5)
    return keep


def _use_fit(rms: float, a: float, c: float, vx: np.ndarray) -> bool:
    """Whether the ellipse describes the front (RMS within a voxel or 5 % of the smaller axis)."""
    return rms <= max(float(np.mean(vx)), 0.05 * min(a, c))


def _robust_sd(values: list[float]) -> float:
    """Half the 16-84 % range (one sigma of a normal), insensitive to a few odd resamples."""
    if len(values) < 3:
        return 0.0
    lo, hi = np.percentile(values, [15.87, 84.13])
    return float(hi - lo) / 2.0


def _thick_k(
    ps: np.ndarray, c: np.ndarray, n_s: np.ndarray, wts: np.ndarray | None, lattice: np.ndarray
) -> float:
    """Thickening ``k``: the labelled set is the crack surface dilated by a ball of radius k in
    thickening units (``p / shape``; an ellipsoid with semi-axes ``k * shape`` in um).

    For a slab of half-thickness h filled uniformly, ``h = sqrt(3 var(w))`` (w: distance from the
    plane); voxel centres on layers of spacing s need Sheppard's correction ``var + s^2 / 12``.
    ``lattice`` is the voxel spacing in these units.
    """
    w = (ps - c) @ n_s
    s = _layer_step(w, 0.15 * float(lattice.min()))
    return math.sqrt(3.0 * (_weighted_var(w, wts) + s * s / 12.0))


@dataclass
class _SheetPlane:
    centroid: np.ndarray  # um
    normal: np.ndarray  # unit, um frame
    normal_s: np.ndarray  # unit, voxel units
    k: float  # thickening units
    interior: np.ndarray  # mask of the voxels the final plane was fitted to
    front_um: np.ndarray  # (M, 3) outline points, thickening removed, on the plane (um)


def _to_um_normal(n_s: np.ndarray, shape: np.ndarray) -> np.ndarray:
    """Plane normal in um of a plane whose normal is ``n_s`` in thickening units (p / shape)."""
    return _orient(_unit(n_s / shape))


def _sheet_plane(p: np.ndarray, ctx: _CrackCtx, wts: np.ndarray | None = None) -> _SheetPlane:
    """Plane, thickening and outline of a crack sheet, worked out in thickening units.

    In thickening units (``p / shape``) the thickening is a ball, so the labelled sheet is
    symmetric about its plane (in um an anisotropic thickening would make the sheet lean to one
    side beyond the crack's edge and tilt the fit). The plane is fitted (SVD) to all voxels
    except the wedges where a wafer boundary cut the sheet obliquely; the outline is the
    half-plateau contour of the projected density, moved inward by ``TAPER * k``.
    """
    lat = ctx.lattice
    ps = p / ctx.shape
    c0, n0 = _weighted_plane(ps, wts)
    k0 = _thick_k(ps, c0, n0, wts, lat)
    keep = _trim_clipped(ps, c0, n0, k0, ctx)
    if keep.sum() >= max(10, 0.3 * len(p)) and not keep.all():
        c1, n1 = _weighted_plane(ps[keep], None if wts is None else wts[keep])
        k1 = _thick_k(ps[keep], c1, n1, None if wts is None else wts[keep], lat)
    else:
        keep = np.ones(len(p), bool)
        c1, n1, k1 = c0, n0, k0
    e_u, e_v = _in_plane_axes(n1)
    uv = np.column_stack([(ps - c1) @ e_u, (ps - c1) @ e_v])
    fp = _footprint(uv, float(lat.max()), wts)
    cpts, cnrm = fp.contour()
    front_s = (
        c1
        + (cpts[:, :1] - TAPER * k1 * cnrm[:, :1]) * e_u
        + (cpts[:, 1:2] - TAPER * k1 * cnrm[:, 1:2]) * e_v
    )
    return _SheetPlane(
        c1 * ctx.shape, _to_um_normal(n1, ctx.shape), n1, k1, keep, front_s * ctx.shape
    )


def _crack_geometry(p: np.ndarray, ctx: _CrackCtx) -> dict[str, Any]:
    """Plane, thickening, front, reaches and their propagated one-sigma of one crack."""
    vx = ctx.vx
    sp = _sheet_plane(p, ctx)
    n, k, c1 = sp.normal, sp.k, sp.centroid
    # outline points along a boundary that cut the crack are not front: within the oblique-cut
    # wedge, the rounding of the corner by the thickening, and half a voxel
    on_b = np.zeros(len(sp.front_um), bool)
    for name in ctx.bnds:
        if ctx.touches.get(name):
            band = _boundary_band_um(name, ctx, sp.normal_s, k, 0.5)
            on_b |= ctx.dist(name, sp.front_um) < band + TAPER * k * _support(
                ctx.shape, ctx.bnds[name].m
            )
    if np.count_nonzero(~on_b) < 5:
        # the whole outline runs along boundaries (a thin layer at a surface): keep it all
        on_b[:] = False
    f3 = sp.front_um[~on_b]
    e_u, e_v = _in_plane_axes(n)
    front_uv = np.column_stack([(f3 - c1) @ e_u, (f3 - c1) @ e_v])
    shape = _shape_of(ctx.kind, ctx.touches)
    t = ctx.thickness_um
    corr = 0.5 * (_support(vx, e_u) + _support(vx, e_v))  # front errors correlate over ~1 voxel

    def slant(name: str) -> float:
        m = ctx.bnds[name].m
        return max(math.hypot(float(m @ e_u), float(m @ e_v)), 1e-9)

    def fit_front(q: np.ndarray, A: np.ndarray, free: bool):
        """Ellipse fit in fit coordinates q = front_uv @ A.T + b, with the blur-curvature
        correction: Gaussian blurring moves the half level of a convex outline inward by
        sigma_n^2 kappa / 2 (sigma_n: blur along the normal, kappa: curvature of the outline)."""
        c_, a_, s_, rms_, cov_ = _fit_centred_ellipse(q, free, corr)
        loc = q - np.array([s_, 0.0])
        kap = _ellipse_curvature(loc, c_, a_)
        nq = _ellipse_normal(loc, c_, a_)
        nuv = nq @ np.linalg.inv(A).T
        n3 = nuv[:, :1] * e_u + nuv[:, 1:2] * e_v
        n3 /= np.linalg.norm(n3, axis=1, keepdims=True)
        # the blur is about half a voxel: 0.5 |voxel N| um along the um normal N; the blurred
        # outline lies TAPER k |shape N| outside the front, where the curvature is lower
        sig_n = 0.5 * np.linalg.norm(n3 * vx, axis=1)
        kap = kap / (1.0 + TAPER * k * np.linalg.norm(n3 * ctx.shape, axis=1) * kap)
        q2 = q + (0.5 * sig_n**2 * kap)[:, None] * nq
        c_, a_, s_, rms_, cov_ = _fit_centred_ellipse(q2, free, corr)
        return c_, a_, s_, rms_, cov_, q2

    z = f3[:, 2]
    span = [
        0.0 if ctx.touches["top"] else max(0.0, float(z.min())),
        t if ctx.touches["bottom"] else min(t, float(z.max())),
    ]
    fit_c = fit_a = fit_rms = None
    good = False
    sq = lambda d: float(np.sum(np.abs(vx * d))) / math.sqrt(12.0)  # noqa: E731  one extreme voxel
    if shape == "semi_elliptical":
        prim = "edge" if ctx.kind == "edge" else ("top" if ctx.kind == "surface_top" else "bottom")
        m = ctx.bnds[prim].m
        e_c = _unit(np.cross(n, m)) if np.linalg.norm(np.cross(n, m)) > 1e-6 else e_u
        g_ = slant(prim)
        e_a = _unit(m - (m @ n) * n)
        A = np.vstack([[e_c @ e_u, e_c @ e_v], [e_a @ e_u, e_a @ e_v]])
        q = np.column_stack([(f3 - c1) @ e_c, ctx.dist(prim, f3) / g_])
        fit_c, fit_a, _, fit_rms, cov, q = fit_front(q, A, True)
        good = _use_fit(fit_rms, fit_a, fit_c, vx)
        # the whole outline's extent along the boundary (its ends meet the boundary)
        raw_len = float(np.ptp(sp.front_um @ e_c))
        raw_depth = float(ctx.dist(prim, f3).max())
        # the fit bridges the front's last voxels at the boundary and smooths its wiggles; a
        # front that is not elliptical falls back to its raw reach, and a fit that reaches
        # beyond the labelled voxels (a front seen over too few voxels) to the raw extent
        if good and fit_a * g_ <= raw_depth + _support(vx, m):
            depth, sig_d = fit_a * g_, math.sqrt(cov[1, 1]) * g_
        else:
            depth, sig_d = raw_depth, sq(m)
        if good and 2.0 * fit_c <= raw_len + _support(vx, e_c):
            length, sig_l = 2.0 * fit_c, 2.0 * math.sqrt(cov[0, 0])
        else:
            length, sig_l = raw_len, math.sqrt(2.0) * sq(e_c)
        f3 = _from_fit_coords(q, c1, e_c, e_a, g_, ctx.dist(prim, c1[None, :])[0])
        if ctx.kind == "surface_top":
            span[1] = min(t, depth)
        elif ctx.kind == "surface_bottom":
            span[0] = max(0.0, t - depth)
    elif shape == "quarter_elliptical":
        face = "top" if ctx.touches["top"] else "bottom"
        gf, ge = slant(face), slant("edge")
        mf, me = ctx.bnds[face].m, ctx.bnds["edge"].m
        ef, ee = _unit(mf - (mf @ n) * n), _unit(me - (me @ n) * n)
        A = np.vstack([[ef @ e_u, ef @ e_v], [ee @ e_u, ee @ e_v]])
        q = np.column_stack([ctx.dist(face, f3) / gf, ctx.dist("edge", f3) / ge])
        fit_c, fit_a, _, fit_rms, cov, q = fit_front(q, A, False)
        good = _use_fit(fit_rms, fit_a, fit_c, vx)
        raw_c = float(np.max(ctx.dist(face, sp.front_um))) / gf
        raw_depth = float(ctx.dist("edge", f3).max())
        if good and fit_a * ge <= raw_depth + _support(vx, me):
            depth, sig_d = fit_a * ge, math.sqrt(cov[1, 1]) * ge
        else:
            depth, sig_d = raw_depth, sq(me)
        if good and fit_c <= raw_c + _support(vx, ef):
            length, sig_l = fit_c, math.sqrt(cov[0, 0])
        else:
            length, sig_l = raw_c, sq(ef)
        # back to the wafer frame: solve the two boundary distances for the in-plane position
        d0 = np.array([ctx.dist(face, c1[None, :])[0], ctx.dist("edge", c1[None, :])[0]])
        rhs = np.column_stack([q[:, 0] * gf, q[:, 1] * ge]) - d0
        # d(p) ~ d0 + (p - c1) . m  =>  (p - c1) . m = d - d0, with p - c1 = x e_u + y e_v
        Mm = np.vstack([[mf @ e_u, mf @ e_v], [me @ e_u, me @ e_v]])
        xy = np.linalg.solve(Mm, rhs.T).T
        f3 = c1 + np.outer(xy[:, 0], e_u) + np.outer(xy[:, 1], e_v)
        if face == "top":
            span[1] = min(t, float(f3[:, 2].max()))
        else:
            span[0] = max(0.0, float(f3[:, 2].min()))
    elif shape == "through" and ctx.kind == "edge":
        dev = ctx.dist("edge", f3)
        depth = float(dev.max())
        me = ctx.bnds["edge"].m
        e_c = _unit(np.cross(n, me)) if np.linalg.norm(np.cross(n, me)) > 1e-6 else EZ
        zc = abs(float(e_c[2]))
        length = t / zc if zc > 0.2 else t
        fit_rms = float(np.std(dev))
        fit_a, fit_c = depth, length
        sig_d, sig_l = sq(me), 0.0
    elif shape == "through":
        depth = t
        u = front_uv[:, 0]
        right = u > 0.5 * (u.min() + u.max())
        both = right.any() and (~right).any()
        length = float(u[right].mean() - u[~right].mean()) if both else float(np.ptp(u))
        dev = (
            np.concatenate([u[right] - u[right].mean(), u[~right] - u[~right].mean()])
            if both
            else u - u.mean()
        )
        fit_rms = float(np.sqrt(np.mean(dev**2)))
        fit_a, fit_c = depth, length / 2.0
        sig_d, sig_l = 0.0, math.hypot(math.sqrt(2.0) * sq(e_u), fit_rms)
    else:  # internal: free ellipse in the plane (EllipseModel, Halir & Flusser 1998)
        depth = float(z.max() - z.min())
        length = float(np.ptp(front_uv[:, 0]))
        sig_d, sig_l = math.sqrt(2.0) * sq(EZ), math.sqrt(2.0) * sq(e_u)
        model = EllipseModel.from_estimate(front_uv) if len(front_uv) >= 5 else None
        if model:
            ax = np.asarray(model.axis_lengths, float)
            th = float(model.theta)
            # a: the semi-axis closer to the dip direction v, c: the other
            first_along_u = abs(math.cos(th)) >= abs(math.sin(th))
            fit_c, fit_a = (ax[0], ax[1]) if first_along_u else (ax[1], ax[0])
            fit_rms = float(np.sqrt(np.mean(model.residuals(front_uv) ** 2)))
            good = _use_fit(fit_rms, fit_a, fit_c, vx)
            if good:
                # extents of the fitted ellipse: vertical (height) and along the trace
                ax1 = math.cos(th) * e_u + math.sin(th) * e_v
                ax2 = -math.sin(th) * e_u + math.cos(th) * e_v
                depth = 2.0 * math.hypot(ax[0] * ax1[2], ax[1] * ax2[2])
                length = 2.0 * math.hypot(ax[0] * (ax1 @ e_u), ax[1] * (ax2 @ e_u))
                # the ellipse's parameters from ~all front points: errors of a few voxels'
                # worth of independent points (front length / voxel)
                m_eff = max(
                    6.0, float(np.sum(np.linalg.norm(np.diff(front_uv, axis=0), axis=1))) / corr
                )
                sig_d = 2.0 * fit_rms / math.sqrt(m_eff / 2.0)
                sig_l = sig_d
        else:
            fit_c, fit_a, fit_rms = length / 2.0, depth / 2.0, 0.0
    return {
        "normal": n,
        "normal_s": sp.normal_s,
        "centroid": c1,
        "k": k,
        "front3": f3,
        "shape": shape,
        "interior": sp.interior,
        "depth": max(0.0, depth),
        "length": max(0.0, length),
        "span": span,
        "a": float(fit_a),
        "c": float(fit_c),
        "fit_rms": float(fit_rms),
        "sig_depth": float(sig_d),
        "sig_length": float(sig_l),
        "fitted": bool(good),
    }


def _from_fit_coords(
    q: np.ndarray, c1: np.ndarray, e_c: np.ndarray, e_a: np.ndarray, g: float, d0: float
) -> np.ndarray:
    """Wafer-frame points of semi-ellipse fit coordinates (along the boundary, slant distance
    from it): ``p = c1 + q1 e_c + (q2 - d0 / g) e_a`` (``d0``: the centroid's boundary distance)."""
    return c1 + np.outer(q[:, 0], e_c) + np.outer(q[:, 1] - d0 / g, e_a)


def _mass_reaches_face(
    pin: np.ndarray,
    mass: ContrastMass,
    face: _Boundary,
    thickness_um: float,
    edge: WaferEdge,
    point_spread: PointSpread | None,
    reach_um: float,
) -> bool:
    """Whether an edge crack whose labels come near a surface is a corner crack by its mass.

    The labels of an edge crack that stops short of a surface can reach within the touch
    tolerance of it: the smear along the diffracted beam runs mostly in depth (+-12..17 um in
    the random scans). A corner crack's mass has its mean distance from the face at
    ``4 L / (3 pi)`` of its extent L from the face (a quarter ellipse), so the L it implies
    lies within the labels' own reach from the face plus the smear; a mid-thickness crack
    that only came near the face implies an L far beyond it (one scan of the harness: 367 um
    against labels reaching 284 um). Too little mass to tell keeps the labels' answer.
    """
    if len(mass.excess) < MIN_VOXELS or mass.snr < MIN_MASS_SNR:
        return True
    e = mass.excess
    tot = float(e.sum())
    if not tot > 0:
        return True
    mean = float(np.sum(e * face.distance(mass.points_um, thickness_um, edge))) / tot
    implied = 0.75 * math.pi * mean - reach_um
    smear = 0.0 if point_spread is None else float(point_spread.half_length_um)
    reach_labels = float(face.distance(pin, thickness_um, edge).max())
    return implied <= reach_labels + smear


def measure_crack_points(
    points_um: np.ndarray,
    voxel_um: tuple[float, float, float],
    *,
    thickness_um: float,
    edge: WaferEdge,
    z_uvw=(0, 0, 1),
    x_uvw=(1, 1, 0),
    bootstrap: int = 50,
    seed: int = 0,
    thickening_shape_um: tuple[float, float, float] | None = None,
    mass: ContrastMass | None = None,
    point_spread: PointSpread | None = None,
    reach_um: float = CONTRAST_REACH_UM,
) -> dict[str, Any]:
    """Measure one crack from its voxel centres and, when given, its contrast mass.

    With ``mass`` (the excess intensity around the crack, :func:`contrast_mass`) of at least
    :data:`MIN_MASS_SNR`, plane, depth, length and front come from the mass moments with the
    volume's point-spread taken out (:func:`_crack_from_mass`), and their one-sigma from a
    bootstrap over the mass voxels plus the calibrated model error (``MODEL_SIGMA_*``). Without
    it (labels only, e.g. invented labels) the labels are measured as a thickened sheet
    (module docstring, steps 2-7).

    Parameters
    ----------
    points_um : (N, 3) ndarray
        Voxel centres of the crack's label, wafer frame [x, y, z] in um.
    voxel_um : (dz, dy, dx)
        Voxel size, um.
    thickness_um : float
        Wafer thickness (z of the exit surface), um.
    edge : WaferEdge
        Wafer centre and radius (centre None: no edge cracks, no positions).
    z_uvw, x_uvw : 3-sequences
        Crystal orientation (SPEC section 3).
    bootstrap : int
        Bootstrap resamples over voxels for the plane's one-sigma (and the thickening's).
    seed : int
        Seed of the random generator (RANSAC and bootstrap).
    thickening_shape_um : (dz, dy, dx), optional
        Shape of the thickening of the labels: they cover the crack dilated by an ellipsoid
        with semi-axes ``k * thickening_shape_um`` (k is measured). Default: the voxel size.
    mass : ContrastMass, optional
        Excess intensity around the crack; None: labels only.
    point_spread : PointSpread, optional
        Point-spread of the volume (:func:`volume_point_spread`); default none.
    reach_um : float
        Reach of the crack's own contrast beyond its front, um (:data:`CONTRAST_REACH_UM`).

    Returns
    -------
    dict
        The crack's export fields (SPEC section 7) without ``id`` and ``review``, plus
        ``voxels`` and ``thickening_um`` (the labels' measured ellipsoid's semi-axes, x y z);
        ``uncertainty.method`` says whether the contrast mass or the labels were measured.

    Raises
    ------
    ValueError
        Too few voxels, or voxels that do not span a plane.
    """
    p = np.asarray(points_um, float)
    vx = np.asarray(voxel_um, float)[::-1]  # (dx, dy, dz)
    if len(p) < MIN_VOXELS:
        raise ValueError(f"a crack needs at least {MIN_VOXELS} voxels, got {len(p)}")
    shape = (
        vx.copy() if thickening_shape_um is None else np.asarray(thickening_shape_um, float)[::-1]
    )
    if shape.shape != (3,) or not np.all(shape > 0):
        raise ValueError(
            f"thickening_shape_um must be three positive lengths (dz, dy, dx), got {thickening_shape_um}"
        )
    lat = vx / shape
    rng = np.random.default_rng(seed)
    fit = fit_plane(p, vx, rng=rng)
    pin = p[fit.inliers]
    k = _thick_k(pin / shape, fit.centroid / shape, _unit(fit.normal * shape), None, lat)
    bnds = _boundaries(pin.mean(axis=0), edge)
    # a sheet lying nearly parallel to a boundary (a lateral crack under the surface) does not
    # start from it, however close it runs: only boundaries it meets at more than 25 deg count
    touches = {
        name: _touches(pin, b, vx, k, thickness_um, edge, shape)
        and abs(float(fit.normal @ b.m)) < math.cos(math.radians(25.0))
        for name, b in bnds.items()
    }
    touches.setdefault("edge", False)
    if touches["edge"] and touches["top"] != touches["bottom"] and mass is not None:
        face = "top" if touches["top"] else "bottom"
        if not _mass_reaches_face(
            pin, mass, bnds[face], thickness_um, edge, point_spread, reach_um
        ):
            touches[face] = False
    if touches["edge"]:
        kind = "edge"
    elif touches["top"] and touches["bottom"]:
        kind = "through"
    elif touches["top"]:
        kind = "surface_top"
    elif touches["bottom"]:
        kind = "surface_bottom"
    else:
        kind = "internal"
    ctx = _CrackCtx(vx, shape, thickness_um, edge, kind, touches, bnds)
    g = _crack_geometry(pin, ctx)
    n = g["normal"]
    res = (pin[g["interior"]] - g["centroid"]) @ n
    plane = plane_record(n, float(np.sqrt(np.mean(res**2))), z_uvw, x_uvw)

    # Inclination: bootstrap over the interior voxels of the plane fit; the same resamples give
    # the spread of the thickening factor, whose correction enters depth and length.
    pi = pin[g["interior"]] / shape
    incl_b, k_b = [], []
    for _ in range(int(bootstrap)):
        wts = rng.multinomial(len(pi), np.full(len(pi), 1.0 / len(pi))).astype(float)
        cb, nb = _weighted_plane(pi, wts)
        incl_b.append(plane_angles_deg(_to_um_normal(nb, shape))[0])
        k_b.append(_thick_k(pi, cb, nb, wts, lat))
    sig_k = _robust_sd(k_b)
    e_u, _ = _in_plane_axes(n)
    prim_m = bnds["edge"].m if kind == "edge" else EZ
    box_d, box_l = float(np.sum(np.abs(vx * prim_m))), float(np.sum(np.abs(vx * e_u)))
    # per free end: the thickening correction (its bootstrap spread) and the residual model
    # error of the outline on the voxel lattice (SYSTEMATIC_VOXELS of a voxel, sized from the
    # round-trip tests in tests/test_measure.py)
    ends_d = 0.0 if kind == "through" else 1.0
    sig_d = math.sqrt(
        g["sig_depth"] ** 2
        + ends_d * ((sig_k * _support(shape, prim_m)) ** 2 + (SYSTEMATIC_VOXELS * box_d) ** 2)
    )
    sig_l = math.sqrt(
        g["sig_length"] ** 2
        + 2.0 * ((sig_k * _support(shape, e_u)) ** 2 + (SYSTEMATIC_VOXELS * box_l) ** 2)
    )
    method = (
        f"labels only: inclination by bootstrap over voxels ({len(incl_b)} resamples) of the "
        "plane fit; depth and length by propagation of the front-fit residuals (ellipse "
        "covariance, front points correlated over one voxel) or of one voxel per extreme, of the "
        f"thickening correction's bootstrap spread and of {SYSTEMATIC_VOXELS} voxel per end for "
        "the outline model"
    )
    sig_i = _robust_sd(incl_b)
    psf_cov = np.zeros((3, 3)) if point_spread is None else np.asarray(point_spread.cov_um2, float)
    fwd_used = False
    if mass is not None and len(mass.excess) >= MIN_VOXELS and mass.snr >= MIN_MASS_SNR:
        try:
            mg = _crack_from_mass(
                mass.points_um, mass.excess, psf_cov, ctx, reach_um, footprint=True
            )
        except (ValueError, np.linalg.LinAlgError) as exc:
            log.debug("measure: contrast mass not used (%s)", exc)
            mg = None
        if mg is not None:
            sd_d, sd_l, sd_i = _crack_mass_bootstrap(
                mass.points_um, mass.excess, psf_cov, ctx, reach_um, bootstrap, rng
            )
            if (
                FORWARD_FIT
                and point_spread is not None
                and kind in ("surface_top", "surface_bottom")
                and mg["dip_um"] <= FORWARD_DIP_MAX_SLITS * point_spread.slit_half_um
            ):
                fwd = _crack_forward_fit(
                    mass.points_um, mass.excess, point_spread, ctx, reach_um, mg["normal"]
                )
                if fwd is not None:
                    log.debug(
                        "measure: forward model inclination %.2f +- %.2f deg (moments %.2f)",
                        plane_angles_deg(fwd.normal)[0],
                        fwd.sigma_inclination_deg,
                        plane_angles_deg(mg["normal"])[0],
                    )
                    mg_f = _crack_from_mass(
                        mass.points_um, mass.excess, psf_cov, ctx, reach_um, fwd.normal,
                        footprint=True,
                    )
                    mg = mg_f or mg
                    sd_i = fwd.sigma_inclination_deg
                    fwd_used = True
            edge_fit = None
            if (
                FORWARD_EDGE_LENGTH
                and point_spread is not None
                and kind == "edge"
                and _shape_of(kind, touches) == "semi_elliptical"
            ):
                edge_fit = _crack_forward_fit(
                    mass.points_um,
                    mass.excess,
                    point_spread,
                    ctx,
                    reach_um,
                    mg["normal"],
                    max_voxels=FORWARD_EDGE_MAX_VOXELS,
                )
            smear = None if point_spread is None else np.asarray(point_spread.direction, float)
            n_l = n if float(n @ mg["normal"]) >= 0 else -n
            apart = math.degrees(math.acos(min(1.0, float(n_l @ mg["normal"]))))
            s_l = max(sig_i, LABEL_TILT_FLOOR_DEG)
            if (
                smear is not None
                and kind != "edge"  # labels cut by the edge (and segment's edge margin)
                and abs(float(n_l @ smear)) < SMEAR_IN_PLANE  # the labels' (precise) normal
                and apart <= 3.0 * math.hypot(sd_i, s_l)
            ):
                # the smear runs within the crack plane: it lengthens the labelled sheet but
                # leaves it symmetric about the plane, so the labels' plane is unbiased too and
                # less noisy; where the two normals agree (within 3 sigma: not where the labels
                # took in something else, such as the wafer edge's face) they are averaged by
                # their inverse variances
                w_m = 1.0 / max(math.radians(sd_i), 1e-4) ** 2
                w_l = 1.0 / math.radians(s_l) ** 2
                n_c = _orient(_unit(w_m * mg["normal"] + w_l * n_l))
                mg = (
                    _crack_from_mass(
                        mass.points_um,
                        mass.excess,
                        psf_cov,
                        ctx,
                        reach_um,
                        normal=n_c,
                        footprint=True,
                    )
                    or mg
                )
                sd_i = math.degrees(1.0 / math.sqrt(w_m + w_l))
            edge_len = None
            if edge_fit is not None:
                l_fw = 2.0 * (edge_fit.half_length_um - FORWARD_EDGE_REACH_UM)
                mg_e = None
                if l_fw > 0:
                    mg_e = _crack_from_mass(
                        mass.points_um,
                        mass.excess,
                        psf_cov,
                        ctx,
                        reach_um,
                        normal=mg["normal"],
                        footprint=True,
                        length_um=l_fw,
                    )
                if mg_e is not None:
                    log.debug(
                        "measure: edge crack length %.1f um from the forward model (moments %.1f)",
                        l_fw,
                        mg["length"],
                    )
                    mg = mg_e
                    edge_len = math.hypot(
                        2.0 * edge_fit.sigma_half_length_um, FORWARD_EDGE_SIGMA_UM
                    )
            n = mg["normal"]
            res = (pin[g["interior"]] - mg["centroid"]) @ n
            plane = plane_record(n, float(np.sqrt(np.mean(res**2))), z_uvw, x_uvw)
            g = dict(g)
            for key in ("depth", "length", "front3", "span", "a", "c"):
                g[key] = mg[key]
            through = kind == "through"
            noise_um = MASS_NOISE_UM / mass.snr  # snr >= MIN_MASS_SNR here (finite or inf)
            sig_d = 0.0 if through else math.hypot(sd_d, MODEL_SIGMA_DEPTH_UM, noise_um)
            sig_l = math.hypot(sd_l, MODEL_SIGMA_LENGTH_UM, noise_um)
            if edge_len is not None:
                sig_l = edge_len
            sig_i = math.hypot(sd_i, math.degrees(MODEL_SIGMA_TILT_UM / mg["dip_um"]))
            method = (
                "contrast mass (excess intensity) with the volume's point-spread taken out: "
                f"bootstrap over voxels ({bootstrap} resamples) of the mass moments for depth, "
                "length and inclination, plus calibrated model errors "
                f"({MODEL_SIGMA_DEPTH_UM} um depth, {MODEL_SIGMA_LENGTH_UM} um length, "
                f"{MODEL_SIGMA_TILT_UM} um tilt over the crack's extent down the dip; "
                f"{MASS_NOISE_UM:g} um / snr on depth and length, snr {mass.snr:.0f})"
            )
            if fwd_used:
                method += (
                    "; plane from a forward model (the semi-elliptical patch, its sheet width "
                    "fitted, smeared by the point-spread; least squares on the mass voxels), its "
                    "inclination's one-sigma from the fit covariance plus the same tilt model error"
                )
            if edge_len is not None:
                method += (
                    "; length along z from the same forward model fitted to the edge crack "
                    f"(less {FORWARD_EDGE_REACH_UM} um of contrast reach per end), its "
                    "one-sigma from the fit covariance and a calibrated model error of "
                    f"{FORWARD_EDGE_SIGMA_UM} um"
                )
    front = {
        "a_um": g["a"],
        "c_um": g["c"],
        "aspect": g["a"] / g["c"] if g["c"] > 0 else 0.0,
        "shape": g["shape"],
        "points_um": g["front3"].tolist(),
        "fit_rms_um": g["fit_rms"],
    }
    return {
        "kind": kind,
        "centroid_um": [float(v) for v in p.mean(axis=0)],
        "position": _position(p, edge, on_edge=kind == "edge"),
        "depth_um": g["depth"],
        "length_um": g["length"],
        "thickness_span_um": [float(v) for v in g["span"]],
        "front": front,
        "plane": plane,
        "uncertainty": {
            "depth_um": sig_d,
            "length_um": sig_l,
            "inclination_deg": sig_i,
            "method": method,
        },
        "voxels": int(len(p)),
        "thickening_um": [float(v) for v in g["k"] * shape],
    }


def _position(p: np.ndarray, edge: WaferEdge, on_edge: bool = False) -> dict[str, float | None]:
    """Radius (mm) and angle (deg, from +x toward +y) of the centroid about the wafer centre,
    and the distance of the defect's nearest voxel centre to the edge (um, >= 0; 0 for a defect
    that meets the edge)."""
    if edge.center_xy_um is None:
        return {"r_mm": None, "angle_deg": None, "distance_to_edge_um": None}
    c = np.asarray(edge.center_xy_um, float)
    cen = p.mean(axis=0)
    r = math.hypot(cen[0] - c[0], cen[1] - c[1])
    ang = math.degrees(math.atan2(cen[1] - c[1], cen[0] - c[0])) % 360.0
    dist = 0.0 if on_edge else max(0.0, float(edge.radius_um - edge.radius_of(p).max()))
    return {"r_mm": r / 1000.0, "angle_deg": ang, "distance_to_edge_um": dist}


# ---------------------------------------------------------------------------------------------
# Point-spread of the reconstructed volume, and the contrast mass of a defect


@dataclass(frozen=True)
class PointSpread:
    """Point-spread of the reconstructed volume, from the acquisition's geometry.

    ``direction`` (unit, x y z) is the direction along which a point is smeared (the diffracted
    beam), ``half_length_um`` the half-length of the smear along it (its support), ``cov_um2``
    the 3 x 3 covariance (x, y, z, um^2) of the smear, ``slit_half_um`` the half-length (um,
    along ``direction``) of its top-hat part (the slit's width; the rest of ``cov_um2`` is
    Gaussian: slit edges, interpolation, detector). A zero spread (``PointSpread.none()``)
    stands for a volume without slit blur (invented labels).
    """

    direction: np.ndarray
    half_length_um: float
    cov_um2: np.ndarray
    slit_half_um: float = 0.0

    @classmethod
    def none(cls) -> PointSpread:
        return cls(EZ.copy(), 0.0, np.zeros((3, 3)))


def volume_point_spread(
    geom: Geometry, step_um: float, detector_blur_px: float = 0.0, slit_edge_um: float = 0.0
) -> PointSpread:
    """Point-spread of the reconstructed volume, mostly along the diffracted beam.

    A detector column integrates the lit ribbon across the slit: frame k's pixel at column c
    sees every wafer point with ``z G + D' L = const`` for the offsets ``D'`` across the slit
    (a top hat ``w / cos(psi0)`` wide in x, SPEC 5). Reconstruct puts the pixel's value at the
    voxel with its own offset ``D``, so a point at ``D'' = D' - D`` contributes from
    ``dz = -D'' L / G`` and ``dx = D'' + dz tan(psi0)``: the smear runs along
    ``(1 - (L/G) tan psi0, 0, -L/G)`` per um of ``D''``, the diffracted beam's direction (in
    symmetric Laue ``dx/dz = -tan(theta_B)``; its depth extent ``w |L| / (G cos psi0)`` is the
    depth ambiguity ``w sin(alpha_out) / sin(2 theta_B)`` of PHYSICS.md section 1.3). Its
    variance in ``D''`` is the top hat's ``(w / cos psi0)^2 / 12`` plus the linear
    interpolation between the two frames that bracket the voxel (weights 1 - f and f at offsets
    f s and (f - 1) s: variance f (1 - f) s^2, s^2 / 6 on average over f). The detector adds,
    along its rows (y) and columns (depth z at fixed D, ``p_col / G`` per column): the pixel's
    area (p^2 / 12), the bilinear interpolation between pixels (p^2 / 6) and its own blur
    (``detector_blur_px``, Gaussian sigma, which the acquisition does not record). In the random
    scans (w 10-15 um, step 4 um) the smear is +-12..17 um along z (one sigma 9-12 um), three
    voxels and more: labels thresholded on it reach that much beyond a crack's tip.

    Parameters
    ----------
    geom : Geometry
        The acquisition's geometry (psi0, G, L, slit width, pixel size).
    step_um : float
        Scan step, um.
    detector_blur_px : float
        Detector point-spread, Gaussian sigma in pixels.

    Returns
    -------
    PointSpread
        Direction (unit), support half-length (um) and covariance (x, y, z, um^2).
    """
    w_x = geom.slit_width_um / math.cos(math.radians(geom.psi0_deg))
    r = geom.L / geom.G
    per_d = np.array([1.0 - r * geom.tan_psi0, 0.0, -r])
    edge_x = slit_edge_um / math.cos(math.radians(geom.psi0_deg))
    var_d = w_x * w_x / 12.0 + edge_x * edge_x + step_um * step_um / 6.0
    norm = float(np.linalg.norm(per_d))
    direction = _orient(per_d / norm)
    cov = var_d * np.outer(per_d, per_d)
    dz_col = geom.p_col_um / abs(geom.G)
    pix2 = 1.0 / 12.0 + 1.0 / 6.0 + float(detector_blur_px) ** 2
    cov += np.diag([0.0, geom.p_row_um**2, dz_col**2]) * pix2
    return PointSpread(direction, (0.5 * w_x + abs(step_um)) * norm, cov, 0.5 * w_x * norm)


def _segment_structure(psf: PointSpread, vx: np.ndarray) -> np.ndarray:
    """Structuring element (z, y, x) of the smear segment on the voxel grid."""
    h = psf.half_length_um
    if h <= 0:
        return np.ones((1, 1, 1), bool)
    d = psf.direction * h / vx  # x y z, voxels
    n = int(math.ceil(np.abs(d).max() * 2)) + 1
    half = np.ceil(np.abs(d)).astype(int)
    el = np.zeros((2 * half[2] + 1, 2 * half[1] + 1, 2 * half[0] + 1), bool)
    for s in np.linspace(-1.0, 1.0, 2 * n + 1):
        i = np.round(s * d).astype(int) + half
        el[i[2], i[1], i[0]] = True
    return el


@dataclass
class ContrastMass:
    """The excess intensity (above the local perfect-crystal background) around one defect.

    ``points_um`` (N, 3: x y z) are voxel centres, ``excess`` their background-subtracted
    intensities (band units; noisy, may be negative).
    """

    points_um: np.ndarray
    excess: np.ndarray
    noise: float = 0.0

    @property
    def snr(self) -> float:
        """Total excess over its noise (``noise * sqrt(N)``); inf when noise-free."""
        tot = float(self.excess.sum())
        sd = self.noise * math.sqrt(len(self.excess))
        return tot / sd if sd > 0 else (math.inf if tot > 0 else 0.0)


def contrast_mass(
    image: np.ndarray,
    labels: np.ndarray,
    label: int,
    offset_zyx: tuple[int, int, int],
    meta: dict,
    psf: PointSpread,
    shell_zyx: tuple[int, int, int] = (1, 1, 1),
    edge: WaferEdge | None = None,
) -> ContrastMass:
    """Excess intensity of one labelled defect and of the smear around it, voxel by voxel.

    The region is the label dilated by the smear segment (everything the point-spread can have
    carried out of the defect) and by a shell of ``shell_zyx`` voxels (the defect's own contrast
    beyond the labels' threshold), minus other labels. The background is the
    median per depth slice of the block's voxels outside that region and inside the wafer
    (columns whose mean is above half the block's median level): the band and its fringes
    depend on depth only, so this keeps the band, the surface lines and the fringes out.

    Parameters
    ----------
    image, labels : (nz, ny, nx) ndarray
        Blocks of the volume and of its labels (the same voxels).
    label : int
        The defect's label.
    offset_zyx : 3 ints
        Index of the blocks' first voxel in the full volume.
    meta : dict
        ``voxel_um`` and ``origin_um`` of the volume.
    psf : PointSpread
        Point-spread of the volume.
    shell_zyx : 3 ints
        Half-widths (voxels) of the shell added around the smeared label.
    edge : WaferEdge, optional
        The wafer edge; where the label comes within :data:`EDGE_GAP_UM` of it, the background
        follows the band's lateral profile, corrected by depth and distance to the edge
        (:func:`_edge_background`), and the region reaches out to the edge.
    """
    img = np.nan_to_num(np.asarray(image, np.float64))
    lab = np.asarray(labels)
    vx = np.asarray(meta["voxel_um"], float)[::-1]
    own = lab == int(label)
    region = ndi.binary_dilation(own, _segment_structure(psf, vx))
    region = ndi.binary_dilation(region, np.ones(tuple(2 * int(h) + 1 for h in shell_zyx), bool))
    others = ndi.binary_dilation((lab != 0) & ~own, np.ones((3, 3, 3), bool))
    region &= ~others
    col_mean = img.mean(axis=0)
    pos = col_mean[col_mean > 0]
    level = float(np.median(pos)) if pos.size else 0.0
    inside_cols = col_mean > 0.5 * level if pos.size else np.ones(col_mean.shape, bool)
    sample = ~region & ~others & inside_cols[None, :, :]
    bg = np.zeros(img.shape[0])
    for k in range(img.shape[0]):
        s = img[k][sample[k]]
        bg[k] = float(np.median(s)) if s.size >= 5 else np.nan
    if np.all(np.isnan(bg)):
        raise ValueError("no background voxels around the defect")
    ok = ~np.isnan(bg)
    bg = np.interp(np.arange(len(bg)), np.nonzero(ok)[0], bg[ok])
    bg3 = np.broadcast_to(bg[:, None, None], img.shape)
    near_edge = False
    if edge is not None and edge.center_xy_um is not None:
        jy, jx = np.meshgrid(np.arange(img.shape[1]), np.arange(img.shape[2]), indexing="ij")
        cols = omezarr.voxel_to_wafer(
            np.column_stack([np.zeros(jy.size, int), jy.ravel(), jx.ravel()])
            + np.asarray(offset_zyx, int),
            meta,
        )
        to_edge = (edge.radius_um - edge.radius_of(np.asarray(cols, float))).reshape(jy.shape)
        near_edge = bool(np.any(to_edge[own.any(axis=0)] <= EDGE_GAP_UM))
    if near_edge:
        # the wafer edge crosses the block: the band falls across it (over the smear's reach in
        # x), so the background is the depth profile times the band's lateral profile, taken
        # per column from the voxels outside the region (nearest sampled column where the
        # region fills a column), and the region is not cut at the edge, where the smear
        # carried the defect's contrast. Labels may stop short of the edge (a segmentation
        # margin) where the defect's contrast goes on: within EDGE_GAP_UM of the edge the
        # region takes in the strip between them (grown radially outward only).
        own_cols = own.any(axis=0)
        cxy = np.asarray(cols, float).reshape(*jy.shape, 3)[own_cols][:, :2].mean(axis=0)
        out_dir = _unit(cxy - np.asarray(edge.center_xy_um, float))  # radially outward (x, y)
        steps = np.linspace(0.0, EDGE_GAP_UM, int(math.ceil(EDGE_GAP_UM / vx[:2].min())) + 1)
        sy = np.round(steps * out_dir[1] / vx[1]).astype(int)
        sx = np.round(steps * out_dir[0] / vx[0]).astype(int)
        ray = np.zeros((1, 2 * np.abs(sy).max() + 1, 2 * np.abs(sx).max() + 1), bool)
        ray[0, sy + np.abs(sy).max(), sx + np.abs(sx).max()] = True
        beyond = to_edge >= -2.0 * float(vx[0])  # the smear's reach past the edge
        strip = ((to_edge <= EDGE_GAP_UM) & beyond)[None]
        region |= ndi.binary_dilation(region, ray) & strip & ~others
        region &= (inside_cols | (beyond & (to_edge <= 0.0)))[None]
        deep = bg > 0.5 * float(bg.max())
        free = ~region & ~others & deep[:, None, None]
        with np.errstate(invalid="ignore", divide="ignore"):
            ratio = np.where(free, img / np.maximum(bg3, 1e-12), np.nan)
        have = free.any(axis=0)
        lat = np.ones(col_mean.shape)
        if have.any():
            lat[have] = np.nanmedian(ratio[:, have], axis=0)
            if not have.all():
                _, near = ndi.distance_transform_edt(~have, return_indices=True)
                lat = lat[near[0], near[1]]
        bg3 = bg3 * lat[None, :, :]
        free = ~region & ~others
        bg3 = _edge_background(img, free, to_edge, float(min(vx[0], vx[1])), bg3)
        sample = free & inside_cols[None, :, :]
    else:
        region &= inside_cols[None, :, :]
    resid = img[sample] - bg3[sample]
    noise = 1.4826 * float(np.median(np.abs(resid - np.median(resid)))) if resid.size else 0.0
    idx = np.argwhere(region)
    excess = img[region] - bg3[region]
    pts = omezarr.voxel_to_wafer(idx + np.asarray(offset_zyx, int), meta)
    return ContrastMass(np.asarray(pts, float), excess, noise)


#: Least voxels outside a defect's region in one (depth, distance to the edge) bin for the
#: bin's own background (:func:`_edge_background`).
EDGE_BG_MIN_VOXELS = 5


def _edge_background(
    img: np.ndarray, free: np.ndarray, to_edge_um: np.ndarray, bin_um: float, separable: np.ndarray
) -> np.ndarray:
    """Background near the wafer edge: the separable model times a correction that depends on
    depth and distance to the edge.

    ``separable`` is a depth profile times one lateral profile per voxel column; it holds
    where the band's fall across the edge is the same at every depth, but not at the corner
    of the edge with a surface, where the band's fall across the surface (the slit's smear in
    depth) and its fall across the edge overlap: the product left a residual there that two
    small corner cracks of the development set took into their mass (planes 6 and 29 deg
    off, lengths +8.8 and +11.1 um). The wafer edge is a cylinder, so what the product misses
    depends on depth and distance to the edge only: the ratio of the voxels outside the
    defect's region (``free``) to ``separable`` is binned by depth slice and distance to the
    edge (``to_edge_um`` per column, bins of ``bin_um``), each bin's median (from at least
    :data:`EDGE_BG_MIN_VOXELS` voxels) is its correction, interpolated along the distance
    between a slice's bins (the columns of a lattice at an angle to the edge fill only some
    fine bins); 1 where a slice has none. The per-column lateral profile stays in
    ``separable`` (a flat-field residual along the rows, say).
    """
    nz = img.shape[0]
    b = np.floor(np.asarray(to_edge_um, float) / bin_um).astype(np.int64)
    b -= int(b.min())
    nb = int(b.max()) + 1
    key = np.arange(nz, dtype=np.int64)[:, None, None] * nb + b[None, :, :]
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = img / separable
    use = free & np.isfinite(ratio) & (separable > 1e-6)
    keys, vals = key[use], ratio[use]
    count = np.bincount(keys, minlength=nz * nb)
    have = np.nonzero(count >= EDGE_BG_MIN_VOXELS)[0]
    corr = np.full(nz * nb, np.nan)
    if have.size:
        corr[have] = ndi.median(vals, keys, have)
    corr = corr.reshape(nz, nb)
    centres = np.arange(nb, dtype=float)
    for k in range(nz):
        ok = np.isfinite(corr[k])
        if ok.any() and not ok.all():
            corr[k] = np.interp(centres, centres[ok], corr[k][ok])
    corr = np.where(np.isfinite(corr), corr, 1.0)
    return separable * corr.ravel()[np.broadcast_to(key, img.shape)]


def _mass_moments(
    q: np.ndarray, e: np.ndarray, psf_cov: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Mean and covariance (um, um^2) of the contrast mass with the point-spread taken out.

    A convolution adds the point-spread's covariance to the object's (the mean of a symmetric
    spread is zero), so the object's second moments are the observed ones less ``psf_cov``.
    """
    m = float(e.sum())
    if not m > 0:
        raise ValueError("no positive contrast mass")
    mu = (e[:, None] * q).sum(axis=0) / m
    x = q - mu
    cov = (e[:, None] * x).T @ x / m - psf_cov
    return mu, cov


#: Invert the footprint model (:func:`_footprint_moments`) for half and quarter ellipses.
FOOTPRINT_MODEL = True
#: What an extent taken from a first moment (depth of half and quarter ellipses, a quarter
#: ellipse's length) gains beyond the footprint model, um: the crack contrast's soft tail
#: (core plus exponential halo about the front) puts its mass farther out than the band of the
#: same mass-equivalent reach does. The forward model's contrast alone, without point-spread,
#: gives +0.4..+1.1 um on half and quarter ellipses of 18-65 um x 18-173 um; the harness
#: (exact registration, seeds 100-120, 39 surface and edge cracks) a mean depth excess of
#: +0.63 um, so 0.6 um; checked on seeds 0-20 and 200-208 (docs/accuracy.md). Not applied
#: to the half ellipse's length, a second moment along the mouth, whose tail the contrast
#: region's one-voxel shell mostly cuts (its excess there: +0.3 um).
TAIL_FIRST_MOMENT_UM = 0.6


def _footprint_moments(
    a_um: float, c_um: float, quarter: bool, reach_um: float
) -> tuple[float, float, float]:
    """Moments (um, um, um) of a crack's contrast footprint in its plane: the uniform half (or
    quarter) ellipse of semi-axes ``a_um`` (from the mouth) and ``c_um`` (along it) grown by
    ``reach_um`` beyond its front, on the wafer's side of the boundary (u >= 0; v >= 0 too for
    the quarter ellipse at a corner).

    Returns ``(mean u, mean v, sd v)``: the first is the moment estimate of depth, the
    second (quarter) or third (half) that of the length. Growing the front by a constant
    reach adds ``reach`` to a circle's semi-axes, but not to a long thin ellipse's: there the
    reach along the flanks (a band of width ``reach`` along the long side) moves the moment
    along the long axis too, by up to 2.9 um for a 26 um x 173 um quarter ellipse (exact
    nearest-point distance, :func:`pipeline.geometry.ellipse_outside_d2`). Numerical, on an
    in-plane grid of step min(a, c) / 40 (0.1-0.5 um, coarser beyond 2e5 points) with the
    edge anti-aliased over one step.
    """
    a, c, r = max(float(a_um), 0.05), max(float(c_um), 0.05), max(float(reach_um), 0.0)
    h = min(max(min(a, c) / 40.0, 0.1), 0.5)
    h = max(h, math.sqrt((a + r) * (2.0 * c + 2.0 * r) / 2e5))  # at most ~2e5 grid points
    u = np.arange(0.5 * h, a + r + h, h)
    v = np.arange(0.5 * h, c + r + h, h) if quarter else np.arange(-c - r - h, c + r + h, h)
    uu, vv = np.meshgrid(u, v, indexing="ij")
    d = np.sqrt(ellipse_outside_d2(uu, vv, a, c))
    m = np.clip((r - d) / h + 0.5, 0.0, 1.0)
    tot = float(m.sum())
    mu, mv = float((m * uu).sum()) / tot, float((m * vv).sum()) / tot
    sv = math.sqrt(max(float((m * vv * vv).sum()) / tot - mv * mv, 0.0))
    return mu, mv, sv


def _invert_footprint(
    mean_u_um: float, along_um: float, quarter: bool, reach_um: float, start: tuple[float, float]
) -> tuple[float, float] | None:
    """Semi-axes (a, c), um, whose footprint (:func:`_footprint_moments`) has the observed
    mean distance from the mouth ``mean_u_um`` and, along the mouth, the observed mean distance
    from the other boundary (quarter ellipse) or standard deviation (half ellipse)
    ``along_um``; None where the least-squares solution does not reproduce them to 1 %."""
    if not (mean_u_um > 0 and along_um > 0 and reach_um > 0):
        return None

    def resid(x: np.ndarray) -> np.ndarray:
        mu, mv, sv = _footprint_moments(x[0], x[1], quarter, reach_um)
        return np.array([mu / mean_u_um - 1.0, (mv if quarter else sv) / along_um - 1.0])

    x0 = np.maximum(np.asarray(start, float), 0.5)
    try:
        sol = least_squares(
            resid, x0, bounds=([0.05, 0.05], [1e5, 1e5]), x_scale=x0, diff_step=1e-3
        )
    except (ValueError, np.linalg.LinAlgError):
        return None
    if not sol.success or float(np.max(np.abs(sol.fun))) > 0.01:
        return None
    return float(sol.x[0]), float(sol.x[1])


def _crack_from_mass(
    q: np.ndarray,
    e: np.ndarray,
    psf_cov: np.ndarray,
    ctx: _CrackCtx,
    reach_um: float,
    normal: np.ndarray | None = None,
    footprint: bool = False,
    length_um: float | None = None,
) -> dict[str, Any] | None:
    """Plane, depth, length and front of a crack from its contrast mass (None: internal crack).

    The mass is the crack's contrast convolved with the volume's point-spread, so its mean is
    the crack's and its covariance the crack's plus ``psf_cov`` (:func:`_mass_moments`). The
    plane normal is the least-variance axis of the deconvolved covariance. A uniform
    semi-elliptical patch of depth a has its mean distance from the boundary at 4 a / (3 pi) and
    its variance along the mouth c^2 / 4 (c the half-length); a quarter ellipse the same means
    along both boundaries; a through crack's band of length l has variance l^2 / 12. The reach
    of the crack's own contrast beyond the front (``reach_um``) is taken off every free end.
    ``normal`` replaces the mass's own plane normal when given. With ``footprint`` (and
    :data:`FOOTPRINT_MODEL`) the half and quarter ellipses' semi-axes are instead those whose
    footprint grown by the reach has the observed moments (:func:`_invert_footprint`), which
    corrects long thin fronts; the bootstrap leaves it out (its spreads are the moments').
    ``length_um`` replaces a half ellipse's length (um) when given (the forward model's, for
    edge cracks at mid-thickness: :data:`FORWARD_EDGE_LENGTH`).
    """
    mu, cov = _mass_moments(q, e, psf_cov)
    _, vec = np.linalg.eigh(cov)
    n = _orient(_unit(vec[:, 0] if normal is None else np.asarray(normal, float)))
    m_tot = float(e.sum())
    t = ctx.thickness_um
    shape = _shape_of(ctx.kind, ctx.touches)
    e_u, e_v = _in_plane_axes(n)

    def mean_dist(name: str) -> float:
        return float(np.sum(e * ctx.dist(name, q)) / m_tot)

    def var_along(d: np.ndarray) -> float:
        s = (q - mu) @ d
        return max(float(np.sum(e * s * s) / m_tot - d @ psf_cov @ d), 0.0)

    def in_plane(m: np.ndarray) -> np.ndarray:
        v = m - (m @ n) * n
        return _unit(v) if np.linalg.norm(v) > 1e-9 else e_v

    span = [0.0, t]
    patch = None
    if shape == "semi_elliptical":
        prim = "edge" if ctx.kind == "edge" else ("top" if ctx.kind == "surface_top" else "bottom")
        m = ctx.bnds[prim].m
        e_c = _unit(np.cross(n, m)) if np.linalg.norm(np.cross(n, m)) > 1e-6 else e_u
        e_a = in_plane(m)
        g = max(abs(float(e_a @ m)), 1e-6)
        depth = max(0.75 * math.pi * mean_dist(prim) - reach_um, 0.0)
        length = max(4.0 * math.sqrt(var_along(e_c)) - 2.0 * reach_um, 0.0)
        if footprint and FOOTPRINT_MODEL:
            ac = _invert_footprint(
                mean_dist(prim) / g,
                math.sqrt(var_along(e_c)),
                False,
                reach_um,
                (depth / g, 0.5 * length),
            )
            if ac is not None:
                depth, length = max(ac[0] - TAIL_FIRST_MOMENT_UM, 0.0) * g, 2.0 * ac[1]
        if length_um is not None:
            length = float(length_um)
        base = mu - (float(ctx.dist(prim, mu[None, :])[0]) / g) * e_a
        th = np.linspace(0.0, math.pi, 65)[:, None]
        front = base + 0.5 * length * np.cos(th) * e_c + (depth / g) * np.sin(th) * e_a
        a_fit, c_fit = depth, 0.5 * length
        dip = depth / g
        # the uniform patch of the same moments (the contrast's reach not taken off): base on
        # the boundary, half-axes along the mouth and down the dip (for the forward model)
        patch = (base, (0.5 * length + reach_um) * e_c, ((depth + reach_um) / g) * e_a)
        if ctx.kind == "surface_top":
            span = [0.0, min(t, depth)]
        elif ctx.kind == "surface_bottom":
            span = [max(0.0, t - depth), t]
        else:
            span = [max(0.0, float(front[:, 2].min())), min(t, float(front[:, 2].max()))]
    elif shape == "quarter_elliptical":
        face = "top" if ctx.touches["top"] else "bottom"
        mf, me = ctx.bnds[face].m, ctx.bnds["edge"].m
        depth = max(0.75 * math.pi * mean_dist("edge") - reach_um, 0.0)
        length = max(0.75 * math.pi * mean_dist(face) - reach_um, 0.0)
        if footprint and FOOTPRINT_MODEL:
            ac = _invert_footprint(
                mean_dist("edge"), mean_dist(face), True, reach_um, (depth, length)
            )
            if ac is not None:
                depth = max(ac[0] - TAIL_FIRST_MOMENT_UM, 0.0)
                length = max(ac[1] - TAIL_FIRST_MOMENT_UM, 0.0)
        mm = np.vstack([[mf @ e_u, mf @ e_v], [me @ e_u, me @ e_v]])
        d0 = np.array([ctx.dist(face, mu[None, :])[0], ctx.dist("edge", mu[None, :])[0]])
        th = np.linspace(0.0, 0.5 * math.pi, 33)
        rhs = np.column_stack([length * np.cos(th), depth * np.sin(th)]) - d0
        xy = np.linalg.solve(mm, rhs.T).T
        front = mu + np.outer(xy[:, 0], e_u) + np.outer(xy[:, 1], e_v)
        a_fit, c_fit = depth, length
        dip = math.hypot(depth, length)
        span = [0.0, min(t, length)] if face == "top" else [max(0.0, t - length), t]
    elif shape == "through" and ctx.kind == "edge":
        me = ctx.bnds["edge"].m
        depth = max(2.0 * mean_dist("edge") - reach_um, 0.0)
        e_c = _unit(np.cross(n, me)) if np.linalg.norm(np.cross(n, me)) > 1e-6 else EZ
        zc = abs(float(e_c[2]))
        length = t / zc if zc > 0.2 else t
        e_a = in_plane(me)
        g = max(abs(float(e_a @ me)), 1e-6)
        base = mu + ((depth - float(ctx.dist("edge", mu[None, :])[0])) / g) * e_a
        if abs(e_c[2]) > 1e-6:  # centre the front line at mid-thickness
            base = base + ((0.5 * t - base[2]) / e_c[2]) * e_c
        front = base + np.linspace(-0.5, 0.5, 33)[:, None] * length * e_c
        a_fit, c_fit = depth, length
        dip = length
    elif shape == "through":
        depth = t
        length = max(math.sqrt(12.0 * var_along(e_u)) - 2.0 * reach_um, 0.0)
        s = np.linspace(0.0, t, 17)[:, None]
        foot = mu - (mu[2] / e_v[2]) * e_v if abs(e_v[2]) > 1e-6 else mu
        ends = [foot + sgn * 0.5 * length * e_u for sgn in (-1.0, 1.0)]
        front = np.vstack([end + s / max(abs(e_v[2]), 1e-6) * e_v for end in ends])
        a_fit, c_fit = depth, 0.5 * length
        dip = t / max(abs(float(e_v[2])), 1e-6)
    else:
        return None
    return {
        "normal": n,
        "centroid": mu,
        "depth": depth,
        "length": length,
        "front3": front,
        "span": span,
        "a": a_fit,
        "c": c_fit,
        "dip_um": max(float(dip), 1e-6),
        "patch": patch,
    }


def _crack_mass_bootstrap(
    q: np.ndarray,
    e: np.ndarray,
    psf_cov: np.ndarray,
    ctx: _CrackCtx,
    reach_um: float,
    n_boot: int,
    rng: np.random.Generator,
) -> tuple[float, float, float]:
    """Bootstrap spreads (depth um, length um, inclination deg) of :func:`_crack_from_mass`:
    voxels resampled with replacement (Efron & Tibshirani 1993), each keeping its excess."""
    d_b, l_b, i_b = [], [], []
    for _ in range(int(n_boot)):
        wts = rng.multinomial(len(e), np.full(len(e), 1.0 / len(e))).astype(float)
        try:
            r = _crack_from_mass(q, e * wts, psf_cov, ctx, reach_um)
        except ValueError:
            continue
        if r is None:
            continue
        d_b.append(r["depth"])
        l_b.append(r["length"])
        i_b.append(plane_angles_deg(r["normal"])[0])
    return _robust_sd(d_b), _robust_sd(l_b), _robust_sd(i_b)


# ---------------------------------------------------------------------------------------------
# Forward model of a shallow crack: its patch smeared by the point-spread, fitted to the mass

#: Start value of the Gaussian half-width of a crack's own contrast about its sheet and front in
#: the forward model (:func:`_crack_forward_fit`), um: the forward model's crack contrast
#: (core 1.5 exp(-r^2 / 2 (1.2 um)^2) + halo 0.3 exp(-r / 4 um),
#: synthetic.scenario.FeatureContrast) has its half maximum at r = 1.9 um.
SHEET_SIGMA_UM = 2.0
#: Range of that half-width, um. It is fitted: where the smear runs nearly within the plane
#: (vertical cracks, smear 10.6 deg off z), a wrong fixed width is taken up by a tilt of the
#: plane (measured on the 20 um deep vertical crack of tests/test_measure_psf.py, 1.5 um core:
#: width held at 2.0 um, -3.7 deg; fitted, 1.45 um and 0.0 deg).
SHEET_SIGMA_BOUNDS_UM = (1.0, 8.0)
#: The forward model replaces the moments' plane for semi-elliptical surface cracks whose
#: extent down the dip is at most this many slit half-lengths (the smear's top hat): there the
#: point-spread's covariance is a large part of the mass's across the plane and taking it out
#: amplifies the noise; for longer dips the moments are as good and cost nothing.
FORWARD_DIP_MAX_SLITS = 4.0
#: Patch samples per smallest Gaussian half-width of the model's kernel, inverse (a spacing of
#: 1.5 sigma leaves a ripple of exp(-2 pi^2 / 1.5^2) ~ 1e-4 of the smeared sheet).
_PATCH_SPACING_SIGMAS = 1.5
#: Most mass voxels and patch samples the fit evaluates (the kernel sum costs voxels x samples
#: per residual; on the small bench run's 0.8 um voxels, with every voxel and sample, one crack
#: took ~200 s). Above it, a fixed-seed random subset of the voxels (the fit's covariance
#: scaled back to all of them) and a coarser patch.
FORWARD_MAX_VOXELS = 1200
FORWARD_MAX_PATCH = 300
#: Edge cracks at mid-thickness (semi-elliptical, the mouth along z) take their length from the
#: forward model's patch (:func:`_crack_forward_fit`) instead of the mass's second moment along
#: z. Along z the contrast region (the label grown by the smear, +-12..17 um) keeps the crack
#: contrast's soft tail and a wide margin of background, and the second moment weights both by
#: the squared distance: on the development set (exact registration, seeds 100-120, 6 such
#: cracks) the moments' lengths were off by -3.0..+3.3 um (sd 2.3 um), the patch's by a constant
#: plus -1.6..+2.8 um (sd 1.5 um); on seeds 0-20 and 200-208 (4 cracks) by -0.7..+6.8 um against
#: +0.6..+2.3 um (docs/accuracy.md).
FORWARD_EDGE_LENGTH = True
#: What the fitted uniform patch reaches beyond an edge crack's front at each end along z, um
#: (taken off both ends): the development set's mean excess of the fitted length, 3.96 um, over
#: two ends (set with the 1200-voxel fit; with FORWARD_EDGE_MAX_VOXELS the development set's
#: mean error is +0.2 um). Less than the mass-equivalent reach (``CONTRAST_REACH_UM``); why is
#: not traced (the patch's free amplitude and constant may take up part of the soft tail).
FORWARD_EDGE_REACH_UM = 2.0
#: Model error of that length, um (one-sigma, the development set's scatter about the mean
#: excess: sd 1.55 um over 6 cracks; the fit's own covariance gives 0.1-0.3 um).
FORWARD_EDGE_SIGMA_UM = 1.5
#: Most mass voxels the edge-length fit evaluates (a fixed-seed random subset above it). The
#: subset is a noise of its own that the fit's covariance (scaled to all the voxels) does not
#: show: with the plane fit's 1200 voxels, six subsets gave one 114 um edge crack's length
#: 116.4-118.4 um (sd 0.8 um), with 4000 116.5-117.0 um (sd 0.2 um), the fit taking about three
#: times as long (3-10 s).
FORWARD_EDGE_MAX_VOXELS = 4000


def _unit_half_disk(n_u: int, n_v: int) -> tuple[np.ndarray, np.ndarray]:
    """Cell centres (s, t) of an ``n_u`` x ``n_v`` grid on [-1, 1] x [0, 1] that lie inside the
    unit half-disk (equal areas: the patch's samples in its own axes)."""
    s = (np.arange(n_u) + 0.5) / n_u * 2.0 - 1.0
    t = (np.arange(n_v) + 0.5) / n_v
    ss, tt = np.meshgrid(s, t, indexing="ij")
    keep = ss**2 + tt**2 <= 1.0
    return ss[keep], tt[keep]


def _smeared_points(
    q: np.ndarray, pts: np.ndarray, direction: np.ndarray, slit_half_um: float, prec: np.ndarray
) -> np.ndarray:
    """Sum over ``pts`` of the point-spread at ``q`` (unnormalised): a segment of half-length
    ``slit_half_um`` along ``direction`` (the slit's top hat) convolved with a Gaussian of
    precision ``prec`` (um^-2). The segment integral of a Gaussian is a difference of normal
    cumulative distributions: with ``r`` the offset, ``(r - s d)^T P (r - s d)`` is quadratic
    in ``s`` (a = d P d, b = d P r, c = r P r), so the integral over ``|s| <= h`` is
    ``exp(-(c - b^2 / a) / 2) (Phi((h - b / a) sqrt a) - Phi((-h - b / a) sqrt a))`` up to a
    constant."""
    # expanded as (r = q - p): c = qPq - 2 qPp + pPp and b = q.Pd - p.Pd, so the pairs cost one
    # matrix product instead of an (N, M, 3) array
    o = q.mean(axis=0)  # about a near origin: no cancellation in the expanded c
    q, pts = q - o, pts - o
    pd = prec @ direction
    alpha = float(direction @ pd)
    sa = math.sqrt(alpha)
    qp = q @ prec
    qq = np.einsum("ni,ni->n", qp, q)
    pp = np.einsum("mi,ij,mj->m", pts, prec, pts)
    qd, pdd = q @ pd, pts @ pd
    out = np.empty(len(q))
    step = max(1, 1_000_000 // max(len(pts), 1))
    for i in range(0, len(q), step):
        sl = slice(i, i + step)
        beta = qd[sl, None] - pdd[None, :]
        gamma = qq[sl, None] - 2.0 * (qp[sl] @ pts.T) + pp[None, :]
        s0 = beta / alpha
        w = np.exp(-0.5 * np.maximum(gamma - beta * s0, 0.0))
        near = w > 1e-12  # the cumulative distributions only where the Gaussian is not 0
        s0 = s0[near]
        w[near] *= ndtr((slit_half_um - s0) * sa) - ndtr((-slit_half_um - s0) * sa)
        out[sl] = w.sum(axis=1)
    return out


@dataclass(frozen=True)
class ForwardFit:
    """Result of :func:`_crack_forward_fit`: the plane normal (unit, x y z), the one-sigma of its
    inclination (deg), the fitted half-length of the patch along the mouth with the contrast's
    reach included (``half_length_um``, um) and its one-sigma from the fit's covariance."""

    normal: np.ndarray
    sigma_inclination_deg: float
    half_length_um: float
    sigma_half_length_um: float


def _crack_forward_fit(
    q: np.ndarray,
    e: np.ndarray,
    psf: PointSpread,
    ctx: _CrackCtx,
    reach_um: float,
    n0: np.ndarray,
    max_voxels: int = FORWARD_MAX_VOXELS,
) -> ForwardFit | None:
    """Forward model of a semi-elliptical crack's contrast mass, fitted; None where the model
    does not apply.

    The model is the uniform patch of :func:`_crack_from_mass` (base on the boundary, the
    moments' depth and length plus the contrast's reach, for the trial normal), its two
    semi-axes scaled by free factors, blurred by a Gaussian sheet width (free, start
    :data:`SHEET_SIGMA_UM`) and smeared by the volume's point-spread (its top hat along the
    diffracted beam and its Gaussian rest, :func:`_smeared_points`), times an amplitude plus a
    constant (both linear, solved at every step). Least squares over the mass voxels
    (:func:`scipy.optimize.least_squares`) of the normal's two tilts, the patch's offset along
    the normal, the two scales and the sheet width, from the moments' normal ``n0``. Unlike
    the moments this weights each voxel by its signal, not by its squared distance from the
    centroid, and needs no complete mass. The one-sigma is the fit's covariance (residual
    variance times (J^T J)^-1) along the tilt that changes the inclination; it sees the noise
    only, not the model's error (the caller adds ``MODEL_SIGMA_TILT_UM``).
    """
    h = float(psf.slit_half_um)
    if h <= 0 or len(e) < 20:
        return None
    cov = np.asarray(psf.cov_um2, float)
    mg0 = _crack_from_mass(q, e, cov, ctx, reach_um, normal=n0)
    if mg0 is None or mg0["patch"] is None:
        return None
    d = np.asarray(psf.direction, float)
    rest = cov - (h * h / 3.0) * np.outer(d, d)  # the point-spread's Gaussian part
    lo_sheet, hi_sheet = SHEET_SIGMA_BOUNDS_UM
    sig_min = math.sqrt(max(float(np.linalg.eigvalsh(rest).min()), 0.0) + lo_sheet**2)
    _, u0, v0 = mg0["patch"]
    spacing = _PATCH_SPACING_SIGMAS * sig_min
    n_u = max(3, int(math.ceil(2.0 * float(np.linalg.norm(u0)) / spacing)))
    n_v = max(2, int(math.ceil(float(np.linalg.norm(v0)) / spacing)))
    shrink = math.sqrt(min(1.0, 2.0 * FORWARD_MAX_PATCH / (n_u * n_v)))  # a half disk: ~n_u n_v / 2
    ss, tt = _unit_half_disk(
        max(3, int(math.ceil(n_u * shrink))), max(2, int(math.ceil(n_v * shrink)))
    )
    n_all = len(e)
    if n_all > max_voxels:
        pick = np.sort(np.random.default_rng(0).choice(n_all, max_voxels, replace=False))
        q_fit, e_fit = q[pick], e[pick]
    else:
        q_fit, e_fit = q, e
    n0 = _orient(_unit(n0))
    t1, t2 = _in_plane_axes(n0)
    ones = np.ones(len(e_fit))

    def normal_of(x: np.ndarray) -> np.ndarray:
        return _orient(_unit(n0 + x[0] * t1 + x[1] * t2))

    def resid(x: np.ndarray) -> np.ndarray:
        n = normal_of(x)
        mg = _crack_from_mass(q, e, cov, ctx, reach_um, normal=n)
        base, u, v = mg["patch"]
        pts = (
            base
            + x[2] * n
            + ss[:, None] * (math.exp(x[3]) * u)
            + tt[:, None] * (math.exp(x[4]) * v)
        )
        prec = np.linalg.inv(rest + x[5] ** 2 * np.eye(3))
        a = np.column_stack([_smeared_points(q_fit, pts, d, h, prec), ones])
        coef, *_ = np.linalg.lstsq(a, e_fit, rcond=None)
        return a @ coef - e_fit

    try:
        sol = least_squares(
            resid,
            np.array([0.0, 0.0, 0.0, 0.0, 0.0, SHEET_SIGMA_UM]),
            bounds=(
                [-0.6, -0.6, -20.0, -1.0, -1.0, lo_sheet],
                [0.6, 0.6, 20.0, 1.0, 1.0, hi_sheet],
            ),
            x_scale=np.array([0.02, 0.02, 1.0, 0.05, 0.05, 0.5]),
            diff_step=1e-3,
            max_nfev=80,
            ftol=1e-6,
            xtol=1e-4,
        )
    except (ValueError, np.linalg.LinAlgError) as exc:
        log.debug("measure: forward model not fitted (%s)", exc)
        return None
    if not np.all(np.isfinite(sol.x)) or max(abs(sol.x[0]), abs(sol.x[1])) >= 0.6 - 1e-6:
        return None  # stopped at the bound: no minimum near the moments' plane
    n = normal_of(sol.x)
    jac = np.asarray(sol.jac, float)
    dof = max(len(e_fit) - 8, 1)
    s2 = float(np.sum(sol.fun**2)) / dof
    try:
        # scaled from the subset to all the voxels (J^T J grows with their number)
        cov_x = s2 * np.linalg.pinv(jac.T @ jac) * (len(e_fit) / n_all)
    except np.linalg.LinAlgError:
        return None
    tz = EZ - float(EZ @ n) * n
    if np.linalg.norm(tz) < 1e-9:
        return None
    tz = _unit(tz)
    g = np.array([float(t1 @ tz), float(t2 @ tz), 0.0, 0.0, 0.0, 0.0])
    sd = math.degrees(math.sqrt(max(float(g @ cov_x @ g), 0.0)))
    half = float(np.linalg.norm(u0)) * math.exp(float(sol.x[3]))
    sd_half = half * math.sqrt(max(float(cov_x[3, 3]), 0.0))
    return ForwardFit(n, sd, half, sd_half)


# ---------------------------------------------------------------------------------------------
# Loops and slip bands


def measure_loop_points(
    points_um: np.ndarray,
    voxel_um: tuple[float, float, float],
    *,
    thickness_um: float,
    z_uvw=(0, 0, 1),
    x_uvw=(1, 1, 0),
    seed: int = 0,
    thickening_shape_um: tuple[float, float, float] | None = None,
    mass: ContrastMass | None = None,
    point_spread: PointSpread | None = None,
) -> dict[str, Any]:
    """Centre, diameter, plane and surface contact of a dislocation loop from its voxels.

    With ``mass`` (excess intensity around the loop, :func:`contrast_mass`) of at least
    :data:`MIN_MASS_SNR`: the covariance of the mass less the volume's point-spread is the
    ring's centre line (a circle of radius R has variance R^2 / 2 along both axes of its plane)
    plus the tube's own spread (the same along every axis, to first order), so the normal is the
    least-variance axis, the centre the mass mean and ``R = sqrt(l1 + l2 - 2 l0)`` from the
    eigenvalues l0 <= l1 <= l2. A label-based circle fits the outside of the blurred tube and
    comes out one smear half-length too large. Without it, the labels: plane fit as for cracks,
    then a least-squares circle (:class:`skimage.measure.CircleModel`) in the plane.
    """
    p = np.asarray(points_um, float)
    vx = np.asarray(voxel_um, float)[::-1]
    if len(p) < MIN_VOXELS:
        raise ValueError(f"a loop needs at least {MIN_VOXELS} voxels, got {len(p)}")
    rng = np.random.default_rng(seed)
    fit = fit_plane(p, vx, rng=rng)
    n = fit.normal
    e_u, e_v = _in_plane_axes(n)
    rel = p - fit.centroid
    uv = np.column_stack([rel @ e_u, rel @ e_v])
    circ = CircleModel.from_estimate(uv)
    rho_rms = float(np.sqrt(np.mean(np.sum(uv**2, axis=1))))
    if circ and float(circ.radius) < 10 * rho_rms + 10 * float(vx.max()):
        # CircleModel's algebraic fit is biased on a partial ring (a half loop at a surface);
        # refine to the geometric least-squares circle
        sol = least_squares(
            lambda x: np.hypot(uv[:, 0] - x[0], uv[:, 1] - x[1]) - x[2],
            [float(circ.center[0]), float(circ.center[1]), float(circ.radius)],
        )
        cu, cv, radius = (float(v) for v in sol.x)
        radius = abs(radius)
        spread = float(np.std(np.hypot(uv[:, 0] - cu, uv[:, 1] - cv)))
        if spread > 0.35 * radius:  # a filled blob, not a ring: radius of the equal-area disc
            cu, cv, radius = 0.0, 0.0, rho_rms * math.sqrt(2.0)
    else:
        cu, cv, radius = 0.0, 0.0, rho_rms * math.sqrt(2.0)
    centre = fit.centroid + cu * e_u + cv * e_v
    shape = (
        vx.copy() if thickening_shape_um is None else np.asarray(thickening_shape_um, float)[::-1]
    )
    # the tube's half-width (uniform disc: r = sqrt(2 <rho^2>)) across the ring, in shape units
    rho = np.hypot(uv[:, 0] - cu, uv[:, 1] - cv) - radius
    tube = np.column_stack([rho, rel @ n])
    k = math.sqrt(2.0 * float(np.mean(np.sum(tube**2, axis=1)))) / max(_support(shape, n), 1e-12)
    diameter = 2.0 * radius
    plane = plane_record(n, fit.rms_um, z_uvw, x_uvw)
    if mass is not None and len(mass.excess) >= MIN_VOXELS and mass.snr >= MIN_MASS_SNR:
        psf_cov = (
            np.zeros((3, 3)) if point_spread is None else np.asarray(point_spread.cov_um2, float)
        )
        try:
            mu, cov = _mass_moments(mass.points_um, mass.excess, psf_cov)
            lam, vec = np.linalg.eigh(cov)
        except (ValueError, np.linalg.LinAlgError) as exc:
            log.debug("measure: loop contrast mass not used (%s)", exc)
        else:
            r2 = float(lam[1] + lam[2] - 2.0 * lam[0])
            if r2 > 0:
                n_m = _orient(_unit(vec[:, 0]))
                centre, diameter = mu, 2.0 * math.sqrt(r2)
                res = (p - mu) @ n_m
                plane = plane_record(n_m, float(np.sqrt(np.mean(res**2))), z_uvw, x_uvw)
    bnds = _boundaries(centre, WaferEdge(None, 1.0))
    meets = any(
        _touches(p, bnds[s], vx, k, thickness_um, WaferEdge(None, 1.0), shape)
        for s in ("top", "bottom")
    )
    return {
        "center_um": [float(v) for v in centre],
        "diameter_um": float(diameter),
        "plane": plane,
        "meets_surface": bool(meets),
        "voxels": int(len(p)),
    }


def _pieces(p: np.ndarray, vx: np.ndarray) -> list[np.ndarray]:
    """Split voxel centres into 26-connected pieces (index arrays into ``p``)."""
    ijk = np.round((p - p.min(axis=0)) / vx).astype(int)
    grid = np.zeros(ijk.max(axis=0) + 1, np.int32)
    grid[ijk[:, 0], ijk[:, 1], ijk[:, 2]] = 1
    lab, n = ndi.label(grid, structure=np.ones((3, 3, 3)))
    ids = lab[ijk[:, 0], ijk[:, 1], ijk[:, 2]]
    return [np.nonzero(ids == i)[0] for i in range(1, n + 1)]


def measure_slip_band_points(
    points_um: np.ndarray,
    voxel_um: tuple[float, float, float],
    *,
    seed: int = 0,
    thickening_shape_um: tuple[float, float, float] | None = None,
) -> dict[str, Any]:
    """Direction (unit), extent along it and number of parallel lines of a slip band.

    The band's voxels are split into 26-connected pieces; each elongated piece (principal axis
    at least twice the next and longer than three voxels) is one line. The direction is the
    voxel-weighted mean of the lines' principal axes; when the lines touch (one piece), a RANSAC
    line (:class:`skimage.measure.LineModelND`) with a one-voxel threshold gives it, and the
    lines are counted as blobs of the projection across the direction. The extent runs over all
    voxels along the direction, less the thickening at both ends.
    """
    p = np.asarray(points_um, float)
    vx = np.asarray(voxel_um, float)[::-1]
    shape = (
        vx.copy() if thickening_shape_um is None else np.asarray(thickening_shape_um, float)[::-1]
    )
    if len(p) < 2:
        raise ValueError(f"a slip band needs at least 2 voxels, got {len(p)}")
    rng = np.random.default_rng(seed)
    lines, dirs, weights = [], [], []
    for idx in _pieces(p, vx):
        q = p[idx]
        if len(q) < 3:
            continue
        _, s, vt = np.linalg.svd(q - q.mean(axis=0), full_matrices=False)
        length = float(np.ptp((q - q.mean(axis=0)) @ vt[0]))
        if s[0] >= 2.0 * (s[1] if len(s) > 1 else 0.0) and length > 3.0 * float(vx.max()):
            lines.append(idx)
            d = vt[0]
            if dirs and d @ dirs[0] < 0:
                d = -d
            dirs.append(d)
            weights.append(len(q))
    if len(lines) >= 2:
        d = _unit(np.average(np.asarray(dirs), axis=0, weights=weights))
        count = len(lines)
    else:
        thr = float(vx.max())
        sub = (
            p
            if len(p) <= RANSAC_MAX_POINTS
            else p[rng.choice(len(p), RANSAC_MAX_POINTS, replace=False)]
        )
        d = None
        if len(sub) >= 3:
            model, inl = ransac(
                sub, LineModelND, 2, thr, max_trials=200, stop_probability=0.999, rng=rng
            )
            if model is not None and model and inl is not None and inl.sum() >= 2:
                refit = LineModelND.from_estimate(sub[inl])
                d = np.asarray((refit if refit else model).direction, float)
        if d is None:
            _, _, vt = np.linalg.svd(p - p.mean(axis=0), full_matrices=False)
            d = vt[0]
        d = _unit(d)
        # lines across the direction: connected blobs of the projection (voxel-size pixels)
        t_ = p @ d
        perp = p - np.outer(t_, d)
        b1 = (
            _unit(np.cross(d, EZ))
            if np.linalg.norm(np.cross(d, EZ)) > 1e-6
            else np.array([1.0, 0.0, 0.0])
        )
        b2 = _unit(np.cross(d, b1))
        xy = np.column_stack([perp @ b1, perp @ b2])
        pix = float(np.sqrt(np.mean(vx**2)))
        ij = np.floor((xy - xy.min(axis=0)) / pix).astype(int)
        grid = np.zeros(ij.max(axis=0) + 1, bool)
        grid[ij[:, 0], ij[:, 1]] = True
        lab, nblob = ndi.label(grid, structure=np.ones((3, 3)))
        per_blob = np.bincount(lab[ij[:, 0], ij[:, 1]], minlength=nblob + 1)[1:]
        count = int(np.sum(per_blob >= max(3, 0.1 * per_blob.max()))) if nblob else 1
        lines = [np.arange(len(p))]
    d = _orient_dir(d)
    t = p @ d
    # thickening of the lines: half-width across a line (uniform disc: r = sqrt(2 <rho^2>))
    k_list = []
    for idx in lines:
        q = p[idx]
        perp = (q - q.mean(axis=0)) - np.outer((q - q.mean(axis=0)) @ d, d)
        b1 = (
            _unit(np.cross(d, EZ))
            if np.linalg.norm(np.cross(d, EZ)) > 1e-6
            else np.array([1.0, 0.0, 0.0])
        )
        b2 = _unit(np.cross(d, b1))
        r_t = math.sqrt(2.0 * float(np.mean(np.sum(perp**2, axis=1))))
        k_list.append(r_t / max(0.5 * (_support(shape, b1) + _support(shape, b2)), 1e-12))
    k = float(np.median(k_list)) if k_list else 0.0
    # _reach removes k |vx d|; for a thickening of another shape rescale k accordingly
    k_vx = k * _support(shape, d) / max(_support(vx, d), 1e-12)
    tmax, _ = _reach(t, d, vx, k_vx)
    tmin_neg, _ = _reach(-t, -d, vx, k_vx)
    return {
        "direction": [float(v) for v in d],
        "extent_um": float(max(0.0, tmax + tmin_neg)),
        "count": max(1, int(count)),
        "center_um": [float(v) for v in p.mean(axis=0)],
        "voxels": int(len(p)),
    }


def _orient_dir(d: np.ndarray) -> np.ndarray:
    """Sign convention for unoriented line directions: first clearly non-zero component > 0."""
    for i in (0, 1, 2):
        if abs(d[i]) > 1e-9:
            return d if d[i] > 0 else -d
    return d


# ---------------------------------------------------------------------------------------------
# Stage entry


def component_points(
    block: np.ndarray, label: int, offset_zyx: tuple[int, int, int], meta: dict
) -> np.ndarray:
    """Voxel centres (N, 3: x, y, z um, wafer frame) of one label in a block of the label image.

    ``offset_zyx`` is the block's first voxel index in the full image; ``meta`` the image's
    metadata (:func:`pipeline.omezarr.read_meta`).
    """
    idx = np.argwhere(np.asarray(block) == int(label)) + np.asarray(offset_zyx, int)
    return omezarr.voxel_to_wafer(idx, meta)


def _measure_one(
    lab_block: np.ndarray | InTask,
    img_block: np.ndarray | InTask | None,
    offset_zyx: tuple[int, int, int],
    comp: dict,
    meta: dict,
    ctx: dict,
) -> tuple[str, dict | None, str | None]:
    # the blocks are read here, in the task (pipeline.compute.in_task)
    lab_block = materialize(lab_block)
    img_block = None if img_block is None else materialize(img_block)
    pts = component_points(lab_block, comp["id"], offset_zyx, meta)
    cls = comp["class"]
    vox = tuple(meta["voxel_um"])
    psf = ctx["psf"]
    try:
        mass = None
        if img_block is not None and cls in ("crack", "dislocation_loop"):
            # a crack's contrast reaches beyond its front (CONTRAST_REACH_UM), which the shell
            # keeps; a loop's tube has no front, and a shell along x and z (4 um voxels) would
            # only add noise to its moments
            shell = (1, 1, 1) if cls == "crack" else (0, 1, 0)
            mass = contrast_mass(
                img_block, lab_block, comp["id"], offset_zyx, meta, psf, shell, ctx["edge"]
            )
        if cls == "crack":
            rec = measure_crack_points(
                pts,
                vox,
                thickness_um=ctx["thickness_um"],
                edge=ctx["edge"],
                z_uvw=ctx["z_uvw"],
                x_uvw=ctx["x_uvw"],
                bootstrap=ctx["bootstrap"],
                seed=ctx["seed"] + int(comp["id"]),
                thickening_shape_um=ctx["shape"],
                mass=mass,
                point_spread=psf,
            )
            rec = {"id": int(comp["id"]), **rec, "review": {"status": "unreviewed", "note": ""}}
        elif cls == "dislocation_loop":
            rec = {
                "id": int(comp["id"]),
                **measure_loop_points(
                    pts,
                    vox,
                    thickness_um=ctx["thickness_um"],
                    z_uvw=ctx["z_uvw"],
                    x_uvw=ctx["x_uvw"],
                    seed=ctx["seed"] + int(comp["id"]),
                    thickening_shape_um=ctx["shape"],
                    mass=mass,
                    point_spread=psf,
                ),
            }
            rec["position"] = _position(np.asarray([rec["center_um"]]), ctx["edge"])
            rec["review"] = {"status": "unreviewed", "note": ""}
        else:
            rec = {
                "id": int(comp["id"]),
                **measure_slip_band_points(
                    pts,
                    vox,
                    seed=ctx["seed"] + int(comp["id"]),
                    thickening_shape_um=ctx["shape"],
                ),
            }
            rec["review"] = {"status": "unreviewed", "note": ""}
    except ValueError as exc:
        return cls, None, f"component {comp['id']} ({cls}): not measured ({exc})"
    return cls, rec, None


def _scan_step_um(acq: Acquisition) -> float:
    """The scan step, um: ``scan.step_um`` or the median spacing of ``scan.positions_um``."""
    if acq.scan.step_um is not None:
        return abs(float(acq.scan.step_um))
    return float(np.median(np.abs(np.diff(np.asarray(acq.scan.positions_um, float)))))


def thickening_shape_um(
    components_doc: dict, voxel_um: tuple[float, float, float]
) -> tuple[float, float, float]:
    """Shape (dz, dy, dx, um) of the thickening of the segmentation's labels.

    The labels cover the crack sheet blurred by the reconstruction's resolution and by the
    segmentation's filter scale. When ``components.json`` names the sheet filter scales
    (``thresholds.responses`` entries with ``measure: "sheet"`` and ``sigma_um``), the smallest
    scale sigma is isotropic in um and adds to a resolution of about one voxel:
    ``sqrt(sigma^2 + voxel^2)`` per axis. Otherwise the thickening is taken proportional to the
    voxel (natural sampling: resolution and voxel scale together).
    """
    v = np.asarray(voxel_um, float)
    thr = components_doc.get("thresholds") if isinstance(components_doc, dict) else None
    sig = []
    if isinstance(thr, dict) and isinstance(thr.get("responses"), list):
        for r in thr["responses"]:
            if (
                isinstance(r, dict)
                and r.get("measure") == "sheet"
                and isinstance(r.get("sigma_um"), (int, float))
            ):
                if r["sigma_um"] > 0:
                    sig.append(float(r["sigma_um"]))
    if not sig:
        return tuple(float(x) for x in v)
    return tuple(float(x) for x in np.sqrt(min(sig) ** 2 + v**2))


def _plain(obj: Any) -> Any:
    """NumPy scalars and arrays as plain JSON values (for json.dumps)."""
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, np.generic):
        return obj.item()
    raise TypeError(f"not JSON serialisable: {type(obj).__name__}")


def measure_defects(
    run_root: Path, acq: Acquisition, cfg: MeasureConfig, *, software_version: str
) -> dict:
    """Measure every component of a run folder and return the ``defects.json`` document.

    Reads ``volume.ome.zarr`` (image and ``labels/defects``) and ``components.json``; the result
    is validated against the shipped schema (:func:`pipeline.runfolder.validate_defects`).

    Raises
    ------
    InputError
        When the run folder lacks the volume, the labels or ``components.json``, or a component
        has an unknown class or a bounding box outside the volume.
    """
    run_root = Path(run_root)
    vol = rf.RunFolder(run_root).require(rf.VOLUME, "the reconstructed volume")
    comps_doc = rf.read_json(run_root / rf.COMPONENTS_JSON, "component list (segment output)")
    labels, meta = omezarr.open_labels(vol)
    image, _ = omezarr.open_image(vol, 0)
    comps = comps_doc.get("components") if isinstance(comps_doc, dict) else None
    if not isinstance(comps, list):
        raise InputError(f"{run_root / rf.COMPONENTS_JSON}: no 'components' list")
    thickness_um = float(meta["crackstack"].get("thickness_um", acq.sample.thickness_um))
    if abs(thickness_um - acq.sample.thickness_um) > 0.01 * acq.sample.thickness_um:
        log.warning(
            "measure: volume thickness %.1f um differs from sample.thickness_um %.1f um; using the volume's",
            thickness_um,
            acq.sample.thickness_um,
        )
    edge = wafer_edge(vol, acq, thickness_um)
    grid = {"voxel_um": tuple(meta["voxel_um"]), "origin_um": tuple(meta["origin_um"])}
    shape = thickening_shape_um(comps_doc, grid["voxel_um"])
    log.info("measure: thickening shape (dz, dy, dx) %s um", ", ".join(f"{v:.2f}" for v in shape))
    psf = volume_point_spread(
        Geometry.from_acquisition(acq), _scan_step_um(acq), cfg.detector_blur_px, cfg.slit_edge_um
    )
    log.info(
        "measure: volume point-spread along (%.3f, %.3f, %.3f), half-length %.1f um, "
        "sigma (x, y, z) %s um",
        *psf.direction,
        psf.half_length_um,
        ", ".join(f"{v:.1f}" for v in np.sqrt(np.diag(psf.cov_um2))),
    )
    # blocks grown by the smear's reach (its mass) plus a margin for the background around it
    vxyz = np.asarray(grid["voxel_um"], float)[::-1]
    reach = np.abs(psf.direction) * psf.half_length_um + BACKGROUND_MARGIN_UM
    grow = np.ceil(reach / vxyz).astype(int)[::-1] + 2  # z, y, x
    ctx = {
        "thickness_um": thickness_um,
        "edge": edge,
        "z_uvw": tuple(acq.sample.crystal.z_uvw),
        "x_uvw": tuple(acq.sample.crystal.x_uvw),
        "bootstrap": cfg.bootstrap,
        "seed": cfg.seed,
        "shape": shape,
        "psf": psf,
    }
    tasks = []
    for i, c in enumerate(comps):
        try:
            cid, cls, bbox = int(c["id"]), c["class"], [int(v) for v in c["bbox_zyx"]]
        except (KeyError, TypeError, ValueError):
            raise InputError(
                f"{run_root / rf.COMPONENTS_JSON}: components[{i}] needs id, class and bbox_zyx"
            ) from None
        if cls not in CLASSES:
            raise InputError(
                f"{run_root / rf.COMPONENTS_JSON}: components[{i}].class is {cls!r}; accepted: {', '.join(CLASSES)}"
            )
        lo, hi = np.asarray(bbox[:3]), np.asarray(bbox[3:])
        if (
            len(bbox) != 6
            or np.any(lo < 0)
            or np.any(hi > np.asarray(labels.shape))
            or np.any(hi <= lo)
        ):
            raise InputError(
                f"{run_root / rf.COMPONENTS_JSON}: components[{i}].bbox_zyx {bbox} is outside the volume "
                f"{list(labels.shape)} (accepted: [z0, y0, x0, z1, y1, x1] voxel indices, end exclusive)"
            )
        glo = np.maximum(lo - grow, 0)
        ghi = np.minimum(hi + grow, np.asarray(labels.shape))
        sl = tuple(slice(int(a), int(b)) for a, b in zip(glo, ghi, strict=True))
        img_block = in_task(image[sl]) if cls in ("crack", "dislocation_loop") else None
        tasks.append(
            dask.delayed(_measure_one)(
                in_task(labels[sl]),
                img_block,
                tuple(int(v) for v in glo),
                {"id": cid, "class": cls, "bbox_zyx": bbox},
                grid,
                ctx,
            )
        )
    results = run_tasks(tasks, "measure") if tasks else []
    doc: dict[str, Any] = {
        "schema_version": 1,
        "software": {"name": "crackstack", "version": str(software_version)},
        "wafer": {
            "diameter_mm": float(acq.sample.diameter_mm),
            "thickness_um": thickness_um,
            "crystal": {
                "z_uvw": [int(v) for v in acq.sample.crystal.z_uvw],
                "x_uvw": [int(v) for v in acq.sample.crystal.x_uvw],
            },
            "center_xy_mm": None
            if edge.center_xy_um is None
            else [edge.center_xy_um[0] / 1000.0, edge.center_xy_um[1] / 1000.0],
            "center_source": edge.source,
        },
        "acquisition": {
            "energy_keV": float(acq.beam.energy),
            "reflection": [int(v) for v in acq.beam.reflection],
            "geometry": acq.beam.geometry,
            "voxel_um": [float(v) for v in meta["voxel_um"]],
        },
        "cracks": [],
        "dislocation_loops": [],
        "slip_bands": [],
    }
    if edge.source == "edge_fit":
        doc["wafer"]["edge_fit"] = {"points": edge.n_points, "rms_um": edge.fit_rms_um}
    key = {"crack": "cracks", "dislocation_loop": "dislocation_loops", "slip_band": "slip_bands"}
    for cls, rec, warn in results:
        if warn:
            log.warning("measure: %s", warn)
            continue
        doc[key[cls]].append(rec)
    for k in key.values():
        doc[k].sort(key=lambda d: d["id"])
    doc = json.loads(json.dumps(doc, default=_plain))
    rf.validate_defects(doc, "defects.json")
    log.info(
        "measure: %d cracks, %d loops, %d slip bands",
        len(doc["cracks"]),
        len(doc["dislocation_loops"]),
        len(doc["slip_bands"]),
    )
    return doc


# ---------------------------------------------------------------------------------------------
# Exports

CSV_COLUMNS = [
    "id",
    "type",
    "kind",
    "x_um",
    "y_um",
    "z_um",
    "r_mm",
    "angle_deg",
    "distance_to_edge_um",
    "depth_um",
    "length_um",
    "z_min_um",
    "z_max_um",
    "front_shape",
    "a_um",
    "c_um",
    "aspect",
    "front_fit_rms_um",
    "normal_x",
    "normal_y",
    "normal_z",
    "inclination_deg",
    "azimuth_deg",
    "nearest_hkl",
    "family",
    "misfit_deg",
    "plane_fit_rms_um",
    "sigma_depth_um",
    "sigma_length_um",
    "sigma_inclination_deg",
    "diameter_um",
    "meets_surface",
    "direction_x",
    "direction_y",
    "direction_z",
    "extent_um",
    "count",
    "review_status",
]


def csv_rows(doc: dict) -> list[list[Any]]:
    """One row per defect of a ``defects.json`` document, columns :data:`CSV_COLUMNS`."""

    def fmt(v):
        if v is None:
            return ""
        if isinstance(v, bool):
            return int(v)
        if isinstance(v, float):
            return f"{v:.6g}"
        return v

    rows = []
    for typ, key in (
        ("crack", "cracks"),
        ("dislocation_loop", "dislocation_loops"),
        ("slip_band", "slip_bands"),
    ):
        for d in doc.get(key, []):
            r = dict.fromkeys(CSV_COLUMNS)
            r.update(
                id=d["id"], type=typ, review_status=d.get("review", {}).get("status", "unreviewed")
            )
            pos = d.get("position") or {}
            r.update(
                r_mm=pos.get("r_mm"),
                angle_deg=pos.get("angle_deg"),
                distance_to_edge_um=pos.get("distance_to_edge_um"),
            )
            xyz = d.get("centroid_um") or d.get("center_um")
            if xyz:
                r.update(x_um=xyz[0], y_um=xyz[1], z_um=xyz[2])
            pl = d.get("plane")
            if pl:
                r.update(
                    normal_x=pl["normal"][0],
                    normal_y=pl["normal"][1],
                    normal_z=pl["normal"][2],
                    inclination_deg=pl["inclination_deg"],
                    azimuth_deg=pl["azimuth_deg"],
                    nearest_hkl=" ".join(str(v) for v in pl["nearest_hkl"]),
                    family=pl.get("family"),
                    misfit_deg=pl["misfit_deg"],
                    plane_fit_rms_um=pl["fit_rms_um"],
                )
            if typ == "crack":
                fr, un = d["front"], d["uncertainty"]
                r.update(
                    kind=d["kind"],
                    depth_um=d["depth_um"],
                    length_um=d["length_um"],
                    z_min_um=d["thickness_span_um"][0],
                    z_max_um=d["thickness_span_um"][1],
                    front_shape=fr.get("shape"),
                    a_um=fr["a_um"],
                    c_um=fr["c_um"],
                    aspect=fr["aspect"],
                    front_fit_rms_um=fr["fit_rms_um"],
                    sigma_depth_um=un["depth_um"],
                    sigma_length_um=un["length_um"],
                    sigma_inclination_deg=un["inclination_deg"],
                )
            elif typ == "dislocation_loop":
                r.update(diameter_um=d["diameter_um"], meets_surface=d["meets_surface"])
            else:
                r.update(
                    direction_x=d["direction"][0],
                    direction_y=d["direction"][1],
                    direction_z=d["direction"][2],
                    extent_um=d["extent_um"],
                    count=d["count"],
                )
            rows.append([fmt(r[c]) for c in CSV_COLUMNS])
    return rows


def write_exports(run_root: Path, doc: dict) -> None:
    """Write ``defects.json`` (validated) and ``defects.csv``, each atomically."""
    run_root = Path(run_root)
    rf.write_defects(run_root / rf.DEFECTS_JSON, doc)
    rf.write_csv_atomic(run_root / rf.DEFECTS_CSV, CSV_COLUMNS, csv_rows(doc))

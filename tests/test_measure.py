"""Round trips of pipeline.measure on label volumes made here from known planar patches.

The label volumes are invented test data: a planar patch (semi-ellipse, quarter-ellipse,
rectangle, ring, lines) is sampled densely and every voxel whose centre lies within the
anisotropic distance ``k * voxel`` of it is labelled -- the crack sheet thickened by the
resolution, a few voxels thick, as the segmentation delivers it. Voxels are anisotropic in
every test. Tolerances follow the measurement's targets: depth and length within
max(1 voxel, 3 %), inclination and azimuth within 2 deg, the nearest plane family right.

External references: interplanar angles of cubic crystals (Kelly & Knowles 2012, Crystallography
and Crystal Defects, 2nd ed.) for the {111} inclination 54.7356 deg on (001); the RANSAC model
protocol of scikit-image 0.26 (``skimage.measure.fit.RansacModelProtocol``).
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
from scipy.spatial import cKDTree

from pipeline import measure, omezarr
from pipeline import runfolder as rf
from pipeline.config import Acquisition, MeasureConfig
from pipeline.crystal import angle_between_planes_deg, canonical_normal, crystal_to_wafer
from pipeline.errors import InputError
from pipeline.measure import WaferEdge

THICKNESS_UM = 300.0
NO_EDGE = WaferEdge(None, 150_000.0)


# ---------------------------------------------------------------------------------------------
# Invented label volumes


def crack_frame(
    azimuth_deg: float, inclination_deg: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Unit trace direction e_u, down-dip direction e_v and normal of a crack plane."""
    az, th = math.radians(azimuth_deg), math.radians(inclination_deg)
    e_u = np.array([math.cos(az), math.sin(az), 0.0])
    h = np.array([-math.sin(az), math.cos(az), 0.0])
    e_v = math.cos(th) * h + math.sin(th) * np.array([0.0, 0.0, 1.0])
    n = np.cross(e_u, e_v)
    return e_u, e_v, n / np.linalg.norm(n)


def ellipse_patch(origin, e1, e2, r1, r2, q1=(-1.0, 1.0), q2=(0.0, 1.0), step=0.3) -> np.ndarray:
    """Points origin + s e1 + t e2 with (s/r1)^2 + (t/r2)^2 <= 1, s/r1 in q1, t/r2 in q2."""
    s = np.arange(q1[0] * r1, q1[1] * r1 + step / 2, step)
    t = np.arange(q2[0] * r2, q2[1] * r2 + step / 2, step)
    ss, tt = np.meshgrid(s, t, indexing="ij")
    m = (ss / r1) ** 2 + (tt / r2) ** 2 <= 1.0 + 1e-12
    return np.asarray(origin, float) + ss[m][:, None] * e1 + tt[m][:, None] * e2


def rect_patch(origin, e1, e2, l1, l2, step=0.3) -> np.ndarray:
    s = np.arange(0.0, l1 + step / 2, step)
    t = np.arange(0.0, l2 + step / 2, step)
    ss, tt = np.meshgrid(s, t, indexing="ij")
    return np.asarray(origin, float) + ss.ravel()[:, None] * e1 + tt.ravel()[:, None] * e2


def ring(center, e1, e2, radius, step=0.3) -> np.ndarray:
    t = np.linspace(0, 2 * np.pi, int(2 * np.pi * radius / step))
    return np.asarray(center, float) + radius * (np.cos(t)[:, None] * e1 + np.sin(t)[:, None] * e2)


def segment(a, b, step=0.3) -> np.ndarray:
    a, b = np.asarray(a, float), np.asarray(b, float)
    t = np.linspace(0, 1, int(np.linalg.norm(b - a) / step) + 2)
    return a + t[:, None] * (b - a)


def thicken(
    samples,
    voxel_zyx,
    k,
    *,
    origin_zyx=(0.0, 0.0, 0.0),
    normal=None,
    edge=None,
    rough=0.0,
    rng=None,
    shape_zyx=None,
):
    """Voxel centres (x, y, z um) within the ellipsoid distance ``k * voxel`` of the samples
    (``k * shape_zyx`` when given: a thickening not proportional to the voxel).

    The voxel lattice has its (0, 0, 0) centre at ``origin_zyx``; voxels outside the wafer
    (z < 0, z > THICKNESS_UM, beyond the edge circle ``edge = (centre_xy, R)``) are not
    labelled. ``rough`` makes the labelled boundary ragged (relative noise on the distance
    limit). ``normal`` (a plane normal) restricts the search to the slab the patch can reach.
    """
    vx = np.asarray(voxel_zyx, float)[::-1]
    off = np.asarray(origin_zyx, float)[::-1]
    scale = k * (vx if shape_zyx is None else np.asarray(shape_zyx, float)[::-1])
    lo = samples.min(axis=0) - scale - vx
    hi = samples.max(axis=0) + scale + vx
    i0 = np.floor((lo - off) / vx).astype(int)
    i1 = np.ceil((hi - off) / vx).astype(int)
    g = [off[d] + vx[d] * np.arange(i0[d], i1[d] + 1) for d in range(3)]
    p = np.stack(np.meshgrid(*g, indexing="ij"), axis=-1).reshape(-1, 3)
    if normal is not None:
        w = (p - samples[0]) @ normal
        p = p[np.abs(w) <= np.linalg.norm(scale * normal) * (1.0 + 4.0 * rough) + 1e-9]
    d, _ = cKDTree(samples / scale).query(p / scale, distance_upper_bound=2.0)
    limit = 1.0 + (rough * rng.standard_normal(len(p)) if rough else 0.0)
    keep = (d <= limit) & (p[:, 2] >= 0) & (p[:, 2] <= THICKNESS_UM)
    if edge is not None:
        c, r = edge
        keep &= np.hypot(p[:, 0] - c[0], p[:, 1] - c[1]) <= r
    return p[keep]


def label_volume(point_sets: dict[int, np.ndarray], voxel_zyx, origin_zyx, shape) -> np.ndarray:
    """uint32 label volume (z, y, x) with each point set's voxels set to its id."""
    lab = np.zeros(shape, np.uint32)
    for lid, pts in point_sets.items():
        idx = np.rint((pts[:, ::-1] - np.asarray(origin_zyx)) / np.asarray(voxel_zyx)).astype(int)
        lab[idx[:, 0], idx[:, 1], idx[:, 2]] = lid
    return lab


def points_from_labels(lab: np.ndarray, lid: int, voxel_zyx, origin_zyx) -> np.ndarray:
    meta = {"voxel_um": tuple(voxel_zyx), "origin_um": tuple(origin_zyx)}
    return measure.component_points(lab, lid, (0, 0, 0), meta)


def voxel_along(voxel_zyx, d) -> float:
    """Size of one voxel along direction d (ellipsoid support, um)."""
    return float(np.linalg.norm(np.asarray(voxel_zyx, float)[::-1] * np.asarray(d, float)))


def az_err(measured: float, true: float) -> float:
    return abs((measured - true + 90.0) % 180.0 - 90.0)


def assert_within(measured: float, true: float, voxel: float, what: str) -> None:
    tol = max(voxel, 0.03 * abs(true))
    assert abs(measured - true) <= tol, (
        f"{what}: {measured:.2f} vs {true:.2f} (tolerance {tol:.2f})"
    )


# ---------------------------------------------------------------------------------------------
# Plane model and angle conventions


def test_plane_model_follows_the_ransac_protocol_and_ignores_outliers():
    from skimage.measure import ransac
    from skimage.measure.fit import RansacModelProtocol

    assert isinstance(measure.PlaneModel, RansacModelProtocol)
    rng = np.random.default_rng(3)
    n_true = np.array([0.3, -0.4, 0.8])
    n_true /= np.linalg.norm(n_true)
    a = np.cross(n_true, [1.0, 0, 0])
    a /= np.linalg.norm(a)
    b = np.cross(n_true, a)
    pts = (
        rng.uniform(-50, 50, (400, 1)) * a
        + rng.uniform(-50, 50, (400, 1)) * b
        + rng.normal(0, 0.3, (400, 1)) * n_true
    )
    out = rng.uniform(-50, 50, (150, 3))  # 27 % outliers
    data = np.vstack([pts, out])
    model, inl = ransac(data, measure.PlaneModel, 3, 1.5, max_trials=200, rng=rng)
    assert abs(abs(model.normal @ n_true) - 1) < 1e-4
    assert inl[:400].mean() > 0.97 and inl[400:].mean() < 0.1
    # collinear samples are a failed estimate (falsy), as the protocol asks
    assert not measure.PlaneModel.from_estimate(np.array([[0, 0, 0], [1, 1, 1], [2, 2, 2.0]]))
    fit = measure.fit_plane(data, np.array([1.0, 1.0, 1.0]), rng=np.random.default_rng(0))
    assert math.degrees(math.acos(min(1, abs(fit.normal @ n_true)))) < 0.2


def test_plane_angle_conventions():
    # SPEC 7: inclination 90 = perpendicular to the surface; azimuth = trace from +x toward +y
    assert measure.plane_angles_deg(np.array([1.0, 0, 0])) == pytest.approx((90.0, 90.0))
    assert measure.plane_angles_deg(np.array([0, 1.0, 0])) == pytest.approx((90.0, 0.0))
    assert measure.plane_angles_deg(np.array([0, 0, 1.0])) == pytest.approx((0.0, 0.0))
    e_u, _, n = crack_frame(30.0, 60.0)
    assert measure.plane_angles_deg(n) == pytest.approx((60.0, 30.0))
    assert measure.plane_angles_deg(-n) == pytest.approx((60.0, 30.0))
    # a {111} plane on a (001) wafer: 54.7356 deg (Kelly & Knowles 2012)
    n111 = crystal_to_wafer(np.array([1.0, 1.0, 1.0]) / math.sqrt(3), (0, 0, 1), (1, 1, 0))
    assert measure.plane_angles_deg(n111)[0] == pytest.approx(
        angle_between_planes_deg((1, 1, 1), (0, 0, 1)), abs=1e-9
    )


# ---------------------------------------------------------------------------------------------
# Cracks


@pytest.mark.parametrize(
    ("voxel", "az", "incl", "a", "c", "k", "side"),
    [
        ((6.0, 2.0, 3.0), 20.0, 90.0, 60.0, 150.0, 1.5, "top"),
        ((4.0, 3.0, 2.0), 135.0, 72.0, 90.0, 70.0, 1.2, "top"),
        ((5.0, 2.5, 2.5), 75.0, 80.0, 45.0, 110.0, 1.8, "bottom"),
    ],
)
def test_semi_elliptical_surface_crack(voxel, az, incl, a, c, k, side):
    e_u, e_v, n = crack_frame(az, incl)
    slant = a / math.sin(math.radians(incl))
    if side == "top":
        patch = ellipse_patch([40.0, 30.0, 0.0], e_u, e_v, c, slant)
    else:
        patch = ellipse_patch([40.0, 30.0, THICKNESS_UM], e_u, -e_v, c, slant)
    origin = (-voxel[0] * 0.37, 1.1, -0.6)
    pts = thicken(patch, voxel, k, origin_zyx=origin, normal=n)
    r = measure.measure_crack_points(
        pts, voxel, thickness_um=THICKNESS_UM, edge=NO_EDGE, bootstrap=10
    )
    assert r["kind"] == ("surface_top" if side == "top" else "surface_bottom")
    assert_within(r["depth_um"], a, voxel[0], "depth")
    assert_within(r["length_um"], 2 * c, voxel_along(voxel, e_u), "length")
    assert r["front"]["shape"] == "semi_elliptical"
    assert_within(r["front"]["c_um"], c, voxel_along(voxel, e_u), "front c")
    assert_within(r["front"]["a_um"], slant, voxel_along(voxel, e_v), "front a")
    assert r["front"]["aspect"] == pytest.approx(r["front"]["a_um"] / r["front"]["c_um"])
    assert abs(r["plane"]["inclination_deg"] - incl) <= 2.0
    assert az_err(r["plane"]["azimuth_deg"], az) <= 2.0
    # the exported normal carries the sign convention of the synthetic truth (n_z > 0, ...)
    got = np.asarray(r["plane"]["normal"])
    assert np.allclose(got, canonical_normal(got))
    if abs(n[2]) > 0.1:  # near-vertical planes: the sign follows the fitted n_z's
        assert float(got @ canonical_normal(n)) >= math.cos(math.radians(2.0))
    span = r["thickness_span_um"]
    if side == "top":
        assert span[0] == 0.0 and abs(span[1] - a) <= voxel[0]
    else:
        assert span[1] == THICKNESS_UM and abs(span[0] - (THICKNESS_UM - a)) <= voxel[0]
    # the front points lie on the crack plane, on the true ellipse within about a voxel
    f = np.asarray(r["front"]["points_um"])
    assert len(f) > 20
    o = np.array([40.0, 30.0, 0.0 if side == "top" else THICKNESS_UM])
    s = (f - o) @ e_u
    t = np.abs((f - o) @ e_v)
    rho = np.hypot(s / c, t / slant)
    assert np.median(np.abs(rho - 1.0)) < 0.03
    assert r["front"]["fit_rms_um"] < max(voxel)
    unc = r["uncertainty"]
    assert unc["depth_um"] > 0 and unc["length_um"] > 0 and unc["inclination_deg"] > 0
    assert "bootstrap" in unc["method"] and "propagation" in unc["method"]


def test_semi_elliptical_crack_from_a_label_volume_and_input_not_modified():
    voxel, origin = (5.0, 2.0, 3.0), (-5.0, 0.0, 0.0)
    e_u, e_v, n = crack_frame(60.0, 85.0)
    pts = thicken(
        ellipse_patch([150.0, 100.0, 0.0], e_u, e_v, 80.0, 50.0 / math.sin(math.radians(85))),
        voxel,
        1.3,
        origin_zyx=origin,
        normal=n,
    )
    lab = label_volume({3: pts}, voxel, origin, shape=(70, 200, 120))
    before = lab.copy()
    got = points_from_labels(lab, 3, voxel, origin)
    np.testing.assert_array_equal(lab, before)
    r = measure.measure_crack_points(
        got, voxel, thickness_um=THICKNESS_UM, edge=NO_EDGE, bootstrap=5
    )
    assert r["kind"] == "surface_top"
    assert_within(r["depth_um"], 50.0, voxel[0], "depth")
    assert_within(r["length_um"], 160.0, voxel_along(voxel, e_u), "length")
    assert r["voxels"] == len(pts)


def _edge_setup(x_edge_um=500.0, y0_um=100.0, radius_um=150_000.0):
    centre = np.array([x_edge_um - radius_um, y0_um])
    return (
        centre,
        radius_um,
        WaferEdge((float(centre[0]), float(centre[1])), radius_um, "acquisition"),
    )


def test_quarter_elliptical_corner_crack_at_the_edge():
    voxel = (6.0, 2.0, 3.0)
    centre, radius, edge = _edge_setup()
    corner = np.array([500.0, 100.0, 0.0])
    inward = np.array([-1.0, 0.0, 0.0])
    down = np.array([0.0, 0.0, 1.0])
    a_edge, c_edge = 80.0, 60.0  # reach from the edge (radial), extent down the edge face
    patch = ellipse_patch(corner, inward, down, a_edge, c_edge, q1=(0, 1), q2=(0, 1))
    pts = thicken(
        patch,
        voxel,
        1.4,
        origin_zyx=(0.4, 0.3, 0.8),
        normal=np.array([0, 1.0, 0]),
        edge=(centre, radius),
    )
    r = measure.measure_crack_points(pts, voxel, thickness_um=THICKNESS_UM, edge=edge, bootstrap=10)
    assert r["kind"] == "edge"
    assert r["front"]["shape"] == "quarter_elliptical"
    assert_within(r["depth_um"], a_edge, voxel_along(voxel, inward), "depth from the edge")
    assert_within(r["length_um"], c_edge, voxel[0], "extent along the edge")
    assert_within(r["front"]["a_um"], a_edge, voxel_along(voxel, inward), "front a")
    assert_within(r["front"]["c_um"], c_edge, voxel[0], "front c")
    assert r["plane"]["inclination_deg"] == pytest.approx(90.0, abs=2.0)
    assert az_err(r["plane"]["azimuth_deg"], 0.0) <= 2.0
    assert r["position"]["distance_to_edge_um"] == 0.0
    assert r["position"]["r_mm"] == pytest.approx(radius / 1000 - 0.04, abs=0.01)
    assert r["thickness_span_um"][0] == 0.0


def test_edge_crack_through_the_thickness_and_on_the_edge_face():
    voxel = (6.0, 2.0, 3.0)
    centre, radius, edge = _edge_setup()
    inward, down = np.array([-1.0, 0.0, 0.0]), np.array([0.0, 0.0, 1.0])
    through = rect_patch([500.0, 100.0, 0.0], inward, down, 120.0, THICKNESS_UM)
    pts = thicken(
        through,
        voxel,
        1.4,
        origin_zyx=(0.0, 0.5, 0.5),
        normal=np.array([0, 1.0, 0]),
        edge=(centre, radius),
    )
    r = measure.measure_crack_points(pts, voxel, thickness_um=THICKNESS_UM, edge=edge, bootstrap=5)
    assert r["kind"] == "edge" and r["front"]["shape"] == "through"
    assert_within(r["depth_um"], 120.0, voxel_along(voxel, inward), "radial reach")
    assert r["thickness_span_um"] == [0.0, THICKNESS_UM]
    semi = ellipse_patch([500.0, 100.0, 150.0], down, inward, 70.0, 90.0)
    pts = thicken(
        semi,
        voxel,
        1.4,
        origin_zyx=(0.0, 0.5, 0.5),
        normal=np.array([0, 1.0, 0]),
        edge=(centre, radius),
    )
    r = measure.measure_crack_points(pts, voxel, thickness_um=THICKNESS_UM, edge=edge, bootstrap=5)
    assert r["kind"] == "edge" and r["front"]["shape"] == "semi_elliptical"
    assert_within(r["depth_um"], 90.0, voxel_along(voxel, inward), "radial reach")
    assert_within(r["length_um"], 140.0, voxel[0], "extent along the edge")


def test_thickening_not_proportional_to_the_voxel():
    """Labels thickened by an isotropic 5 um ball on (6, 2, 3) um voxels, measured with that
    thickening shape (as segment's filter scale implies, see thickening_shape_um)."""
    voxel, shape = (6.0, 2.0, 3.0), (5.0, 5.0, 5.0)
    e_u, e_v, n = crack_frame(0.0, 80.0)
    slant = 70.0 / math.sin(math.radians(80.0))
    pts = thicken(
        ellipse_patch([0.0, 0.0, 0.0], e_u, e_v, 110.0, slant),
        voxel,
        1.0,
        origin_zyx=(0.3, 0.2, 0.1),
        normal=n,
        shape_zyx=shape,
    )
    r = measure.measure_crack_points(
        pts, voxel, thickness_um=THICKNESS_UM, edge=NO_EDGE, bootstrap=5, thickening_shape_um=shape
    )
    assert_within(r["depth_um"], 70.0, voxel[0], "depth")
    assert_within(r["length_um"], 220.0, voxel_along(voxel, e_u), "length")
    assert (
        abs(r["plane"]["inclination_deg"] - 80.0) <= 2.0
        and az_err(r["plane"]["azimuth_deg"], 0.0) <= 2.0
    )
    np.testing.assert_allclose(r["thickening_um"], [5.0, 5.0, 5.0], rtol=0.15)
    # the voxel-proportional default model, measuring the thickness across y (2 um voxels),
    # removes too much along the trace (x, 3 um voxels)
    r0 = measure.measure_crack_points(
        pts, voxel, thickness_um=THICKNESS_UM, edge=NO_EDGE, bootstrap=0
    )
    assert r0["length_um"] < r["length_um"] - 1.5


def test_thickening_shape_from_the_component_table():
    doc = {
        "thresholds": {
            "responses": [
                {"measure": "line", "sigma_um": 2.0},
                {"measure": "sheet", "sigma_um": 8.0},
                {"measure": "sheet", "sigma_um": 4.0},
            ]
        }
    }
    np.testing.assert_allclose(
        measure.thickening_shape_um(doc, (3.0, 0.0, 4.0)), [5.0, 4.0, math.sqrt(32.0)]
    )
    assert measure.thickening_shape_um({"thresholds": {}}, (6.0, 2.0, 3.0)) == (6.0, 2.0, 3.0)


def test_inclined_111_crack_gets_the_111_family():
    """A crack on a {111} plane of a (001) wafer with x = [110] (SPEC 4 default): the plane
    contains y = [-110], so it dips 54.7356 deg (Kelly & Knowles 2012) with its trace along y."""
    z_uvw, x_uvw = (0, 0, 1), (1, 1, 0)
    n_w = crystal_to_wafer(np.array([1.0, 1.0, 1.0]) / math.sqrt(3), z_uvw, x_uvw)
    incl, az = measure.plane_angles_deg(n_w)
    assert incl == pytest.approx(54.7356, abs=1e-4) and az == pytest.approx(90.0, abs=1e-9)
    e_u, e_v, n = crack_frame(az, incl)
    assert abs(abs(n @ n_w) - 1) < 1e-12
    voxel, a, c = (4.0, 2.0, 3.0), 70.0, 120.0
    slant = a / math.sin(math.radians(incl))
    pts = thicken(
        ellipse_patch([0.0, 0.0, 0.0], e_u, e_v, c, slant),
        voxel,
        1.5,
        origin_zyx=(0.7, 0.2, 1.3),
        normal=n,
    )
    r = measure.measure_crack_points(
        pts, voxel, thickness_um=THICKNESS_UM, edge=NO_EDGE, z_uvw=z_uvw, x_uvw=x_uvw, bootstrap=10
    )
    pl = r["plane"]
    assert pl["family"] == "{111}" and pl["misfit_deg"] < 1.0
    assert abs(pl["inclination_deg"] - incl) <= 2.0 and az_err(pl["azimuth_deg"], az) <= 2.0
    assert angle_between_planes_deg(pl["nearest_hkl"], (0, 0, 1)) == pytest.approx(
        54.7356, abs=1e-4
    )
    assert_within(r["depth_um"], a, voxel[0], "depth")
    assert_within(r["length_um"], 2 * c, voxel_along(voxel, e_u), "length")
    assert_within(r["front"]["a_um"], slant, voxel_along(voxel, e_v), "front a (in the plane)")


def test_internal_and_through_cracks():
    voxel = (6.0, 2.0, 3.0)
    e_u, e_v, n = crack_frame(20.0, 80.0)
    internal = ellipse_patch([0.0, 0.0, 150.0], e_u, e_v, 90.0, 50.0, q2=(-1, 1))
    r = measure.measure_crack_points(
        thicken(internal, voxel, 1.4, normal=n),
        voxel,
        thickness_um=THICKNESS_UM,
        edge=NO_EDGE,
        bootstrap=5,
    )
    assert r["kind"] == "internal" and r["front"]["shape"] == "elliptical"
    height = 2 * 50.0 * math.sin(math.radians(80.0))
    assert_within(r["depth_um"], height, voxel[0], "height")
    assert_within(r["length_um"], 180.0, voxel_along(voxel, e_u), "length")
    assert_within(r["front"]["a_um"], 50.0, voxel_along(voxel, e_v), "front a")
    assert_within(r["front"]["c_um"], 90.0, voxel_along(voxel, e_u), "front c")
    e_u, e_v, n = crack_frame(60.0, 75.0)
    slant = THICKNESS_UM / math.sin(math.radians(75.0))
    through = rect_patch(-100.0 * e_u, e_u, e_v, 200.0, slant)
    r = measure.measure_crack_points(
        thicken(through, voxel, 1.4, normal=n),
        voxel,
        thickness_um=THICKNESS_UM,
        edge=NO_EDGE,
        bootstrap=5,
    )
    assert r["kind"] == "through" and r["front"]["shape"] == "through"
    assert r["depth_um"] == THICKNESS_UM and r["thickness_span_um"] == [0.0, THICKNESS_UM]
    assert_within(r["length_um"], 200.0, voxel_along(voxel, e_u), "length")
    assert (
        abs(r["plane"]["inclination_deg"] - 75.0) <= 2.0
        and az_err(r["plane"]["azimuth_deg"], 60.0) <= 2.0
    )


def test_lateral_crack_just_under_the_surface_is_internal():
    """A crack nearly parallel to the surface does not start from it, however close it runs."""
    voxel = (4.0, 2.0, 3.0)
    e_u, e_v, n = crack_frame(30.0, 5.0)
    pts = thicken(
        ellipse_patch([0.0, 0.0, 3.0], e_u, e_v, 80.0, 50.0, q2=(-1, 1)), voxel, 1.3, normal=n
    )
    r = measure.measure_crack_points(
        pts, voxel, thickness_um=THICKNESS_UM, edge=NO_EDGE, bootstrap=5
    )
    assert r["kind"] == "internal" and r["front"]["shape"] == "elliptical"
    assert_within(r["front"]["c_um"], 80.0, voxel_along(voxel, e_u), "front c")
    assert_within(r["front"]["a_um"], 50.0, voxel_along(voxel, e_v), "front a")
    assert r["plane"]["inclination_deg"] < 7.0


def test_crack_with_stray_voxels_is_fitted_robustly():
    """RANSAC: 10 % stray voxels far off the sheet do not tilt the plane."""
    voxel = (4.0, 2.0, 3.0)
    e_u, e_v, n = crack_frame(40.0, 70.0)
    pts = thicken(ellipse_patch([0.0, 0.0, 0.0], e_u, e_v, 100.0, 70.0), voxel, 1.3, normal=n)
    rng = np.random.default_rng(1)
    stray = pts[rng.choice(len(pts), len(pts) // 10)] + n * rng.uniform(15, 40, (len(pts) // 10, 1))
    r = measure.measure_crack_points(
        np.vstack([pts, stray]), voxel, thickness_um=THICKNESS_UM, edge=NO_EDGE, bootstrap=5
    )
    assert (
        abs(r["plane"]["inclination_deg"] - 70.0) <= 2.0
        and az_err(r["plane"]["azimuth_deg"], 40.0) <= 2.0
    )
    assert_within(r["length_um"], 200.0, voxel_along(voxel, e_u), "length")


def test_too_few_voxels_is_an_error():
    with pytest.raises(ValueError, match="at least"):
        measure.measure_crack_points(
            np.zeros((3, 3)), (1.0, 1.0, 1.0), thickness_um=100.0, edge=NO_EDGE
        )


def test_uncertainty_coverage_over_randomised_cracks(capsys):
    """One-sigma coverage: the share of randomised cracks whose true error is within the
    reported one-sigma (about 68 % for a well-sized sigma). Measured over 40 cracks with random
    orientation, size, voxel shape, thickening and lattice offset, with ragged labels."""
    rng = np.random.default_rng(2026)
    rows = []
    for i in range(40):
        voxel = tuple(float(v) for v in rng.choice([2.0, 3.0, 4.0, 6.0], 3))
        az, incl = rng.uniform(0, 180), rng.uniform(45, 90)
        a, c, k = rng.uniform(30, 130), rng.uniform(40, 170), rng.uniform(0.9, 1.9)
        e_u, e_v, n = crack_frame(az, incl)
        patch = ellipse_patch(
            [0.0, 0.0, 0.0],
            e_u,
            e_v,
            c,
            a / math.sin(math.radians(incl)),
            step=0.25 * k * min(voxel),
        )
        pts = thicken(
            patch,
            voxel,
            k,
            origin_zyx=tuple(rng.uniform(0, 1, 3) * voxel),
            normal=n,
            rough=rng.uniform(0, 0.2),
            rng=rng,
        )
        r = measure.measure_crack_points(
            pts, voxel, thickness_um=THICKNESS_UM, edge=NO_EDGE, bootstrap=20, seed=i
        )
        u, pl = r["uncertainty"], r["plane"]
        rows.append(
            (
                r["depth_um"] - a,
                u["depth_um"],
                r["length_um"] - 2 * c,
                u["length_um"],
                pl["inclination_deg"] - incl,
                u["inclination_deg"],
                az_err(pl["azimuth_deg"], az),
                max(voxel[0], 0.03 * a),
                max(voxel_along(voxel, e_u), 0.06 * c),
            )
        )
    e = np.asarray(rows)
    cov = {
        name: float(np.mean(np.abs(e[:, j]) <= e[:, j + 1]))
        for name, j in (("depth", 0), ("length", 2), ("inclination", 4))
    }
    with capsys.disabled():
        print(
            f"\n[measure] one-sigma coverage over {len(e)} random cracks: depth {cov['depth']:.0%}, "
            f"length {cov['length']:.0%}, inclination {cov['inclination']:.0%}; "
            f"rms errors depth {np.sqrt(np.mean(e[:, 0] ** 2)):.2f} um, length {np.sqrt(np.mean(e[:, 2] ** 2)):.2f} um, "
            f"inclination {np.sqrt(np.mean(e[:, 4] ** 2)):.2f} deg, azimuth {np.sqrt(np.mean(e[:, 6] ** 2)):.2f} deg"
        )
    # every crack within the accuracy targets
    assert np.all(np.abs(e[:, 0]) <= e[:, 7]), "depth error beyond max(1 voxel, 3 %)"
    assert np.all(np.abs(e[:, 2]) <= e[:, 8]), "length error beyond max(1 voxel, 3 %)"
    assert np.all(np.abs(e[:, 4]) <= 2.0) and np.all(e[:, 6] <= 2.0)
    # a one-sigma that covers about 68 %: neither far too small nor far too large
    for name, c_ in cov.items():
        assert 0.45 <= c_ <= 0.95, f"{name} one-sigma coverage {c_:.0%} is not near 68 %"


# ---------------------------------------------------------------------------------------------
# Loops and slip bands


def _111_axes():
    n = crystal_to_wafer(np.array([1.0, -1.0, 1.0]) / math.sqrt(3), (0, 0, 1), (1, 1, 0))
    e1 = np.cross(n, [0.0, 0.0, 1.0])
    e1 /= np.linalg.norm(e1)
    return n, e1, np.cross(n, e1)


@pytest.mark.parametrize(("radius", "cz"), [(40.0, 150.0), (25.0, 100.0)])
def test_dislocation_loop(radius, cz):
    voxel = (6.0, 2.0, 3.0)
    n, e1, e2 = _111_axes()
    centre = np.array([100.0, 50.0, cz])
    pts = thicken(ring(centre, e1, e2, radius), voxel, 1.2, origin_zyx=(0.3, 0.7, 1.1))
    r = measure.measure_loop_points(pts, voxel, thickness_um=THICKNESS_UM)
    assert_within(r["diameter_um"], 2 * radius, min(voxel), "diameter")
    assert np.linalg.norm(np.asarray(r["center_um"]) - centre) <= min(voxel)
    assert r["plane"]["family"] == "{111}" and r["plane"]["misfit_deg"] < 2.0
    assert r["meets_surface"] is False


def test_half_loop_meets_the_surface():
    voxel = (6.0, 2.0, 3.0)
    n, e1, e2 = _111_axes()
    pts = thicken(ring([100.0, 50.0, 0.0], e1, e2, 40.0), voxel, 1.2, origin_zyx=(0.0, 0.7, 1.1))
    r = measure.measure_loop_points(pts, voxel, thickness_um=THICKNESS_UM)
    assert r["meets_surface"] is True
    assert_within(r["diameter_um"], 80.0, min(voxel), "diameter")
    assert r["plane"]["family"] == "{111}"


@pytest.mark.parametrize(
    ("angle_deg", "length", "offsets"),
    [(0.0, 250.0, (0.0, 20.0, 45.0)), (30.0, 60.0, (0, 15, 30, 45, 60, 75))],
)
def test_slip_band(angle_deg, length, offsets):
    """Parallel straight lines (slip traces along an in-plane <110> direction and a rotated
    one); the band may be wider than long."""
    voxel = (6.0, 2.0, 3.0)
    d = np.array([math.cos(math.radians(angle_deg)), math.sin(math.radians(angle_deg)), 0.0])
    across = np.array([-d[1], d[0], 0.0])
    samples = np.concatenate(
        [
            segment(o * across + [0, 0, 12.0], o * across + length * d + [0, 0, 12.0])
            for o in offsets
        ]
    )
    pts = thicken(samples, voxel, 1.2, origin_zyx=(0.5, 0.3, 0.9))
    r = measure.measure_slip_band_points(pts, voxel)
    ang = math.degrees(math.acos(min(1.0, abs(float(np.dot(r["direction"], d))))))
    assert ang <= 2.0
    assert np.linalg.norm(r["direction"]) == pytest.approx(1.0)
    assert r["count"] == len(offsets)
    assert_within(r["extent_um"], length, voxel_along(voxel, d), "extent")


# ---------------------------------------------------------------------------------------------
# Wafer edge


def test_edge_fit_recovers_the_wafer_centre():
    """A 300 mm wafer whose edge crosses a 2 x 1.6 mm scan at a 25 deg angle."""
    vy, vx = 8.0, 10.0
    radius = 150_000.0
    phi = math.radians(25.0)
    x_e, y_e = 1500.0, 800.0
    centre = np.array([x_e - radius * math.cos(phi), y_e - radius * math.sin(phi)])
    ny, nx = 200, 200
    y = np.arange(ny)[:, None] * vy
    x = np.arange(nx)[None, :] * vx
    inside = np.hypot(x - centre[0], y - centre[1]) <= radius
    rng = np.random.default_rng(0)
    img = np.where(inside, 1.0, 0.02) + 0.05 * rng.standard_normal((ny, nx))
    img[60:70, 30:120] = 0.3  # defect contrast inside the wafer must not count as edge
    pts = measure.edge_points_from_slice(img, voxel_yx_um=(vy, vx), origin_yx_um=(0.0, 0.0))
    assert len(pts) > 100
    edge = measure.fit_edge_circle(pts, radius, inside_xy_um=np.array([0.0, 0.0]))
    assert edge is not None and edge.source == "edge_fit"
    # the edge itself is located to a fraction of a pixel; along the short arc the centre
    # slides a little, which moves radii and angles by far less than a pixel
    r_pts = np.hypot(pts[:, 0] - edge.center_xy_um[0], pts[:, 1] - edge.center_xy_um[1])
    assert np.sqrt(np.mean((r_pts - radius) ** 2)) < 0.5 * vx
    probe = np.array([[1000.0, 500.0, 0.0]])
    true_r = np.hypot(1000.0 - centre[0], 500.0 - centre[1])
    assert abs(edge.radius_of(probe)[0] - true_r) < 0.5 * vx
    assert abs(
        math.atan2(500.0 - edge.center_xy_um[1], 1000.0 - edge.center_xy_um[0])
        - math.atan2(500.0 - centre[1], 1000.0 - centre[0])
    ) < math.radians(0.05)
    # no edge in the scan: nothing found
    assert (
        len(
            measure.edge_points_from_slice(
                np.ones((50, 50)) + 0.05 * rng.standard_normal((50, 50)),
                voxel_yx_um=(vy, vx),
                origin_yx_um=(0, 0),
            )
        )
        == 0
    )


# ---------------------------------------------------------------------------------------------
# The stage on a run folder, and the export


def _acquisition(center_xy_mm=None) -> Acquisition:
    return Acquisition.model_validate(
        {
            "sample": {
                "thickness_um": THICKNESS_UM,
                "diameter_mm": 300.0,
                "center_xy_mm": center_xy_mm,
            },
            "beam": {"energy_keV": 17.479, "reflection": [2, 2, 0]},
            "scan": {"start_um": 0.0, "step_um": 3.0},
        }
    )


def _build_run(root: Path) -> dict:
    """Run folder with an imaged wafer edge, a surface crack, a corner crack, a loop and a slip
    band (invented). Returns the truths."""
    voxel, origin = (6.0, 2.0, 3.0), (-12.0, 0.0, 0.0)
    shape = (54, 160, 200)  # z -12..306 um, y 0..318 um, x 0..597 um
    radius = 150_000.0
    centre = np.array([560.0 - radius, 160.0])  # the edge crosses x = 560 um at y = 160 um
    z = origin[0] + voxel[0] * np.arange(shape[0])
    y = origin[1] + voxel[1] * np.arange(shape[1])
    x = origin[2] + voxel[2] * np.arange(shape[2])
    inside = np.hypot(x[None, :] - centre[0], y[:, None] - centre[1]) <= radius
    in_z = (z >= 0) & (z <= THICKNESS_UM)
    rng = np.random.default_rng(5)
    img = (in_z[:, None, None] & inside[None]).astype(np.float32) + np.float32(
        0.03
    ) * rng.standard_normal(shape).astype(np.float32)
    e_u, e_v, n = crack_frame(90.0, 85.0)
    surf = thicken(
        ellipse_patch([150.0, 160.0, 0.0], e_u, e_v, 100.0, 60.0 / math.sin(math.radians(85))),
        voxel,
        1.3,
        origin_zyx=origin,
        normal=n,
    )
    corner = thicken(
        ellipse_patch(
            [560.0, 100.0, 0.0], [-1.0, 0, 0], [0, 0, 1.0], 70.0, 50.0, q1=(0, 1), q2=(0, 1)
        ),
        voxel,
        1.3,
        origin_zyx=origin,
        normal=np.array([0, 1.0, 0]),
        edge=(centre, radius),
    )
    nl, e1, e2 = _111_axes()
    loop = thicken(ring([300.0, 220.0, 150.0], e1, e2, 30.0), voxel, 1.2, origin_zyx=origin)
    band = thicken(
        np.concatenate([segment([250.0, yy, 12.0], [450.0, yy, 12.0]) for yy in (40.0, 60.0)]),
        voxel,
        1.2,
        origin_zyx=origin,
    )
    sets = {1: surf, 2: corner, 5: loop, 9: band}
    lab = label_volume(sets, voxel, origin, shape)
    vol = root / rf.VOLUME
    grp = omezarr.create_image(
        vol,
        shape,
        voxel_um=voxel,
        origin_um=origin,
        chunks=(32, 64, 64),
        extra={"thickness_um": THICKNESS_UM, "geometry": "transmission"},
    )
    grp["0"][:] = img
    omezarr.build_pyramid(vol, method="mean")
    omezarr.create_labels(vol)
    import zarr

    zarr.open_array(str(vol / "labels" / "defects" / "0"), mode="r+")[:] = lab
    omezarr.build_pyramid(vol / "labels" / "defects", method="max")
    comps = []
    for lid, cls in ((1, "crack"), (2, "crack"), (5, "dislocation_loop"), (9, "slip_band")):
        idx = np.argwhere(lab == lid)
        comps.append(
            {
                "id": lid,
                "class": cls,
                "voxels": len(idx),
                "bbox_zyx": [*idx.min(axis=0).tolist(), *(idx.max(axis=0) + 1).tolist()],
                "centroid_um": sets[lid].mean(axis=0).tolist(),
                "extent_um": np.ptp(sets[lid], axis=0).tolist(),
                "planarity": 0.9,
                "score": 5.0,
            }
        )
    rf.write_json_atomic(
        root / rf.COMPONENTS_JSON,
        {
            "voxel_um": list(voxel),
            "origin_um": list(origin),
            "noise_sigma": 0.03,
            "thresholds": {},
            "components": comps,
        },
    )
    return {"centre": centre, "radius": radius}


@pytest.fixture(scope="module")
def run_folder(tmp_path_factory):
    root = tmp_path_factory.mktemp("measure_run")
    truth = _build_run(root)
    return root, truth


def test_measure_defects_on_a_run_folder(run_folder):
    root, truth = run_folder
    doc = measure.measure_defects(
        root, _acquisition(), MeasureConfig(bootstrap=10), software_version="0.1.0"
    )
    assert doc["wafer"]["center_source"] == "edge_fit"
    cx, cy = doc["wafer"]["center_xy_mm"]
    # the edge over a 0.3 mm arc fixes the centre's distance well and its direction roughly
    assert math.hypot(cx * 1000 - truth["centre"][0], cy * 1000 - truth["centre"][1]) < 300.0
    assert [c["id"] for c in doc["cracks"]] == [1, 2]
    assert [d["id"] for d in doc["dislocation_loops"]] == [5] and [
        d["id"] for d in doc["slip_bands"]
    ] == [9]
    surf, corner = doc["cracks"]
    assert surf["kind"] == "surface_top" and corner["kind"] == "edge"
    assert corner["front"]["shape"] == "quarter_elliptical"
    assert_within(surf["depth_um"], 60.0, 6.0, "depth")
    assert_within(surf["length_um"], 200.0, 2.0, "length")
    assert_within(corner["depth_um"], 70.0, 3.0, "radial reach")
    assert_within(corner["length_um"], 50.0, 6.0, "extent along the edge")
    assert corner["position"]["distance_to_edge_um"] == 0.0
    # the surface crack lies ~410 um inside the edge (its nearest voxel)
    assert abs(surf["position"]["distance_to_edge_um"] - (560.0 - 150.0 - 1.3 * 3.0)) < 5.0
    assert surf["position"]["r_mm"] == pytest.approx((truth["radius"] - 410.0) / 1000.0, abs=0.005)
    assert surf["review"] == {"status": "unreviewed", "note": ""}
    assert doc["dislocation_loops"][0]["plane"]["family"] == "{111}"
    assert doc["slip_bands"][0]["count"] == 2
    assert doc["acquisition"]["voxel_um"] == [6.0, 2.0, 3.0]
    rf.validate_defects(json.loads(json.dumps(doc)))

    measure.write_exports(root, doc)
    back = rf.read_defects(root / rf.DEFECTS_JSON)
    assert back["cracks"][0]["id"] == 1
    lines = (root / rf.DEFECTS_CSV).read_text().splitlines()
    assert lines[0].split(",") == measure.CSV_COLUMNS
    ids = [int(line.split(",")[0]) for line in lines[1:]]
    types = [line.split(",")[1] for line in lines[1:]]
    assert ids == [1, 2, 5, 9] and types == ["crack", "crack", "dislocation_loop", "slip_band"]
    assert not list(root.glob(".*.tmp"))  # atomic writes leave no temporary files


def test_measure_uses_the_given_centre(run_folder):
    root, truth = run_folder
    c_mm = (float(truth["centre"][0]) / 1000.0, float(truth["centre"][1]) / 1000.0)
    doc = measure.measure_defects(
        root, _acquisition(center_xy_mm=c_mm), MeasureConfig(bootstrap=0), software_version="x"
    )
    assert doc["wafer"]["center_source"] == "acquisition"
    assert doc["wafer"]["center_xy_mm"] == pytest.approx(list(c_mm))
    assert doc["cracks"][1]["kind"] == "edge"


def test_measure_bad_inputs_name_the_file_and_key(run_folder, tmp_path):
    root, _ = run_folder
    with pytest.raises(InputError, match="volume.ome.zarr"):
        measure.measure_defects(tmp_path, _acquisition(), MeasureConfig(), software_version="x")
    bad = tmp_path / "bad"
    bad.mkdir()
    import shutil

    shutil.copytree(root / rf.VOLUME, bad / rf.VOLUME)
    with pytest.raises(InputError, match="components.json"):
        measure.measure_defects(bad, _acquisition(), MeasureConfig(), software_version="x")
    comps = rf.read_json(root / rf.COMPONENTS_JSON)
    comps["components"][0]["class"] = "scratch"
    rf.write_json_atomic(bad / rf.COMPONENTS_JSON, comps)
    with pytest.raises(
        InputError, match=r"components\[0\]\.class.*crack, dislocation_loop, slip_band"
    ):
        measure.measure_defects(bad, _acquisition(), MeasureConfig(), software_version="x")
    comps["components"][0]["class"] = "crack"
    comps["components"][0]["bbox_zyx"] = [0, 0, 0, 999, 5, 5]
    rf.write_json_atomic(bad / rf.COMPONENTS_JSON, comps)
    with pytest.raises(InputError, match=r"components\[0\]\.bbox_zyx .* outside the volume"):
        measure.measure_defects(bad, _acquisition(), MeasureConfig(), software_version="x")


@pytest.fixture(scope="module")
def exported(run_folder):
    root, _ = run_folder
    doc = measure.measure_defects(
        root, _acquisition(), MeasureConfig(bootstrap=0), software_version="0.1.0"
    )
    measure.write_exports(root, doc)
    return root / rf.DEFECTS_JSON


def test_exported_file_validates_against_the_shipped_schema(exported):
    import jsonschema

    doc = json.loads(exported.read_text())
    jsonschema.Draft202012Validator(rf.defects_schema()).validate(doc)
    assert doc["schema_version"] == 1


@pytest.mark.parametrize(
    ("mutate", "path"),
    [
        (lambda d: d["cracks"][0].__setitem__("depth_um", "deep"), "cracks[0].depth_um"),
        (lambda d: d["cracks"][1]["plane"].pop("normal"), "cracks[1].plane"),
        (lambda d: d["cracks"][0]["front"].__setitem__("a_um", -1.0), "cracks[0].front.a_um"),
        (
            lambda d: d["dislocation_loops"][0].__setitem__("meets_surface", "yes"),
            "dislocation_loops[0].meets_surface",
        ),
        (lambda d: d["wafer"].pop("thickness_um"), "wafer"),
    ],
)
def test_bad_defect_file_is_rejected_naming_the_key(exported, tmp_path, mutate, path):
    doc = json.loads(exported.read_text())
    mutate(doc)
    bad = tmp_path / "defects.json"
    bad.write_text(json.dumps(doc))
    with pytest.raises(InputError) as exc:
        rf.read_defects(bad)
    assert path in str(exc.value)
    assert str(bad) in str(exc.value)


def test_assess_cli_rejects_a_bad_defect_file_with_exit_2(exported, tmp_path):
    """SPEC 9: `crackstack assess` on a defects.json with a wrong type exits 2 and names the
    key's path."""
    from typer.testing import CliRunner

    from pipeline.cli import app

    doc = json.loads(exported.read_text())
    doc["cracks"][0]["length_um"] = "long"
    bad = tmp_path / "bad_defects.json"
    bad.write_text(json.dumps(doc))
    stress = tmp_path / "stress.csv"
    stress.write_text(
        "time_s,r_mm,sigma_r_MPa,sigma_theta_MPa\n0,0,0,0\n0,150,0,10\n1,0,0,0\n1,150,0,20\n"
    )
    out = tmp_path / "assessment.json"
    res = CliRunner().invoke(
        app, ["assess", str(bad), "--stress-csv", str(stress), "--out", str(out)]
    )
    assert res.exit_code == 2, res.output
    # click >= 8.2 keeps stderr apart and also mixes it into output
    assert "cracks[0].length_um" in res.output + res.stderr
    assert not out.exists()

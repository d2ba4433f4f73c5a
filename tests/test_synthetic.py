"""Synthetic series: geometry of the rendered frames, ground truth, instrument model, scenarios.

External references used as oracles (named at each check):
- pipeline.geometry (SPEC section 5) for where a point must land; the projection is the contract.
- Section width ``W = 2 t sin(theta_B)`` (Lang 1959, J. Appl. Phys. 30, 1748; Authier 2001,
  Dynamical Theory of X-ray Diffraction, ch. 5); PHYSICS.md check 11: 286.3 um for t = 775 um,
  Si 220, 17.479 keV.
- Pendellosung distances, PHYSICS.md check 9 / table 2.4 (ITC Vol. B section 5.1.3.5 formula,
  computed there with xraylib): Si 220 17.479 keV 35.2 um (no DW) / 36.3 um (DW); Si 220
  8.048 keV 15.26 um with DW (ITC quotes 15.3 um).
- Attenuation of Si at 8.048 keV, mu = 148 cm^-1 (xraylib CS_Total_CP x 2.329 g/cm^3, PHYSICS.md
  section 1.6) and the reflection depth 1 / (mu (1/gamma_0 + 1/|gamma_h|)) (PHYSICS.md 1.3).
- Interplanar angles of cubic crystals (Cullity & Stock 2001, appendix 3): (111)/(001) 54.7356 deg.
- Centroid of a half ellipse at 4a/(3 pi) from its straight edge, of a quarter ellipse at
  (4a/(3 pi), 4c/(3 pi)) from its corner (standard plane-area centroids, e.g. any statics text).
- Sub-pixel shifts: scikit-image phase_cross_correlation (Guizar-Sicairos et al. 2008, Opt. Lett.
  33, 156).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import tifffile
import yaml
from skimage.registration import phase_cross_correlation

import synthetic
from pipeline import crystal as cx
from pipeline.compute import set_quiet
from pipeline.config import load_acquisition
from pipeline.errors import InputError
from pipeline.geometry import bragg_angle_deg
from pipeline.runfolder import read_json, validate_defects
from synthetic import Scenario, load_scenario, render_series
from synthetic.defects import expand
from synthetic.forward import (
    _check_layout,
    _edge_inside,
    band_profile,
    build_plan,
    expected_frame,
    lit_points,
)
from synthetic.physics import absorption_depth_um, pendellosung_um

set_quiet(True)

QUIET_INSTRUMENT = {
    "photons_per_px": 20000,
    "noise": False,
    "blur_px": 0.7,
    "flat_amplitude": 0,
    "dark_offset": 0,
    "monitor_variation": 0,
    "hot_pixels": 0,
}


def _scenario(
    beam: dict,
    *,
    detector=None,
    frames=20,
    rows=64,
    cols=128,
    step=3.0,
    margin=10,
    thickness=200.0,
    instrument=None,
    contrast=None,
    defects=(),
    center=(-149.0, 0.0),
    start=0.0,
) -> Scenario:
    return Scenario.model_validate(
        {
            "wafer": {"thickness_um": thickness, "center_xy_mm": list(center)},
            "acquisition": {
                "beam": beam,
                "detector": detector or {"pixel_um": [1.0, 1.0]},
                "scan": {"start_um": start, "step_um": step, "n_frames": frames},
                "frame": {"rows": rows, "cols": cols, "margin_px": margin},
            },
            "instrument": {**QUIET_INSTRUMENT, **(instrument or {})},
            "contrast": contrast or {"pendellosung_um": 30.0},
            "defects": list(defects),
        }
    )


def _frames(out) -> np.ndarray:
    truth = read_json(out / "ground_truth.json")
    return np.stack(
        [tifffile.imread(out / f"frame_{k:05d}.tif").astype(float) for k in truth["frame_numbers"]]
    ), truth


# --- a point lands where the geometry says ------------------------------------------------------

# (beam, detector tilt, pixel um): both geometries, several energies and reflections, tilts.
# Reflection incidences are the coplanar (001)-wafer settings of PHYSICS.md check 5
# (xrayutilities HXRD.Q2Ang): 224 grazing incidence 8.748 deg, 113 grazing exit 53.299 deg.
POINT_CASES = {
    "laue-220-17keV": ({"energy_keV": 17.479, "reflection": [2, 2, 0]}, 0.0, 1.0),
    "laue-440-30keV-tilt20": ({"energy_keV": 30.0, "reflection": [4, 4, 0]}, 20.0, 1.0),
    "laue-111-12keV-asym": (
        {
            "energy_keV": 12.0,
            "reflection": [1, 1, 1],
            "incidence_deg": bragg_angle_deg((1, 1, 1), 12.0) + 15.0,
        },
        0.0,
        0.8,
    ),
    "bragg-004-8keV": (
        {
            "energy_keV": 8.048,
            "reflection": [0, 0, 4],
            "geometry": "reflection",
            "incidence_deg": 90.0 - bragg_angle_deg((0, 0, 4), 8.048),
        },
        0.0,
        1.0,
    ),
    "bragg-224-8keV-gi": (
        {
            "energy_keV": 8.048,
            "reflection": [2, 2, 4],
            "geometry": "reflection",
            "incidence_deg": 90.0 - 8.748,
            "slit_width_um": 3.0,
        },
        0.0,
        1.0,
    ),
    "bragg-113-8keV-ge-tilt10": (
        {
            "energy_keV": 8.048,
            "reflection": [1, 1, 3],
            "geometry": "reflection",
            "incidence_deg": 90.0 - 53.299,
        },
        10.0,
        1.0,
    ),
}


@pytest.mark.parametrize("case", list(POINT_CASES))
def test_point_defect_lands_on_predicted_frame_row_and_column(case, tmp_path):
    beam, tilt, pixel = POINT_CASES[case]
    beam = {"slit_width_um": 8.0, **beam}
    base = _scenario(beam, detector={"pixel_um": [pixel, pixel], "tilt_deg": tilt})
    g = base.geometry()
    reflection = g.geometry == "reflection"
    z = 3.0 if reflection else 120.0
    wx = g.slit_width_um / math.cos(math.radians(g.psi0_deg))
    step = max(3.0, wx / 4)  # each point lit in about four frames
    # point 1 sits on the ribbon centre of frame 10 (D = 0), point 2 at D = +1.2 um in frame 8
    x1 = 10 * step + z * g.tan_psi0
    x2 = 8 * step + 1.2 + z * g.tan_psi0
    points = [
        {"type": "point", "position_um": [x1, 16.0 * pixel, z], "size_um": 0.6},
        {"type": "point", "position_um": [x2, 46.0 * pixel, z], "size_um": 0.6},
    ]
    drift = {"drift_step_px": [0.25, 0.35]}
    with_pts = _scenario(
        beam,
        detector={"pixel_um": [pixel, pixel], "tilt_deg": tilt},
        step=step,
        instrument=drift,
        defects=points,
    )
    without = _scenario(
        beam, detector={"pixel_um": [pixel, pixel], "tilt_deg": tilt}, step=step, instrument=drift
    )
    a, truth = _frames(render_series(with_pts, tmp_path / "a"))
    b, _ = _frames(render_series(without, tmp_path / "b"))
    diff = a - b
    pos = np.asarray(truth["positions_um"])
    r0, c0 = np.asarray(truth["origins"]["r0_px"]), np.asarray(truth["origins"]["c0_px"])
    for p, rows, j_true in ((points[0], slice(0, 32), 10), (points[1], slice(32, 64), 8)):
        x, y, zz = p["position_um"]
        k_pred, _, _ = g.wafer_to_detector(x, y, zz, pos, r0, c0)
        flux = diff[:, rows].sum(axis=(1, 2))
        assert flux.max() > 0, "the point is not visible"
        k_seen = float((np.arange(len(flux)) * flux).sum() / flux.sum())
        assert abs(k_seen - float(k_pred)) < 0.5, (case, k_seen, float(k_pred))
        j = int(round(float(k_pred)))
        assert j == j_true
        sub = np.clip(diff[j, rows], 0, None)
        r, c = np.unravel_index(np.argmax(sub), sub.shape)
        r_lo, c_lo = max(r - 6, 0), max(c - 20, 0)
        win = sub[r_lo : r + 7, c_lo : c + 21]
        rr, cc = np.mgrid[r_lo : r_lo + win.shape[0], c_lo : c_lo + win.shape[1]]
        row_seen = float((rr * win).sum() / win.sum()) + rows.start
        col_seen = float((cc * win).sum() / win.sum())
        row_pred, col_pred, _ = g.project(x, y, zz, pos[j], r0[j], c0[j])
        assert abs(row_seen - float(row_pred)) < 0.5, (case, row_seen, float(row_pred))
        assert abs(col_seen - float(col_pred)) < 0.5, (case, col_seen, float(col_pred))
        if j_true == 10:  # on the ribbon centre the ribbon-centre map is exact too
            _, row_rc, col_rc = g.wafer_to_detector(x, y, zz, pos, r0, c0)
            assert abs(col_seen - float(col_rc)) < 0.5
            assert abs(row_seen - float(row_rc)) < 0.5


def test_lit_points_invert_the_geometry_projection():
    scn = _scenario(
        {"energy_keV": 22.163, "reflection": [2, 2, 0], "incidence_deg": 20.0},
        detector={"pixel_um": [1.3, 0.7], "tilt_deg": 12.0},
    )
    g = scn.geometry()
    D = np.linspace(-6, 6, 7)
    rows, cols = np.arange(0, 64, 7.0), np.arange(0, 128, 5.0)
    x, y, z = lit_points(g, 123.0, 1.7, 9.3, D, rows, cols)
    row, col, d_back = g.project(x[:, None, :], y[None, :, None], z[:, None, :], 123.0, 1.7, 9.3)
    np.testing.assert_allclose(row, np.broadcast_to(rows[None, :, None], row.shape), atol=1e-9)
    np.testing.assert_allclose(col, np.broadcast_to(cols[None, None, :], col.shape), atol=1e-9)
    np.testing.assert_allclose(d_back, np.broadcast_to(D[:, None, None], d_back.shape), atol=1e-9)


def test_band_across_the_edge_equals_per_sample_mask():
    # the edge crosses the scan at an angle: compare the cumulative-table shortcut with the
    # direct sum over slit samples of band x edge mask
    scn = _scenario(
        {"energy_keV": 17.479, "reflection": [2, 2, 0], "slit_width_um": 10},
        thickness=300.0,
        frames=12,
        rows=48,
        cols=128,
        step=4.0,
        center=(-149.95 * math.cos(0.3) + 0.02, -149.95 * math.sin(0.3)),
    )
    plan, _, _ = build_plan(scn)
    mixed = 0
    for k in range(12):
        x, y, z = lit_points(
            plan.geom,
            plan.positions[k],
            plan.r0[k],
            plan.c0[k],
            plan.D,
            np.arange(48.0),
            np.arange(128.0),
        )
        wb = plan.Dw[:, None] * band_profile(z, plan)
        direct = np.einsum("dc,drc->rc", wb, _edge_inside(x[:, None, :], y[None, :, None], plan))
        fast = expected_frame(plan, k, with_defects=False)
        assert np.abs(fast - direct).max() < 0.02
        assert fast.sum() == pytest.approx(direct.sum(), rel=1e-3, abs=1e-6)
        mixed += 0 < (direct > 0.5).mean() < 1
    assert mixed >= 3  # the edge was in view


# --- band width, reflection depth, drift --------------------------------------------------------


def _half_max_edges(profile: np.ndarray) -> tuple[float, float]:
    half = profile.max() / 2
    above = np.nonzero(profile >= half)[0]
    i0, i1 = above[0], above[-1]
    left = i0 - 1 + (half - profile[i0 - 1]) / (profile[i0] - profile[i0 - 1])
    right = i1 + (profile[i1] - half) / (profile[i1] - profile[i1 + 1])
    return float(left), float(right)


@pytest.mark.parametrize("tilt", [0.0, 20.0])
def test_band_width_equals_t_times_G(tilt, tmp_path):
    scn = _scenario(
        {"energy_keV": 17.479, "reflection": [2, 2, 0], "slit_width_um": 10},
        detector={"pixel_um": [1.0, 1.0], "tilt_deg": tilt},
        thickness=775.0,
        frames=3,
        rows=16,
        cols=360,
        margin=20,
        instrument={"blur_px": 0.0, "drift_step_px": [0.0, 0.4]},
        contrast={"fringe_visibility": 0.0, "surface_line_amplitude": 0.0},
    )
    g = scn.geometry()
    frames, truth = _frames(render_series(scn, tmp_path / "s"))
    # Lang (1959) / PHYSICS.md check 11: W = 2 t sin(theta_B) = 286.3 um (t = 775 um), detector
    # normal to the diffracted beam; a tilted detector stretches it by 1/cos(delta)
    assert g.band_width_px == pytest.approx(286.3 / math.cos(math.radians(tilt)), abs=0.15)
    for i in range(3):
        left, right = _half_max_edges(frames[i].mean(axis=0))
        assert right - left == pytest.approx(g.band_width_px, abs=1.0)
        assert left == pytest.approx(truth["origins"]["c0_px"][i], abs=1.0)


def test_reflection_band_decays_with_absorption_depth(tmp_path):
    tb = bragg_angle_deg((0, 0, 4), 8.048)
    scn = _scenario(
        {
            "energy_keV": 8.048,
            "reflection": [0, 0, 4],
            "geometry": "reflection",
            "incidence_deg": 90.0 - tb,
            "slit_width_um": 2.0,
        },
        frames=2,
        rows=8,
        cols=420,
        margin=10,
        instrument={"blur_px": 0.0},
        contrast={"surface_line_amplitude": 0.0},
    )
    g = scn.geometry()
    frames, truth = _frames(render_series(scn, tmp_path / "r"))
    prof = frames[0].mean(axis=0)
    z = (np.arange(prof.size) - truth["origins"]["c0_px"][0]) * g.p_col_um / g.G
    sel = (z > 6) & (z < 40)
    slope = np.polyfit(z[sel], np.log(prof[sel]), 1)[0]
    # mu = 148.1 cm^-1 at 8.048 keV (xraylib, PHYSICS.md 1.6); symmetric Bragg:
    # z_abs = sin(theta_B) / (2 mu) = 19.2 um (PHYSICS.md 1.3 gives "about 19 um")
    z_abs_ref = 1e4 / 148.087 * math.sin(math.radians(tb)) / 2
    assert -1 / slope == pytest.approx(z_abs_ref, rel=0.02)
    assert truth["geometry"]["absorption_depth_um"] == pytest.approx(z_abs_ref, rel=0.005)
    # only the near-surface slab contributes: from 10 z_abs on the band is dark
    assert prof[z > 10 * z_abs_ref].max() < 1e-4 * prof.max()


def test_drift_written_equals_drift_rendered(tmp_path):
    # a through crack along x (normal along y) gives every frame the same horizontal line, the
    # band edges the columns: frames differ only by the drift
    crack = {
        "type": "crack",
        "plane": {"hkl": [1, -1, 0]},
        "start": "through",
        "c_um": 5000,
        "position_um": [30.0, 30.0, 0.0],
    }
    scn = _scenario(
        {"energy_keV": 17.479, "reflection": [2, 2, 0], "slit_width_um": 8},
        frames=20,
        rows=64,
        cols=110,
        margin=15,
        defects=[crack],
        instrument={"drift_step_px": [0.15, 0.2], "blur_px": 1.0},
    )
    frames, truth = _frames(render_series(scn, tmp_path / "d"))
    dr = np.asarray(truth["drift"]["row_px"])
    dc = np.asarray(truth["drift"]["col_px"])
    np.testing.assert_allclose(np.asarray(truth["origins"]["r0_px"]), 0.0 + dr)
    np.testing.assert_allclose(np.asarray(truth["origins"]["c0_px"]), 15.0 + dc)
    assert dr[0] == 0 and dc[0] == 0
    assert np.ptp(dr) > 0.3 and np.ptp(dc) > 0.3
    for k in range(1, 20):
        # plain (not phase-whitened) cross-correlation: the frames are smooth, and whitening
        # would weight the empty high frequencies
        shift, _, _ = phase_cross_correlation(
            frames[0], frames[k], upsample_factor=100, normalization=None
        )
        # the returned shift registers frame k onto frame 0: minus its displacement
        assert -shift[0] == pytest.approx(dr[k] - dr[0], abs=0.05)
        assert -shift[1] == pytest.approx(dc[k] - dc[0], abs=0.05)
    steps = np.diff(dc)
    assert 0.1 < np.sqrt(np.mean(steps**2)) < 0.4  # a random walk of 0.2 px rms steps


# --- physics numbers ---------------------------------------------------------------------------


def test_pendellosung_distance_matches_published_values():
    laue = _scenario({"energy_keV": 17.479, "reflection": [2, 2, 0]}).geometry()
    assert pendellosung_um(laue, (2, 2, 0), debye_waller=False) == pytest.approx(35.2, rel=0.02)
    assert pendellosung_um(laue, (2, 2, 0)) == pytest.approx(36.3, rel=0.02)
    cu = _scenario({"energy_keV": 8.048, "reflection": [2, 2, 0]}).geometry()
    assert pendellosung_um(cu, (2, 2, 0)) == pytest.approx(15.3, rel=0.02)  # ITC Vol. B 5.1.3.5


def test_absorption_depth_formula_224_grazing_incidence():
    g = _scenario(
        {
            "energy_keV": 8.048,
            "reflection": [2, 2, 4],
            "geometry": "reflection",
            "incidence_deg": 90 - 8.748,
        }
    ).geometry()
    # PHYSICS.md 1.3: 224 Cu grazing incidence z_abs ~ 8.9 um (mu = 148 cm^-1)
    assert absorption_depth_um(g, 1e4 / 148.0) == pytest.approx(8.9, abs=0.1)


# --- crystal planes and ground truth ----------------------------------------------------------


def test_plane_descriptors_of_the_demo_orientation():
    R = cx.orientation_matrix((0, 0, 1), (1, 1, 0))
    d = cx.plane_descriptor(cx.to_wafer(R, (1, -1, 1)), R)
    assert d["inclination_deg"] == pytest.approx(54.7356, abs=1e-4)  # (111)/(001)
    assert d["azimuth_deg"] == pytest.approx(0.0, abs=1e-9)  # trace along x = [110]
    assert d["family"] == "{111}" and d["misfit_deg"] == 0.0
    assert cx.plane_descriptor(cx.to_wafer(R, (1, -1, 0)), R)["inclination_deg"] == pytest.approx(
        90
    )
    v = cx.plane_descriptor(cx.to_wafer(R, (1, 1, 0)), R)
    assert v["azimuth_deg"] == pytest.approx(90.0)  # (110) normal along x: trace along y
    # PHYSICS.md check 7: (111) rotated 2 deg toward [001] -> {111}, misfit 2.000 deg
    n111 = cx.unit((1, 1, 1))
    axis = cx.unit(np.cross(n111, (0, 0, 1)))
    th = math.radians(2.0)
    rot = n111 * math.cos(th) + np.cross(axis, n111) * math.sin(th)
    hkl, misfit = cx.nearest_hkl(rot)
    assert cx.family_name(hkl) == "{111}" and misfit == pytest.approx(2.0, abs=1e-6)
    assert cx.family_name((1, 1, 3)) == "{311}" and cx.family_name((0, 2, -2)) == "{220}"
    # a plane given by indices above the search range keeps them
    d115 = cx.plane_descriptor(cx.to_wafer(R, (1, 1, 5)), R, (2, 2, 10))
    assert d115["nearest_hkl"] == [1, 1, 5] and d115["misfit_deg"] == 0.0
    assert cx.same_family((0, 2, -2), (1, 1, 0))


def test_hexagon_distance_equals_distance_to_its_six_edges():
    from synthetic.defects import _hexagon_d2

    R = 7.0
    th = np.radians(30.0 + 60.0 * np.arange(6))
    verts = R * np.stack([np.cos(th), np.sin(th)], axis=1)
    rng = np.random.default_rng(1)
    u, v = rng.uniform(-15, 15, (2, 4000))
    best = np.full(u.shape, np.inf)
    for i in range(6):  # point-to-segment distance, directly
        a, b = verts[i], verts[(i + 1) % 6]
        e = b - a
        t = np.clip(((u - a[0]) * e[0] + (v - a[1]) * e[1]) / (e @ e), 0, 1)
        best = np.minimum(best, (u - a[0] - t * e[0]) ** 2 + (v - a[1] - t * e[1]) ** 2)
    np.testing.assert_allclose(_hexagon_d2(u, v, R), best, rtol=1e-9, atol=1e-9)


def _crack_scenario(**crack) -> Scenario:
    return _scenario(
        {"energy_keV": 17.479, "reflection": [2, 2, 0]},
        thickness=775.0,
        center=(-149.0, 0.1),
        defects=[{"type": "crack", **crack}],
    )


def test_edge_crack_ground_truth_matches_closed_form():
    scn = _crack_scenario(
        plane={"hkl": [1, -1, 0]}, start="edge", a_um=200, c_um=150, position_um=[900, 100, 400]
    )
    (c,) = expand(scn).cracks
    edge_x = -149000 + 150000 * math.sqrt(1 - (100 / 150000) ** 2)
    assert c["kind"] == "edge"
    assert c["depth_um"] == pytest.approx(200, abs=0.05)
    assert c["length_um"] == pytest.approx(300, abs=0.05)
    assert c["thickness_span_um"] == pytest.approx([250, 550], abs=0.05)
    # half-ellipse centroid 4a/(3 pi) from the mouth
    assert c["centroid_um"][0] == pytest.approx(edge_x - 4 * 200 / (3 * math.pi), abs=0.5)
    assert c["centroid_um"][1:] == pytest.approx([100, 400], abs=0.5)
    assert c["position"]["distance_to_edge_um"] == pytest.approx(4 * 200 / (3 * math.pi), abs=0.5)
    assert c["plane"]["inclination_deg"] == pytest.approx(90.0)
    assert c["front"]["aspect"] == pytest.approx(200 / 150)
    assert all(
        math.hypot(p[0] + 149000, p[1] - 100) <= 150000 + 1e-6 for p in c["front"]["points_um"]
    )


def test_corner_and_inclined_cracks_ground_truth():
    scn = _crack_scenario(
        plane={"hkl": [1, -1, 0]},
        start="edge",
        front="quarter_elliptical",
        corner="top",
        a_um=120,
        c_um=240,
        position_um=[900, 50, 0],
    )
    (q,) = expand(scn).cracks
    assert q["thickness_span_um"] == pytest.approx([0, 240], abs=0.05)
    assert q["length_um"] == pytest.approx(240, abs=0.05)
    assert q["centroid_um"][2] == pytest.approx(4 * 240 / (3 * math.pi), abs=0.5)
    scn = _crack_scenario(
        plane={"hkl": [1, -1, 1]},
        start="surface_top",
        a_um=110,
        c_um=140,
        position_um=[600, 100, 0],
    )
    (s,) = expand(scn).cracks
    sin_incl = math.sin(math.radians(54.7356))
    assert s["depth_um"] == pytest.approx(110 * sin_incl, abs=0.05)
    assert s["length_um"] == pytest.approx(280, abs=0.05)
    assert s["plane"]["nearest_hkl"] == [1, -1, 1]
    # the crack dips toward +y: its centroid lies 4a/(3 pi) down the dip
    dip = 4 * 110 / (3 * math.pi)
    assert s["centroid_um"] == pytest.approx(
        [600, 100 + dip * math.cos(math.radians(54.7356)), dip * sin_incl], abs=0.5
    )


def test_indent_expands_into_cracks_and_loops():
    scn = _scenario(
        {"energy_keV": 17.479, "reflection": [2, 2, 0]},
        thickness=775.0,
        defects=[
            {
                "type": "indent",
                "position_um": [50, 30],
                "loops_per_plane": 2,
                "zone_radius_um": 5,
                "loop_radius_um": 10,
                "loop_spacing_um": 25,
            }
        ],
    )
    ex = expand(scn)
    assert len(ex.cracks) == 2 and len(ex.loops) == 8
    ids = [c["id"] for c in ex.cracks] + [lp["id"] for lp in ex.loops]
    assert len(set(ids)) == len(ids)
    (ind,) = ex.indents
    assert ind["crack_ids"] == [c["id"] for c in ex.cracks]
    assert ind["loop_ids"] == [lp["id"] for lp in ex.loops]
    for lp in ex.loops:
        assert lp["plane"]["family"] == "{111}"
        assert lp["plane"]["inclination_deg"] == pytest.approx(54.7356, abs=1e-4)
        assert not lp["meets_surface"]
    assert {c["plane"]["inclination_deg"] for c in ex.cracks} == {90.0}


# --- the files: acquisition, dropped/corrupt frames, instrument files, reproducibility --------


def test_series_files_dropped_and_corrupt_frames(tmp_path):
    scn = _scenario(
        {"energy_keV": 17.479, "reflection": [2, 2, 0]},
        frames=8,
        rows=32,
        cols=96,
        instrument={
            "noise": True,
            "dark_offset": 100,
            "flat_amplitude": 0.05,
            "monitor_variation": 0.03,
            "hot_pixels": 4,
            "dropped_frames": [2, 5],
            "corrupt_frames": [3, {"frame": 6, "kind": "garbage"}],
        },
    )
    out = render_series(scn, tmp_path / "s")
    names = sorted(p.name for p in out.glob("frame_*.tif"))
    assert names == [f"frame_{k:05d}.tif" for k in (0, 1, 3, 4, 6, 7)]
    acq, base = load_acquisition(out / "acquisition.yaml")
    assert base == out.resolve()
    assert acq.scan.positions_um == [0.0, 3.0, 9.0, 12.0, 18.0, 21.0]
    assert (acq.frames.dark, acq.frames.flat, acq.frames.monitor) == (
        "dark.tif",
        "flat.tif",
        "monitor.csv",
    )
    truth = read_json(out / "ground_truth.json")
    validate_defects(truth)
    assert truth["frames_dropped"] == [2, 5]
    assert truth["frame_numbers"] == [0, 1, 3, 4, 6, 7]
    assert truth["frames_corrupt"] == [2, 4]  # series indices of frames 3 and 6
    assert len(truth["drift"]["row_px"]) == len(truth["origins"]["c0_px"]) == 6
    assert not tifffile.imread(out / "frame_00003.tif").any()
    garbage = tifffile.imread(out / "frame_00006.tif")
    good = tifffile.imread(out / "frame_00007.tif")
    assert good.dtype == np.uint16 and garbage.dtype == np.uint16
    # garbage is uniform over 0..65535; a real frame stays below 2x the band (hot pixels aside)
    assert np.mean(garbage > 40000) > 0.3 and np.mean(good > 40000) < 0.01
    monitor = np.loadtxt(out / "monitor.csv", delimiter=",", skiprows=1)
    np.testing.assert_allclose(monitor[:, 1], truth["monitor"], rtol=1e-5)
    dark = tifffile.imread(out / "dark.tif")
    assert dark.shape == (32, 96) and abs(float(dark.mean()) - 100) < 3
    # hot pixels read far above their neighbours, and are not in the dark
    hot = good.astype(float) - dark > 3 * 20000
    assert hot.sum() == 4
    # a second render into the same folder replaces the first
    render_series(scn, out, seed=3)
    assert sorted(p.name for p in out.glob("frame_*.tif")) == names


def test_render_is_reproducible_and_independent_of_batching(tmp_path):
    scn = _scenario(
        {"energy_keV": 17.479, "reflection": [2, 2, 0]},
        frames=6,
        rows=32,
        cols=96,
        instrument={"noise": True, "drift_step_px": [0.2, 0.2], "hot_pixels": 2},
        defects=[{"type": "loop", "plane": [1, 1, 1], "center_um": [8, 16, 60], "radius_um": 8}],
    )
    a = render_series(scn, tmp_path / "a", frames_per_task=1)
    b = render_series(scn, tmp_path / "b", frames_per_task=6)
    c = render_series(scn, tmp_path / "c", seed=99)
    for k in range(6):
        fa = tifffile.imread(a / f"frame_{k:05d}.tif")
        assert np.array_equal(fa, tifffile.imread(b / f"frame_{k:05d}.tif"))
        assert not np.array_equal(fa, tifffile.imread(c / f"frame_{k:05d}.tif"))


def test_orientation_is_undone_in_the_stored_frames(tmp_path):
    kw = dict(
        frames=3,
        rows=32,
        cols=96,
        instrument={"drift_step_px": [0.1, 0.1]},
        defects=[{"type": "point", "position_um": [3, 10, 60], "size_um": 1.5}],
    )
    beam = {"energy_keV": 17.479, "reflection": [2, 2, 0]}
    plain = render_series(_scenario(beam, **kw), tmp_path / "p")
    o = {"transpose": True, "flip_rows": True, "flip_columns": False}
    turned = render_series(
        _scenario(beam, detector={"pixel_um": [1.0, 1.0], "orientation": o}, **kw), tmp_path / "t"
    )
    stored = tifffile.imread(turned / "frame_00001.tif")
    assert stored.shape == (96, 32)
    # reading applies transpose, then flip_rows, then flip_columns
    assert np.array_equal(stored.T[::-1, :], tifffile.imread(plain / "frame_00001.tif"))


# --- scenario validation -----------------------------------------------------------------------


def _write(tmp_path, doc) -> str:
    p = tmp_path / "scenario.yaml"
    p.write_text(yaml.safe_dump(doc))
    return str(p)


BASE_DOC = {
    "acquisition": {
        "beam": {"energy_keV": 17.479, "reflection": [2, 2, 0]},
        "scan": {"step_um": 4, "n_frames": 10},
    },
    "contrast": {"pendellosung_um": 36.3},
}


@pytest.mark.parametrize(
    ("defects", "extra", "message"),
    [
        (
            [
                {
                    "type": "crack",
                    "plane": {"hkl": [1, 1, 0]},
                    "start": "edge",
                    "a_umm": 5,
                    "c_um": 5,
                    "position_um": [0, 0, 0],
                }
            ],
            {},
            "defects[0]: a_umm: unknown key; did you mean 'a_um'?",
        ),
        (
            [{"type": "crak"}],
            {},
            "defects[0]: type: 'crak' is not a defect type; did you mean 'crack'?",
        ),
        (
            [{"type": "loop", "plane": [1, 1, 0], "center_um": [0, 0, 5], "radius_um": 3}],
            {},
            "is not a {111} plane",
        ),
        (
            [
                {
                    "type": "slip_band",
                    "plane": [1, 1, 1],
                    "direction": [1, 1, 0],
                    "center_um": [0, 0, 5],
                }
            ],
            {},
            "does not lie in plane",
        ),
        (
            [
                {
                    "type": "crack",
                    "plane": {"hkl": [1, 1, 0]},
                    "start": "internal",
                    "front": "quarter_elliptical",
                    "a_um": 5,
                    "c_um": 5,
                    "position_um": [0, 0, 9],
                }
            ],
            {},
            "does not fit start 'internal'",
        ),
        ([], {"instrument": {"dropped_frames": [12]}}, "dropped_frames: frame 12 is not in 0..9"),
        (
            [],
            {
                "acquisition": {
                    "beam": {"energy_keV": 17.479, "reflection": [2, 0, 0]},
                    "scan": {"step_um": 4, "n_frames": 10},
                }
            },
            "forbidden",
        ),
        ([], {"wafer": {"thicknes_um": 700}}, "did you mean 'thickness_um'"),
    ],
)
def test_bad_scenarios_name_the_key(tmp_path, defects, extra, message):
    doc = {**BASE_DOC, **extra, "defects": defects}
    with pytest.raises(InputError) as exc:
        load_scenario(_write(tmp_path, doc))
    assert message in str(exc.value)
    assert "scenario.yaml" in str(exc.value)


def test_edge_crack_that_misses_the_wafer_is_refused():
    scn = _scenario(
        {"energy_keV": 17.479, "reflection": [2, 2, 0]},
        center=(0.0, 0.0),
        defects=[
            {
                "type": "crack",
                "plane": {"hkl": [1, -1, 0]},
                "start": "edge",
                "a_um": 20,
                "c_um": 20,
                "position_um": [0, 160000, 100],
            }
        ],
    )
    with pytest.raises(InputError, match="misses the wafer edge"):
        expand(scn)


def test_non_empty_foreign_folder_is_refused(tmp_path):
    (tmp_path / "notes.txt").write_text("mine")
    scn = _scenario({"energy_keV": 17.479, "reflection": [2, 2, 0]}, frames=2, rows=8, cols=64)
    with pytest.raises(InputError, match="not empty"):
        render_series(scn, tmp_path)
    assert (tmp_path / "notes.txt").read_text() == "mine"


# --- demo scenario and the command-line helper -------------------------------------------------


def test_demo_scenario_is_valid_complete_and_fits(tmp_path):
    path = synthetic.demo_scenario_path()
    # The package ships the scenario; configs/demo_scenario.yaml is a link to the same file.
    assert path.name == "demo_scenario.yaml" and path.parent.name == "synthetic"
    linked = path.parent.parent / "configs" / "demo_scenario.yaml"
    assert linked.read_text() == path.read_text()
    scn = load_scenario(path)
    assert scn.wafer.diameter_mm == 300 and scn.wafer.crystal.z_uvw == (0, 0, 1)
    assert scn.acquisition.scan.count == 300
    assert (scn.acquisition.frame.rows, scn.acquisition.frame.cols) == (256, 512)
    g = scn.geometry()
    assert 0.6 * 512 < g.band_width_px < 512
    ex = expand(scn)
    kinds = sorted(c["kind"] for c in ex.cracks)
    assert kinds == ["edge", "edge", "surface_top", "surface_top", "surface_top"]
    assert any(
        c["plane"]["family"] == "{111}" and c["plane"]["inclination_deg"] < 60 for c in ex.cracks
    )
    assert len(ex.loops) == 8 and len(ex.slip_bands) == 1
    plan, _, _ = build_plan(scn)
    assert _check_layout(scn, plan, "demo") == []
    # a short stretch of the demo renders (the indent region)
    short = Scenario.model_validate(
        {
            **scn.model_dump(mode="json"),
            "acquisition": {
                **scn.model_dump(mode="json")["acquisition"],
                "scan": {"start_um": 288, "step_um": 4, "n_frames": 6},
            },
            "instrument": {
                **scn.model_dump(mode="json")["instrument"],
                "dropped_frames": [],
                "corrupt_frames": [],
            },
        }
    )
    frames, truth = _frames(render_series(short, tmp_path / "demo"))
    validate_defects(truth)
    assert frames.shape == (6, 256, 512)


def test_cli_synth_summary(tmp_path):
    doc = {
        **BASE_DOC,
        "acquisition": {
            **BASE_DOC["acquisition"],
            "frame": {"rows": 16, "cols": 64},
            "detector": {"pixel_um": [4, 4]},
        },
        "defects": [{"type": "point", "position_um": [10, 20, 100]}],
    }
    text = synthetic.cli_synth(_write(tmp_path, doc), tmp_path / "out")
    assert "Wrote 10 frames (16 x 64 px, 16-bit TIFF)" in text
    assert "1 point defects" in text and "ground_truth.json" in text

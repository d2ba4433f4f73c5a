"""Accuracy harness (synthetic/evaluate.py): aggregation on hand-made scores, one tiny real run.

The accuracy thresholds themselves are not tested here: they come from the full evaluation
(``python -m synthetic.evaluate``, docs/accuracy.md). These tests check the bookkeeping: which
tolerance applies to which crack, how false detections are attributed, how scans pool per
photon level, the one-sigma coverage against the normal distribution (scipy.stats.norm), and the
table's shape.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import stats

from synthetic import evaluate as ev
from synthetic.scenario import scenario_from_mapping

VOXEL = [4.0, 1.5, 4.0]  # dz, dy, dx (um)
T_UM = 775.0
# wafer centre 149.3 mm along -x: the edge crosses y = 0 at x = 700 um, nearly along y
WAFER = {"diameter_mm": 300.0, "thickness_um": T_UM, "center_xy_mm": [-149.3, 0.0]}


def _plane(normal, family="{110}"):
    return {"normal": normal, "inclination_deg": 90.0, "azimuth_deg": 0.0, "family": family}


def _truth_crack(cid, kind, centroid, normal, depth, length, span, front):
    return {
        "id": cid,
        "kind": kind,
        "centroid_um": centroid,
        "plane": _plane(normal),
        "depth_um": depth,
        "length_um": length,
        "thickness_span_um": span,
        "front": {"points_um": front},
    }


def _found_crack(cid, centroid, span, sigmas=(0.0, 0.0, 0.0), kind="internal"):
    return {
        "id": cid,
        "kind": kind,
        "centroid_um": centroid,
        "thickness_span_um": span,
        "uncertainty": dict(zip(("depth_um", "length_um", "inclination_deg"), sigmas, strict=True)),
    }


def _match(tid, fid, depth_e, length_e, incl_e, az_e, family=True, kind=True):
    return {
        "truth_id": tid,
        "found_id": fid,
        "kind_right": kind,
        "plane_family_right": family,
        "depth_error_um": depth_e,
        "length_error_um": length_e,
        "inclination_error_deg": incl_e,
        "azimuth_error_deg": az_e,
    }


def _scan_a():
    """Three true cracks (edge, surface_top, a shallow surface_bottom), two matches, four false
    detections: one near each of the edge, the exit surface, a true crack, and the interior."""
    truth = {
        "wafer": WAFER,
        "cracks": [
            # edge crack on a plane normal to y at y = 50: depth inward (-x), length along z
            _truth_crack(
                1,
                "edge",
                [680.0, 50.0, 300.0],
                [0.0, 1.0, 0.0],
                20.0,
                100.0,
                [250.0, 350.0],
                [[680.0, 50.0, 250.0], [680.0, 50.0, 350.0]],
            ),
            # surface crack on the plane x = 300: depth along z, length along y (the trace)
            _truth_crack(
                2,
                "surface_top",
                [300.0, 100.0, 10.0],
                [1.0, 0.0, 0.0],
                20.0,
                40.0,
                [0.0, 20.0],
                [[300.0, 80.0, 0.0], [300.0, 100.0, 20.0]],
            ),
            # 8 um deep = 2 voxels of 4 um: not counted in the recall
            _truth_crack(
                3,
                "surface_bottom",
                [500.0, 60.0, 771.0],
                [1.0, 0.0, 0.0],
                8.0,
                30.0,
                [767.0, 775.0],
                [[500.0, 50.0, 767.0]],
            ),
        ],
        "dislocation_loops": [{"center_um": [600.0, 40.0, 400.0], "diameter_um": 30.0}] * 2,
        "slip_bands": [],
    }
    defects = {
        "acquisition": {"voxel_um": VOXEL},
        "cracks": [
            _found_crack(11, [681.0, 50.0, 302.0], [250.0, 350.0], sigmas=(4.0, 2.0, 1.0)),
            _found_crack(12, [300.0, 101.0, 9.0], [0.0, 21.0], sigmas=(0.5, 1.0, None)),
            _found_crack(13, [695.0, 150.0, 400.0], [380.0, 420.0]),  # 5 um inside the edge
            _found_crack(14, [250.0, 20.0, 770.0], [760.0, 775.0]),  # touches the exit surface
            _found_crack(15, [400.0, 100.0, 400.0], [380.0, 420.0]),  # interior
            _found_crack(16, [305.0, 60.0, 15.0], [10.0, 20.0]),  # 5 um off crack 2's plane
        ],
        "dislocation_loops": [{}, {}],
        "slip_bands": [{}],
    }
    scores = {
        "cracks": {
            "tp": 2,
            "fp": 4,
            "matches": [
                # depth within 4 um (1 voxel along x), length 5 um > 4 um (1 voxel along z)
                _match(1, 11, 3.0, 5.0, 0.5, 3.0),
                # depth 4.1 > 4 (dz), length 1.4 <= 1.5 (dy); wrong family
                _match(2, 12, -4.1, 1.4, -2.5, 0.1, family=False, kind=False),
            ],
            "false_ids": [13, 14, 15, 16],
        },
        "loops": {"tp": 1, "fp": 1},
    }
    return defects, truth, scores


def _scan_b():
    """One deep surface crack, missed; a loop found; a slip band found, and one found far away."""
    truth = {
        "wafer": {**WAFER, "center_xy_mm": [-120.0, 0.0]},
        "cracks": [
            _truth_crack(
                1,
                "surface_top",
                [200.0, 80.0, 20.0],
                [0.0, 1.0, 0.0],
                40.0,
                60.0,
                [0.0, 40.0],
                [[170.0, 80.0, 0.0], [200.0, 80.0, 40.0]],
            ),
        ],
        "dislocation_loops": [{"center_um": [100.0, 40.0, 400.0], "diameter_um": 30.0}],
        # reach for pairing: (60 + 20) / 2 + 30 = 70 um about the centre
        "slip_bands": [{"center_um": [300.0, 100.0, 300.0], "extent_um": 60.0, "width_um": 20.0}],
    }
    defects = {
        "acquisition": {"voxel_um": VOXEL},
        "cracks": [],
        "dislocation_loops": [{}],
        "slip_bands": [{"center_um": [340.0, 120.0, 330.0]}, {"center_um": [500.0, 20.0, 300.0]}],
    }
    scores = {
        "cracks": {"tp": 0, "fp": 0, "matches": [], "false_ids": []},
        "loops": {
            "tp": 1,
            "fp": 0,
            "matches": [
                {"diameter_error_um": 4.0, "normal_angle_deg": 3.0, "plane_family_right": True}
            ],
        },
    }
    return defects, truth, scores


def test_voxel_extent_along_directions():
    assert ev.voxel_along_um([1, 0, 0], VOXEL) == pytest.approx(4.0)
    assert ev.voxel_along_um([0, -2, 0], VOXEL) == pytest.approx(1.5)
    assert ev.voxel_along_um([0, 0, 1], VOXEL) == pytest.approx(4.0)
    # the voxel box's width along the diagonal of x and y: (dx + dy) / sqrt(2)
    assert ev.voxel_along_um([1, 1, 0], VOXEL) == pytest.approx(5.5 / math.sqrt(2))


def test_summarise_scan_tolerances_and_false_causes():
    s = ev.summarise_scan(*_scan_a())
    rows = {r["truth_id"]: r for r in s["cracks"]}
    edge, top, shallow = rows[1], rows[2], rows[3]
    # edge crack: depth inward along x (dx = 4), length along the mouth = z (dz = 4)
    assert edge["depth_voxel_um"] == pytest.approx(4.0, abs=1e-3)
    assert edge["length_voxel_um"] == pytest.approx(4.0, abs=1e-3)
    assert edge["length_tol_um"] == pytest.approx(4.0, abs=1e-3)  # 3 % of 100 um = 3 < 4
    # surface crack on x = const: depth along z (dz), length along the trace = y (dy = 1.5)
    assert top["depth_voxel_um"] == pytest.approx(4.0)
    assert top["length_tol_um"] == pytest.approx(1.5)
    assert (edge["deep"], top["deep"], shallow["deep"]) == (True, True, False)
    assert (edge["found"], top["found"], shallow["found"]) == (True, True, False)
    assert edge["sigma_depth_um"] == 4.0 and top["sigma_inclination_deg"] is None
    causes = {f["found_id"]: f["cause"] for f in s["false_cracks"]}
    assert causes == {13: "edge", 14: "surface", 15: "fringes", 16: "defect"}
    assert s["n_found_cracks"] == 6
    assert s["loops"] == {"n_true": 2, "tp": 1, "fp": 1, "matches": []}
    assert s["slip_bands"] == {"n_true": 0, "n_found": 1, "true_found": 0, "found_away": 1}
    b = ev.summarise_scan(*_scan_b())
    # 54 um from the true band's centre: found; 218 um: away
    assert b["slip_bands"] == {"n_true": 1, "n_found": 2, "true_found": 1, "found_away": 1}
    assert b["loops"]["matches"][0]["diameter_error_um"] == 4.0


def test_aggregate_pools_per_level_and_overall():
    a = {"status": "ok", "level": "high", "summary": ev.summarise_scan(*_scan_a())}
    b = {"status": "ok", "level": "low", "summary": ev.summarise_scan(*_scan_b())}
    failed = {"status": "failed", "level": "low", "index": 7, "stage": "segment", "error": "x"}
    agg = ev.aggregate([a, b, failed], {"high": 5000.0, "low": 400.0})
    hi, lo, al = agg["per_level"]["high"], agg["per_level"]["low"], agg["overall"]
    assert (hi["scans"], lo["scans"], lo["scans_ok"], al["scans"], al["scans_ok"]) == (
        1,
        2,
        1,
        3,
        2,
    )
    assert al["failed"] == [{"index": 7, "stage": "segment", "error": "x"}]
    # recall over deep cracks only: high 2/2, low 0/1, all 2/3
    assert (hi["crack_recall"]["n"], hi["crack_recall"]["of"]) == (2, 2)
    assert lo["crack_recall"]["value"] == 0.0
    assert al["crack_recall"]["value"] == pytest.approx(2 / 3)
    assert al["crack_recall_by_kind"]["surface_top"] == {"n": 1, "of": 2, "value": 0.5}
    assert lo["crack_precision"]["value"] is None  # nothing found at low
    assert al["crack_precision"]["value"] == pytest.approx(2 / 6)
    assert al["loop_recall"]["value"] == pytest.approx(2 / 3)
    assert al["loop_precision"]["value"] == pytest.approx(2 / 3)
    fc = al["false_cracks"]
    assert fc["by_cause"] == {"defect": 1, "edge": 1, "surface": 1, "fringes": 1}
    assert (fc["per_scan_max"], fc["per_scan_mean"]) == (4, 2.0)
    assert (fc["background_per_scan_max"], fc["background_per_scan_mean"]) == (3, 1.5)
    assert al["pass"]["false_cracks_per_scan"] is False
    # errors: depth 3 (tol 4) in, -4.1 (tol 4) out; length 5 (tol 4) out, 1.4 (tol 1.5) in
    assert al["depth"]["within"] == 0.5 and al["length"]["within"] == 0.5
    assert al["depth"]["max_abs"] == pytest.approx(4.1)
    assert al["depth"]["mean"] == pytest.approx(-0.55)
    assert al["inclination"]["within"] == 0.5  # 0.5 in, -2.5 out
    assert al["azimuth"]["within"] == 0.5  # 3.0 out, 0.1 in
    assert al["plane_family_right"]["value"] == 0.5 and al["kind_right"]["value"] == 0.5
    # coverage: depth |3| <= 4 yes, |-4.1| <= 0.5 no; inclination: 0.5 <= 1 yes, no sigma -> no
    assert al["coverage"]["depth"]["value"] == 0.5
    assert al["coverage"]["length"]["value"] == 0.0
    assert al["coverage"]["inclination"]["value"] == 0.5
    assert al["pass"]["crack_recall"] is False and al["pass"]["loop_recall"] is False
    assert al["slip_bands"] == {"n_true": 1, "n_found": 3, "true_found": 1, "found_away": 2}
    assert al["loop_diameter"]["n"] == 1 and al["loop_diameter"]["mean"] == 4.0
    assert al["loop_plane_family_right"]["value"] == 1.0


def test_through_cracks_are_left_out_of_the_depth_rows():
    """A through crack's depth is the thickness by definition; it must not enter the depth
    error or coverage (it would count as exact), but it does count for length and recall."""
    truth = {
        "wafer": WAFER,
        "cracks": [
            _truth_crack(
                1,
                "through",
                [300.0, 90.0, T_UM / 2],
                [1.0, 0.0, 0.0],
                T_UM,
                50.0,
                [0.0, T_UM],
                [[300.0, 65.0, 0.0], [300.0, 115.0, T_UM]],
            ),
        ],
        "dislocation_loops": [],
        "slip_bands": [],
    }
    defects = {
        "acquisition": {"voxel_um": VOXEL},
        "slip_bands": [],
        "dislocation_loops": [],
        "cracks": [_found_crack(5, [300.0, 90.0, 380.0], [0.0, T_UM], (0.0, 1.0, 0.1))],
    }
    scores = {
        "cracks": {
            "tp": 1,
            "fp": 0,
            "matches": [_match(1, 5, 0.0, -2.0, 0.0, 0.0)],
            "false_ids": [],
        },
        "loops": {"tp": 0, "fp": 0},
    }
    rec = {"status": "ok", "level": "x", "summary": ev.summarise_scan(defects, truth, scores)}
    al = ev.aggregate([rec])["overall"]
    assert al["crack_recall"]["value"] == 1.0
    assert al["depth"]["n"] == 0 and al["coverage"]["depth"]["n"] == 0
    assert al["length"]["n"] == 1 and al["coverage"]["length"]["value"] == 0.0


def test_coverage_matches_the_normal_distribution():
    """Gaussian errors with their true sigma cover |e| <= sigma with P = Phi(1) - Phi(-1)
    (scipy.stats.norm); with sigmas twice too large, Phi(2) - Phi(-2)."""
    rng = np.random.default_rng(5)
    sigma = rng.uniform(0.5, 3.0, 4000)
    errors = rng.normal(0.0, sigma)
    p1 = stats.norm.cdf(1) - stats.norm.cdf(-1)
    assert ev.ONE_SIGMA_FRACTION == pytest.approx(p1, rel=1e-12)
    c = ev.coverage(errors, sigma)
    se = math.sqrt(p1 * (1 - p1) / len(errors))
    assert abs(c["value"] - p1) < 3 * se and c["consistent"]
    c2 = ev.coverage(errors, 2 * sigma)
    p2 = stats.norm.cdf(2) - stats.norm.cdf(-2)
    assert abs(c2["value"] - p2) < 3 * math.sqrt(p2 * (1 - p2) / len(errors))
    assert not c2["consistent"]


def test_table_has_a_row_per_metric_and_a_column_per_level():
    a = {"status": "ok", "level": "high", "summary": ev.summarise_scan(*_scan_a())}
    b = {"status": "ok", "level": "low", "summary": ev.summarise_scan(*_scan_b())}
    agg = ev.aggregate([a, b], {"high": 5000.0, "low": 400.0})
    lines = ev.markdown_table(agg).strip().splitlines()
    assert len(lines) == 2 + len(ev._ROWS)
    # metric, target, two levels, all, meets target: 6 cells, 7 bars
    assert all(line.count("|") - line.count("\\|") == 7 for line in lines)
    assert "high (5000 ph/px)" in lines[0] and "low (400 ph/px)" in lines[0]
    recall = next(line for line in lines if line.startswith("| crack recall"))
    assert "100 % (2/2)" in recall and "0 % (0/1)" in recall and "67 % (2/3)" in recall
    assert recall.rstrip().endswith("**no** |")


def test_random_scenarios_are_reproducible_and_within_the_brief():
    a, b = ev.random_scenario(11, 1500.0), ev.random_scenario(11, 400.0)
    assert a.defects == b.defects  # the photon level changes only the counts
    assert b.instrument.photons_per_px == 400.0
    for seed in range(8):
        s = ev.random_scenario(seed, 1500.0)
        cracks = [d for d in s.defects if d.type == "crack"]
        loops = [d for d in s.defects if d.type == "loop"]
        assert 1 <= len(cracks) <= 4 and len(loops) <= 3
        assert 80 <= s.acquisition.scan.n_frames <= 120
        for c in cracks:
            depth = c.a_um if c.a_um is not None else s.wafer.thickness_um
            if c.plane.hkl is not None and sorted(map(abs, c.plane.hkl)) == [1, 1, 1]:
                depth *= math.sqrt(2.0 / 3.0)  # {111}: sin(54.74 deg) of the in-plane a
            assert depth >= 3 * 4.06  # 3 voxels of depth (one detector column = 4.06 um)


def _tiny_scenario(seed: int, photons_per_px: float):
    """40 frames of 64 x 128 px through a 300 um wafer: one through crack and one loop."""
    return scenario_from_mapping(
        {
            "name": "tiny",
            "wafer": {"thickness_um": 300.0, "center_xy_mm": [-100.0, 0.0]},
            "acquisition": {
                "beam": {
                    "energy_keV": 17.479,
                    "reflection": [2, 2, 0],
                    "geometry": "transmission",
                    "slit_width_um": 12.0,
                },
                "detector": {"pixel_um": [1.5, 1.5]},
                "scan": {"start_um": 0.0, "step_um": 4.0, "n_frames": 40},
                "frame": {"rows": 64, "cols": 128, "margin_px": 24.0},
            },
            "contrast": {"pendellosung_um": 36.3},
            "instrument": {
                "photons_per_px": photons_per_px,
                "seed": seed,
                "drift_step_px": [0.02, 0.03],
            },
            "defects": [
                {
                    "type": "crack",
                    "plane": {"hkl": [1, 1, 0]},
                    "start": "through",
                    "c_um": 25.0,
                    "position_um": [110.0, 48.0, 150.0],
                },
                {
                    "type": "loop",
                    "plane": [1, 1, 1],
                    "center_um": [60.0, 45.0, 150.0],
                    "radius_um": 12.0,
                },
            ],
        },
        "tiny scenario",
    )


def test_evaluate_end_to_end_on_a_tiny_scan(tmp_path):
    doc = ev.evaluate(1, {"typical": 1500.0}, tmp_path, make_scenario=_tiny_scenario)
    (rec,) = doc["scans"]
    assert rec["status"] == "ok", rec.get("traceback")
    assert (rec["level"], rec["seed"], rec["photons_per_px"]) == ("typical", 0, 1500.0)
    assert set(rec["timings_s"]) >= set(ev.STAGES)
    al = doc["aggregate"]["overall"]
    assert doc["aggregate"]["per_level"]["typical"] == al
    # the pooled counts are the scan's own
    sc = rec["scores"]["cracks"]
    assert al["true_cracks"] == 1 and al["found_cracks"] == sc["tp"] + sc["fp"]
    assert al["crack_recall"]["n"] == sc["tp"] and al["false_cracks"]["total"] == sc["fp"]
    assert al["loop_recall"]["of"] == 1 and al["loop_recall"]["n"] == rec["scores"]["loops"]["tp"]
    on_disk = json.loads((tmp_path / "accuracy.json").read_text())
    assert on_disk["aggregate"]["overall"]["scans"] == 1
    assert (tmp_path / "scans" / "000_typical.json").is_file()
    md = (tmp_path / "accuracy.md").read_text()
    assert doc["table"] in md
    assert len(doc["table"].strip().splitlines()) == 2 + len(ev._ROWS)
    # a resumed evaluation reuses the record instead of running again
    again = ev.evaluate(1, {"typical": 1500.0}, tmp_path, make_scenario=_tiny_scenario, resume=True)
    assert again["scans"][0]["timings_s"] == rec["timings_s"]


def test_bad_arguments_are_rejected(tmp_path):
    with pytest.raises(ValueError, match="n_scenarios"):
        ev.evaluate(0, ev.LEVELS, tmp_path)
    with pytest.raises(ValueError, match="levels"):
        ev.evaluate(1, {"low": 0.0}, tmp_path)
    with pytest.raises(ValueError, match="photons_per_px"):
        ev.random_scenario(1, -5.0)

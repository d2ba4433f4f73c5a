"""Scoring a defect export against a synthetic ground truth.

The truth documents come from the synthetic scenario expansion (exact geometry); the "found"
documents are copies with known changes, so every expected number is set by the change made.
Optimal pairing is checked on a case where nearest-first (greedy) pairing loses a match and
scipy's linear_sum_assignment (Kuhn 1955; Crouse 2016) keeps both.
"""

from __future__ import annotations

import copy
import math

import numpy as np
import pytest

from pipeline.errors import InputError
from synthetic import Scenario, score
from synthetic.defects import expand


def _truth() -> dict:
    scn = Scenario.model_validate(
        {
            "wafer": {"center_xy_mm": [-149.0, 0.1]},
            "acquisition": {
                "beam": {"energy_keV": 17.479, "reflection": [2, 2, 0]},
                "scan": {"step_um": 4, "n_frames": 10},
            },
            "contrast": {"pendellosung_um": 36.3},
            "defects": [
                {
                    "type": "crack",
                    "plane": {"hkl": [1, -1, 0]},
                    "start": "edge",
                    "a_um": 200,
                    "c_um": 150,
                    "position_um": [900, 100, 400],
                },
                {
                    "type": "crack",
                    "plane": {"hkl": [1, -1, 1]},
                    "start": "surface_top",
                    "a_um": 100,
                    "c_um": 120,
                    "position_um": [400, 60, 0],
                },
                {
                    "type": "crack",
                    "plane": {"hkl": [1, 1, 0]},
                    "start": "internal",
                    "a_um": 40,
                    "c_um": 60,
                    "position_um": [200, 150, 500],
                },
                {"type": "loop", "plane": [1, 1, 1], "center_um": [100, 50, 300], "radius_um": 15},
                {
                    "type": "loop",
                    "plane": [1, -1, 1],
                    "center_um": [600, 150, 200],
                    "radius_um": 25,
                },
            ],
        }
    )
    ex = expand(scn)
    return {
        "schema_version": 1,
        "software": {"name": "test", "version": "0"},
        "wafer": {
            "diameter_mm": 300,
            "thickness_um": 775,
            "crystal": {"z_uvw": [0, 0, 1], "x_uvw": [1, 1, 0]},
            "center_xy_mm": [-149.0, 0.1],
        },
        "acquisition": {
            "energy_keV": 17.479,
            "reflection": [2, 2, 0],
            "geometry": "transmission",
            "voxel_um": [2.0, 1.0, 4.0],
        },
        "cracks": ex.cracks,
        "dislocation_loops": ex.loops,
        "slip_bands": ex.slip_bands,
    }


def test_perfect_match():
    truth = _truth()
    s = score(copy.deepcopy(truth), truth)
    for kind, n in (("cracks", 3), ("loops", 2)):
        r = s[kind]
        assert (r["tp"], r["fp"], r["fn"]) == (n, 0, 0)
        assert r["recall"] == r["precision"] == r["f1"] == 1.0
        assert r["missed_ids"] == [] and r["false_ids"] == []
        assert r["errors"]["distance_um"]["max_abs"] == 0.0
    assert all(m["plane_family_right"] and m["kind_right"] for m in s["cracks"]["matches"])
    assert s["cracks"]["errors"]["depth_error_um"]["max_abs"] == 0.0
    assert s["cracks"]["plane_family_right_fraction"] == 1.0


def test_missing_and_false_cracks():
    truth = _truth()
    found = copy.deepcopy(truth)
    missing = found["cracks"].pop(1)
    extra = copy.deepcopy(found["cracks"][0])
    extra["id"] = 99
    extra["centroid_um"] = [50.0, 20.0, 700.0]  # nowhere near a true crack
    found["cracks"].append(extra)
    s = score(found, truth)["cracks"]
    assert (s["tp"], s["fp"], s["fn"]) == (2, 1, 1)
    assert s["recall"] == pytest.approx(2 / 3) and s["precision"] == pytest.approx(2 / 3)
    assert s["missed_ids"] == [missing["id"]] and s["false_ids"] == [99]


def test_nothing_found():
    truth = _truth()
    found = {**copy.deepcopy(truth), "cracks": [], "dislocation_loops": []}
    s = score(found, truth)
    assert (s["cracks"]["tp"], s["cracks"]["fn"], s["cracks"]["recall"]) == (0, 3, 0.0)
    assert s["cracks"]["precision"] is None and s["cracks"]["f1"] is None
    assert s["cracks"]["errors"]["depth_error_um"]["mean_abs"] is None


def _rotate(v, axis, deg):
    v, k = np.asarray(v, float), np.asarray(axis, float) / np.linalg.norm(axis)
    t = math.radians(deg)
    return v * math.cos(t) + np.cross(k, v) * math.sin(t) + k * (k @ v) * (1 - math.cos(t))


def test_geometry_errors_are_signed_found_minus_true():
    truth = _truth()
    found = copy.deepcopy(truth)
    c = found["cracks"][1]  # the inclined (1-11) surface crack, trace along x
    c["depth_um"] += 12.0
    c["length_um"] -= 8.0
    c["centroid_um"][0] += 30.0
    # tilt the plane 5 deg about its trace (x): inclination changes by 5 deg, azimuth stays
    n = _rotate(c["plane"]["normal"], [1, 0, 0], 5.0)
    c["plane"]["normal"] = list(n)
    c["plane"]["inclination_deg"] = math.degrees(math.acos(abs(n[2])))
    c["plane"]["nearest_hkl"] = [1, 1, 0]  # reported as the wrong family
    c["plane"]["azimuth_deg"] = 178.0  # 2 deg the other way across the 0/180 wrap
    c["kind"] = "internal"
    s = score(found, truth)["cracks"]
    (m,) = [m for m in s["matches"] if m["truth_id"] == truth["cracks"][1]["id"]]
    assert m["depth_error_um"] == pytest.approx(12.0)
    assert m["length_error_um"] == pytest.approx(-8.0)
    assert m["distance_um"] == pytest.approx(30.0)
    assert abs(m["inclination_error_deg"]) == pytest.approx(5.0, abs=1e-9)
    assert m["normal_angle_deg"] == pytest.approx(5.0, abs=1e-9)
    assert m["azimuth_error_deg"] == pytest.approx(-2.0)
    assert not m["plane_family_right"] and not m["kind_right"]
    assert s["plane_family_right_fraction"] == pytest.approx(2 / 3)
    assert s["errors"]["depth_error_um"]["max_abs"] == pytest.approx(12.0)
    assert s["errors"]["depth_error_um"]["mean"] == pytest.approx(4.0)


def test_loop_diameter_error_and_match_radius():
    truth = _truth()
    found = copy.deepcopy(truth)
    found["dislocation_loops"][0]["diameter_um"] += 6.0
    found["dislocation_loops"][1]["center_um"][2] += 60.0  # beyond match_um = 50
    s = score(found, truth)["loops"]
    assert (s["tp"], s["fp"], s["fn"]) == (1, 1, 1)
    assert s["matches"][0]["diameter_error_um"] == pytest.approx(6.0)
    s = score(found, truth, match_um=70.0)["loops"]
    assert s["tp"] == 2


def test_pairing_is_optimal_not_greedy():
    truth = _truth()
    t1, t2 = truth["cracks"][0], truth["cracks"][1]
    t1["centroid_um"] = [0.0, 0.0, 0.0]
    t2["centroid_um"] = [20.0, 0.0, 0.0]
    truth["cracks"] = [t1, t2]
    found = copy.deepcopy(truth)
    found["cracks"][0]["centroid_um"] = [9.0, 0.0, 0.0]  # 9 from t1, 11 from t2
    found["cracks"][1]["centroid_um"] = [-20.0, 0.0, 0.0]  # 20 from t1, 40 from t2
    # nearest-first would pair (found 0, t1) and leave found 1 unmatched; the optimum pairs both
    s = score(found, truth, match_um=30.0)["cracks"]
    assert (s["tp"], s["fp"], s["fn"]) == (2, 0, 0)
    pairs = {(m["found_id"], m["truth_id"]) for m in s["matches"]}
    assert pairs == {(found["cracks"][0]["id"], t2["id"]), (found["cracks"][1]["id"], t1["id"])}


def test_invalid_documents_are_refused():
    truth = _truth()
    bad = copy.deepcopy(truth)
    del bad["cracks"][0]["depth_um"]
    with pytest.raises(InputError, match=r"cracks\[0\]"):
        score(bad, truth)
    with pytest.raises(ValueError, match="match_um"):
        score(truth, truth, match_um=0)

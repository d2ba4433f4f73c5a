"""Atomic writes and the shipped defect-export schema (JSON Schema draft 2020-12)."""

import copy
import json
import os

import jsonschema
import pytest

from pipeline import runfolder as rf
from pipeline.errors import InputError


def minimal_defects():
    plane = {
        "normal": [0.0, 1.0, 0.0],
        "inclination_deg": 90.0,
        "azimuth_deg": 0.0,
        "nearest_hkl": [1, -1, 0],
        "misfit_deg": 0.5,
        "fit_rms_um": 1.0,
    }
    return {
        "schema_version": 1,
        "software": {"name": "crackstack", "version": "0.1.0"},
        "wafer": {
            "diameter_mm": 300.0,
            "thickness_um": 775.0,
            "crystal": {"z_uvw": [0, 0, 1], "x_uvw": [1, 1, 0]},
            "center_xy_mm": None,
        },
        "acquisition": {
            "energy_keV": 17.479,
            "reflection": [2, 2, 0],
            "geometry": "transmission",
            "voxel_um": [6.8, 2.5, 10.0],
        },
        "cracks": [
            {
                "id": 1,
                "kind": "edge",
                "centroid_um": [10.0, 20.0, 300.0],
                "position": {"r_mm": 149.9, "angle_deg": 0.0, "distance_to_edge_um": 50.0},
                "depth_um": 120.0,
                "length_um": 775.0,
                "thickness_span_um": [0.0, 775.0],
                "front": {
                    "a_um": 120.0,
                    "c_um": 387.5,
                    "aspect": 0.31,
                    "points_um": [[1.0, 2.0, 3.0]],
                    "fit_rms_um": 2.0,
                },
                "plane": plane,
                "uncertainty": {"depth_um": 3.0, "length_um": 5.0, "inclination_deg": 0.5},
                "review": {"status": "unreviewed", "note": ""},
            }
        ],
        "dislocation_loops": [
            {
                "id": 2,
                "center_um": [1.0, 2.0, 3.0],
                "diameter_um": 40.0,
                "plane": plane,
                "meets_surface": False,
            }
        ],
        "slip_bands": [],
    }


def test_schema_is_valid_draft_2020_12():
    jsonschema.Draft202012Validator.check_schema(rf.defects_schema())


def test_valid_document_passes_and_round_trips(tmp_path):
    doc = minimal_defects()
    p = rf.write_defects(tmp_path / "defects.json", doc)
    assert rf.read_defects(p) == doc


@pytest.mark.parametrize(
    ("mutate", "path_words"),
    [
        (lambda d: d["cracks"][0].__setitem__("depth_um", "deep"), "cracks[0].depth_um"),
        (lambda d: d["cracks"][0].pop("plane"), "cracks[0]"),
        (lambda d: d["cracks"][0].__setitem__("kind", "corner"), "cracks[0].kind"),
        (lambda d: d.pop("wafer"), "wafer"),
        (
            lambda d: d["dislocation_loops"][0].__setitem__("meets_surface", "no"),
            "dislocation_loops[0].meets_surface",
        ),
    ],
)
def test_bad_documents_name_the_key_path(tmp_path, mutate, path_words):
    doc = copy.deepcopy(minimal_defects())
    mutate(doc)
    p = tmp_path / "defects.json"
    p.write_text(json.dumps(doc))
    with pytest.raises(InputError) as exc:
        rf.read_defects(p)
    assert path_words in str(exc.value)


def test_corrupt_json_is_input_error(tmp_path):
    p = tmp_path / "defects.json"
    p.write_text('{"schema_version": 1,')
    with pytest.raises(InputError, match="not valid JSON"):
        rf.read_defects(p)


def test_atomic_write_keeps_old_file_on_failure(tmp_path):
    p = tmp_path / "x.json"
    rf.write_json_atomic(p, {"a": 1})
    with pytest.raises(TypeError):
        rf.write_json_atomic(p, {"a": object()})
    assert json.loads(p.read_text()) == {"a": 1}
    assert [f for f in os.listdir(tmp_path) if f != "x.json"] == []

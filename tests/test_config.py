"""Acquisition and run-configuration models (SPEC section 4): parsing, did-you-mean, ranges.

The diamond-lattice reflection rule is checked against International Tables for
Crystallography Vol. A (space group Fd-3m: hkl all odd, or all even with h + k + l = 4n) and
against xraylib's structure factor, which is zero for forbidden reflections.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
import xraylib
import yaml
from conftest import BASE_ACQUISITION, deep_merge

from pipeline.config import (
    Acquisition,
    RunConfig,
    diamond_allowed,
    load_acquisition,
    load_run_config,
    read_yaml_mapping,
    validate_model,
)
from pipeline.errors import InputError


def _validate(overrides: dict) -> Acquisition:
    return validate_model(Acquisition, deep_merge(BASE_ACQUISITION, overrides), "acq.yaml")


def test_valid_acquisition_parses(tmp_path, write_acquisition):
    path = write_acquisition(
        tmp_path,
        {
            "sample": {"crystal": {"z_uvw": [0, 0, 1], "x_uvw": [1, -1, 0]}},
            "frames": {"monitor": [1.0, 2.0]},
        },
    )
    acq, base = load_acquisition(path)
    assert base == tmp_path.resolve()
    assert acq.sample.thickness_um == 100.0
    assert acq.beam.reflection == (2, 2, 0)
    assert acq.beam.wavelength == pytest.approx(12.3984198 / 17.479)
    assert acq.detector.orientation.transpose is False
    np.testing.assert_allclose(acq.scan.positions(3), [0, 10, 20])
    assert acq.sample.crystal.x_uvw == (1, -1, 0)


def test_defaults_fill_optional_sections():
    acq = validate_model(
        Acquisition, {"beam": {"wavelength_A": 0.7093}, "scan": {"step_um": 5}}, "a"
    )
    assert acq.sample.material == "Si" and acq.sample.thickness_um == 775.0
    assert acq.beam.energy == pytest.approx(12.3984198 / 0.7093)
    assert acq.frames.pattern == "frame_*.tif"


@pytest.mark.parametrize(
    "overrides, key, suggestion",
    [
        ({"sample": {"thicknes_um": 700}}, "sample.thicknes_um", "thickness_um"),
        ({"bean": {}}, "bean", "beam"),
        (
            {"detector": {"orientation": {"transpos": True}}},
            "detector.orientation.transpos",
            "transpose",
        ),
        ({"scan": {"step": 5}}, "scan.step", "step_um"),
    ],
)
def test_misspelt_key_gets_did_you_mean(overrides, key, suggestion):
    with pytest.raises(InputError) as info:
        _validate(overrides)
    msg = str(info.value)
    assert msg.startswith(f"acq.yaml: {key}: unknown key")
    assert f"did you mean '{suggestion}'?" in msg
    assert len(msg.splitlines()) == 1


def _nan_positions():
    return {"scan": {"step_um": None, "positions_um": [0.0, math.nan, 2.0]}}


# Each range check of the models: (overrides, words the message must contain).
RANGE_CASES = [
    ({"sample": {"thickness_um": -775}}, ["sample.thickness_um", "greater than 0"]),
    ({"sample": {"thickness_um": 0}}, ["sample.thickness_um", "greater than 0"]),
    ({"sample": {"thickness_um": 1e5}}, ["sample.thickness_um", "less than or equal to 5000"]),
    ({"sample": {"diameter_mm": 0}}, ["sample.diameter_mm", "greater than 0"]),
    ({"sample": {"lattice_A": -1}}, ["sample.lattice_A", "greater than 0"]),
    ({"sample": {"material": "Ge"}}, ["sample.material", "'Si'"]),
    (
        {"sample": {"crystal": {"z_uvw": [0, 0, 1], "x_uvw": [1, 0, 1]}}},
        ["sample.crystal", "not perpendicular", "dot product must be 0"],
    ),
    (
        {"sample": {"crystal": {"z_uvw": [0, 0, 0], "x_uvw": [1, 0, 0]}}},
        ["sample.crystal", "non-zero"],
    ),
    ({"beam": {"energy_keV": -1}}, ["beam.energy_keV", "greater than 0"]),
    (
        {"beam": {"energy_keV": 17.479, "wavelength_A": 0.7}},
        ["beam", "exactly one of energy_keV or wavelength_A"],
    ),
    ({"beam": {"energy_keV": None}}, ["beam", "exactly one of energy_keV or wavelength_A"]),
    ({"beam": {"reflection": [1, 0, 0]}}, ["beam.reflection", "forbidden", "all odd"]),
    ({"beam": {"reflection": [2, 0, 0]}}, ["beam.reflection", "forbidden"]),
    ({"beam": {"reflection": [2, 2, 2]}}, ["beam.reflection", "forbidden"]),
    (
        {"beam": {"energy_keV": 3.0}},
        ["energy 3.000 keV is below the cut-off", "use energy_keV > 3.228"],
    ),
    ({"beam": {"geometry": "laue"}}, ["beam.geometry", "'transmission' or 'reflection'"]),
    ({"beam": {"geometry": "reflection"}}, ["beam", "incidence_deg (psi0) is required"]),
    ({"beam": {"incidence_deg": 95}}, ["beam.incidence_deg", "less than 90"]),
    ({"beam": {"exit_deg": -200}}, ["beam.exit_deg", "greater than -180"]),
    ({"beam": {"slit_width_um": 0}}, ["beam.slit_width_um", "greater than 0"]),
    ({"detector": {"pixel_um": [0, 2.5]}}, ["detector.pixel_um.0", "greater than 0"]),
    ({"detector": {"pixel_um": [2.5, -1]}}, ["detector.pixel_um.1", "greater than 0"]),
    ({"detector": {"tilt_deg": 85}}, ["detector.tilt_deg", "less than 80"]),
    ({"detector": {"depth_magnification": 0}}, ["detector.depth_magnification", "greater than 0"]),
    ({"scan": {"step_um": -10}}, ["scan", "step_um must be > 0"]),
    ({"scan": {"step_um": 0}}, ["scan", "step_um must be > 0"]),
    ({"scan": {"step_um": None}}, ["scan", "exactly one of step_um or positions_um"]),
    ({"scan": {"positions_um": [0, 1]}}, ["scan", "exactly one of step_um or positions_um"]),
    (
        {"scan": {"step_um": None, "positions_um": [0, 10, 10, 30]}},
        ["scan", "strictly monotonic", "index 2", "10.0 -> 10.0"],
    ),
    (
        {"scan": {"step_um": None, "positions_um": [0, 10, 30, 20]}},
        ["scan", "strictly monotonic", "index 3", "30.0 -> 20.0"],
    ),
    ({"scan": {"step_um": None, "positions_um": [5]}}, ["scan", "at least 2 finite"]),
    (_nan_positions(), ["scan", "at least 2 finite"]),
    (
        {"frames": {"pattern": "a_*.tif", "hdf5": {"file": "a.h5", "dataset": "/d"}}},
        ["frames", "either pattern or hdf5"],
    ),
    ({"frames": {"hdf5": {"file": "a.h5"}}}, ["frames.hdf5.dataset", "Field required"]),
]


@pytest.mark.parametrize(
    "overrides, words", RANGE_CASES, ids=[str(i) for i in range(len(RANGE_CASES))]
)
def test_range_checks(overrides, words):
    with pytest.raises(InputError) as info:
        _validate(overrides)
    msg = str(info.value)
    assert msg.startswith("acq.yaml: ")
    for w in words:
        assert w in msg, (w, msg)
    assert len(msg.splitlines()) <= 2


def test_strictly_decreasing_positions_are_accepted():
    acq = _validate({"scan": {"step_um": None, "positions_um": [30.0, 20.0, 5.0]}})
    np.testing.assert_array_equal(acq.scan.positions(3), [30.0, 20.0, 5.0])


def test_energy_just_above_cutoff_is_accepted():
    # Si 220 cut-off: E = hc / (2 d) = 12.3984198 / (2 * 1.920156) = 3.2285 keV.
    _validate({"beam": {"energy_keV": 3.23}})


def test_positions_count_mismatch():
    acq = _validate({"scan": {"step_um": None, "positions_um": [0.0, 1.0, 2.0]}})
    with pytest.raises(InputError, match="has 3 values but 5 frames"):
        acq.scan.positions(5)


def test_diamond_rule_matches_xraylib_structure_factor():
    # xraylib's structure factor of Si (from its own atom positions) vanishes exactly for the
    # reflections the Fd-3m rule forbids (ITC Vol. A), over every hkl with |h|,|k|,|l| <= 4.
    crystal = xraylib.Crystal_GetCrystal("Si")
    wrong = []
    for hkl in itertools.product(range(-4, 5), repeat=3):
        if not any(hkl):
            continue
        F = xraylib.Crystal_F_H_StructureFactor(crystal, 17.479, *hkl, 1.0, 1.0)
        if diamond_allowed(hkl) != (abs(F) > 1e-6):
            wrong.append((hkl, F))
    assert not wrong
    assert diamond_allowed((2, 2, 0)) and not diamond_allowed((1, 0, 0))


# --- YAML reading -----------------------------------------------------------------------------


def test_yaml_not_a_mapping(tmp_path):
    p = tmp_path / "acq.yaml"
    p.write_text("- 1\n- 2\n")
    with pytest.raises(InputError, match="top level must be a mapping of keys"):
        read_yaml_mapping(p, "acquisition file")


def test_invalid_yaml_names_the_line(tmp_path):
    p = tmp_path / "acq.yaml"
    p.write_text("beam:\n  energy_keV: 17\n scan: [\n")
    with pytest.raises(InputError, match=r"acq.yaml: line \d+: not valid YAML"):
        read_yaml_mapping(p)


def test_missing_yaml_file(tmp_path):
    with pytest.raises(InputError, match="acquisition file not found"):
        load_acquisition(tmp_path / "nope.yaml")


# --- run configuration ------------------------------------------------------------------------


def test_run_config_defaults_and_file(tmp_path):
    assert load_run_config(None) == RunConfig()
    p = tmp_path / "run.yaml"
    p.write_text(yaml.safe_dump({"segment": {"sheet_sigmas_um": [3.0]}, "compute": {"workers": 4}}))
    cfg = load_run_config(p)
    assert cfg.segment.sheet_sigmas_um == [3.0]
    assert cfg.compute.workers == 4
    assert cfg.registration == RunConfig().registration


@pytest.mark.parametrize(
    "data, words",
    [
        ({"segmnt": {}}, ["segmnt", "did you mean 'segment'?"]),
        (
            {"registration": {"upsample": 5}},
            ["registration.upsample", "did you mean 'upsample_factor'?"],
        ),
        (
            {"correct": {"hot_pixel_window": 1}},
            ["correct.hot_pixel_window", "greater than or equal to 3"],
        ),
        (
            {"registration": {"min_quality": 1.5}},
            ["registration.min_quality", "less than or equal to 1"],
        ),
        ({"reconstruct": {"levels": 2}}, ["reconstruct.levels", "greater than or equal to 3"]),
        ({"segment": {"sheet_sigmas_um": [0.0]}}, ["segment.sheet_sigmas_um.0", "greater than 0"]),
        ({"compute": {"scheduler": "mpi"}}, ["compute.scheduler", "'threads'"]),
        ({"compute": {"workers": 0}}, ["compute.workers", "greater than or equal to 1"]),
    ],
)
def test_run_config_errors(tmp_path, data, words):
    p = tmp_path / "run.yaml"
    p.write_text(yaml.safe_dump(data))
    with pytest.raises(InputError) as info:
        load_run_config(p)
    for w in words:
        assert w in str(info.value), (w, str(info.value))

"""Bad inputs through the real CLI: ``crackstack check`` must exit 2 with a one- or two-line
message naming the file / frame index / key and what is accepted, and no traceback (SPEC
section 9). Every case builds a tiny invented acquisition (4 frames of 16 x 32) in tmp_path.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import h5py
import numpy as np
import pytest
import tifffile
from typer.testing import CliRunner

from pipeline.cli import app

runner = CliRunner()


def check(path: Path):
    return runner.invoke(app, ["check", str(path)])


def assert_bad_input(result, words: list[str]) -> None:
    out = result.output
    assert result.exit_code == 2, out
    assert "Traceback" not in out
    lines = [ln for ln in out.splitlines() if ln.strip()]
    assert 1 <= len(lines) <= 2, out
    assert lines[0].startswith("error: "), out
    for w in words:
        assert w in out, (w, out)


# Each case: (tmp folder, write_acquisition, write_tiff_frames) -> path of acquisition.yaml.
Case = Callable[[Path, Callable, Callable], Path]


def missing_folder(d, acq, frames):
    return acq(d, {"frames": {"pattern": "scans/frame_*.tif"}})


def no_frames_matching(d, acq, frames):
    frames(d, name="img_{:04d}.tif")
    return acq(d)


def mixed_shapes(d, acq, frames):
    frames(d)
    tifffile.imwrite(d / "frame_0002.tif", np.zeros((16, 30), np.uint16))
    return acq(d)


def mixed_dtypes(d, acq, frames):
    frames(d)
    tifffile.imwrite(d / "frame_0003.tif", np.zeros((16, 32), np.float32))
    return acq(d)


def truncated_tiff(d, acq, frames):
    frames(d)
    p = d / "frame_0001.tif"
    p.write_bytes(p.read_bytes()[:-200])
    return acq(d)


def zero_byte_file(d, acq, frames):
    frames(d)
    (d / "frame_0002.tif").write_bytes(b"")
    return acq(d)


def not_a_tiff(d, acq, frames):
    frames(d)
    (d / "frame_0001.tif").write_bytes(b"PNG? no, just text pretending to be an image")
    return acq(d)


def colour_tiff(d, acq, frames):
    frames(d)
    tifffile.imwrite(d / "frame_0000.tif", np.zeros((16, 32, 3), np.uint8))
    return acq(d)


def duplicate_frame_numbers(d, acq, frames):
    frames(d, name="frame_{}.tif")
    tifffile.imwrite(d / "frame_01.tif", np.zeros((16, 32), np.uint16))
    return acq(d)


def non_monotonic_positions(d, acq, frames):
    frames(d)
    return acq(d, {"scan": {"step_um": None, "positions_um": [0.0, 10.0, 5.0, 20.0]}})


def positions_count(d, acq, frames):
    frames(d)
    return acq(d, {"scan": {"step_um": None, "positions_um": [0.0, 10.0, 20.0]}})


def forbidden_reflection(d, acq, frames):
    frames(d)
    return acq(d, {"beam": {"reflection": [1, 0, 0]}})


def energy_below_cutoff(d, acq, frames):
    frames(d)
    return acq(d, {"beam": {"energy_keV": 3.0}})


def x_not_perpendicular(d, acq, frames):
    frames(d)
    return acq(d, {"sample": {"crystal": {"z_uvw": [0, 0, 1], "x_uvw": [1, 1, 1]}}})


def negative_thickness(d, acq, frames):
    frames(d)
    return acq(d, {"sample": {"thickness_um": -775}})


def misspelt_key(d, acq, frames):
    frames(d)
    return acq(d, {"sample": {"thicknes_um": 775}}, drop=("sample.thickness_um",))


def reflection_without_incidence(d, acq, frames):
    frames(d)
    return acq(d, {"beam": {"geometry": "reflection", "reflection": [0, 0, 4]}})


def nan_in_monitor_list(d, acq, frames):
    frames(d)
    return acq(d, {"frames": {"monitor": [1.0, 1.1, float("nan"), 1.0]}})


def nan_in_monitor_csv(d, acq, frames):
    frames(d)
    (d / "monitor.csv").write_text("monitor\n1.0\nnan\n1.2\n1.1\n")
    return acq(d, {"frames": {"monitor": "monitor.csv"}})


def negative_monitor(d, acq, frames):
    frames(d)
    return acq(d, {"frames": {"monitor": [1.0, -5.0, 1.0, 1.0]}})


def monitor_count(d, acq, frames):
    frames(d)
    (d / "monitor.csv").write_text("1.0\n1.1\n1.2\n")
    return acq(d, {"frames": {"monitor": "monitor.csv"}})


def monitor_not_a_number(d, acq, frames):
    frames(d)
    (d / "monitor.csv").write_text("1.0\nabc\n1.2\n1.3\n")
    return acq(d, {"frames": {"monitor": "monitor.csv"}})


def _hdf5(d: Path, shape=(4, 16, 32)) -> None:
    with h5py.File(d / "scan.h5", "w") as f:
        f.create_dataset("entry/data", data=np.zeros(shape, np.uint16))


def hdf5_dataset_missing(d, acq, frames):
    _hdf5(d)
    return acq(
        d, {"frames": {"pattern": None, "hdf5": {"file": "scan.h5", "dataset": "/entry/dat"}}}
    )


def hdf5_file_missing(d, acq, frames):
    return acq(
        d, {"frames": {"pattern": None, "hdf5": {"file": "scan.h5", "dataset": "/entry/data"}}}
    )


def hdf5_not_3d(d, acq, frames):
    _hdf5(d, shape=(16, 32))
    return acq(
        d, {"frames": {"pattern": None, "hdf5": {"file": "scan.h5", "dataset": "/entry/data"}}}
    )


def hdf5_not_hdf5(d, acq, frames):
    (d / "scan.h5").write_text("not hdf5")
    return acq(
        d, {"frames": {"pattern": None, "hdf5": {"file": "scan.h5", "dataset": "/entry/data"}}}
    )


def dark_shape_mismatch(d, acq, frames):
    frames(d)
    tifffile.imwrite(d / "dark.tif", np.zeros((16, 30), np.uint16))
    return acq(d, {"frames": {"dark": "dark.tif"}})


def flat_missing(d, acq, frames):
    frames(d)
    return acq(d, {"frames": {"flat": "flat.tif"}})


def dark_hdf5_dataset_missing(d, acq, frames):
    frames(d)
    _hdf5(d)
    return acq(d, {"frames": {"dark": "scan.h5:/entry/dark"}})


def yaml_not_a_mapping(d, acq, frames):
    return acq(d, text="- beam\n- scan\n")


def yaml_syntax_error(d, acq, frames):
    return acq(d, text="beam:\n  energy_keV: 17.479\n scan: {step_um: 10\n")


def acquisition_missing(d, acq, frames):
    return d / "acquisition.yaml"


CASES: list[tuple[Case, list[str]]] = [
    (missing_folder, ["frames.pattern", "folder scans not found", "accepted:"]),
    (
        no_frames_matching,
        ["frames.pattern", "no file matches 'frame_*.tif'", "img_0000.tif", "accepted:"],
    ),
    (mixed_shapes, ["frame_0002.tif (frame 2)", "16x30", "frame_0000.tif (16x32)", "one shape"]),
    (mixed_dtypes, ["frame_0003.tif (frame 3)", "float32", "uint16", "one data type"]),
    (truncated_tiff, ["frame_0001.tif (frame 1)", "truncated", "re-copy"]),
    (zero_byte_file, ["frame_0002.tif (frame 2)", "empty file (0 bytes)", "complete TIFF"]),
    (not_a_tiff, ["frame_0001.tif (frame 1)", "not a readable TIFF", "expected a TIFF"]),
    (colour_tiff, ["frame_0000.tif (frame 0)", "colour image", "single-channel"]),
    (
        duplicate_frame_numbers,
        ["frame number 1 appears twice", "frame_1.tif", "frame_01.tif", "unique"],
    ),
    (
        non_monotonic_positions,
        ["scan", "positions_um must be strictly monotonic", "index 2", "10.0 -> 5.0"],
    ),
    (positions_count, ["scan.positions_um has 3 values but 4 frames", "one position per frame"]),
    (forbidden_reflection, ["beam.reflection", "[1, 0, 0] is forbidden", "allowed: all odd"]),
    (
        energy_below_cutoff,
        ["energy 3.000 keV is below the cut-off", "[2, 2, 0]", "energy_keV > 3.228"],
    ),
    (
        x_not_perpendicular,
        ["sample.crystal", "x_uvw [1, 1, 1] is not perpendicular", "dot product must be 0"],
    ),
    (negative_thickness, ["sample.thickness_um", "greater than 0", "-775"]),
    (misspelt_key, ["sample.thicknes_um", "did you mean 'thickness_um'?"]),
    (reflection_without_incidence, ["beam", "incidence_deg (psi0) is required for reflection"]),
    (
        nan_in_monitor_list,
        ["frames.monitor", "value nan for frame 2", "frames.monitor[2]", "finite and > 0"],
    ),
    (
        nan_in_monitor_csv,
        ["frames.monitor", "value nan for frame 1", "monitor.csv line 3", "finite and > 0"],
    ),
    (negative_monitor, ["frames.monitor", "value -5.0 for frame 1", "finite and > 0"]),
    (
        monitor_count,
        ["frames.monitor", "monitor.csv has 3 values but 4 frames", "one monitor value per frame"],
    ),
    (monitor_not_a_number, ["frames.monitor", "monitor.csv line 2", "'abc' is not a number"]),
    (
        hdf5_dataset_missing,
        ["frames.hdf5.dataset", "'/entry/dat' not found in scan.h5", "/entry/data"],
    ),
    (hdf5_file_missing, ["frames.hdf5.file", "scan.h5 not found"]),
    (hdf5_not_3d, ["frames.hdf5.dataset", "shape 16x32", "expected 3D (frames, rows, cols)"]),
    (hdf5_not_hdf5, ["frames.hdf5.file", "scan.h5 is not an HDF5 file"]),
    (
        dark_shape_mismatch,
        ["frames.dark", "dark.tif has shape 16x30 but the frames are 16x32", "must match"],
    ),
    (
        dark_hdf5_dataset_missing,
        ["frames.dark", "'/entry/dark' not found in scan.h5", "3D datasets there: /entry/data"],
    ),
    (flat_missing, ["frames.flat", "'flat.tif' not found"]),
    (yaml_not_a_mapping, ["acquisition.yaml", "top level must be a mapping", "got a list"]),
    (yaml_syntax_error, ["acquisition.yaml", "not valid YAML"]),
    (acquisition_missing, ["acquisition.yaml", "acquisition file not found"]),
]


@pytest.mark.parametrize("make, words", CASES, ids=[c[0].__name__ for c in CASES])
def test_bad_input_exits_2_with_a_short_message(
    tmp_path, write_acquisition, write_tiff_frames, make, words
):
    path = make(tmp_path, write_acquisition, write_tiff_frames)
    assert_bad_input(check(path), words)


def test_gapped_frame_numbers_warn_but_pass(tmp_path, write_acquisition, write_tiff_frames):
    # Gaps are a warning, not an error: detectors drop frames and the rest is good data
    # (pipeline.ingest's module docstring says why).
    write_tiff_frames(tmp_path, numbers=[0, 1, 2, 5])
    result = check(write_acquisition(tmp_path))
    assert result.exit_code == 0, result.output
    assert "Traceback" not in result.output
    warnings = [ln for ln in result.output.splitlines() if ln.startswith("warning: ")]
    assert len(warnings) == 1 and "2 frame number(s) missing (jumps 2 -> 5)" in warnings[0]


def test_check_summary_of_a_good_acquisition(tiff_acquisition):
    path, _ = tiff_acquisition
    result = check(path)
    assert result.exit_code == 0, result.output
    out = result.output
    assert "warning" not in out
    for key in (
        "frames",
        "shape",
        "dtype",
        "theta_B_deg",
        "psi0_deg",
        "G",
        "band_width_px",
        "voxel_um",
    ):
        assert any(ln.split()[0] == key for ln in out.splitlines() if ln.strip()), key
    frames_line = next(ln for ln in out.splitlines() if ln.startswith("frames "))
    assert frames_line.split()[-1] == "4"

"""Ingest: frame sources, order, orientation, laziness, dark / flat / monitor.

All data here are invented round-trip data: frames are written with tifffile or h5py and read
back; expected arrays come from NumPy on the written stack (an oracle outside ingest).
"""

from __future__ import annotations

import math
import pickle
import tracemalloc

import dask
import h5py
import numpy as np
import pytest
import tifffile

from pipeline.config import Orientation, load_acquisition
from pipeline.errors import InputError
from pipeline.ingest import describe_acquisition, natural_key, open_series, orient_image


def _open(path):
    acq, base = load_acquisition(path)
    return open_series(acq, base)


# --- order ------------------------------------------------------------------------------------


def test_natural_key_orders_digit_groups_by_value():
    names = ["frame_10.tif", "frame_2.tif", "frame_1.tif", "frame_100.tif", "frame_11.tif"]
    assert sorted(names, key=natural_key) == [
        "frame_1.tif",
        "frame_2.tif",
        "frame_10.tif",
        "frame_11.tif",
        "frame_100.tif",
    ]


def test_folder_series_is_read_in_natural_order(tmp_path, write_acquisition):
    # Unpadded numbers: plain string sorting would give 1, 10, 2, 3.
    for n in (1, 2, 3, 10):
        tifffile.imwrite(tmp_path / f"frame_{n}.tif", np.full((16, 32), n, np.uint16))
    series = _open(write_acquisition(tmp_path))
    assert series.kind == "tiff_files"
    assert series.sources == ["frame_1.tif", "frame_2.tif", "frame_3.tif", "frame_10.tif"]
    np.testing.assert_array_equal(series.frames[:, 0, 0].compute(), [1, 2, 3, 10])


def test_folder_series_round_trip(tiff_acquisition):
    path, stack = tiff_acquisition
    series = _open(path)
    assert series.frames.shape == stack.shape
    assert series.frames.dtype == stack.dtype
    assert series.frames.chunksize == (1, 16, 32)
    np.testing.assert_array_equal(series.frames.compute(), stack)
    np.testing.assert_allclose(series.positions_um, [0, 10, 20, 30])
    assert series.dark is None and series.flat is None and series.monitor is None
    assert series.warnings == ()


def test_pattern_naming_a_folder_takes_every_tiff(tmp_path, write_acquisition, write_tiff_frames):
    stack = write_tiff_frames(tmp_path / "raw", n=3)
    series = _open(write_acquisition(tmp_path, {"frames": {"pattern": "raw"}}))
    np.testing.assert_array_equal(series.frames.compute(), stack)
    assert series.sources[0] == "raw/frame_0000.tif"


# --- multi-page TIFF and HDF5 ---------------------------------------------------------------


def test_multipage_tiff(tmp_path, write_acquisition):
    stack = np.random.default_rng(1).integers(0, 4000, (5, 16, 32), dtype=np.uint16)
    tifffile.imwrite(tmp_path / "scan.tif", stack, photometric="minisblack")
    series = _open(write_acquisition(tmp_path, {"frames": {"pattern": "scan.tif"}}))
    assert series.kind == "multipage_tiff"
    assert series.sources == [f"scan.tif[{k}]" for k in range(5)]
    np.testing.assert_array_equal(series.frames.compute(), stack)


def test_several_multipage_files_are_concatenated(tmp_path, write_acquisition):
    stack = np.random.default_rng(2).integers(0, 4000, (6, 16, 32), dtype=np.uint16)
    tifffile.imwrite(tmp_path / "part_1.tif", stack[:4], photometric="minisblack")
    tifffile.imwrite(tmp_path / "part_2.tif", stack[4:], photometric="minisblack")
    series = _open(write_acquisition(tmp_path, {"frames": {"pattern": "part_*.tif"}}))
    np.testing.assert_array_equal(series.frames.compute(), stack)
    assert series.sources[4] == "part_2.tif[0]"


def test_hdf5_dataset(tmp_path, write_acquisition):
    stack = np.random.default_rng(3).random((4, 16, 32)).astype(np.float32)
    with h5py.File(tmp_path / "scan.h5", "w") as f:
        f.create_dataset("entry/data", data=stack, chunks=(1, 16, 32))
    path = write_acquisition(
        tmp_path,
        {"frames": {"pattern": None, "hdf5": {"file": "scan.h5", "dataset": "/entry/data"}}},
    )
    series = _open(path)
    assert series.kind == "hdf5"
    assert series.frames.dtype == np.float32
    assert series.sources[2] == "scan.h5:/entry/data[2]"
    np.testing.assert_array_equal(series.frames.compute(), stack)


# --- orientation ----------------------------------------------------------------------------


@pytest.mark.parametrize("transpose", [False, True])
@pytest.mark.parametrize("flip_rows", [False, True])
@pytest.mark.parametrize("flip_columns", [False, True])
def test_orientation_is_transpose_then_flips(
    tmp_path, write_acquisition, write_tiff_frames, transpose, flip_rows, flip_columns
):
    stack = write_tiff_frames(tmp_path, n=2)
    dark = np.arange(16 * 32, dtype=np.uint16).reshape(16, 32)
    tifffile.imwrite(tmp_path / "dark.tif", dark)
    orient = {"transpose": transpose, "flip_rows": flip_rows, "flip_columns": flip_columns}
    path = write_acquisition(
        tmp_path, {"detector": {"orientation": orient}, "frames": {"dark": "dark.tif"}}
    )
    series = _open(path)
    # Oracle: NumPy's own axis operations applied in the documented order.
    expected, expected_dark = stack, dark[None]
    if transpose:
        expected, expected_dark = expected.transpose(0, 2, 1), expected_dark.transpose(0, 2, 1)
    if flip_rows:
        expected, expected_dark = np.flip(expected, 1), np.flip(expected_dark, 1)
    if flip_columns:
        expected, expected_dark = np.flip(expected, 2), np.flip(expected_dark, 2)
    assert series.frames.shape == expected.shape
    assert series.frames.chunksize == (1, *expected.shape[1:])
    np.testing.assert_array_equal(series.frames.compute(), expected)
    np.testing.assert_array_equal(series.dark, expected_dark[0].astype(np.float32))


def test_orientation_moves_a_known_pixel():
    # Raw pixel (row 1, column 5) of a 3 x 7 image; after transpose it is at (5, 1), and
    # flipping the 7 rows then puts it at (6 - 5, 1) = (1, 1).
    img = np.zeros((3, 7), int)
    img[1, 5] = 9
    out = orient_image(img, Orientation(transpose=True, flip_rows=True))
    assert out.shape == (7, 3)
    assert out[1, 1] == 9 and out.sum() == 9


# --- laziness -------------------------------------------------------------------------------


@pytest.fixture
def count_tiff_reads(monkeypatch):
    """Count every page of TIFF pixel data decoded (tifffile's TiffPage.asarray)."""
    calls = []
    real = tifffile.TiffPage.asarray

    def counting(self, *args, **kwargs):
        calls.append(self.index)
        return real(self, *args, **kwargs)

    monkeypatch.setattr(tifffile.TiffPage, "asarray", counting)
    return calls


@pytest.mark.parametrize("layout", ["folder", "multipage"])
def test_opening_reads_headers_only_and_each_frame_once(
    tmp_path, write_acquisition, count_tiff_reads, layout
):
    stack = np.random.default_rng(4).integers(0, 4000, (6, 16, 32), dtype=np.uint16)
    if layout == "folder":
        for k, img in enumerate(stack):
            tifffile.imwrite(tmp_path / f"frame_{k:04d}.tif", img)
        path = write_acquisition(tmp_path)
    else:
        tifffile.imwrite(tmp_path / "scan.tif", stack, photometric="minisblack")
        path = write_acquisition(tmp_path, {"frames": {"pattern": "scan.tif"}})
    series = _open(path)
    assert count_tiff_reads == [], "opening the series decoded pixel data"
    describe_acquisition(path)
    assert count_tiff_reads == [], "check decoded pixel data"
    np.testing.assert_array_equal(series.frames[3].compute(), stack[3])
    assert len(count_tiff_reads) == 1
    count_tiff_reads.clear()
    total = series.frames.astype(np.int64).sum(axis=(1, 2)).compute(scheduler="threads")
    np.testing.assert_array_equal(total, stack.astype(np.int64).sum(axis=(1, 2)))
    assert len(count_tiff_reads) == 6, "a frame was read more than once (or not at all)"


def test_graph_holds_one_task_per_frame(tiff_acquisition):
    path, stack = tiff_acquisition
    frames = _open(path).frames
    assert len(dict(frames.__dask_graph__())) == stack.shape[0]


def test_thousand_frames_of_2048_squared_open_without_loading(tmp_path, write_acquisition):
    # 1,000 x 2048 x 2048 uint16 = 8.4 GB as an HDF5 dataset with unallocated chunks (the
    # file stays a few kB); opening must not touch pixel data, and one frame costs one frame.
    with h5py.File(tmp_path / "big.h5", "w") as f:
        f.create_dataset("data", shape=(1000, 2048, 2048), dtype="uint16", chunks=(1, 2048, 2048))
    path = write_acquisition(
        tmp_path, {"frames": {"pattern": None, "hdf5": {"file": "big.h5", "dataset": "data"}}}
    )
    tracemalloc.start()
    try:
        series = _open(path)
        _, peak_open = tracemalloc.get_traced_memory()
        tracemalloc.reset_peak()
        frame = series.frames[500].compute(scheduler="sync")
        _, peak_frame = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert series.frames.shape == (1000, 2048, 2048)
    assert series.frames.nbytes == 1000 * 2048 * 2048 * 2
    # The task graph carries file references, not pixels: 1,000 tasks pickle to well under
    # 1 MB (the data are 8.4 GB).
    graph = dict(series.frames.__dask_graph__())
    assert len(graph) == 1000
    assert len(pickle.dumps(graph)) < 1e6
    assert peak_open < 20e6, f"opening used {peak_open / 1e6:.0f} MB"
    assert frame.shape == (2048, 2048)
    # One frame is 8.4 MB; allow a copy or two, but not more frames.
    assert peak_frame < 4 * 2048 * 2048 * 2


def test_frames_compute_with_a_process_pool(tiff_acquisition):
    # Readers hold only paths, so the graph pickles to worker processes (cluster runs).
    path, stack = tiff_acquisition
    with dask.config.set(scheduler="processes", num_workers=2):
        np.testing.assert_array_equal(_open(path).frames.compute(), stack)


# --- dark, flat, monitor, positions ---------------------------------------------------------


def test_dark_and_flat_are_means_and_left_out_of_the_frames(
    tmp_path, write_acquisition, write_tiff_frames
):
    stack = write_tiff_frames(tmp_path, n=3, name="img_{:04d}.tif")
    rng = np.random.default_rng(5)
    darks = rng.integers(90, 110, (2, 16, 32)).astype(np.uint16)
    flats = rng.integers(900, 1100, (3, 16, 32)).astype(np.uint16)
    tifffile.imwrite(tmp_path / "dark_a.tif", darks[0])
    tifffile.imwrite(tmp_path / "dark_b.tif", darks[1])
    tifffile.imwrite(tmp_path / "flat.tif", flats, photometric="minisblack")
    path = write_acquisition(
        tmp_path, {"frames": {"pattern": "*.tif", "dark": "dark_*.tif", "flat": "flat.tif"}}
    )
    series = _open(path)
    np.testing.assert_array_equal(series.frames.compute(), stack)
    assert series.dark.dtype == np.float32 and series.flat.dtype == np.float32
    np.testing.assert_allclose(series.dark, darks.mean(axis=0), rtol=1e-6)
    np.testing.assert_allclose(series.flat, flats.mean(axis=0), rtol=1e-6)
    assert any("dark/flat" in w for w in series.warnings)


def test_dark_from_hdf5(tmp_path, write_acquisition, write_tiff_frames):
    write_tiff_frames(tmp_path, n=2)
    darks = np.random.default_rng(6).random((3, 16, 32))
    with h5py.File(tmp_path / "cal.h5", "w") as f:
        f["entry/dark"] = darks
    series = _open(write_acquisition(tmp_path, {"frames": {"dark": "cal.h5:/entry/dark"}}))
    np.testing.assert_allclose(series.dark, darks.mean(axis=0), rtol=1e-6)


@pytest.mark.parametrize(
    "csv_text",
    [
        "1.0\n2.5\n3.0\n4.0\n",
        "monitor\n1.0\n2.5\n3.0\n4.0\n",
        "frame,monitor\n0,1.0\n1,2.5\n2,3.0\n3,4.0\n",
        "# ring current\n1.0\n\n2.5\n3.0\n4.0\n",
    ],
    ids=["plain", "header", "two-columns", "comment-and-blank"],
)
def test_monitor_from_csv(tiff_acquisition, write_acquisition, csv_text):
    path, _ = tiff_acquisition
    (path.parent / "monitor.csv").write_text(csv_text)
    series = _open(write_acquisition(path.parent, {"frames": {"monitor": "monitor.csv"}}))
    assert series.monitor.dtype == np.float64
    np.testing.assert_array_equal(series.monitor, [1.0, 2.5, 3.0, 4.0])


def test_monitor_from_hdf5(tiff_acquisition, write_acquisition):
    path, _ = tiff_acquisition
    with h5py.File(path.parent / "cal.h5", "w") as f:
        f["entry/monitor"] = np.array([1.0, 2.0, 3.0, 4.0])
    series = _open(write_acquisition(path.parent, {"frames": {"monitor": "cal.h5:/entry/monitor"}}))
    np.testing.assert_array_equal(series.monitor, [1, 2, 3, 4])


def test_monitor_from_list(tiff_acquisition, write_acquisition):
    path, _ = tiff_acquisition
    series = _open(write_acquisition(path.parent, {"frames": {"monitor": [1, 2, 3, 4]}}))
    np.testing.assert_array_equal(series.monitor, [1, 2, 3, 4])


def test_explicit_positions(tiff_acquisition, write_acquisition):
    path, _ = tiff_acquisition
    pos = [5.0, 4.0, 2.5, -1.0]  # strictly decreasing is allowed
    series = _open(write_acquisition(path.parent, {"scan": {"step_um": None, "positions_um": pos}}))
    np.testing.assert_array_equal(series.positions_um, pos)


def test_gap_in_frame_numbers_warns_and_keeps_stage_positions(
    tmp_path, write_acquisition, write_tiff_frames
):
    # Frame 3 was dropped: positions follow the numbers (frame 4 is still at 4 steps).
    write_tiff_frames(tmp_path, numbers=[0, 1, 2, 4, 5])
    series = _open(write_acquisition(tmp_path, {"scan": {"start_um": 100.0, "step_um": 10.0}}))
    assert series.n_frames == 5
    np.testing.assert_allclose(series.positions_um, [100, 110, 120, 140, 150])
    assert len(series.warnings) == 1 and "1 frame number(s) missing" in series.warnings[0]
    assert "2 -> 4" in series.warnings[0]


def test_regular_stride_of_two_is_not_a_gap(tmp_path, write_acquisition, write_tiff_frames):
    write_tiff_frames(tmp_path, numbers=[0, 2, 4, 6])
    series = _open(write_acquisition(tmp_path))
    assert series.warnings == ()
    np.testing.assert_allclose(series.positions_um, [0, 10, 20, 30])


def test_constant_digit_groups_do_not_count_as_frame_numbers(
    tmp_path, write_acquisition, write_tiff_frames
):
    # The energy tag "E17" is the last digit group but never changes; frame numbers are 0..3.
    write_tiff_frames(tmp_path, name="scan_{:03d}_E17.tif")
    series = _open(write_acquisition(tmp_path, {"frames": {"pattern": "scan_*_E17.tif"}}))
    assert series.warnings == ()


def test_positions_count_must_match(tiff_acquisition, write_acquisition):
    path, _ = tiff_acquisition
    path = write_acquisition(
        path.parent, {"scan": {"step_um": None, "positions_um": [0.0, 1.0, 2.0]}}
    )
    with pytest.raises(InputError, match=r"scan.positions_um has 3 values but 4 frames"):
        _open(path)


# --- the check summary ----------------------------------------------------------------------


def test_describe_acquisition_summary(tiff_acquisition):
    path, stack = tiff_acquisition
    info = describe_acquisition(path)
    assert info["frames"] == 4 and info["shape"] == [16, 32] and info["dtype"] == "uint16"
    # Symmetric Laue, Si 220 at 17.479 keV: theta_B = 10.644 deg (PHYSICS.md check row 3,
    # computed there from Bragg's law with the CODATA 2018 lattice parameter), psi0 = theta_B.
    assert info["theta_B_deg"] == pytest.approx(10.644, abs=0.002)
    assert info["psi0_deg"] == pytest.approx(info["theta_B_deg"])
    # G = 2 sin(theta_B) in symmetric Laue (Lang 1959; Authier 2001 ch. 5, from memory).
    G = 2 * np.sin(np.radians(10.644049))
    assert info["G"] == pytest.approx(G, rel=1e-5)
    assert info["band_width_px"] == pytest.approx(100.0 * G / 2.5, rel=1e-5)
    # Natural sampling: one column of depth (p_col / G), one row, one scan step.
    np.testing.assert_allclose(info["voxel_um"], [2.5 / G, 2.5, 10.0], rtol=1e-5)
    assert info["warnings"] == []
    assert info["positions_um"] == [0.0, 30.0]


def test_describe_warns_when_band_is_wider_than_frame(tiff_acquisition, write_acquisition):
    path, _ = tiff_acquisition
    # 775 um * G 0.3694 / 2.5 um = 114.5 columns > 32.
    info = describe_acquisition(write_acquisition(path.parent, {"sample": {"thickness_um": 775}}))
    assert any("section band is 115 px wide" in w for w in info["warnings"])


def test_describe_warns_when_G_override_is_off(tiff_acquisition, write_acquisition):
    path, _ = tiff_acquisition
    info = describe_acquisition(
        write_acquisition(path.parent, {"detector": {"depth_magnification": 0.40}})
    )
    assert info["G"] == 0.40
    assert any("differs from the computed" in w for w in info["warnings"])


def test_reader_without_ifd_offsets_reads_the_same_pages(tmp_path):
    # Files whose pages are not one IFD each (e.g. very large ImageJ stacks) are read through
    # tifffile's series API instead of a direct jump to the page's IFD.
    from pipeline.ingest import _TiffFrameReader

    stack = np.random.default_rng(7).integers(0, 4000, (3, 16, 32), dtype=np.uint16)
    tifffile.imwrite(tmp_path / "scan.tif", stack, photometric="minisblack")
    with tifffile.TiffFile(tmp_path / "scan.tif") as tif:
        offsets = [p.offset for p in tif.pages]
    orient = Orientation()
    direct = _TiffFrameReader(
        tuple((str(tmp_path / "scan.tif"), k, offsets[k]) for k in range(3)), "<u2", orient
    )
    series_api = _TiffFrameReader(
        tuple((str(tmp_path / "scan.tif"), k, None) for k in range(3)), "<u2", orient
    )
    for k in range(3):
        np.testing.assert_array_equal(direct(block_id=(k, 0, 0))[0], stack[k])
        np.testing.assert_array_equal(series_api(block_id=(k, 0, 0))[0], stack[k])


@pytest.mark.parametrize("bad", [math.inf, -math.inf, 0.0])
def test_monitor_rejects_inf_and_zero(tiff_acquisition, write_acquisition, bad):
    path, _ = tiff_acquisition
    path = write_acquisition(path.parent, {"frames": {"monitor": [1.0, 1.0, 1.0, bad]}})
    with pytest.raises(InputError, match=r"for frame 3 .*finite and > 0"):
        _open(path)

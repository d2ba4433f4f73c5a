"""Tests of pipeline.reconstruct: point defects of synthetic series land within one voxel of
their true position (transmission, tilted detector, reflection), the volume is valid OME-Zarr for
independent readers, frames are streamed, flagged frames are not used, and a run killed with
SIGKILL resumes to a byte-identical volume. The mechanics tests use small frames drawn with
:func:`pipeline.bench.render_section_series` (fast, invented)."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path
from types import SimpleNamespace

import dask.array as da
import numpy as np
import pytest
import tifffile
import yaml

from pipeline import omezarr
from pipeline.bench import PointDefect, SeriesModel, render_section_series
from pipeline.config import Acquisition, CorrectConfig, ReconstructConfig
from pipeline.correct import correct_series
from pipeline.errors import InputError
from pipeline.geometry import Geometry
from pipeline.reconstruct import reconstruct_volume
from pipeline.register import COLUMNS, write_registration_csv

sys.path.insert(0, str(Path(__file__).parent))
import _section_series as ss  # noqa: E402

TRANSMISSION = ss.TRANSMISSION
STEP_UM = 4.0
SMALL_CHUNKS = ReconstructConfig(chunk_voxels=(32, 64, 32))


def acquisition(beam: dict, *, thickness_um: float = 300.0, tilt_deg: float = 0.0, n: int = 0) -> dict:
    return {
        "sample": {"thickness_um": thickness_um}, "beam": beam,
        "detector": {"pixel_um": [2.5, 2.5], "tilt_deg": tilt_deg},
        "scan": {"start_um": 0.0, "step_um": STEP_UM},
    }


def render(acq: dict, *, n: int, rows: int, cols: int, points, absorption_um=None, seed=1):
    geom = Geometry.from_acquisition(Acquisition.model_validate(acq))
    rng = np.random.default_rng(seed)
    r0 = np.cumsum(rng.normal(0, 0.3, n))
    r0 -= r0[0]
    c0 = 24.6 + np.cumsum(rng.normal(0, 0.3, n))
    pos = STEP_UM * np.arange(n)
    model = SeriesModel(rows=rows, cols=cols, absorption_um=absorption_um,
                        points=tuple(PointDefect(*p) for p in points))
    frames = np.stack(list(render_section_series(geom, model, pos, r0, c0, seed=seed)))
    return geom, frames, pos, r0, c0


def corrected_of(frames):
    series = SimpleNamespace(frames=da.from_array(frames, chunks=(1,) + frames.shape[1:]),
                             dark=None, flat=None, monitor=None)
    return correct_series(series, CorrectConfig())


def peak_centroid(vol: np.ndarray, meta: dict, xyz, half: int = 4) -> np.ndarray:
    """Centroid (fractional voxel index z, y, x) of the part of a blob above half its peak, in
    a window around the expected position, after removing the perfect-crystal background
    (band and fringes vary with z and x only: the median over y)."""
    excess = vol - np.median(vol, axis=1, keepdims=True)
    guess = np.round(omezarr.wafer_to_voxel(np.asarray(xyz, float), meta)).astype(int)
    lo = np.maximum(guess - half, 0)
    win = excess[lo[0] : guess[0] + half + 1, lo[1] : guess[1] + half + 1, lo[2] : guess[2] + half + 1]
    w = np.clip(win.astype(float), 0, None)
    w[w < 0.5 * w.max()] = 0
    idx = np.indices(win.shape).reshape(3, -1)
    return (idx * w.ravel()).sum(axis=1) / w.sum() + lo


# --- point defects (synthetic series with known drift) --------------------------------------


@pytest.mark.parametrize("case", list(ss.CASES))
def test_point_defects_within_one_voxel(tmp_path, case):
    """Register + reconstruct a drifting synthetic series: every point defect's centroid lies
    within one voxel of its true (x, y, z) on each axis (issue 4), at the natural sampling."""
    reg = ss.registered(case)
    geom = reg.geom
    info = reconstruct_volume(reg.corrected, geom, reg.series.positions_um, reg.result.table,
                              SMALL_CHUNKS, tmp_path / "volume.ome.zarr")
    vol, meta = omezarr.open_image(tmp_path / "volume.ome.zarr")
    v = vol.compute()
    assert info["voxel_um"] == pytest.approx([geom.p_col_um / geom.G, geom.p_row_um, ss.STEP_UM])
    for pt in reg.truth["points"]:
        xyz = np.asarray(pt["xyz_um"])
        err = peak_centroid(v, meta, xyz) - omezarr.wafer_to_voxel(xyz, meta)
        assert np.all(np.abs(err) <= 1.0), (pt, err)
    # ~0 above the entrance surface; perfect-crystal level ~1 inside the wafer (transmission).
    # The surfaces stay blurred by +-w|L|/(2 G cos psi0): each column integrates the slit.
    dz = meta["voxel_um"][0]
    z0 = int(round(-meta["origin_um"][0] / dz))
    cpsi = np.cos(np.radians(geom.psi0_deg))
    blur = int(np.ceil(geom.slit_width_um / cpsi * abs(geom.L) / (2 * geom.G) / dz))
    nx = v.shape[2]
    lit = v[:, :, nx // 3 : 2 * nx // 3]  # fully scanned x
    assert z0 >= blur + 3 and abs(float(np.median(lit[: z0 - blur - 1]))) < 0.05
    if geom.geometry == "transmission":
        assert abs(float(np.median(lit[z0 + blur + 1 : -z0 - blur - 1])) - 1.0) < 0.1


# --- OME-Zarr ---------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def small_volume(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("vol")
    acq = acquisition(TRANSMISSION, thickness_um=100.0)
    geom, frames, pos, r0, c0 = render(acq, n=24, rows=40, cols=70, points=[(40.0, 50.0, 50.0)])
    table = _truth_table(pos, r0, c0)
    info = reconstruct_volume(corrected_of(frames), geom, pos, table, ReconstructConfig(chunk_voxels=(8, 16, 8)),
                              tmp / "volume.ome.zarr", extra_meta={"note": "test"})
    return tmp / "volume.ome.zarr", info, geom, (frames, pos, r0, c0)


def _truth_table(pos, r0, c0, flagged=None):
    n = pos.size
    flagged = np.zeros(n, int) if flagged is None else flagged
    return {"frame": np.arange(n), "position_um": pos, "r0_px": r0, "c0_px": c0,
            "row_shift_px": r0 - r0[0], "col_shift_px": c0 - c0[0], "quality": np.ones(n),
            "flagged": flagged, "interpolated": flagged}


def test_volume_opens_with_ome_zarr_py_and_validates(small_volume):
    """Independent clients: ome-zarr-py's reader and the ome-zarr-models v0.5 validation."""
    from ome_zarr.io import parse_url
    from ome_zarr.reader import Multiscales, Reader
    from ome_zarr_models import open_ome_zarr
    from ome_zarr_models.v05.image import Image

    path, info, geom, _ = small_volume
    nodes = list(Reader(parse_url(str(path)))())
    image = nodes[0]
    assert image.load(Multiscales) is not None
    assert len(image.data) == info["levels"] >= 3
    assert tuple(image.data[0].shape) == tuple(info["shape"])
    assert [a["name"] for a in image.metadata["axes"]] == ["z", "y", "x"]
    assert {a["unit"] for a in image.metadata["axes"]} == {"micrometer"}
    model = open_ome_zarr(str(path))
    assert isinstance(model, Image)
    meta = omezarr.read_meta(path)
    cs = meta["crackstack"]
    for key in ("voxel_um", "origin_um", "thickness_um", "geometry", "x_range_um", "y_range_um", "G_used"):
        assert key in cs, key
    assert cs["geometry"] == "transmission" and cs["note"] == "test" and cs["G_used"] == pytest.approx(geom.G)
    assert cs["x_range_um"][0] == pytest.approx(meta["origin_um"][2])
    assert meta["origin_um"][0] < 0  # z index 0 is above the entrance surface (margin)
    s0 = np.asarray(meta["levels"][0]["scale"])
    np.testing.assert_allclose(meta["levels"][2]["scale"], 4 * s0)


def test_finished_volume_left_untouched(small_volume):
    path, info, geom, (frames, pos, r0, c0) = small_volume
    before = {p: p.stat().st_mtime_ns for p in path.rglob("*") if p.is_file()}
    again = reconstruct_volume(corrected_of(frames), geom, pos, _truth_table(pos, r0, c0),
                               ReconstructConfig(chunk_voxels=(8, 16, 8)), path, extra_meta={"note": "test"})
    assert again["blocks_written"] == 0 and again["blocks_skipped"] == info["blocks_total"]
    assert {p: p.stat().st_mtime_ns for p in path.rglob("*") if p.is_file()} == before


def test_scan_direction_does_not_matter(small_volume, tmp_path):
    """The same frames recorded in the opposite order (stage stepping toward -x) give the same
    volume: the geometry is in the positions, not in the frame order."""
    path, info, geom, (frames, pos, r0, c0) = small_volume
    rev = reconstruct_volume(corrected_of(frames[::-1].copy()), geom, pos[::-1].copy(),
                             _truth_table(pos[::-1].copy(), r0[::-1].copy(), c0[::-1].copy()),
                             ReconstructConfig(chunk_voxels=(8, 16, 8)), tmp_path / "rev.ome.zarr")
    assert rev["shape"] == info["shape"] and rev["origin_um"] == pytest.approx(info["origin_um"])
    a, _ = omezarr.open_image(path)
    b, _ = omezarr.open_image(tmp_path / "rev.ome.zarr")
    np.testing.assert_allclose(b.compute(), a.compute(), atol=1e-6)


def _counted_series(frames: np.ndarray, reads: list) -> SimpleNamespace:
    """A series of ``frames`` (one Dask chunk per frame) that appends each frame index it reads
    to ``reads``."""

    def counting(block, block_info=None):
        reads.append(block_info[0]["chunk-location"][0])
        return block

    return SimpleNamespace(
        frames=da.from_array(frames, chunks=(1,) + frames.shape[1:]).map_blocks(counting, dtype=frames.dtype),
        dark=None, flat=None, monitor=None,
    )


def test_frames_are_streamed_and_flagged_frames_unused(tmp_path):
    """Each slab reads only the frames it needs (no frame is read by more than two slabs), and
    a flagged frame with garbage never enters the volume."""
    acq = acquisition(TRANSMISSION, thickness_um=100.0)
    geom, frames, pos, r0, c0 = render(acq, n=40, rows=24, cols=64, points=[])
    frames[20] = 60000  # garbage, flagged by registration
    flagged = np.zeros(40, int)
    flagged[20] = 1
    reads = []
    corrected = correct_series(_counted_series(frames, reads), CorrectConfig(), band_level=1000.0)
    info = reconstruct_volume(corrected, geom, pos, _truth_table(pos, r0, c0, flagged),
                              ReconstructConfig(chunk_voxels=(8, 8, 16)), tmp_path / "v.ome.zarr")
    counts = np.bincount(reads, minlength=40)
    # slab width 16 steps (64 um) exceeds the shear t tan(psi0) = 19 um plus two steps
    assert counts.max() <= 2 and counts[20] == 0
    assert info["frames_excluded"] == [20] and info["blocks_total"] >= 3
    v, _ = omezarr.open_image(tmp_path / "v.ome.zarr")
    assert float(v.max().compute()) < 3.0


def test_frames_read_once_per_task(tmp_path):
    """With one worker the slabs run as one task that keeps the frames neighbouring slabs share
    (the shear makes them overlap): every frame is read exactly once, as by the I/O floor. With
    two workers (two tasks, the frames at their border handed over through the progress
    folder when the neighbour has them first) no frame is read more than twice and the volume
    is the same."""
    from pipeline.compute import use_scheduler
    from pipeline.config import ComputeConfig

    acq = acquisition(TRANSMISSION, thickness_um=100.0)
    geom, frames, pos, r0, c0 = render(acq, n=40, rows=24, cols=64, points=[])
    volumes = {}
    for workers in (1, 2):
        reads = []
        corrected = correct_series(_counted_series(frames, reads), CorrectConfig(), band_level=1000.0)
        out = tmp_path / f"v{workers}.ome.zarr"
        with use_scheduler(ComputeConfig(workers=workers)):
            info = reconstruct_volume(corrected, geom, pos, _truth_table(pos, r0, c0),
                                      ReconstructConfig(chunk_voxels=(8, 8, 4)), out)
        counts = np.bincount(reads, minlength=40)
        assert info["blocks_total"] >= 8  # slabs of 4 steps overlap by the 19 um shear
        assert counts.min() == 1 and counts.max() <= (1 if workers == 1 else 2)
        assert not (tmp_path / f".v{workers}.ome.zarr.progress" / "handoff").exists()
        volumes[workers] = np.asarray(omezarr.open_image(out)[0].compute())
    np.testing.assert_array_equal(volumes[1], volumes[2])


def _bilinear_reference(corrected: np.ndarray, geom, pos, r0, c0, meta) -> tuple[np.ndarray, np.ndarray]:
    """The volume by the formulas of the module docstring, sampled with scipy.ndimage's
    order-1 ``map_coordinates`` voxel by voxel (an independent bilinear interpolation), and the
    mask of voxels whose four taps lie inside every frame used (edges are clamped/zero here)."""
    from scipy import ndimage as ndi

    shape = tuple(meta["shape"])
    dz, dy, dx = meta["voxel_um"]
    z0, y0, x0 = meta["origin_um"]
    z = z0 + dz * np.arange(shape[0])[:, None, None]
    y = y0 + dy * np.arange(shape[1])[None, :, None]
    x = x0 + dx * np.arange(shape[2])[None, None, :]
    z, y, x = np.broadcast_arrays(z, y, x)
    xp = x - z * geom.tan_psi0
    f = np.interp(xp, pos, np.arange(pos.size, dtype=float))
    k0 = np.clip(np.floor(f).astype(int), 0, pos.size - 2)
    t = (xp - pos[k0]) / (pos[k0 + 1] - pos[k0])
    inside = (xp >= pos[0]) & (xp <= pos[-1])
    out = np.zeros(shape)
    ok = inside.copy()
    rows, cols = corrected.shape[1:]
    for k, w in ((k0, 1 - t), (k0 + 1, t)):
        r = r0[k] + y / geom.p_row_um
        c = c0[k] + (z * geom.G + (xp - pos[k]) * geom.L) / geom.p_col_um
        ok &= (r >= 0) & (r < rows - 1) & (c >= 0) & (c < cols - 1)
        for u in np.unique(k[inside]):
            sel = inside & (k == u)
            out[sel] += w[sel] * ndi.map_coordinates(corrected[u].astype(float), [r[sel], c[sel]], order=1)
    return out, ok


def test_resampling_matches_bilinear_reference(small_volume):
    """Level 0 equals the module's formulas evaluated with scipy's bilinear interpolation
    (``ndimage.map_coordinates``, order 1) within float32 rounding, on every voxel whose taps
    are inside the frames; the sparse-matrix formulation must not change the numbers."""
    path, info, geom, (frames, pos, r0, c0) = small_volume
    corrected = corrected_of(frames).compute()
    vol, meta = omezarr.open_image(path)
    ref, ok = _bilinear_reference(corrected, geom, pos, r0, c0, {**meta, "shape": info["shape"]})
    assert ok.mean() > 0.5
    np.testing.assert_allclose(vol.compute()[ok], ref[ok], rtol=1e-5, atol=1e-5)


@pytest.mark.parametrize("chunk_x", [8, 2])
def test_pyramid_levels_are_block_means(tmp_path, chunk_x):
    """Levels 1.. are 2x2x2 block means of the level above (scikit-image's
    ``measure.block_reduce`` on the trimmed level), whether each slab writes them from memory
    (x chunk divisible by 4 at 3 levels: x chunks halve per level) or they are built from level
    0 afterwards (x chunk 2)."""
    from skimage.measure import block_reduce

    acq = acquisition(TRANSMISSION, thickness_um=100.0)
    geom, frames, pos, r0, c0 = render(acq, n=24, rows=40, cols=70, points=[(40.0, 50.0, 50.0)])
    out = tmp_path / "v.ome.zarr"
    reconstruct_volume(corrected_of(frames), geom, pos, _truth_table(pos, r0, c0),
                       ReconstructConfig(chunk_voxels=(8, 16, chunk_x)), out)
    above = np.asarray(omezarr.open_image(out, 0)[0].compute())
    for k in (1, 2):
        level, _ = omezarr.open_image(out, k)
        data = np.asarray(level.compute())
        trim = above[tuple(slice(0, 2 * n) for n in data.shape)]
        np.testing.assert_allclose(data, block_reduce(trim, (2, 2, 2), np.mean), rtol=1e-5, atol=1e-6)
        expected_x = chunk_x // 2**k if chunk_x == 8 else chunk_x
        assert level.chunksize[2] == min(expected_x, data.shape[2])
        above = data


@pytest.mark.parametrize(
    "change, message",
    [
        ({"r0_px": np.zeros(3)}, "registration table has 3 frames but the series has 24"),
        ({"flagged": np.ones(24, int)}, "only 0 usable frames of 24"),
    ],
)
def test_bad_inputs(small_volume, tmp_path, change, message):
    _, _, geom, (frames, pos, r0, c0) = small_volume
    table = {**_truth_table(pos, r0, c0), **change}
    with pytest.raises(InputError, match=message):
        reconstruct_volume(corrected_of(frames), geom, pos, table, SMALL_CHUNKS, tmp_path / "v.ome.zarr")
    with pytest.raises(InputError, match="strictly monotonic"):
        reconstruct_volume(corrected_of(frames), geom, pos[::-1] * 0 + 1.0, _truth_table(pos, r0, c0),
                           SMALL_CHUNKS, tmp_path / "v.ome.zarr")


# --- resume after SIGKILL -----------------------------------------------------------------------

_CHILD = """
import sys
from pathlib import Path
import dask
from pipeline.compute import set_quiet
from pipeline.config import CorrectConfig, ReconstructConfig, load_acquisition
from pipeline.correct import correct_series
from pipeline.geometry import Geometry
from pipeline.ingest import open_series
from pipeline.reconstruct import reconstruct_volume
from pipeline.register import read_registration_csv
set_quiet(True)
acq, base = load_acquisition(sys.argv[1])
series = open_series(acq, base)
corrected = correct_series(series, CorrectConfig(), band_level=1000.0)
reg = read_registration_csv(Path(sys.argv[1]).parent / "registration.csv")
with dask.config.set(scheduler="threads", num_workers=1):
    info = reconstruct_volume(corrected, Geometry.from_acquisition(acq), series.positions_um, reg,
                              ReconstructConfig(chunk_voxels=(16, 16, 2)), Path(sys.argv[2]))
print("INFO", __import__("json").dumps(info))
"""


def _child(acq: Path, out: Path, stdout=subprocess.DEVNULL) -> subprocess.Popen:
    env = {k: v for k, v in os.environ.items() if k != "PYTHONHASHSEED"}
    return subprocess.Popen([sys.executable, "-c", _CHILD, str(acq), str(out)], stdout=stdout,
                            stderr=subprocess.PIPE, text=True, env=env)


def _tree(root: Path) -> dict[str, bytes]:
    return {str(p.relative_to(root)): p.read_bytes() for p in sorted(root.rglob("*")) if p.is_file()}


def test_resume_after_sigkill_is_byte_identical(tmp_path):
    acq = acquisition(TRANSMISSION, thickness_um=100.0)
    geom, frames, pos, r0, c0 = render(acq, n=40, rows=48, cols=64, points=[(80.0, 60.0, 50.0)])
    data = tmp_path / "data"
    data.mkdir()
    for k, f in enumerate(frames):
        tifffile.imwrite(data / f"frame_{k:03d}.tif", f)
    (data / "acquisition.yaml").write_text(yaml.safe_dump(acq))
    write_registration_csv(data / "registration.csv", _truth_table(pos, r0, c0))
    assert list(_truth_table(pos, r0, c0)) == list(COLUMNS)

    # interrupted run: SIGKILL once some slabs are marked complete
    killed = tmp_path / "killed" / "volume.ome.zarr"
    killed.parent.mkdir()
    progress = killed.parent / ".volume.ome.zarr.progress"
    proc = _child(data / "acquisition.yaml", killed)
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline and proc.poll() is None:
        if len(list(progress.glob("slab_*.done"))) >= 3:
            os.kill(proc.pid, signal.SIGKILL)
            break
        time.sleep(0.005)
    proc.wait(timeout=30)
    assert proc.returncode == -signal.SIGKILL, "the run finished before it could be killed"
    n_marked = len(list(progress.glob("slab_*.done")))
    assert not (progress / "complete.json").exists()

    def run(out: Path) -> dict:  # the child's code in this process
        env: dict = {"ACQ": str(data / "acquisition.yaml"), "OUT": str(out), "print": lambda *a: None}
        exec(compile(_CHILD.replace("sys.argv[1]", "ACQ").replace("sys.argv[2]", "OUT"), "child", "exec"), env)
        return env["info"]

    # restart in a new process (hash seeds differ between processes, as for a user)
    proc = _child(data / "acquisition.yaml", killed, stdout=subprocess.PIPE)
    out, err = proc.communicate(timeout=120)
    assert proc.returncode == 0, err
    info = json.loads(out.split("INFO", 1)[1])
    assert info["blocks_skipped"] >= n_marked >= 3 and info["blocks_written"] > 0

    # uninterrupted reference
    ref = tmp_path / "ref" / "volume.ome.zarr"
    ref.parent.mkdir()
    assert run(ref)["blocks_skipped"] == 0
    a, b = _tree(killed), _tree(ref)
    assert sorted(a) == sorted(b)
    assert [k for k in a if a[k] != b[k]] == []
    assert any(k.startswith("0/c/") for k in a)

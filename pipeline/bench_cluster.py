"""``crackstack bench`` cases for where the work runs: 1 -> 2 worker scaling, local-cluster overhead.

Figures (each the best of a few interleaved repeats, so a busy moment on a shared machine counts
as little as possible; the 1-minute load average is logged with every figure):

- **machine check**: how much faster two independent pure-Python loops run in two processes
  than one (before and after the scaling runs, the lower value). Target >= 1.9: below it, other
  programs share the two cores and the speed-ups below measure the machine, not crackstack.

- **reconstruct speed-up, 2 workers / 1**, on a local cluster (1 or 2 worker processes of one
  thread each, how a batch cluster runs the work; target) and on the threads scheduler
  (``compute.workers`` threads of this process; shown for comparison: the threads take turns on
  the GIL in the frame load, zarr's per-chunk Python and the sparse product, docs/cluster.md),
  on an invented series made by :func:`pipeline.bench.write_series`, written in x slabs of
  ``chunk_x`` voxels so both workers have work. Target >= 1.7 (the issue's figure for this
  2-core machine: 2.0 is the ideal, 0.3 is left for the serial parts: grid set-up, task
  shipping, the client's share). The full series, 412 frames of 1024 x 1024 px (0.86 GB, a
  fifth of the reconstruct case's), is long enough that those fixed parts (~0.3 s per run on a
  local cluster) do not decide the figure, as they would not on a real series of thousands of
  frames; the 206 x 512 x 1024 series used before reconstructed in ~1.3 s. Its length gives an
  even number of slabs (two equal runs; 192 frames gave 13 slabs, runs of 7 and 6, which alone
  capped the figure at 13 / 7 = 1.86). The chunks hold 128 x 512 x
  ``chunk_x`` voxels (4 MiB at 16, the byte size of the default 64 x 128 x 128 chunk): with
  64 x 128 x 16 chunks (512 KiB), 8 times as many chunks as with the default, the chunk writes
  took ~40 % of a slab task. A local cluster is started per worker count and repeat, and its
  first run is not timed (the workers' first task pays for their caches).
- **segment speed-up, 2 workers / 1**, on that reconstructed volume as a run folder holds it
  (OME-Zarr in the default chunks), in 4-8 compute blocks, on the same two schedulers.
- **local-cluster / threads wall time** of the same small run (register .. measure of the
  invented 48-frame series of :func:`small_scenario`), stage time only. Target <= 1.3: a
  distributed scheduler costs about 1 ms per task plus pickling of task inputs and results
  between processes; on ~100 tasks of 10-500 ms that must stay a small fraction, and 30 % is
  the point where threads would be the better default for a workstation run.
- **local-cluster start and stop**, seconds (paid once per run). Target <= 5 s: about 1 s was
  measured for 2 workers on this machine (ECOSYSTEM.md section 3.5); 5 s leaves room for a
  loaded machine and stays small against any real run.

``--quick`` uses a 48-frame 256 x 512 series and one small run per scheduler (about a minute);
the full run a 412-frame 1024 x 1024 series and three small runs each.
"""

from __future__ import annotations

import logging
import math
import os
import shutil
import time
from pathlib import Path

import yaml

from pipeline.bench import BenchContext, Row, _make_bench_series, figure, register_case

log = logging.getLogger(__name__)

#: (frames, rows, cols, slab width in x voxels, repeats per worker count)
SCALING_QUICK = (48, 256, 512, 8, 2)
SCALING_FULL = (412, 1024, 1024, 16, 3)
#: Largest (y, x) voxel extent of the volume the segment scaling runs on.
SEGMENT_CROP_YX = (512, 224)
#: Chunk of the scaling case in z and y (voxels); x is the slab width.
SCALING_CHUNK_ZY = (128, 512)
#: Where the 1 -> 2 worker scaling is measured: worker processes of a local cluster (as on a
#: batch cluster; the target) and threads of one process (the default, for comparison).
SCALING_SCHEDULERS = ("local-cluster", "threads")
#: The stages that make defects.json (assess needs a recipe, report adds nothing to time here).
TO_MEASURE = ("register", "reconstruct", "segment", "measure")


def _load() -> float:
    return round(os.getloadavg()[0], 2)


def _spin(n: int) -> float:
    """Seconds of a pure-Python loop of ``n`` steps (CPU only, no memory traffic)."""
    t0 = time.perf_counter()
    s = 0
    for i in range(n):
        s += i * i
    return time.perf_counter() - t0


def machine_speedup(n: int) -> float:
    """What this machine gives two independent processes right now: the time of one loop alone
    over the time of two at once (x 2). 2.0 on two free cores; less when other programs share
    them, and then no scaling figure can reach its target either."""
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor

    with ProcessPoolExecutor(2, mp_context=multiprocessing.get_context("spawn")) as pool:
        list(pool.map(_spin, [1000, 1000]))  # start both processes first
        one = min(pool.submit(_spin, n).result() for _ in range(2))
        t0 = time.perf_counter()
        list(pool.map(_spin, [n, n]))
        both = time.perf_counter() - t0
    return 2 * one / both


# ---------------------------------------------------------------------------------------------
# 1 -> 2 workers


def _time_reconstruct(acq_path: Path, out: Path, chunk_x: int) -> float:
    """Wall time of reconstruct_volume (corrected series, registration from the file) on the
    active scheduler."""
    from pipeline.config import CorrectConfig, ReconstructConfig, load_acquisition
    from pipeline.correct import correct_series
    from pipeline.geometry import Geometry
    from pipeline.ingest import open_series
    from pipeline.reconstruct import reconstruct_volume
    from pipeline.register import read_registration_csv

    acq, base = load_acquisition(acq_path)
    geom = Geometry.from_acquisition(acq)
    series = open_series(acq, base)
    reg = read_registration_csv(acq_path.parent / "registration.csv")
    for p in (out, out.parent / f".{out.name}.progress"):
        shutil.rmtree(p, ignore_errors=True)  # a fresh volume: nothing to resume
    corrected = correct_series(series, CorrectConfig())
    t0 = time.perf_counter()
    reconstruct_volume(
        corrected, geom, series.positions_um, reg, ReconstructConfig(chunk_voxels=(*SCALING_CHUNK_ZY, chunk_x)), out
    )
    return time.perf_counter() - t0


def _time_segment(volume, voxel_um, blocks_y: int) -> float:
    """Wall time of segment_array on the active scheduler (``volume`` a Dask array)."""
    from pipeline.config import SegmentConfig
    from pipeline.segment import segment_array

    nz, ny, nx = volume.shape
    # ceil(n / k) pieces: the last one is never thinner than the others by more than k voxels
    chunks = (math.ceil(nz / 2), math.ceil(ny / blocks_y), nx)
    t0 = time.perf_counter()
    segment_array(volume, voxel_um=voxel_um, cfg=SegmentConfig(), chunks=chunks)
    return time.perf_counter() - t0


def _scheduler(kind: str, workers: int):
    from pipeline.compute import use_scheduler
    from pipeline.config import ComputeConfig

    return use_scheduler(ComputeConfig(scheduler=kind, workers=workers, memory_limit="4GiB"))


def _speedups(run, repeats: int) -> dict[str, dict[int, list[float]]]:
    """Seconds of ``run()`` per scheduler kind and worker count, repeats interleaved. On a
    local cluster the first run after the start is not timed (the workers' first task pays
    for their caches), so every timed run is one of a started cluster, as on a batch cluster."""
    times: dict[str, dict[int, list[float]]] = {k: {1: [], 2: []} for k in SCALING_SCHEDULERS}
    for _ in range(repeats):
        for kind in SCALING_SCHEDULERS:
            for w in (1, 2):
                with _scheduler(kind, w):
                    if kind == "local-cluster":
                        run()
                    times[kind][w].append(run())
    return times


@register_case(name="cluster_scaling")
def bench_scaling(ctx: BenchContext) -> list[Row]:
    """Speed-up of reconstruct and segment from 1 to 2 workers."""
    import dask.array as da

    from pipeline import omezarr
    from pipeline.compute import set_quiet
    from pipeline.config import ReconstructConfig

    n, rows, cols, chunk_x, repeats = SCALING_QUICK if ctx.quick else SCALING_FULL
    spins = 5_000_000 if ctx.quick else 20_000_000
    machine = [machine_speedup(spins)]
    data = ctx.workdir / "scaling"
    acq_path, _ = _make_bench_series(data, n, rows, cols)
    set_quiet(True)
    with _scheduler("threads", 2):
        # Read every frame once first, so the 1-worker run does not pay the cold page cache alone.
        _time_reconstruct(acq_path, data / "warm.ome.zarr", chunk_x)
    rec = _speedups(lambda: _time_reconstruct(acq_path, data / "vol.ome.zarr", chunk_x), repeats)
    # segment reads the volume as a run folder holds it: OME-Zarr in the default chunks
    arr, meta = omezarr.open_image(data / "vol.ome.zarr")
    # segment of the full series' whole volume would take ~45 s per 1-worker run: a crop of
    # ~15 M voxels keeps the case to a few minutes (the filter bank ~80 % of its time)
    arr = arr[:, :SEGMENT_CROP_YX[0], :SEGMENT_CROP_YX[1]]
    voxel = tuple(float(v) for v in meta["voxel_um"])
    chunks = tuple(min(c, s) for c, s in zip(ReconstructConfig().chunk_voxels, arr.shape, strict=True))
    root = omezarr.create_image(data / "segment.ome.zarr", arr.shape, voxel_um=voxel,
                                origin_um=tuple(meta["origin_um"]), chunks=chunks, dtype="float32",
                                levels=1, name="volume")
    da.store(arr.rechunk(chunks), root["0"], lock=False)
    volume, _ = omezarr.open_image(data / "segment.ome.zarr")
    blocks_y = 2 if ctx.quick else 4
    seg = _speedups(lambda: _time_segment(volume, voxel, blocks_y), max(1, repeats - 1))
    machine.append(machine_speedup(spins))
    load = _load()
    log.info("bench cluster_scaling: reconstruct %s, segment %s (s per scheduler and worker count), machine "
             "2-process speed-up %s, load %.2f", rec, seg, machine, load)
    size = f"{n} x {rows} x {cols} series"
    vol = "x".join(map(str, volume.shape)) + " volume"
    rows_out = [
        # Not a property of crackstack: says whether the figures below could be measured.
        {**figure("machine check: 2 free cores (2 CPU loops / 1)", min(machine), ">= 1.9", "x"),
         "before_after": machine, "load_1min": load},
    ]
    for stage, times, what in (("reconstruct", rec, size), ("segment", seg, vol)):
        for kind in SCALING_SCHEDULERS:
            t = times[kind]
            # The target is for worker processes, how a cluster runs; threads share one
            # interpreter and its GIL (docs/cluster.md) and are shown for comparison.
            target = ">= 1.7" if kind == "local-cluster" else "info"
            rows_out.append({**figure(f"{stage} speed-up 2/1 workers, {kind} ({what})", min(t[1]) / min(t[2]),
                                      target, "x"),
                             "seconds": {str(k): v for k, v in t.items()}, "load_1min": load})
    return rows_out


# ---------------------------------------------------------------------------------------------
# local-cluster against threads


def small_scenario():
    """The demo scenario shrunk to a small run: 48 frames of 64 x 128 px (0.8 um pixels) of a
    200 um wafer with one surface crack and one dislocation loop (demo contrast and instrument).
    Also the data of the scheduler and resume tests (``tests/_smallrun.py``)."""
    import synthetic

    d = synthetic.load_scenario(synthetic.demo_scenario_path()).model_dump(mode="json")
    d["name"] = "small scheduler scenario (invented)"
    d["wafer"]["thickness_um"] = 200.0
    d["acquisition"]["scan"] = {"start_um": 0.0, "step_um": 4.0, "n_frames": 48}
    d["acquisition"]["frame"] = {"rows": 64, "cols": 128, "margin_px": 16, "origin_row_px": 0}
    d["instrument"].update(dropped_frames=[], corrupt_frames=[], hot_pixels=5)
    d["defects"] = [
        {"type": "crack", "name": "surface crack", "plane": {"hkl": [1, -1, 0]},
         "start": "surface_top", "a_um": 60, "c_um": 50, "position_um": [95, 25, 0]},
        {"type": "loop", "name": "loop", "plane": [1, 1, 1], "center_um": [150, 30, 120],
         "radius_um": 10},
    ]
    return synthetic.Scenario.model_validate(d)


def _small_run(acq: Path, out: Path, scheduler: str) -> tuple[float, float]:
    """(wall s of run_pipeline, sum of its stage times s) for register .. measure."""
    from pipeline.run import run_pipeline

    cfg = out.parent / f"{out.name}.yaml"
    cfg.write_text(yaml.safe_dump({
        "reconstruct": {"chunk_voxels": [64, 64, 4]},  # 15 slab tasks, as in the tests
        "compute": {"scheduler": scheduler, "workers": 2, "memory_limit": "2GiB"},
    }))
    t0 = time.perf_counter()
    record = run_pipeline(acq, out, cfg, stages=TO_MEASURE)
    wall = time.perf_counter() - t0
    return wall, sum(record["stages"][s]["elapsed_s"] for s in TO_MEASURE)


def _cluster_start_stop_s() -> float:
    from pipeline.compute import use_scheduler
    from pipeline.config import ComputeConfig

    t0 = time.perf_counter()
    with use_scheduler(ComputeConfig(scheduler="local-cluster", workers=2, memory_limit="2GiB")):
        pass
    return time.perf_counter() - t0


@register_case(name="cluster_overhead")
def bench_overhead(ctx: BenchContext) -> list[Row]:
    """local-cluster against threads on the same small run; the cluster's start and stop."""
    import synthetic
    from pipeline.compute import set_quiet

    set_quiet(True)
    data = ctx.workdir / "small"
    synthetic.render_series(small_scenario(), data / "series")
    acq = data / "series" / "acquisition.yaml"
    repeats = 1 if ctx.quick else 3
    times: dict[str, list[tuple[float, float]]] = {"threads": [], "local-cluster": []}
    # Not timed: the first run in this process pays for imports and first calls (~1 s of 2.5 s),
    # which would count against whichever scheduler runs first.
    _small_run(acq, data / "warm-up", "threads")
    for i in range(repeats):
        for scheduler in times:
            times[scheduler].append(_small_run(acq, data / f"{scheduler}-{i}", scheduler))
    start = min(_cluster_start_stop_s() for _ in range(2))
    same = all(
        (data / f"local-cluster-{i}" / "defects.json").read_bytes() == (data / "threads-0" / "defects.json").read_bytes()
        for i in range(repeats)
    )
    load = _load()
    log.info("bench cluster_overhead: (wall s, stage s) %s, start+stop %.2f s, same defects %s, load %.2f",
             times, start, same, load)
    stages = {k: min(s for _, s in v) for k, v in times.items()}
    wall = {k: min(w for w, _ in v) for k, v in times.items()}
    ratio = stages["local-cluster"] / stages["threads"]
    row = {**figure("local-cluster / threads, small run, stage time", ratio, "<= 1.3", "x"),
           "wall_s": wall, "stage_s": stages, "same_defects_json": same, "load_1min": load}
    if not same:  # a faster wrong answer is no answer
        row.update(passed=False, error="defects.json differs between local-cluster and threads")
    return [row, {**figure("local-cluster start + stop (2 workers)", start, "<= 5", "s"), "load_1min": load}]

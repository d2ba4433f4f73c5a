"""Schedulers and progress: the same results whichever scheduler runs the tasks."""

import logging
import shutil
import subprocess

import dask
import pytest

from pipeline import compute
from pipeline.config import ComputeConfig


def _tasks():
    # Built-ins only: a SLURM worker cannot import this test module by reference.
    return [dask.delayed(sum)([float(i)] * 3) for i in range(7)]


@pytest.mark.parametrize("scheduler", ["threads", "processes"])
def test_local_schedulers_same_results(scheduler):
    with compute.use_scheduler(ComputeConfig(scheduler=scheduler, workers=2)):
        assert compute.run_tasks(_tasks(), "test") == [3.0 * i for i in range(7)]


def test_local_cluster_same_results():
    cfg = ComputeConfig(scheduler="local-cluster", workers=2, memory_limit="1GiB")
    with compute.use_scheduler(cfg) as client:
        assert client is not None
        assert compute.current_client() is client
        assert compute.run_tasks(_tasks(), "test") == [3.0 * i for i in range(7)]
        # the stage modules were imported when each worker started, not in the first task
        loaded = client.run(lambda: sorted(set(compute.WARM_MODULES) & set(__import__("sys").modules)))
        assert len(loaded) == 2 and all(v == sorted(compute.WARM_MODULES) for v in loaded.values())
    assert compute.current_client() is None


def _frame_sum(frames):
    return float(compute.materialize(frames).sum())


def _total(x):
    return float(x.sum())


@pytest.mark.parametrize("scheduler", ["threads", "processes", "local-cluster"])
def test_in_task_pieces_and_kept_results_give_the_values_of_plain_compute(scheduler):
    import dask.array as da
    import numpy as np

    x = da.from_array(np.arange(6 * 8 * 10, dtype="float32").reshape(6, 8, 10), chunks=(2, 4, 5)) * 0.5
    pieces = [x[k : k + 3, 1:7] for k in range(0, 6, 3)]
    wrapped = [compute.in_task(p) for p in pieces]
    # the wrapper is a plain argument: the task computes it; its graph is culled to the piece
    assert [w.shape for w in wrapped] == [(3, 6, 10)] * 2
    assert all(np.array_equal(compute.materialize(w), p.compute()) for w, p in zip(wrapped, pieces, strict=True))
    assert dask.base.tokenize(wrapped[0]) == dask.base.tokenize(compute.in_task(pieces[0]))
    cfg = ComputeConfig(scheduler=scheduler, workers=2, memory_limit="1GiB")
    with compute.use_scheduler(cfg):
        sums = compute.run_tasks([dask.delayed(_frame_sum)(w) for w in wrapped], "in task")
        kept = compute.keep_tasks([dask.delayed(np.multiply)(w.compute(), 2.0) for w in wrapped], "kept")
        if scheduler == "local-cluster":  # futures on the workers, not values
            assert all(type(k).__name__ == "Future" for k in kept)
        again = compute.fetch(kept, _total, "fetch")
    assert sums == [float(p.sum().compute()) for p in pieces]
    assert again == [2.0 * v for v in sums]


def _fails(i):
    if i == 3:
        raise ValueError("bad block 3")
    return i


def test_failing_task_names_itself_under_distributed():
    cfg = ComputeConfig(scheduler="local-cluster", workers=1, memory_limit="1GiB")
    with compute.use_scheduler(cfg), pytest.raises(ValueError, match="bad block 3"):
        compute.run_tasks(
            [dask.delayed(_fails)(i, dask_key_name=f"blk-{i}") for i in range(5)], "test"
        )


def test_progress_lines_when_not_a_terminal(caplog):
    compute.set_quiet(False)
    with caplog.at_level(logging.INFO, logger="pipeline.compute"):
        compute.run_tasks(_tasks(), "demo-stage")
    assert any("demo-stage" in r.getMessage() and "done" in r.getMessage() for r in caplog.records)


def test_slurm_job_script_renders_without_slurm():
    # dask-jobqueue renders the batch script without sbatch (ECOSYSTEM notes, section 4.2).
    jq = pytest.importorskip("dask_jobqueue")
    cluster = jq.SLURMCluster(
        cores=4,
        processes=2,
        memory="8GiB",
        queue="short",
        account="wafers",
        walltime="01:00:00",
        job_extra_directives=["--exclusive"],
    )
    try:
        script = cluster.job_script()
    finally:
        cluster.close()
    assert "#SBATCH -p short" in script
    assert "#SBATCH -A wafers" in script
    assert "#SBATCH --cpus-per-task=4" in script
    assert "#SBATCH --exclusive" in script
    assert "--nworkers 2" in script and "--nthreads 2" in script


def _slurm_idle() -> str | None:
    if shutil.which("sinfo") is None:
        return "no sinfo on PATH (SLURM not installed)"
    out = subprocess.run(["sinfo", "-h", "-o", "%T"], capture_output=True, text=True, timeout=10)
    if "idle" not in out.stdout.split():
        return f"no idle SLURM node (sinfo: {out.stdout.strip() or out.stderr.strip()})"
    return None


@pytest.mark.slurm
def test_tasks_run_through_slurm():
    why = _slurm_idle()
    if why:
        pytest.skip(why)
    cfg = ComputeConfig(
        scheduler="slurm",
        workers=1,
        threads_per_worker=1,
        memory_limit="1GiB",
        slurm={"walltime": "00:10:00", "processes": 1},
    )
    with compute.use_scheduler(cfg):
        assert compute.run_tasks(_tasks(), "slurm") == [3.0 * i for i in range(7)]

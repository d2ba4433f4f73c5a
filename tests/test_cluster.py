"""Same results on every scheduler, a lost worker, a real SLURM run, progress and the dashboard.

The runs use the small invented series of ``tests/_smallrun.py`` (why it stands in for the demo
is explained there: the demo takes 1-2 minutes per run and these tests need several runs).
Results are compared byte for byte: nothing in defects.json (or in the intermediate
registration.csv and components.json) may depend on where the tasks ran, so no field is dropped
before comparing. The reference is the threads run of the ``small_reference`` fixture.
"""

from __future__ import annotations

import io
import logging
import os
import re
import signal
import threading
import time
from pathlib import Path

import _smallrun
import dask
import numpy as np
import pytest
import zarr

from pipeline import compute
from pipeline import run as runmod
from pipeline import runfolder as rf
from pipeline.config import ComputeConfig, load_run_config

ROOT = Path(__file__).resolve().parent.parent
#: Files every scheduler must write identically (defects.json is the one the issue names; the two
#: intermediates say which stage differs when it does not hold).
SAME_FILES = (rf.REGISTRATION_CSV, rf.COMPONENTS_JSON, rf.DEFECTS_JSON)


def _assert_same_outputs(run: Path, reference: Path) -> None:
    for name in SAME_FILES:
        assert (run / name).read_bytes() == (reference / name).read_bytes(), f"{name} differs from the threads run"
    a = zarr.open_array(str(run / rf.VOLUME / "0"), mode="r")[...]
    b = zarr.open_array(str(reference / rf.VOLUME / "0"), mode="r")[...]
    assert np.array_equal(a, b), "volume level 0 differs from the threads run"


# --- same results whichever scheduler runs the stages -------------------------------------------


@pytest.mark.parametrize("scheduler", ["processes", "local-cluster"])
def test_scheduler_gives_the_threads_result(scheduler, small_series, small_reference, tmp_path):
    cfg = _smallrun.write_config(
        tmp_path / "run.yaml", {"scheduler": scheduler, "workers": 2, "memory_limit": "2GiB"}
    )
    record = runmod.run_pipeline(small_series, tmp_path / "run", cfg, stages=_smallrun.TO_MEASURE)
    assert record["config"]["compute"]["scheduler"] == scheduler
    assert all(record["stages"][s]["status"] == "done" for s in _smallrun.TO_MEASURE)
    _assert_same_outputs(tmp_path / "run", small_reference)


# --- a worker lost mid-stage --------------------------------------------------------------------


def _kill_a_worker_running(prefix: str, run_thread: threading.Thread, timeout_s: float = 180.0):
    """SIGKILL the process of a LocalCluster worker as soon as the scheduler shows it processing
    a task whose key starts with ``prefix``; returns (address, pid, keys) or None when the run
    ended first."""
    pids: dict[str, int] = {}
    deadline = time.monotonic() + timeout_s
    while run_thread.is_alive() and time.monotonic() < deadline:
        client = compute.current_client()
        if client is None:
            time.sleep(0.05)
            continue
        try:
            for addr, keys in client.processing().items():
                busy = [str(k) for k in keys if str(k).startswith(prefix)]
                if not busy:
                    continue
                if addr not in pids:
                    pids.update(client.run(os.getpid))
                os.kill(pids[addr], signal.SIGKILL)
                return addr, pids[addr], busy
        except (OSError, KeyError, RuntimeError):  # client closing or a worker just replaced
            pass
        time.sleep(0.01)
    return None


def test_killed_local_cluster_worker_is_replaced_and_results_are_identical(
    small_series, small_reference, tmp_path
):
    cfg = _smallrun.write_config(
        tmp_path / "run.yaml", {"scheduler": "local-cluster", "workers": 2, "memory_limit": "2GiB"}
    )
    ctx = runmod.prepare(small_series, tmp_path / "run", cfg)
    outcome: dict = {}

    def body():
        try:
            outcome["record"] = runmod.execute(ctx, stages=_smallrun.TO_MEASURE)
        except BaseException as exc:  # re-raised in the test thread
            outcome["error"] = exc

    run_thread = threading.Thread(target=body, name="pipeline-run")
    run_thread.start()
    killed = _kill_a_worker_running("reconstruct-slab-", run_thread)
    run_thread.join(timeout=300)
    assert not run_thread.is_alive(), "the run did not finish after a worker was killed"
    if "error" in outcome:
        raise outcome["error"]
    assert killed is not None, "the run finished before a reconstruct task could be caught in flight"
    addr, pid, keys = killed
    with pytest.raises(ProcessLookupError):  # the process is really gone (the nanny reaped it)
        os.kill(pid, 0)
    rec = outcome["record"]["stages"]["reconstruct"]
    assert rec["status"] == "done"
    # Every slab was written in this run, the lost one(s) again on the replacement worker.
    assert rec["result"]["blocks_written"] == rec["result"]["blocks_total"] == 15
    _assert_same_outputs(tmp_path / "run", small_reference)


# --- a real SLURM run ---------------------------------------------------------------------------


@pytest.mark.slurm
def test_slurm_run_gives_the_threads_result(slurm_node, small_series, small_reference, tmp_path, caplog):
    # The workers run in a SLURM job started by dask-jobqueue: they import the stage functions
    # from the installed package (nothing from this test module is shipped to them).
    cfg = _smallrun.write_config(
        tmp_path / "run.yaml",
        {"scheduler": "slurm", "workers": 1, "threads_per_worker": 2, "memory_limit": "2GiB",
         "slurm": {"walltime": "00:20:00", "log_directory": str(tmp_path / "slurm-logs")}},
    )
    with caplog.at_level(logging.INFO, logger="pipeline.compute"):
        record = runmod.run_pipeline(small_series, tmp_path / "run", cfg, stages=_smallrun.TO_MEASURE)
    assert all(record["stages"][s]["status"] == "done" for s in _smallrun.TO_MEASURE)
    _assert_same_outputs(tmp_path / "run", small_reference)
    # The dashboard is logged where it listens (localhost), not at the node's address.
    logged = [r.getMessage() for r in caplog.records if r.getMessage().startswith("dask dashboard: ")]
    assert len(logged) == 1 and re.fullmatch(r"dask dashboard: http://127\.0\.0\.1:\d+/status", logged[0]), logged
    # The job wrote its worker log where the config said.
    assert any((tmp_path / "slurm-logs").glob("*.err")), "no SLURM worker log written"


@pytest.mark.slurm
def test_adaptive_slurm_cluster_starts_jobs_for_work(slurm_node, tmp_path):
    # No job at the start (minimum 0): use_scheduler must not wait for a worker, and the first
    # tasks make the adaptive cluster submit one.
    cfg = ComputeConfig(
        scheduler="slurm", threads_per_worker=1, memory_limit="1GiB",
        slurm={"walltime": "00:10:00", "log_directory": str(tmp_path),
               "adapt": {"minimum_jobs": 0, "maximum_jobs": 1}},
    )
    with compute.use_scheduler(cfg) as client:
        assert compute.run_tasks(_tasks(), "adaptive") == [3.0 * i for i in range(7)]
        assert len(client.scheduler_info()["workers"]) == 1


def test_slurm_example_config_renders_its_job_script():
    # dask-jobqueue renders the batch script without sbatch (ECOSYSTEM.md section 4.2), so this
    # runs everywhere: configs/slurm_example.yaml must load and ask SLURM for what docs/cluster.md
    # says it does.
    jq = pytest.importorskip("dask_jobqueue")
    cfg = load_run_config(ROOT / "configs" / "slurm_example.yaml").compute
    assert cfg.scheduler == "slurm"
    opts, adapt = compute.slurm_cluster_options(cfg)
    assert adapt == cfg.slurm["adapt"]  # cluster.adapt(...), not a SLURMCluster argument
    cluster = jq.SLURMCluster(**opts)  # starts only the scheduler; scale() would call sbatch
    try:
        script = cluster.job_script()
        # The dashboard listens on localhost only, and the link logged says so (the cluster's
        # own dashboard_link names the node's address, where nothing answers).
        port = int(cluster.dashboard_link.rsplit(":", 1)[1].split("/")[0])
        assert _listening_hosts(port) == {"127.0.0.1"}
        assert compute._dashboard_link(cluster, opts["scheduler_options"]["dashboard_address"]) == (
            f"http://127.0.0.1:{port}/status"
        )
    finally:
        cluster.close()
    assert f"#SBATCH -p {cfg.slurm['queue']}" in script
    assert f"#SBATCH -A {cfg.slurm['account']}" in script
    assert f"#SBATCH -t {cfg.slurm['walltime']}" in script
    assert f"#SBATCH --cpus-per-task={cfg.threads_per_worker}" in script
    assert "#SBATCH --mem=" in script
    assert f"--nthreads {cfg.threads_per_worker}" in script  # one worker process per job
    assert "--memory-limit 32.00GiB" in script
    assert "--lifetime" in script  # workers retire before the walltime kills them mid-task
    # glibc reads these when a process starts: exported before the worker command, they reach it
    worker_line = next(i for i, line in enumerate(script.splitlines()) if "distributed.cli.dask_worker" in line)
    for k, v in compute.WORKER_MALLOC_ENV.items():
        assert script.splitlines().index(f"export {k}={v}") < worker_line


def test_local_cluster_workers_start_with_the_allocator_settings():
    # distributed's nanny default (MALLOC_TRIM_THRESHOLD_=65536) made every stage task 1.7-2x
    # slower than in a thread here (compute.WORKER_MALLOC_ENV); the workers must get ours.
    import os

    with compute.use_scheduler(ComputeConfig(scheduler="local-cluster", workers=1, memory_limit="1GiB")) as client:
        seen = next(iter(client.run(lambda: {k: os.environ.get(k) for k in compute.WORKER_MALLOC_ENV}).values()))
    assert seen == compute.WORKER_MALLOC_ENV


def test_slurm_options_defaults_and_adaptive_bounds():
    cfg = ComputeConfig(
        scheduler="slurm", workers=3, threads_per_worker=4, memory_limit="8GiB",
        slurm={"queue": "short", "adapt": {"minimum_jobs": 1, "maximum_jobs": 6}},
    )
    opts, adapt = compute.slurm_cluster_options(cfg)
    assert adapt == {"minimum_jobs": 1, "maximum_jobs": 6}
    assert "adapt" not in opts  # not a SLURMCluster argument
    assert opts["cores"] == 4 and opts["memory"] == "8GiB" and opts["processes"] == 1
    assert opts["queue"] == "short"
    assert opts["scheduler_options"] == {"dashboard_address": "127.0.0.1:0"}
    assert opts["log_directory"]


# --- progress and the dashboard -----------------------------------------------------------------


def _listening_hosts(port: int) -> set[str]:
    """Addresses this process listens on at ``port``."""
    import psutil

    return {
        c.laddr.ip for c in psutil.Process().net_connections(kind="tcp")
        if c.status == psutil.CONN_LISTEN and c.laddr.port == port
    }


def _tasks(n: int = 7):
    # Built-ins only: distributed workers import task functions by reference.
    return [dask.delayed(sum)([float(i)] * 3) for i in range(n)]


_LINE = re.compile(r"^(?P<desc>\S+): (?P<done>\d+)/(?P<total>\d+) done, \d+ s elapsed, ~\d+ s left$")


def _progress_counts(records, desc: str) -> list[tuple[int, int]]:
    out = []
    for r in records:
        m = _LINE.match(r.getMessage())
        if m and m["desc"] == desc:
            out.append((int(m["done"]), int(m["total"])))
    return out


@pytest.fixture
def not_quiet(monkeypatch):
    # Another test module silences progress for the session; these tests need it on.
    monkeypatch.setitem(compute._state, "quiet", False)


@pytest.fixture
def fake_terminal(monkeypatch):
    """stderr claims to be a terminal; rich draws into a buffer that is read back."""
    import rich
    from rich.console import Console

    buf = io.StringIO()
    monkeypatch.setattr("sys.stderr.isatty", lambda: True, raising=False)
    monkeypatch.setattr(rich, "_console", Console(file=buf, force_terminal=True, width=100))
    return buf


def _check_bar(text: str, desc: str, n: int) -> None:
    assert desc in text
    assert f"{n}/{n}" in text  # counts
    assert re.search(r"\d+:\d\d:\d\d|-:--:--", text), "no time-left column in the bar"


def test_progress_lines_with_counts_and_time_left_when_not_a_terminal(not_quiet, caplog):
    with caplog.at_level(logging.INFO, logger="pipeline.compute"), compute.use_scheduler(
        ComputeConfig(scheduler="threads", workers=2)
    ):
        assert compute.run_tasks(_tasks(), "stage-a") == [3.0 * i for i in range(7)]
    counts = _progress_counts(caplog.records, "stage-a")
    assert counts and counts[-1] == (7, 7)
    assert [d for d, _ in counts] == sorted({d for d, _ in counts})  # increasing, one line each


def test_progress_bar_on_a_terminal(not_quiet, fake_terminal, caplog):
    with caplog.at_level(logging.INFO, logger="pipeline.compute"):
        compute.run_tasks(_tasks(), "stage-b")
    _check_bar(fake_terminal.getvalue(), "stage-b", 7)
    assert not _progress_counts(caplog.records, "stage-b")  # the bar replaces the log lines


def test_progress_and_dashboard_under_a_distributed_client(not_quiet, caplog, monkeypatch):
    import rich
    from rich.console import Console

    cfg = ComputeConfig(scheduler="local-cluster", workers=2, memory_limit="1GiB")
    assert cfg.dashboard_address.startswith("127.0.0.1:")  # the default binds localhost only
    with caplog.at_level(logging.INFO, logger="pipeline.compute"), compute.use_scheduler(cfg) as client:
        # Plain lines (not a terminal): Dask's local callbacks print nothing under a client, so
        # these come from run_tasks' as_completed loop.
        assert compute.run_tasks(_tasks(), "stage-c") == [3.0 * i for i in range(7)]
        # The bar on a terminal, under the same client.
        buf = io.StringIO()
        monkeypatch.setattr("sys.stderr.isatty", lambda: True, raising=False)
        monkeypatch.setattr(rich, "_console", Console(file=buf, force_terminal=True, width=100))
        assert compute.run_tasks(_tasks(5), "stage-d") == [3.0 * i for i in range(5)]
        port = int(client.dashboard_link.rsplit(":", 1)[1].split("/")[0])
        listening = _listening_hosts(port)
    assert _progress_counts(caplog.records, "stage-c")[-1] == (7, 7)
    _check_bar(buf.getvalue(), "stage-d", 5)
    logged = [r.getMessage() for r in caplog.records if r.getMessage().startswith("dask dashboard: ")]
    assert logged == [f"dask dashboard: http://127.0.0.1:{port}/status"]
    assert listening == {"127.0.0.1"}


def test_failing_task_is_named_whatever_its_exception_type():
    # json.loads raises JSONDecodeError, whose constructor needs (msg, doc, pos): the task's name
    # must still reach the user (not a TypeError from re-raising), with the cause kept.
    import json

    cfg = ComputeConfig(scheduler="local-cluster", workers=1, memory_limit="1GiB")
    with compute.use_scheduler(cfg), pytest.raises(RuntimeError, match=r"test: task blk-3 failed: Expecting") as err:
        compute.run_tasks([dask.delayed(json.loads)("{bad", dask_key_name="blk-3")], "test")
    assert isinstance(err.value.__cause__, json.JSONDecodeError)

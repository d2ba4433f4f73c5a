"""Where Dask work runs, and progress while it runs.

Stages hand lists of ``dask.delayed`` tasks (typically one per output block) to
:func:`run_tasks`; it computes them on the active scheduler and shows progress:

- a rich bar with counts and time left when stderr is a terminal;
- plain log lines (every ~10 %) otherwise, so batch-job logs stay readable.

Dask's local callbacks print nothing under a distributed client, so with a client the tasks are
submitted as futures and advanced with ``as_completed`` (which also surfaces a failing task at
once, naming its key).
"""

from __future__ import annotations

import contextlib
import logging
import math
import re
import sys
import tempfile
import time
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any

import dask

log = logging.getLogger(__name__)

_state: dict[str, Any] = {"client": None, "scheduler": "threads", "workers": None, "quiet": False}


def set_quiet(quiet: bool) -> None:
    """Silence progress output (tests, ``--quiet``)."""
    _state["quiet"] = quiet


def current_client():
    """The distributed client in use, or None for the local schedulers."""
    return _state["client"]


#: Modules every stage task needs; imported when a worker process starts, so that their import
#: time (about 0.5 s per process for scipy + scikit-image here) is paid once at cluster start
#: and not inside the first task of each stage (the small bench run: register 2.6 s on a
#: local cluster against 1.3 s with threads before this).
WARM_MODULES = (
    "numpy", "scipy.ndimage", "scipy.optimize", "scipy.sparse", "skimage.registration",
    "skimage.measure", "zarr", "tifffile",
    "pipeline.correct", "pipeline.register", "pipeline.reconstruct", "pipeline.segment",
    "pipeline.measure",
)


#: glibc allocator settings for worker processes of a distributed cluster. Dask's nanny starts
#: workers with ``MALLOC_TRIM_THRESHOLD_=65536``, and setting it fixes glibc's mmap threshold
#: at 128 KiB: every array above that is then a fresh mmap whose pages fault in on first touch
#: and go back to the system when freed, and stage tasks make many MB-sized temporaries (a
#: frame block, a slab). Measured on this 2-core machine, one reconstruct task of the scaling
#: bench series: 1.2-1.3 s in a thread, 2.2-2.7 s in a local-cluster worker with dask's
#: setting, 1.35 s with these (the dynamic limit's ceiling, 32 MiB, for both: arrays below it
#: are reused from the heap; above it they are still mapped and unmapped per use, so a
#: worker's memory still goes back to the system after a large task).
WORKER_MALLOC_ENV = {"MALLOC_TRIM_THRESHOLD_": str(32 * 2**20), "MALLOC_MMAP_THRESHOLD_": str(32 * 2**20)}


def warm_imports() -> None:
    """Import :data:`WARM_MODULES` (in a worker process)."""
    import importlib

    for name in WARM_MODULES:
        importlib.import_module(name)


def _warm_imports_plugin() -> Any:
    """A dask ``WorkerPlugin`` that runs :func:`warm_imports` on every worker, also on those
    that join later (adaptive SLURM jobs)."""
    from distributed import WorkerPlugin

    class WarmImports(WorkerPlugin):
        def setup(self, worker: Any) -> None:
            warm_imports()

    return WarmImports()


@contextlib.contextmanager
def use_scheduler(cfg=None) -> Iterator[Any]:
    """Activate the scheduler named in a :class:`~pipeline.config.ComputeConfig`.

    ``threads`` (default) and ``processes`` use Dask's local schedulers; ``local-cluster``
    starts a ``distributed.LocalCluster``; ``slurm`` a dask-jobqueue ``SLURMCluster``;
    ``address`` connects to a running scheduler. The dashboard binds to localhost unless the
    config says otherwise, and its address is logged.
    """
    scheduler = "threads" if cfg is None else cfg.scheduler
    prev = dict(_state)
    cluster = client = None
    bind = ""  # where the dashboard of a cluster started here listens
    settings_ctx = contextlib.ExitStack()
    try:
        if scheduler in ("threads", "processes"):
            _state.update(client=None, scheduler=scheduler, workers=None if cfg is None else cfg.workers)
            settings: dict[str, Any] = {"scheduler": scheduler, "num_workers": None if cfg is None else cfg.workers}
            with contextlib.ExitStack() as stack:
                if scheduler == "processes":
                    # One pool for the whole block: without it dask spawns a fresh pool per
                    # compute() call, and every spawned process re-imports numpy/scipy/skimage
                    # (the 48-frame test run: 74 s with a pool per call, 25 s with one).
                    settings["pool"] = stack.enter_context(_process_pool(cfg.workers if cfg else None))
                with dask.config.set(settings):
                    yield None
            return
        import distributed

        if scheduler == "local-cluster":
            # The nanny reads this when it starts a worker; a variable set in the environment
            # still takes precedence (distributed's rule), so a user's own choice stands.
            # Held for the cluster's life: a worker restarted after a loss gets them too.
            spawn_env = {**dask.config.get("distributed.nanny.pre-spawn-environ", {}), **WORKER_MALLOC_ENV}
            settings_ctx.enter_context(dask.config.set({"distributed.nanny.pre-spawn-environ": spawn_env}))
            cluster = distributed.LocalCluster(
                n_workers=cfg.workers,
                threads_per_worker=cfg.threads_per_worker,
                processes=True,
                memory_limit=cfg.memory_limit,
                dashboard_address=cfg.dashboard_address,
                silence_logs=logging.ERROR,
            )
            bind = cfg.dashboard_address
            client = distributed.Client(cluster)
        elif scheduler == "slurm":
            from dask_jobqueue import SLURMCluster

            opts, adapt = slurm_cluster_options(cfg)
            bind = str(opts["scheduler_options"].get("dashboard_address", ""))
            cluster = SLURMCluster(**opts)
            if adapt:
                cluster.adapt(**adapt)
            else:
                cluster.scale(jobs=cfg.workers)
            client = distributed.Client(cluster)
            # An adaptive cluster without a minimum starts jobs only once there is work.
            if not adapt or adapt.get("minimum_jobs", adapt.get("minimum", 0)) > 0:
                client.wait_for_workers(1, timeout=120)
        elif scheduler == "address":
            client = distributed.Client(cfg.address)
        log.info("dask dashboard: %s", _dashboard_link(client, bind))
        client.register_plugin(_warm_imports_plugin(), name="crackstack-warm-imports")
        _state.update(client=client, scheduler=scheduler, workers=cfg.workers)
        yield client
    finally:
        if client is not None:
            client.close()
        if cluster is not None:
            cluster.close()
        settings_ctx.close()
        _state.update(prev)


def _dashboard_link(client, bind: str) -> str:
    """The dashboard URL, with the host it is bound to.

    ``Client.dashboard_link`` names the scheduler's host address even when the dashboard listens
    on ``127.0.0.1`` only (SLURMCluster: ``http://<node ip>:8787/status``, which does not answer);
    for a cluster started here the bind host (``bind``, ``host:port``) is the one to print.
    """
    link = str(getattr(client, "dashboard_link", "n/a"))
    host = bind.rpartition(":")[0].strip("[]")
    if host not in ("", "0.0.0.0", "::", "*"):
        host = f"[{host}]" if ":" in host else host
        link = re.sub(r"^(\w+://)(\[[^\]]*\]|[^/:]+)", lambda m: m.group(1) + host, link, count=1)
    return link


def slurm_cluster_options(cfg) -> tuple[dict[str, Any], dict[str, Any] | None]:
    """SLURMCluster keyword arguments for a ``compute`` section, and adaptive bounds or None.

    ``cores = threads_per_worker`` and ``memory = memory_limit`` per job (one worker process
    each) unless ``compute.slurm`` says otherwise; every other ``compute.slurm`` key goes to
    SLURMCluster as is, except ``adapt`` (``{minimum_jobs, maximum_jobs}``), which replaces the
    fixed ``workers`` job count by ``cluster.adapt(...)``.
    """
    opts = {"cores": cfg.threads_per_worker, "memory": cfg.memory_limit, "processes": 1}
    opts.update(cfg.slurm)
    adapt = opts.pop("adapt", None)
    # Worker logs would otherwise land in the current folder, one file per job.
    opts.setdefault("log_directory", str(Path(tempfile.gettempdir()) / "crackstack-slurm-logs"))
    opts.setdefault("scheduler_options", {"dashboard_address": cfg.dashboard_address})
    # Exported before the worker's nanny starts: it takes variables already set over its own
    # defaults (see WORKER_MALLOC_ENV); a user's prologue lines run after these.
    exports = [f"export {k}={v}" for k, v in WORKER_MALLOC_ENV.items()]
    opts["job_script_prologue"] = exports + list(opts.get("job_script_prologue") or [])
    return opts, (dict(adapt) if adapt else None)


def _init_pool_process() -> None:
    from dask.multiprocessing import initialize_worker_process

    initialize_worker_process()
    warm_imports()


@contextlib.contextmanager
def _process_pool(workers: int | None) -> Iterator[Any]:
    """The process pool dask's ``processes`` scheduler would make per call, made once."""
    import os
    from concurrent.futures import ProcessPoolExecutor

    from dask.multiprocessing import get_context

    # As dask does for its own pools: a fixed hash seed so hashing agrees across processes.
    if os.environ.get("PYTHONHASHSEED") in (None, "0"):
        os.environ["PYTHONHASHSEED"] = "6640"
    n = workers or os.cpu_count() or 1
    pool = ProcessPoolExecutor(n, mp_context=get_context(), initializer=_init_pool_process)
    # Start every process now (one short task each, submitted together: the pool spawns a
    # process per task while none is idle), so that their start and imports (~1-2 s) are paid
    # here, not inside the first stage's tasks and its recorded time.
    list(pool.map(time.sleep, [0.05] * n))
    try:
        yield pool
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


class InTask:
    """A piece of a Dask array that the task receiving it computes itself.

    Given to ``dask.delayed`` as an argument, a Dask array becomes a dependency: its chunks
    are computed as tasks of their own and, under a distributed scheduler, sent to the worker
    that runs the consuming task (one more scheduler round trip per chunk, and the frames cross
    between processes). Wrapped in this object it is a plain argument instead (its graph culled
    to the piece, so it pickles small), and the task calls :meth:`compute`, which runs that
    graph in the task's own thread. On the threads scheduler the two do the same work.
    Measured, the 48-frame small bench run on a 2-worker local cluster: register 2.4-2.6 s
    with the frame slices as dependencies, against 1.0 s on threads.
    """

    def __init__(self, array):
        from dask.core import flatten

        self._keys = array.__dask_keys__()
        self._graph = dict(array.__dask_graph__().cull(set(flatten(self._keys))))
        self.shape = tuple(int(n) for n in array.shape)
        self.dtype = array.dtype
        self._name = array.name

    def __dask_tokenize__(self):
        return ("crackstack-in-task", self._name)

    def compute(self):
        """The piece as a NumPy array (computed here, with Dask's in-thread executor)."""
        import numpy as np
        from dask.array.core import concatenate3

        got = dask.core.get(self._graph, self._keys)
        return np.asarray(concatenate3(got))


def in_task(array) -> InTask:
    """Wrap the Dask array ``array`` (usually a slice) for computing inside a task (:class:`InTask`)."""
    return InTask(array)


def compute_here(array):
    """A small piece of a Dask array (a few sample frames) computed in this process, whatever
    the scheduler: under a distributed client each ``compute()`` is a scheduler round trip plus
    the graph's shipping, ~0.1-0.25 s for a handful of frames on the small bench run against
    ~0.01 s read here. Not for large pieces: it runs on one thread."""
    return InTask(array).compute()


def materialize(value):
    """``value`` as an array inside a task: an :class:`InTask` is computed, anything else is
    returned as it is (a NumPy array passed directly, e.g. in tests)."""
    return value.compute() if isinstance(value, InTask) else value


def shares_memory() -> bool:
    """True when task results stay in this process (the threads scheduler): keeping large
    intermediate arrays between task rounds is then free, while under processes or a cluster
    every such array would travel between processes twice."""
    return _state["client"] is None and _state.get("scheduler", "threads") == "threads"


def n_workers() -> int:
    """Number of parallel workers of the active scheduler (for sizing task batches)."""
    if _state["client"] is not None:
        return max(1, sum(w["nthreads"] for w in _state["client"].scheduler_info()["workers"].values()))
    import os

    return _state["workers"] or os.cpu_count() or 1


class _Progress:
    """Rich bar on a terminal, plain log lines otherwise."""

    def __init__(self, desc: str, total: int, *, show: bool = True):
        self.desc, self.total, self.done, self.t0 = desc, total, 0, time.monotonic()
        self._next_log = 0.1 if show else math.inf
        self._bar = None
        if show and not _state["quiet"] and sys.stderr.isatty():
            from rich.progress import (
                BarColumn,
                MofNCompleteColumn,
                Progress,
                TextColumn,
                TimeRemainingColumn,
            )

            self._bar = Progress(
                TextColumn("{task.description:<12}"),
                BarColumn(),
                MofNCompleteColumn(),
                TimeRemainingColumn(),
                transient=False,
            )
            self._bar.start()
            self._task = self._bar.add_task(desc, total=total)

    def advance(self, n: int = 1) -> None:
        self.done += n
        if self._bar is not None:
            self._bar.advance(self._task, n)
        elif not _state["quiet"] and self.total and self.done / self.total >= self._next_log:
            el = time.monotonic() - self.t0
            left = el / self.done * (self.total - self.done)
            log.info("%s: %d/%d done, %.0f s elapsed, ~%.0f s left", self.desc, self.done, self.total, el, left)
            self._next_log += 0.1

    def close(self) -> None:
        if self._bar is not None:
            self._bar.stop()
        log.debug("%s: %d of %d tasks in %.3f s", self.desc, self.done, self.total, time.monotonic() - self.t0)


def _wait(futures: list, desc: str, bar: _Progress, *, gather: bool) -> list[Any]:
    """Advance ``bar`` as the futures finish; their results in order (``gather``) or the
    futures themselves. A failing task cancels the rest and is re-raised with its key."""
    from distributed import as_completed

    index = {f.key: i for i, f in enumerate(futures)}
    results: list[Any] = [None] * len(futures) if gather else list(futures)
    for fut in as_completed(futures):
        if fut.status == "error" or gather:
            try:
                value = fut.result()
            except Exception as exc:
                for f in futures:
                    f.cancel()
                msg = f"{desc}: task {fut.key} failed: {exc}"
                try:  # the same type (InputError stays exit code 2), when it takes a message
                    named = type(exc)(msg)
                except Exception:  # e.g. JSONDecodeError(msg, doc, pos), KilledWorker
                    named = RuntimeError(msg)
                raise named from exc
            if gather:
                results[index[fut.key]] = value
        bar.advance()
    return results


def keep_tasks(tasks: Sequence[Any], desc: str) -> list[Any]:
    """Compute ``dask.delayed`` tasks and keep their results where they were made.

    On the local schedulers that is this process: the results are returned. Under a distributed
    client they stay on the workers: the futures are returned (once every task is done, with
    progress), to be passed to later ``dask.delayed`` tasks (which then run where their inputs
    are) or to :func:`fetch`; a kept result is recomputed by Dask if its worker is lost.
    """
    client = _state["client"]
    if client is None:
        return run_tasks(tasks, desc)
    tasks = list(tasks)
    bar = _Progress(desc, len(tasks))
    try:
        return _wait(client.compute(tasks, retries=2), desc, bar, gather=False)
    finally:
        bar.close()


def fetch(kept: Sequence[Any], fn, desc: str) -> list[Any]:
    """``fn`` of each result of :func:`keep_tasks`, run where the result is; the (small)
    values of ``fn`` come back in order."""
    client = _state["client"]
    if client is None:
        return [fn(v) for v in kept]
    bar = _Progress(desc, len(kept), show=False)  # small and quick: no bar of its own
    try:
        return _wait([client.submit(fn, f, retries=2) for f in kept], desc, bar, gather=True)
    finally:
        bar.close()


def run_tasks(tasks: Sequence[Any], desc: str) -> list[Any]:
    """Compute ``dask.delayed`` tasks (or dask collections) with progress; results in order.

    Under a distributed client the tasks run as futures (retried by Dask when a worker is lost);
    a task that raises is re-raised here with its key in the message.
    """
    tasks = list(tasks)
    bar = _Progress(desc, len(tasks))
    try:
        client = _state["client"]
        if client is not None:
            return _wait(client.compute(tasks, retries=2), desc, bar, gather=True)
        from dask.callbacks import Callback

        class _CB(Callback):
            def _posttask(self, key, result, dsk, state, id):  # noqa: A002
                if key in keys:
                    bar.advance()

        from dask.delayed import Delayed

        if not all(isinstance(t, Delayed) for t in tasks):
            # Collections (arrays) have many keys each; advance per batch instead.
            out = []
            step = max(1, n_workers() * 2)
            for i in range(0, len(tasks), step):
                out.extend(dask.compute(*tasks[i : i + step]))
                bar.advance(len(tasks[i : i + step]))
            return out
        keys = {t.key for t in tasks}
        with _CB():
            return list(dask.compute(*tasks))
    finally:
        bar.close()

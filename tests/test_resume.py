"""Resumable runs: a finished run is not redone, a changed parameter is refused naming its key,
an interrupted ``crackstack run`` continues where it stopped and ends with the same results.

The runs use the small invented series of ``tests/_smallrun.py`` (why it stands in for the demo
is explained there); ``small_reference`` is its finished threads run (all stages), which these
tests copy before running on it again.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import _smallrun
import numpy as np
import pytest
import tifffile
import zarr

from pipeline import run as runmod
from pipeline import runfolder as rf
from pipeline.config import RunConfig
from pipeline.errors import InputError

#: reconstruct's per-slab markers (written after each slab; see pipeline/reconstruct.py).
SLAB_MARKERS = f".{rf.VOLUME}.progress/slab_*.done"


def _copy_reference(reference: Path, dest: Path) -> Path:
    shutil.copytree(reference, dest)  # copy2: file modification times are kept
    return dest


def _file_times(folder: Path) -> dict[str, int]:
    """Modification time (ns) of every file below ``folder`` except run.json."""
    return {
        str(p.relative_to(folder)): p.stat().st_mtime_ns
        for p in folder.rglob("*")
        if p.is_file() and p.name != rf.RUN_JSON
    }


def _cli(*args: str | Path, log: Path) -> subprocess.Popen:
    """``crackstack ...`` in a subprocess, stdout and stderr to ``log``.

    Without PYTHONHASHSEED, as a user runs it: Dask's process pools set it in this process's
    environment, and a fixed seed would hide a run-to-run difference of anything hashed."""
    env = {k: v for k, v in os.environ.items() if k != "PYTHONHASHSEED"}
    with open(log, "w") as fh:
        return subprocess.Popen(
            [sys.executable, "-m", "pipeline.cli", *map(str, args)], stdout=fh, stderr=subprocess.STDOUT,
            env=env,
        )


# --- a finished run is not redone ---------------------------------------------------------------


def test_second_run_of_a_finished_run_does_no_work(small_series, small_reference, tmp_path, monkeypatch):
    out = _copy_reference(small_reference, tmp_path / "run")
    before = json.loads((out / rf.RUN_JSON).read_text())
    times = _file_times(out)
    assert set(before["stages"]) == set(runmod.STAGES)

    def must_not_run(ctx):
        raise AssertionError("a complete stage was run again")

    monkeypatch.setattr(runmod, "_RUNNERS", dict.fromkeys(runmod.STAGES, must_not_run))
    record = runmod.run_pipeline(small_series, out, small_reference.parent / "threads.yaml")

    after = json.loads((out / rf.RUN_JSON).read_text())
    assert after == record
    for stage in runmod.STAGES:
        old, new = before["stages"][stage], after["stages"][stage]
        assert new["status"] == "done", stage
        assert new["last_elapsed_s"] == 0.0, stage  # the timing of this run: nothing done
        assert new["skipped_runs"] == old.get("skipped_runs", 0) + 1, stage
        # the first run's timing, fingerprint and summary are kept
        assert (new["elapsed_s"], new["fingerprint"], new["result"]) == (
            old["elapsed_s"], old["fingerprint"], old["result"]
        ), stage
    assert _file_times(out) == times  # no output rewritten, none added or removed


# --- a changed parameter is refused -------------------------------------------------------------


def test_changed_parameter_is_refused_by_the_cli_naming_the_key(small_series, small_reference, tmp_path):
    out = _copy_reference(small_reference, tmp_path / "run")
    run_json = (out / rf.RUN_JSON).read_bytes()
    times = _file_times(out)
    changed = _smallrun.write_config(
        tmp_path / "changed.yaml", {"scheduler": "threads", "workers": 2}, segment={"min_size_um": 30.0}
    )
    proc = _cli("run", small_series, "--out", out, "--config", changed, log=tmp_path / "cli.log")
    assert proc.wait(timeout=120) == 2  # bad input (SPEC section 9)
    msg = (tmp_path / "cli.log").read_text()
    assert "config.segment.min_size_um" in msg
    assert "Traceback" not in msg
    assert (out / rf.RUN_JSON).read_bytes() == run_json and _file_times(out) == times


def test_changed_compute_section_continues_the_run(small_series, tmp_path):
    # Where the work runs does not change the results, so a run started on one scheduler may be
    # continued on another (a SLURM allocation ran out: finish on the workstation).
    out = tmp_path / "run"
    first = _smallrun.write_config(tmp_path / "a.yaml", {"scheduler": "local-cluster", "workers": 2})
    second = _smallrun.write_config(tmp_path / "b.yaml", {"scheduler": "threads", "workers": 1})
    runmod.prepare(small_series, out, first)
    ctx = runmod.prepare(small_series, out, second)
    assert ctx.record["config"]["compute"]["scheduler"] == "threads"  # the one in use is recorded
    # ... while a result-changing key in the same file is still refused
    third = _smallrun.write_config(
        tmp_path / "c.yaml", {"scheduler": "threads"}, reconstruct={"levels": 4}
    )
    with pytest.raises(InputError, match=r"config\.reconstruct\.levels"):
        runmod.prepare(small_series, out, third)


def test_key_added_by_a_newer_version_at_its_default_is_not_a_change(small_series, tmp_path):
    # A run folder made before a configuration key existed continues when the key is at its
    # default; a non-default value of that key is a change and is refused by name.
    out = tmp_path / "run"
    runmod.prepare(small_series, out)
    record = json.loads((out / "run.json").read_text())
    del record["config"]["measure"]["slit_edge_um"]  # as written by the older version
    (out / "run.json").write_text(json.dumps(record))
    ctx = runmod.prepare(small_series, out)
    assert ctx.record["config"]["measure"]["slit_edge_um"] == RunConfig().measure.slit_edge_um
    other = _smallrun.write_config(tmp_path / "d.yaml", {"scheduler": "threads"}, measure={"slit_edge_um": 2.0})
    with pytest.raises(InputError, match=r"config\.measure\.slit_edge_um"):
        runmod.prepare(small_series, out, other)


def test_changed_input_frames_are_refused(small_series, tmp_path):
    # The stage fingerprints include the input files' fingerprint recorded in run.json: a frame
    # replaced after the run folder was made must not pass as the old one.
    data = tmp_path / "data"
    shutil.copytree(small_series.parent, data)  # copy2: sizes and modification times kept
    out = tmp_path / "run"
    runmod.prepare(data / "acquisition.yaml", out)
    runmod.prepare(data / "acquisition.yaml", out)  # unchanged: accepted
    frame = sorted(data.glob("frame_*.tif"))[7]
    img = tifffile.imread(frame)
    tifffile.imwrite(frame, img[::-1])  # same size; the time stamp says it changed
    st = frame.stat()
    os.utime(frame, ns=(st.st_atime_ns, st.st_mtime_ns + 10**10))
    with pytest.raises(InputError, match="input files in .* changed"):
        runmod.prepare(data / "acquisition.yaml", out)


# --- an interrupted run continues ---------------------------------------------------------------


def test_killed_cli_run_continues_and_ends_with_the_same_results(small_series, small_reference, tmp_path):
    out = tmp_path / "run"
    cfg = small_reference.parent / "threads.yaml"
    proc = _cli("run", small_series, "--out", out, "--config", cfg, log=tmp_path / "first.log")
    killed_after = None
    deadline = time.monotonic() + 240
    try:
        while proc.poll() is None and time.monotonic() < deadline:
            done = list(out.glob(SLAB_MARKERS))
            if done:  # reconstruct is under way: at least one slab written, others in flight
                os.kill(proc.pid, signal.SIGKILL)
                killed_after = len(done)
                break
            time.sleep(0.005)
    finally:
        if proc.poll() is None and killed_after is None:
            proc.kill()
        proc.wait(timeout=60)
    assert killed_after is not None, (
        f"the run ended before reconstruct was under way:\n{(tmp_path / 'first.log').read_text()[-2000:]}"
    )
    assert proc.returncode == -signal.SIGKILL
    stages = json.loads((out / rf.RUN_JSON).read_text())["stages"]
    assert stages["register"]["status"] == "done"
    assert stages["reconstruct"]["status"] == "running"  # killed: never marked done
    assert not (out / rf.DEFECTS_JSON).exists()
    n_marked = len(list(out.glob(SLAB_MARKERS)))

    again = _cli("run", small_series, "--out", out, "--config", cfg, log=tmp_path / "second.log")
    assert again.wait(timeout=240) == 0, (tmp_path / "second.log").read_text()[-3000:]
    stages = json.loads((out / rf.RUN_JSON).read_text())["stages"]
    assert all(stages[s]["status"] == "done" for s in runmod.STAGES)
    assert stages["register"]["last_elapsed_s"] == 0.0  # complete before the kill: skipped
    res = stages["reconstruct"]["result"]
    # continued slab by slab: what was written before the kill was kept
    assert res["blocks_skipped"] == n_marked >= killed_after >= 1, (
        f"reconstruct wrote all {res['blocks_written']} slabs again instead of continuing after the "
        f"{n_marked} written before the kill (its input fingerprint differs between processes?)"
    )
    assert res["blocks_written"] + res["blocks_skipped"] == res["blocks_total"]
    for name in (rf.REGISTRATION_CSV, rf.COMPONENTS_JSON, rf.DEFECTS_JSON):
        assert (out / name).read_bytes() == (small_reference / name).read_bytes(), name
    a = zarr.open_array(str(out / rf.VOLUME / "0"), mode="r")[...]
    b = zarr.open_array(str(small_reference / rf.VOLUME / "0"), mode="r")[...]
    assert np.array_equal(a, b)

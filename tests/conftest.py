"""Shared test fixtures: tiny invented frame series and acquisition files.

Everything here is generic (no stage-specific data): a base acquisition mapping, a writer for
acquisition.yaml with nested overrides, and a writer for small TIFF frame series.
"""

from __future__ import annotations

import os

# Before numpy is imported: no threaded BLAS under Dask (see pipeline/__init__.py).
for _v in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_v, "1")


import copy
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import tifffile
import yaml

#: A minimal valid acquisition for 16 x 32 test frames. The thickness is small so that the
#: section band (t G / p_col = 100 * 0.369 / 2.5 = 15 columns) fits in 32 columns.
BASE_ACQUISITION: dict[str, Any] = {
    "sample": {"material": "Si", "thickness_um": 100.0, "diameter_mm": 300.0},
    "beam": {
        "energy_keV": 17.479,
        "reflection": [2, 2, 0],
        "geometry": "transmission",
        "slit_width_um": 15.0,
    },
    "detector": {"pixel_um": [2.5, 2.5], "tilt_deg": 0.0},
    "scan": {"start_um": 0.0, "step_um": 10.0},
    "frames": {"pattern": "frame_*.tif"},
}


def deep_merge(base: dict, overrides: dict) -> dict:
    """Copy of ``base`` with ``overrides`` merged in, nested mappings key by key (a ``None``
    value is kept: it is written as a YAML null)."""
    out = copy.deepcopy(base)
    for key, value in overrides.items():
        if isinstance(value, dict) and isinstance(out.get(key), dict):
            out[key] = deep_merge(out[key], value)
        else:
            out[key] = copy.deepcopy(value)
    return out


def _write_acquisition(
    folder: Path,
    overrides: dict | None = None,
    *,
    drop: tuple[str, ...] = (),
    text: str | None = None,
) -> Path:
    """Write ``folder/acquisition.yaml`` from :data:`BASE_ACQUISITION` merged with
    ``overrides``; ``drop`` removes dotted keys (``"scan.step_um"``); ``text`` writes raw YAML."""
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "acquisition.yaml"
    if text is not None:
        path.write_text(text)
        return path
    data = deep_merge(BASE_ACQUISITION, overrides or {})
    for dotted in drop:
        *parents, last = dotted.split(".")
        node = data
        for p in parents:
            node = node[p]
        node.pop(last, None)
    path.write_text(yaml.safe_dump(data, sort_keys=False))
    return path


def _write_tiff_frames(
    folder: Path,
    n: int = 4,
    shape: tuple[int, int] = (16, 32),
    dtype: str = "uint16",
    name: str = "frame_{:04d}.tif",
    numbers: list[int] | None = None,
    seed: int = 0,
) -> np.ndarray:
    """Write ``n`` single-page TIFF frames of random values; returns the (n, rows, cols)
    stack in the order of ``numbers`` (default 0..n-1)."""
    folder.mkdir(parents=True, exist_ok=True)
    numbers = list(range(n)) if numbers is None else numbers
    rng = np.random.default_rng(seed)
    stack = (rng.random((len(numbers), *shape)) * 1000).astype(dtype)
    for k, img in zip(numbers, stack, strict=True):
        tifffile.imwrite(folder / name.format(k), img, photometric="minisblack")
    return stack


@pytest.fixture
def write_acquisition() -> Callable[..., Path]:
    """``write_acquisition(folder, overrides=None, drop=(), text=None) -> Path``."""
    return _write_acquisition


@pytest.fixture
def write_tiff_frames() -> Callable[..., np.ndarray]:
    """``write_tiff_frames(folder, n=4, shape=(16, 32), dtype="uint16", name=..., numbers=None)``."""
    return _write_tiff_frames


@pytest.fixture
def tiff_acquisition(tmp_path: Path) -> tuple[Path, np.ndarray]:
    """A valid acquisition: 4 frames of 16 x 32 uint16 and acquisition.yaml in ``tmp_path``.
    Returns (path to acquisition.yaml, frame stack)."""
    stack = _write_tiff_frames(tmp_path)
    return _write_acquisition(tmp_path), stack


# --- a small rendered series and its threads run (scheduler, resume and SLURM tests) -------------


@pytest.fixture(scope="session")
def small_series(tmp_path_factory) -> Path:
    """acquisition.yaml of the small invented series of ``tests/_smallrun.py`` (rendered once)."""
    import _smallrun

    return _smallrun.render(tmp_path_factory.mktemp("small-series"))


@pytest.fixture(scope="session")
def small_reference(small_series, tmp_path_factory) -> Path:
    """Run folder of every stage of ``small_series`` on the threads scheduler (2 workers): the
    reference the other schedulers, killed and continued runs are compared with. Read-only:
    tests that run again copy it first."""
    import _smallrun

    from pipeline.run import run_pipeline

    root = tmp_path_factory.mktemp("small-reference")
    cfg = _smallrun.write_config(root / "threads.yaml", {"scheduler": "threads", "workers": 2})
    run_pipeline(small_series, root / "run", cfg)
    return root / "run"


def slurm_idle_reason() -> str | None:
    """Why SLURM tests cannot run here (no ``sinfo``, no idle node), or None when they can."""
    import shutil
    import subprocess

    if shutil.which("sinfo") is None:
        return "no sinfo on PATH (SLURM not installed)"
    try:
        out = subprocess.run(["sinfo", "-h", "-o", "%T"], capture_output=True, text=True, timeout=10)
    except (OSError, subprocess.TimeoutExpired) as exc:
        return f"sinfo failed: {exc}"
    if "idle" not in out.stdout.split():
        return f"no idle SLURM node (sinfo: {out.stdout.strip() or out.stderr.strip()})"
    return None


@pytest.fixture
def slurm_node() -> None:
    """Skip (saying why) unless an idle SLURM node exists (``.ci/run`` starts one). A node still
    busy with the jobs of the previous test (``completing``, ``mixed``, ``allocated``) gets up
    to 30 s to become idle."""
    import time

    why = slurm_idle_reason()
    deadline = time.monotonic() + 30
    while why and any(s in why for s in ("completing", "mixed", "allocated")) and time.monotonic() < deadline:
        time.sleep(0.5)
        why = slurm_idle_reason()
    if why:
        pytest.skip(why)

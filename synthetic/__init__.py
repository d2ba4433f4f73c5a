"""Synthetic section-topograph series with exact ground truth (demo data and accuracy tests).

Public API::

    load_scenario(path) -> Scenario
    Scenario.model_validate(mapping)
    render_series(scenario, out_dir, *, seed=None) -> Path
    make_series(scenario_path, out_dir) -> Path
    score(defects, truth, *, match_um=50.0) -> dict
    demo_scenario_path() -> Path
    cli_synth(scenario_path, out_dir) -> str

The forward model and what it leaves out are described in :mod:`synthetic.forward` and in
``docs/synthetic.md``.
"""

from __future__ import annotations

import time
from importlib import resources
from pathlib import Path

from pipeline.runfolder import read_json
from synthetic.forward import ACQUISITION_YAML, GROUND_TRUTH_JSON, render_series
from synthetic.scenario import Scenario, load_scenario
from synthetic.score import score

__all__ = [
    "Scenario",
    "cli_synth",
    "demo_scenario_path",
    "load_scenario",
    "make_series",
    "render_series",
    "score",
]

DEMO_NAME = "demo_scenario.yaml"


def demo_scenario_path() -> Path:
    """The demo scenario, shipped inside the package (``configs/demo_scenario.yaml`` links to it)."""
    return Path(str(resources.files("synthetic").joinpath(DEMO_NAME)))


def make_series(scenario_path: str | Path, out_dir: str | Path) -> Path:
    """Load a scenario file and render it into ``out_dir`` (``crackstack synth``)."""
    return render_series(load_scenario(scenario_path), out_dir)


def cli_synth(scenario_path: str | Path, out_dir: str | Path) -> str:
    """Render a scenario and return a one-paragraph summary for the command line."""
    t0 = time.perf_counter()
    out = make_series(scenario_path, out_dir)
    dt = time.perf_counter() - t0
    truth = read_json(out / GROUND_TRUTH_JSON, "ground truth")
    rows, cols = truth["frame_shape"]
    n = len(truth["frame_numbers"])
    parts = [
        f"{len(truth['cracks'])} cracks",
        f"{len(truth['dislocation_loops'])} dislocation loops",
        f"{len(truth['slip_bands'])} slip bands",
    ]
    if truth["points"]:
        parts.append(f"{len(truth['points'])} point defects")
    if truth["indents"]:
        parts.append(f"{len(truth['indents'])} indents")
    frames = f"{n} frames ({rows} x {cols} px, 16-bit TIFF)"
    extra = []
    if truth["frames_dropped"]:
        extra.append(f"{len(truth['frames_dropped'])} dropped")
    if truth["frames_corrupt"]:
        extra.append(f"{len(truth['frames_corrupt'])} corrupt")
    if extra:
        frames += " with " + " and ".join(extra)
    return (
        f"Wrote {frames} to {out} in {dt:.1f} s. Defects: {', '.join(parts)}. "
        f"Acquisition file: {out / ACQUISITION_YAML}; ground truth: {out / GROUND_TRUTH_JSON}."
    )

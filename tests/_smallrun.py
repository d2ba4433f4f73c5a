"""A small invented section-topograph series and run configs for the scheduler and resume tests.

Why not the demo scenario itself: one demo run (300 frames of 256 x 512 px, a 775 um wafer)
takes about 1-2 minutes on the 2-core CI machine, and these tests need some eight runs
(threads, processes, local-cluster, a killed worker, an interrupted and continued run, SLURM,
...) while the whole suite must stay under 15 minutes. The small series keeps what the tests
are about: every stage runs its real code on data with a section band, drift, noise, a dark and
a flat, one surface crack and one dislocation loop (from the demo's contrast and instrument
model), and the volume is written in enough slabs (15) that a worker or the whole run can be
killed while reconstruct tasks are in flight. It renders in under a second; a threads run of
register .. measure takes about 5 s on an idle machine.

Sizes: 48 frames of 64 x 128 px, 0.8 um pixels, a 200 um wafer (band t G / p = 92 columns).
"""

from __future__ import annotations

from pathlib import Path

import yaml

import synthetic
from pipeline import bench_cluster

#: reconstruct chunks (z, y, x) voxels: 4 voxels (16 um) per x slab gives 15 slab tasks.
CHUNK_VOXELS = [64, 64, 4]
#: The stages that make defects.json (assess has no recipe here and report adds nothing to it).
TO_MEASURE = bench_cluster.TO_MEASURE


def small_scenario() -> synthetic.Scenario:
    """The demo scenario with a shorter scan, smaller frames, a thinner wafer, two defects (the
    same small run the ``cluster_overhead`` bench case times)."""
    return bench_cluster.small_scenario()


def render(folder: Path) -> Path:
    """Render the small series into ``folder``; returns its acquisition.yaml."""
    synthetic.render_series(small_scenario(), folder)
    return folder / "acquisition.yaml"


def write_config(path: Path, compute: dict | None = None, **sections) -> Path:
    """A run config: the test chunks for reconstruct, ``compute`` and any other sections."""
    doc: dict = {"reconstruct": {"chunk_voxels": CHUNK_VOXELS}}
    for name, values in sections.items():
        doc.setdefault(name, {}).update(values)
    if compute is not None:
        doc["compute"] = compute
    path.write_text(yaml.safe_dump(doc, sort_keys=False))
    return path

"""Tests of the bench framework (pipeline.bench): cases register, figures are judged against
their targets, one line per figure is printed and the same goes to JSON; the reconstruct case's
pieces run on a tiny invented series (no timed assertions: speed is what the bench reports)."""

from __future__ import annotations

import io
import json
import math

import numpy as np
import pytest

from pipeline import bench
from pipeline.register import read_registration_csv


@pytest.mark.parametrize(
    "value, target, passed",
    [(1.5, "<= 2.0", True), (2.5, "<= 2.0", False), (3.0, ">= 3", True), (None, "<= 1", False),
     (math.nan, "<= 1", False), (0.9, "info", True), (None, "info", False)],
)
def test_figure_is_judged_against_its_target(value, target, passed):
    row = bench.figure("f", value, target, "x")
    assert set(row) == {"name", "value", "target", "unit", "passed"} and row["passed"] is passed


def test_main_prints_one_line_per_figure_and_writes_json(tmp_path):
    def good(ctx):
        assert ctx.quick and ctx.workdir.is_dir()
        return [bench.figure("speed", 1.2, "<= 2.0", "x"), bench.figure("memory", 0.4, "<= 1.5", "GiB")]

    def broken(ctx):
        raise RuntimeError("no data")

    out = io.StringIO()
    rc = bench.main(True, tmp_path / "b.json", workdir=tmp_path, cases=[("good", good), ("broken", broken)], out=out)
    lines = out.getvalue().splitlines()
    assert rc == 1  # a failed (here: broken) figure fails the bench
    assert len(lines) == 3 and lines[0].split()[0] == "speed" and lines[0].endswith("pass")
    assert lines[2].startswith("broken") and lines[2].endswith("FAIL")
    doc = json.loads((tmp_path / "b.json").read_text())
    assert doc["quick"] is True and [r["name"] for r in doc["figures"]] == ["speed", "memory", "broken"]
    assert "no data" in doc["figures"][2]["error"]
    assert bench.main(True, None, workdir=tmp_path, cases=[("good", good)], out=io.StringIO()) == 0
    assert list(tmp_path.iterdir()) == [tmp_path / "b.json"]  # scratch folders removed


def test_register_case_adds_once():
    before = list(bench._CASES)
    try:
        def extra(ctx):
            return []

        assert bench.register_case(extra) is extra
        bench.register_case(name="extra")(extra)
        assert [n for n, _ in bench._CASES].count("extra") == 1
        assert ("reconstruct", bench.bench_reconstruct) in bench._CASES
    finally:
        bench._CASES[:] = before


def test_reconstruct_case_pieces_on_a_tiny_series(tmp_path):
    """The bench series (long + a linked short quarter, each with its registration table), one
    reconstruction as the child process runs it, and the I/O floor of the same data."""
    long_acq, short_acq = bench._make_bench_series(tmp_path, 12, 24, 160)
    assert len(list(long_acq.parent.glob("frame_*.tif"))) == 12
    assert len(list(short_acq.parent.glob("frame_*.tif"))) == 3
    assert read_registration_csv(short_acq.parent / "registration.csv")["frame"].size == 3
    result = tmp_path / "r.json"
    bench._child_reconstruct(long_acq, tmp_path / "v.ome.zarr", result)
    rec = json.loads(result.read_text())
    assert rec["seconds"] > 0 and rec["peak_rss_bytes"] > 0 and rec["info"]["blocks_written"] >= 1
    floor = bench.io_floor_seconds(long_acq, tmp_path / "v.ome.zarr")
    assert floor["read_s"] > 0 and floor["write_s"] > 0
    assert not (tmp_path / "floor.zarr").exists()


def test_rendered_band_matches_the_projection():
    """The bench frames put the perfect-crystal band where SPEC 5 says: columns c0 .. c0 + tG/p
    (half-maximum crossings of a box blurred symmetrically by the slit)."""
    from pipeline.config import Acquisition
    from pipeline.geometry import Geometry

    geom = Geometry.from_acquisition(Acquisition.model_validate({**bench.BENCH_ACQ, "scan": {"step_um": 10}}))
    model = bench.SeriesModel(rows=8, cols=200, psf_px=0.0)
    prof = bench.band_profile(geom, model, 30.3)
    cols = np.arange(200)
    inside = prof > 0.5
    assert abs(cols[inside][0] - 30.3) < 1.0 and abs(cols[inside][-1] - (30.3 + geom.band_width_px)) < 1.0
    assert abs(np.median(prof[inside]) - 1.0) < 1e-6

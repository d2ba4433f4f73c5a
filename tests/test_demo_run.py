"""`crackstack demo` end to end: render the demo scenario, run every stage with the demo recipe,
then check what a person reads first: the printed table, report.html and the 3D view.

The demo data are invented (synthetic/demo_scenario.yaml). What is checked against something
outside the project is in the shared report checks (tests/_html.py: PNG signature and decode,
SVG as XML) and in the stage tests; here the point is that the real demo run holds together:
the table agrees with defects.json and assessment.json, the report names every crack and carries
the cautions, and napari renders the run in 3D.

One demo run serves the module (about 1-2 min on 2 cores).
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np
import pytest

from pipeline import demo, report
from pipeline import runfolder as rf

sys.path.insert(0, str(Path(__file__).parent))
from _html import SECTIONS, check_images, parse  # noqa: E402

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory) -> tuple[Path, str]:
    out = tmp_path_factory.mktemp("demo")
    printed = demo.run_demo(out)
    return out / "run", printed


def test_demo_runs_every_stage(demo_run):
    run, printed = demo_run
    record = rf.read_json(run / rf.RUN_JSON)
    for stage in ("register", "reconstruct", "segment", "measure", "assess", "report"):
        assert record["stages"][stage]["status"] == "done", stage
    defects = rf.read_defects(run / rf.DEFECTS_JSON)
    # the scenario holds two edge cracks, an inclined surface crack and the indent's cracks
    assert len(defects["cracks"]) >= 2
    assert "CAUTION" in printed and "crackstack view" in printed


def test_printed_table_matches_the_exports(demo_run):
    run, printed = demo_run
    defects = rf.read_defects(run / rf.DEFECTS_JSON)
    assessed = {c["id"]: c for c in json.loads((run / rf.ASSESSMENT_JSON).read_text())["cracks"]}
    rows = demo.crack_table(run)
    assert [r["defect"] for r in rows] == [c["id"] for c in defects["cracks"]]
    lines = printed.splitlines()
    for row, crack in zip(rows, defects["cracks"], strict=True):
        assert row["depth_um"] == round(crack["depth_um"], 1)
        assert row["length_um"] == round(crack["length_um"], 1)
        assert row["verdict"] == assessed[crack["id"]]["verdict"]
        # each crack has its own line in the printed table, with its depth and verdict
        assert any(
            line.split() and line.split()[0] == str(crack["id"]) and f"{row['depth_um']:.1f}" in line
            and row["verdict"] in line for line in lines
        ), crack["id"]


def test_report_of_the_demo_run(demo_run):
    run, _ = demo_run
    text = (run / rf.REPORT_HTML).read_text()
    parsed = parse(text)
    for sec in SECTIONS:
        assert sec in parsed.ids, sec
    defects = rf.read_defects(run / rf.DEFECTS_JSON)
    for c in defects["cracks"]:
        assert f"crack-{c['id']}" in parsed.ids
    assert check_images(text, parsed) >= 2 + len(defects["cracks"]) + 2
    plain = " ".join(" ".join(parsed.text).split())
    for c in report.cautions():
        assert " ".join(c.split()) in plain


@pytest.mark.viewer
def test_demo_run_in_3d(make_napari_viewer, demo_run):
    pytest.importorskip("napari")
    from skimage.io import imsave

    import viewer_plugins

    run, _ = demo_run
    viewer = make_napari_viewer(show=True)
    panel = viewer_plugins.open_in_viewer(viewer, run)
    assert len(panel.view["rows"]) >= 2
    viewer.dims.ndisplay = 3
    viewer.scene.camera.angles = (-20.0, 25.0, 115.0)
    viewer.fit_to_view()
    shot = viewer.screenshot(canvas_only=True, flash=False)
    imsave(run.parent / "demo_3d.png", shot)
    rgb = shot[..., :3].astype(float)
    # not a black or uniform canvas: the volume and the defect surfaces are drawn
    assert rgb.std() > 5 and (rgb.max(axis=2) > 40).mean() > 0.02
    assert len(np.unique(rgb.reshape(-1, 3), axis=0)) > 50

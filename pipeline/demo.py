"""`crackstack demo`: the built-in demo scenario through the whole pipeline.

Renders the invented demo scenario with ``synthetic``, runs every stage with the demo recipe,
writes the report, and returns a printable summary: one row per crack (kind, depth, length,
inclination, plane, margin, verdict) read back from ``defects.json`` and ``assessment.json``.
"""

from __future__ import annotations

import time
from pathlib import Path

from pipeline import runfolder as rf


def demo_recipe_path() -> Path:
    """The demo thermal recipe, shipped as package data (configs/demo_recipe.yaml links to it)."""
    return Path(__file__).parent / "data" / "demo_recipe.yaml"


def crack_table(run_root: Path) -> list[dict]:
    """Rows of the demo table, joined by crack id from defects.json and assessment.json."""
    defects = rf.read_defects(run_root / rf.DEFECTS_JSON)
    assessed = {}
    ap = run_root / rf.ASSESSMENT_JSON
    if ap.exists():
        assessed = {c["id"]: c for c in rf.read_json(ap).get("cracks", [])}
    rows = []
    for c in defects["cracks"]:
        a = assessed.get(c["id"], {})
        rows.append({
            "defect": c["id"],
            "kind": c["kind"],
            "depth_um": round(c["depth_um"], 1),
            "length_um": round(c["length_um"], 1),
            "inclination_deg": round(c["plane"]["inclination_deg"], 1),
            "plane": "(" + " ".join(str(v) for v in c["plane"]["nearest_hkl"]) + ")",
            "margin": _margin(a.get("margin")),
            "verdict": a.get("verdict", "-"),
        })
    return rows


def _margin(m: float | None) -> str | None:
    """Margins far above 1 carry no information beyond "large"; show them as the report does."""
    if m is None:
        return None
    return "> 100" if m > 100 else f"{m:.2f}"


def run_demo(out: str | Path) -> str:
    """Make the demo data in ``out/data``, run into ``out/run``; returns the printed summary."""
    import synthetic
    from pipeline.assess import CAUTIONS
    from pipeline.cli import format_table
    from pipeline.run import run_pipeline

    out = Path(out)
    data, run_root = out / "data", out / "run"
    t0 = time.perf_counter()
    if not (data / "acquisition.yaml").exists():
        synthetic.render_series(synthetic.load_scenario(synthetic.demo_scenario_path()), data)
    t_synth = time.perf_counter() - t0
    record = run_pipeline(data / "acquisition.yaml", run_root, recipe=demo_recipe_path())
    t_all = time.perf_counter() - t0
    rows = crack_table(run_root)
    defects = rf.read_defects(run_root / rf.DEFECTS_JSON)
    verdict = record["stages"].get("assess", {}).get("result", {}).get("wafer_verdict", "-")
    lines = [
        f"demo scenario rendered to {data} ({t_synth:.1f} s); pipeline run in {run_root} "
        f"({t_all:.1f} s in all)",
        f"found {len(defects['cracks'])} cracks, {len(defects['dislocation_loops'])} dislocation loops, "
        f"{len(defects['slip_bands'])} slip bands; wafer verdict with the demo recipe: {verdict}",
        "",
        format_table(rows),
        "",
        f"report:        {run_root / rf.REPORT_HTML}",
        f"review in 3D:  crackstack view {run_root}    (needs: pip install 'crackstack[viewer]')",
        "",
        f"CAUTION: {CAUTIONS}",
    ]
    return "\n".join(lines)

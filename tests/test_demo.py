"""`crackstack demo`'s printed table agrees with defects.json and assessment.json."""

import json
import sys
from pathlib import Path

from pipeline import demo

sys.path.insert(0, str(Path(__file__).parent))
from _report_fixture import build_report_run  # noqa: E402


def test_crack_table_matches_the_exports(tmp_path):
    run = build_report_run(tmp_path / "run")
    defects = json.loads((run / "defects.json").read_text())
    assessed = {c["id"]: c for c in json.loads((run / "assessment.json").read_text())["cracks"]}
    rows = demo.crack_table(run)
    assert [r["defect"] for r in rows] == [c["id"] for c in defects["cracks"]]
    for row, crack in zip(rows, defects["cracks"], strict=True):
        assert row["kind"] == crack["kind"]
        assert row["depth_um"] == round(crack["depth_um"], 1)
        assert row["length_um"] == round(crack["length_um"], 1)
        assert row["inclination_deg"] == round(crack["plane"]["inclination_deg"], 1)
        assert row["plane"] == "(" + " ".join(map(str, crack["plane"]["nearest_hkl"])) + ")"
        a = assessed[crack["id"]]
        assert row["verdict"] == a["verdict"]
        m = a["margin"]
        assert row["margin"] == ("> 100" if m > 100 else f"{m:.2f}")

"""Exit codes of the command line (SPEC section 9)."""

import pytest
from typer.testing import CliRunner

from pipeline import cli

runner = CliRunner()


def test_help_lists_the_commands():
    res = runner.invoke(cli.app, ["--help"])
    assert res.exit_code == 0
    for cmd in ("check", "run", "synth", "demo", "assess", "view", "bench", "report"):
        assert cmd in res.output


def test_internal_error_exits_1_without_traceback(monkeypatch, tmp_path):
    def boom(*a, **k):
        raise RuntimeError("kaboom")

    monkeypatch.setattr("pipeline.run.run_pipeline", boom)
    res = runner.invoke(cli.app, ["run", str(tmp_path / "a.yaml"), "--out", str(tmp_path / "r")])
    assert res.exit_code == 1
    assert "internal error" in res.output and "kaboom" in res.output
    assert "Traceback" not in res.output


def test_interrupt_exits_130(monkeypatch, tmp_path):
    def interrupted(*a, **k):
        raise KeyboardInterrupt

    monkeypatch.setattr("pipeline.run.run_pipeline", interrupted)
    res = runner.invoke(cli.app, ["run", str(tmp_path / "a.yaml"), "--out", str(tmp_path / "r")])
    assert res.exit_code == 130
    assert "again" in res.output


def test_assess_needs_exactly_one_source(tmp_path):
    res = runner.invoke(cli.app, ["assess", str(tmp_path / "d.json"), "--out", str(tmp_path / "a.json")])
    assert res.exit_code == 2
    assert "--recipe" in res.output and "--stress-csv" in res.output


def test_run_missing_acquisition_exits_2(tmp_path):
    res = runner.invoke(cli.app, ["run", str(tmp_path / "missing.yaml"), "--out", str(tmp_path / "r")])
    assert res.exit_code == 2
    assert "missing.yaml" in res.output and "not found" in res.output


@pytest.mark.parametrize("rows", [[{"id": 1, "v": 1.23456, "n": None}]])
def test_format_table(rows):
    text = cli.format_table(rows)
    assert "1.23" in text and "-" in text.splitlines()[-1]
    # a value rounded to one decimal keeps it (the demo table is compared with defects.json)
    assert "123.4" in cli.format_table([{"depth_um": 123.4}])

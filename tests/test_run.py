"""The orchestrator's bookkeeping: run.json, fingerprints, refusal of changed inputs."""

import json

import pytest
import yaml

from pipeline import run as runmod
from pipeline.errors import InputError

ACQ = {
    "sample": {"thickness_um": 500, "diameter_mm": 200},
    "beam": {"energy_keV": 17.479, "reflection": [2, 2, 0]},
    "scan": {"step_um": 10},
}


@pytest.fixture
def acq_path(tmp_path):
    p = tmp_path / "data" / "acquisition.yaml"
    p.parent.mkdir()
    p.write_text(yaml.safe_dump(ACQ))
    return p


def test_changed_keys_lists_dotted_paths():
    old = {"a": {"b": 1, "c": [1, 2]}, "d": 3}
    new = {"a": {"b": 2, "c": [1, 2]}, "e": 4}
    assert runmod.changed_keys(old, new) == ["a.b", "d", "e"]


def test_prepare_writes_provenance(acq_path, tmp_path):
    ctx = runmod.prepare(acq_path, tmp_path / "run")
    rec = json.loads((tmp_path / "run" / "run.json").read_text())
    assert rec["software"]["crackstack"]
    assert rec["acquisition"]["beam"]["energy_keV"] == 17.479
    assert rec["geometry"]["G"] == pytest.approx(ctx.geom.G)
    assert rec["config"]["segment"]["min_size_um"] == 15.0


def test_changed_config_is_refused_naming_the_key(acq_path, tmp_path):
    out = tmp_path / "run"
    runmod.prepare(acq_path, out)
    cfg = tmp_path / "run.yaml"
    cfg.write_text("segment:\n  min_size_um: 30\n")
    with pytest.raises(InputError, match=r"config\.segment\.min_size_um"):
        runmod.prepare(acq_path, out, cfg)
    # The old record is untouched.
    assert json.loads((out / "run.json").read_text())["config"]["segment"]["min_size_um"] == 15.0


def test_changed_acquisition_is_refused(acq_path, tmp_path):
    out = tmp_path / "run"
    runmod.prepare(acq_path, out)
    changed = dict(ACQ, beam={"energy_keV": 20.0, "reflection": [2, 2, 0]})
    acq_path.write_text(yaml.safe_dump(changed))
    with pytest.raises(InputError, match=r"acquisition\.beam\.energy_keV"):
        runmod.prepare(acq_path, out)


def test_fingerprint_depends_on_own_section_only(acq_path, tmp_path):
    ctx = runmod.prepare(acq_path, tmp_path / "run")
    fp_measure = runmod._fingerprint(ctx, "measure", "up")
    fp_segment = runmod._fingerprint(ctx, "segment", "up")
    assert fp_measure != fp_segment
    assert runmod._fingerprint(ctx, "measure", "other-upstream") != fp_measure


def test_missing_recipe_is_input_error(acq_path, tmp_path):
    with pytest.raises(InputError, match="recipe"):
        runmod.prepare(acq_path, tmp_path / "run", recipe=tmp_path / "nope.yaml")


def test_configs_run_yaml_lists_the_defaults():
    # configs/run.yaml documents every key with its default; it must not drift from the model.
    from pathlib import Path

    from pipeline.config import RunConfig

    doc = yaml.safe_load((Path(__file__).parent.parent / "configs" / "run.yaml").read_text())
    assert doc == RunConfig().model_dump(mode="json")

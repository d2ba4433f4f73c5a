"""`crackstack run`: the stages in order over one run folder, resumable and recorded in run.json.

Each stage records in ``run.json`` its status, a fingerprint of its inputs and parameters, and
its timings. Running the same command again skips every stage that is complete with the same
fingerprint, redoes what is not (reconstruct also resumes block by block), and refuses to mix
outputs of a changed configuration or acquisition into an old run folder: it names the keys that
changed.
"""

from __future__ import annotations

import hashlib
import json
import logging
import platform
import time
from dataclasses import dataclass, field
from datetime import UTC, datetime
from importlib import metadata
from pathlib import Path
from typing import Any

from pipeline import __version__
from pipeline import runfolder as rf
from pipeline.config import Acquisition, RunConfig, load_acquisition, load_run_config
from pipeline.errors import InputError
from pipeline.geometry import Geometry

log = logging.getLogger(__name__)

STAGES = ("register", "reconstruct", "segment", "measure", "assess", "report")
_VERSIONED = ("numpy", "scipy", "scikit-image", "zarr", "dask", "tifffile", "pydantic")


def software_versions() -> dict[str, str]:
    out = {"crackstack": __version__, "python": platform.python_version()}
    for name in _VERSIONED:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            pass
    return out


def _digest(obj: Any) -> str:
    return hashlib.sha256(json.dumps(obj, sort_keys=True, default=str).encode()).hexdigest()[:16]


def _flatten(d: Any, prefix: str = "") -> dict[str, Any]:
    if isinstance(d, dict):
        out: dict[str, Any] = {}
        for k, v in d.items():
            out.update(_flatten(v, f"{prefix}{k}."))
        return out
    return {prefix.rstrip("."): d}


def changed_keys(old: dict, new: dict) -> list[str]:
    """Dotted keys whose values differ between two nested mappings."""
    a, b = _flatten(old), _flatten(new)
    return sorted(k for k in a.keys() | b.keys() if a.get(k) != b.get(k))


def _frames_fingerprint(acq: Acquisition, base_dir: Path) -> str:
    """Names, sizes and modification times of the input files (cheap; no pixel reads)."""
    items = []
    for p in sorted(base_dir.iterdir()):
        if p.is_file():
            st = p.stat()
            items.append((p.name, st.st_size, int(st.st_mtime)))
    return _digest(items)


@dataclass
class RunContext:
    acquisition_path: Path
    out: Path
    acq: Acquisition
    base_dir: Path
    cfg: RunConfig
    config_dir: Path
    geom: Geometry
    recipe: Path | None
    record: dict = field(default_factory=dict)
    _corrected: Any = None
    _series: Any = None

    @property
    def run(self) -> rf.RunFolder:
        return rf.RunFolder(self.out)

    def corrected(self):
        """The lazily corrected frames (opened once per process)."""
        if self._corrected is None:
            from pipeline.correct import correct_series
            from pipeline.ingest import open_series

            self._series = open_series(self.acq, self.base_dir)
            self._corrected = correct_series(self._series, self.cfg.correct)
        return self._series, self._corrected


# --- stages -------------------------------------------------------------------------------------


def _stage_register(ctx: RunContext) -> dict:
    from pipeline.register import register_frames, write_registration_csv

    series, corrected = ctx.corrected()
    res = register_frames(corrected, ctx.geom, series.positions_um, ctx.cfg.registration)
    write_registration_csv(ctx.out / rf.REGISTRATION_CSV, res)  # warnings: logged by register
    return {
        "G_computed": res.G_computed,
        "G_measured": res.G_measured,
        "band_width_px": res.band_width_px,
        "warnings": list(res.warnings),
        "flagged_frames": [int(i) for i in res.flagged],
    }


def _stage_reconstruct(ctx: RunContext) -> dict:
    from pipeline.reconstruct import reconstruct_volume
    from pipeline.register import read_registration_csv

    series, corrected = ctx.corrected()
    reg = read_registration_csv(ctx.out / rf.REGISTRATION_CSV)
    info = reconstruct_volume(
        corrected, ctx.geom, series.positions_um, reg, ctx.cfg.reconstruct, ctx.out / rf.VOLUME,
        extra_meta={"acquisition": ctx.acq.model_dump(mode="json")},
    )
    return {k: v for k, v in info.items() if k != "volume"}


def _stage_segment(ctx: RunContext) -> dict:
    from pipeline.segment import segment_volume

    comps = segment_volume(ctx.out / rf.VOLUME, ctx.cfg.segment)
    rf.write_json_atomic(ctx.out / rf.COMPONENTS_JSON, comps)
    counts: dict[str, int] = {}
    for c in comps["components"]:
        counts[c["class"]] = counts.get(c["class"], 0) + 1
    return {"components": counts}


def _stage_measure(ctx: RunContext) -> dict:
    from pipeline.measure import measure_defects, write_exports

    doc = measure_defects(ctx.out, ctx.acq, ctx.cfg.measure, software_version=__version__)
    # A re-measure must not throw away reviews already recorded for the same ids.
    old = ctx.out / rf.DEFECTS_JSON
    if old.exists():
        try:
            prev = rf.read_json(old)
            reviews = {
                (kind, d["id"]): d.get("review") for kind in ("cracks", "dislocation_loops", "slip_bands")
                for d in prev.get(kind, []) if d.get("review")
            }
            for kind in ("cracks", "dislocation_loops", "slip_bands"):
                for d in doc.get(kind, []):
                    if (kind, d["id"]) in reviews and "review" in d:
                        d["review"] = reviews[(kind, d["id"])]
        except InputError:
            pass
    write_exports(ctx.out, doc)
    return {
        "cracks": len(doc["cracks"]),
        "dislocation_loops": len(doc["dislocation_loops"]),
        "slip_bands": len(doc["slip_bands"]),
    }


def _stage_assess(ctx: RunContext) -> dict:
    from pipeline.assess import assess_defects, write_assessment

    if ctx.recipe is None:
        return {"skipped": "no recipe given (assess.recipe in the config, or --recipe)"}
    defects = rf.read_defects(ctx.out / rf.DEFECTS_JSON)
    doc = assess_defects(defects, recipe_path=ctx.recipe)
    write_assessment(ctx.out / rf.ASSESSMENT_JSON, doc)
    return {"wafer_verdict": doc.get("wafer_verdict")}


def _stage_report(ctx: RunContext) -> dict:
    from pipeline.report import write_report

    path = write_report(ctx.out)
    return {"report": str(Path(path).name)}


_RUNNERS = {
    "register": _stage_register,
    "reconstruct": _stage_reconstruct,
    "segment": _stage_segment,
    "measure": _stage_measure,
    "assess": _stage_assess,
    "report": _stage_report,
}
_OUTPUTS = {
    "register": [rf.REGISTRATION_CSV],
    "reconstruct": [rf.VOLUME],
    "segment": [rf.COMPONENTS_JSON],
    "measure": [rf.DEFECTS_JSON, rf.DEFECTS_CSV],
    "assess": [],
    "report": [rf.REPORT_HTML],
}
_SECTIONS = {
    "register": ["correct", "registration"],
    "reconstruct": ["correct", "reconstruct"],
    "segment": ["segment"],
    "measure": ["measure"],
    "assess": ["assess"],
    "report": [],
}


def _now() -> str:
    return datetime.now(UTC).isoformat(timespec="seconds")


def prepare(
    acquisition_path: str | Path,
    out: str | Path,
    config_path: str | Path | None = None,
    *,
    recipe: str | Path | None = None,
) -> RunContext:
    """Validate every input up front and check the run folder against the new configuration."""
    acq_path = Path(acquisition_path)
    acq, base_dir = load_acquisition(acq_path)
    cfg = load_run_config(config_path)
    config_dir = Path(config_path).resolve().parent if config_path else Path.cwd()
    geom = Geometry.from_acquisition(acq)
    recipe_path: Path | None = None
    if recipe is not None:
        recipe_path = Path(recipe).resolve()
    elif cfg.assess.recipe:
        recipe_path = (config_dir / cfg.assess.recipe).resolve()
    if recipe_path is not None and not recipe_path.is_file():
        raise InputError(f"assess.recipe: recipe file {recipe_path} not found")
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise InputError(f"--out {out}: exists and is not a folder")
    ctx = RunContext(acq_path, out, acq, base_dir, cfg, config_dir, geom, recipe_path)

    new_inputs = {
        "acquisition": acq.model_dump(mode="json"),
        "config": cfg.model_dump(mode="json"),
        "recipe": _file_digest(recipe_path),
    }
    record = ctx.run.read_run() if out.exists() else {}
    if record:
        old_inputs = {k: record.get(k) for k in new_inputs}
        # Where the work runs does not change the outputs (same results on every scheduler), so
        # a run may be continued with another compute section (SLURM, then a workstation).
        diff = [k for k in changed_keys(old_inputs, new_inputs) if not k.startswith("config.compute.")]
        # A key that a newer crackstack added, at its default, is not a change of the user's
        # inputs (the run folder predates the key); its stage still reruns, because the stage
        # fingerprint covers the whole section.
        old_flat = _flatten(old_inputs)
        defaults = _flatten({"config": RunConfig().model_dump(mode="json")})
        new_flat = _flatten(new_inputs)
        diff = [k for k in diff if not (k not in old_flat and k in defaults and new_flat.get(k) == defaults[k])]
        if diff:
            shown = ", ".join(diff[:6]) + (f" and {len(diff) - 6} more" if len(diff) > 6 else "")
            raise InputError(
                f"{out}: this run folder was made with different inputs ({shown} changed); "
                "use a new --out folder, or restore the old values to continue it"
            )
        # Stage fingerprints use the recorded frames fingerprint, so changed input files must be
        # caught here, or old outputs would pass for results of the new frames.
        if record.get("frames_fingerprint") not in (None, _frames_fingerprint(acq, base_dir)):
            raise InputError(
                f"{out}: the input files in {base_dir} changed (names, sizes or modification "
                "times) since this run folder was made; use a new --out folder"
            )
        record["config"] = new_inputs["config"]  # the compute section in use now, new keys
    else:
        out.mkdir(parents=True, exist_ok=True)
        record = {
            "software": software_versions(),
            **new_inputs,
            "acquisition_file": str(acq_path.resolve()),
            "frames_fingerprint": _frames_fingerprint(acq, base_dir),
            "geometry": {
                k: getattr(geom, k) for k in ("geometry", "energy_keV", "theta_B_deg", "psi0_deg",
                                               "psi_h_deg", "tilt_deg", "G", "G_computed", "L")
            },
            "stages": {},
        }
        ctx.run.write_run(record)
    ctx.record = record
    return ctx


def _file_digest(path: Path | None) -> str | None:
    if path is None:
        return None
    return hashlib.sha256(path.read_bytes()).hexdigest()[:16]


def _fingerprint(ctx: RunContext, stage: str, upstream: str) -> str:
    cfg = ctx.cfg.model_dump(mode="json")
    parts = {
        "stage": stage,
        "upstream": upstream,
        "frames": ctx.record.get("frames_fingerprint"),
        "acquisition": ctx.record.get("acquisition"),
        "sections": {s: cfg[s] for s in _SECTIONS[stage]},
        "recipe": ctx.record.get("recipe") if stage == "assess" else None,
        "version": __version__,
    }
    return _digest(parts)


def execute(ctx: RunContext, *, stages: tuple[str, ...] = STAGES) -> dict:
    """Run (or skip) each stage in order; returns the run record."""
    from pipeline.compute import use_scheduler

    upstream = ""
    with use_scheduler(ctx.cfg.compute):
        for stage in stages:
            fp = _fingerprint(ctx, stage, upstream)
            upstream = fp
            entry = ctx.record["stages"].get(stage, {})
            outputs_there = all((ctx.out / o).exists() for o in _OUTPUTS[stage])
            if entry.get("status") == "done" and entry.get("fingerprint") == fp and outputs_there:
                log.info("%s: complete, skipped", stage)
                entry["skipped_runs"] = entry.get("skipped_runs", 0) + 1
                entry["last_elapsed_s"] = 0.0
                ctx.record["stages"][stage] = entry
                ctx.run.write_run(ctx.record)
                continue
            log.info("%s: running", stage)
            t0 = time.perf_counter()
            ctx.record["stages"][stage] = {"status": "running", "fingerprint": fp, "started": _now()}
            ctx.run.write_run(ctx.record)
            try:
                result = _RUNNERS[stage](ctx)
            except BaseException:
                ctx.record["stages"][stage].update(status="failed", finished=_now())
                ctx.run.write_run(ctx.record)
                raise
            el = round(time.perf_counter() - t0, 3)
            ctx.record["stages"][stage] = {
                "status": "done", "fingerprint": fp, "started": ctx.record["stages"][stage]["started"],
                "finished": _now(), "elapsed_s": el, "last_elapsed_s": el, "result": result,
            }
            ctx.run.write_run(ctx.record)
            log.info("%s: done in %.1f s", stage, el)
    return ctx.record


def run_pipeline(
    acquisition_path: str | Path,
    out: str | Path,
    config_path: str | Path | None = None,
    *,
    recipe: str | Path | None = None,
    stages: tuple[str, ...] = STAGES,
) -> dict:
    """Validate inputs, then run the stages over the run folder ``out``; returns run.json's record."""
    return execute(prepare(acquisition_path, out, config_path, recipe=recipe), stages=stages)

"""The run folder: the one interface between stages, the viewer and other tools (SPEC section 6).

Every file is written atomically (temporary file in the same folder, fsync, rename), so a crash
never leaves a half-written JSON or CSV behind and earlier results stay intact.

Layout::

    <run>/run.json              config, acquisition, versions, timings, per-stage status
    <run>/registration.csv      per frame: r0, c0, shifts, quality score
    <run>/volume.ome.zarr       OME-Zarr 0.5 multiscale image (z, y, x um) + labels/defects
    <run>/components.json       segment -> measure: one entry per labelled component
    <run>/defects.json          the defect export (SPEC section 7), schema-validated
    <run>/defects.csv           one row per defect, same ids
    <run>/assessment.json       per crack: K_I, K_IC, margin, verdict (when a recipe is given)
    <run>/report.html           the report a person reads first
    <run>/review_log.jsonl      append-only log of review actions (viewer)
"""

from __future__ import annotations

import csv
import io
import json
import os
import tempfile
from functools import cache
from importlib import resources
from pathlib import Path
from typing import Any

import numpy as np

from pipeline.errors import InputError

RUN_JSON = "run.json"
REGISTRATION_CSV = "registration.csv"
VOLUME = "volume.ome.zarr"
LABELS = "labels/defects"
COMPONENTS_JSON = "components.json"
DEFECTS_JSON = "defects.json"
DEFECTS_CSV = "defects.csv"
ASSESSMENT_JSON = "assessment.json"
REPORT_HTML = "report.html"
REVIEW_LOG = "review_log.jsonl"


def _json_default(obj: Any) -> Any:
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.floating):
        return float(obj)
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(f"not JSON serialisable: {type(obj).__name__}")


def write_bytes_atomic(path: str | Path, data: bytes) -> Path:
    """Write ``data`` to ``path`` via a temporary file and a rename (atomic on POSIX)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        # mkstemp makes 0600 files; run folders are shared with colleagues and the viewer.
        os.fchmod(fd, 0o644)
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return path


def write_text_atomic(path: str | Path, text: str) -> Path:
    return write_bytes_atomic(path, text.encode("utf-8"))


def write_json_atomic(path: str | Path, obj: Any) -> Path:
    """Write JSON (NumPy scalars and arrays allowed) atomically."""
    return write_text_atomic(path, json.dumps(obj, indent=2, default=_json_default) + "\n")


def write_csv_atomic(path: str | Path, header: list[str], rows: list[list[Any]]) -> Path:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(header)
    w.writerows(rows)
    return write_text_atomic(path, buf.getvalue())


def read_json(path: str | Path, what: str = "JSON file") -> Any:
    """Read a JSON file; a missing or corrupt file is an :class:`InputError`."""
    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: {what} not found")
    try:
        return json.loads(path.read_text())
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise InputError(f"{path}: {what} is not valid JSON ({exc})") from None


@cache
def defects_schema() -> dict:
    """The JSON Schema (draft 2020-12) of ``defects.json`` that the project ships."""
    text = resources.files("pipeline").joinpath("schemas/defects.schema.json").read_text()
    return json.loads(text)


def validate_defects(doc: Any, source: str = "defects.json") -> None:
    """Validate a defect export against the shipped schema.

    Raises
    ------
    InputError
        Naming the JSON path of the first offending key (e.g. ``cracks[0].depth_um``).
    """
    import jsonschema

    validator = jsonschema.Draft202012Validator(defects_schema())
    errors = sorted(validator.iter_errors(doc), key=lambda e: list(e.absolute_path))
    if errors:
        e = errors[0]
        path = "".join(f"[{p}]" if isinstance(p, int) else f".{p}" for p in e.absolute_path)
        path = path.lstrip(".") or "(top level)"
        more = f" (and {len(errors) - 1} more problems)" if len(errors) > 1 else ""
        raise InputError(f"{source}: {path}: {e.message}{more}")


def read_defects(path: str | Path) -> dict:
    """Read and validate a ``defects.json`` (ours or from another tool)."""
    doc = read_json(path, "defect export")
    validate_defects(doc, str(path))
    return doc


def write_defects(path: str | Path, doc: dict) -> Path:
    """Validate and write ``defects.json`` atomically."""
    doc = json.loads(json.dumps(doc, default=_json_default))
    validate_defects(doc, str(path))
    return write_json_atomic(path, doc)


class RunFolder:
    """Paths of one run folder; reading and writing go through this module's functions."""

    def __init__(self, root: str | Path):
        self.root = Path(root)

    def __truediv__(self, name: str) -> Path:
        return self.root / name

    @property
    def run_json(self) -> Path:
        return self.root / RUN_JSON

    @property
    def volume(self) -> Path:
        return self.root / VOLUME

    @property
    def defects_json(self) -> Path:
        return self.root / DEFECTS_JSON

    def read_run(self) -> dict:
        if not self.run_json.exists():
            return {}
        return read_json(self.run_json, "run record")

    def write_run(self, record: dict) -> None:
        write_json_atomic(self.run_json, record)

    def require(self, name: str, what: str) -> Path:
        """Path of ``name`` inside the run; :class:`InputError` if it is missing."""
        p = self.root / name
        if not p.exists():
            raise InputError(f"{self.root}: no {name} ({what}); is this a crackstack run folder?")
        return p

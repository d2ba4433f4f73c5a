"""Validated models of the acquisition file (SPEC section 4) and the run configuration.

Every model is frozen and forbids unknown keys; :func:`load_yaml_model` turns pydantic's
errors into one :class:`~pipeline.errors.InputError` that names the file, the key path, what
was wrong and (for a misspelt key) the nearest accepted name.
"""

from __future__ import annotations

import difflib
import math
import re
from pathlib import Path
from typing import Annotated, Any, Literal, TypeVar

import numpy as np
import yaml
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from pipeline.errors import InputError

#: CODATA 2018 recommended lattice parameter of silicon (22.5 degC, vacuum), angstrom.
SI_LATTICE_A = 5.431020511
#: hc in keV*angstrom (exact from the SI 2019 values of h, c and e).
HC_KEV_A = 12.3984198


class Strict(BaseModel):
    """Base: frozen, unknown keys rejected."""

    model_config = ConfigDict(extra="forbid", frozen=True)


Vec3 = tuple[int, int, int]


def diamond_allowed(hkl: tuple[int, int, int]) -> bool:
    """True when reflection ``hkl`` is allowed for the diamond lattice.

    All odd, or all even with h + k + l = 4n (International Tables for Crystallography Vol. A,
    space group Fd-3m reflection conditions; 200 and 222 forbidden).
    """
    h, k, l = (int(v) for v in hkl)
    if h == k == l == 0:
        return False
    parities = {h % 2, k % 2, l % 2}
    if parities == {1}:
        return True
    if parities == {0}:
        return (h + k + l) % 4 == 0
    return False


class Crystal(Strict):
    z_uvw: Vec3 = Field((0, 0, 1), description="crystal direction along +z (depth)")
    x_uvw: Vec3 = Field((1, 1, 0), description="crystal direction along +x (scan axis)")

    @model_validator(mode="after")
    def _perpendicular(self) -> Crystal:
        z, x = np.asarray(self.z_uvw, float), np.asarray(self.x_uvw, float)
        if not z.any() or not x.any():
            raise ValueError("z_uvw and x_uvw must be non-zero directions")
        if abs(float(z @ x)) > 1e-9:
            raise ValueError(
                f"x_uvw {list(self.x_uvw)} is not perpendicular to z_uvw {list(self.z_uvw)} "
                "(their dot product must be 0, e.g. z [0,0,1] with x [1,1,0])"
            )
        return self


class Sample(Strict):
    material: Literal["Si"] = Field("Si", description="only silicon is supported")
    thickness_um: float = Field(775.0, gt=0, le=5000, description="wafer thickness, um")
    diameter_mm: float = Field(300.0, gt=0, le=500, description="wafer diameter, mm")
    center_xy_mm: tuple[float, float] | None = Field(
        None, description="wafer centre in the scan frame, mm; null = fit from the imaged edge"
    )
    crystal: Crystal = Crystal()
    lattice_A: float = Field(SI_LATTICE_A, gt=0, description="lattice parameter, angstrom")


class Beam(Strict):
    energy_keV: float | None = Field(None, gt=0, le=200, description="photon energy, keV")
    wavelength_A: float | None = Field(None, gt=0, le=10, description="wavelength, angstrom")
    reflection: Vec3 = Field((2, 2, 0), description="Miller indices of the reflection")
    geometry: Literal["transmission", "reflection"] = "transmission"
    incidence_deg: float | None = Field(
        None, gt=-90, lt=90, description="psi0, incident beam angle from +z toward +x"
    )
    exit_deg: float | None = Field(
        None, gt=-180, lt=180, description="psi_h, diffracted beam angle from +z toward +x"
    )
    slit_width_um: float = Field(15.0, gt=0, le=1000, description="slit (ribbon) width, um")

    @field_validator("reflection")
    @classmethod
    def _allowed(cls, hkl: Vec3) -> Vec3:
        if not diamond_allowed(hkl):
            raise ValueError(
                f"reflection {list(hkl)} is forbidden for the diamond lattice "
                "(allowed: all odd, or all even with h+k+l = 4n, e.g. 111, 220, 004, 113, 224)"
            )
        return hkl

    @model_validator(mode="after")
    def _energy(self) -> Beam:
        if (self.energy_keV is None) == (self.wavelength_A is None):
            raise ValueError("give exactly one of energy_keV or wavelength_A")
        if self.geometry == "reflection" and self.incidence_deg is None:
            raise ValueError("incidence_deg (psi0) is required for reflection geometry")
        return self

    @property
    def wavelength(self) -> float:
        """Wavelength in angstrom."""
        return self.wavelength_A if self.wavelength_A is not None else HC_KEV_A / self.energy_keV

    @property
    def energy(self) -> float:
        """Energy in keV."""
        return self.energy_keV if self.energy_keV is not None else HC_KEV_A / self.wavelength_A


class Orientation(Strict):
    transpose: bool = False
    flip_rows: bool = False
    flip_columns: bool = False


class Detector(Strict):
    pixel_um: tuple[Annotated[float, Field(gt=0)], Annotated[float, Field(gt=0)]] = Field(
        (2.5, 2.5), description="pixel size [row, column], um"
    )
    tilt_deg: float = Field(0.0, gt=-80, lt=80, description="delta, rotation about y")
    depth_magnification: float | None = Field(None, gt=0, description="G override")
    orientation: Orientation = Orientation()


class Scan(Strict):
    start_um: float = 0.0
    step_um: float | None = Field(None, description="scan step, um (or positions_um)")
    positions_um: list[float] | None = Field(None, description="explicit stage positions, um")

    @model_validator(mode="after")
    def _one(self) -> Scan:
        if (self.step_um is None) == (self.positions_um is None):
            raise ValueError("give exactly one of step_um or positions_um")
        if self.step_um is not None and not self.step_um > 0:
            raise ValueError(f"step_um must be > 0 (got {self.step_um})")
        if self.positions_um is not None:
            p = np.asarray(self.positions_um, float)
            if p.size < 2 or not np.all(np.isfinite(p)):
                raise ValueError("positions_um needs at least 2 finite values")
            d = np.diff(p)
            if not (np.all(d > 0) or np.all(d < 0)):
                bad = int(np.nonzero((np.sign(d) != np.sign(d[0])) | (d == 0))[0][0]) + 1
                raise ValueError(
                    f"positions_um must be strictly monotonic; it breaks at index {bad} "
                    f"({p[bad - 1]} -> {p[bad]})"
                )
        return self

    def positions(self, n_frames: int) -> np.ndarray:
        """Stage position X_k of every frame, um."""
        if self.positions_um is not None:
            if len(self.positions_um) != n_frames:
                raise InputError(
                    f"scan.positions_um has {len(self.positions_um)} values but {n_frames} frames "
                    "were found; give one position per frame"
                )
            return np.asarray(self.positions_um, float)
        return self.start_um + self.step_um * np.arange(n_frames, dtype=float)


class Hdf5Source(Strict):
    file: str
    dataset: str


class Frames(Strict):
    pattern: str | None = Field("frame_*.tif", description="glob of frame files, or one multi-page TIFF")
    hdf5: Hdf5Source | None = None
    dark: str | None = Field(None, description="dark image(s): a file or glob")
    flat: str | None = Field(None, description="flat (open-beam) image(s): a file or glob")
    monitor: str | list[float] | None = Field(None, description="per-frame monitor: CSV or list")

    @model_validator(mode="after")
    def _one_source(self) -> Frames:
        if self.hdf5 is not None and self.pattern not in (None, "frame_*.tif"):
            raise ValueError("give either pattern or hdf5, not both")
        return self


class Acquisition(Strict):
    """The acquisition file (SPEC section 4)."""

    sample: Sample = Sample()
    beam: Beam
    detector: Detector = Detector()
    scan: Scan
    frames: Frames = Frames()

    @model_validator(mode="after")
    def _bragg(self) -> Acquisition:
        h, k, l = self.beam.reflection
        d = self.sample.lattice_A / math.sqrt(h * h + k * k + l * l)
        lam = self.beam.wavelength
        if lam >= 2 * d:
            e_min = HC_KEV_A / (2 * d)
            raise ValueError(
                f"beam.energy_keV: energy {self.beam.energy:.3f} keV is below the cut-off of reflection "
                f"{list(self.beam.reflection)} (lambda must be < 2d = {2 * d:.4f} A; "
                f"use energy_keV > {e_min:.3f})"
            )
        return self


# ---------------------------------------------------------------------------------------------
# Run configuration: one section per stage; each stage sees only its own section.


class CorrectConfig(Strict):
    hot_pixel_sigma: float = Field(6.0, gt=0, description="outlier test threshold, robust sigmas")
    hot_pixel_window: int = Field(3, ge=3, le=15, description="median window, pixels (odd)")


class RegisterConfig(Strict):
    upsample_factor: int = Field(20, ge=1, le=1000, description="phase-correlation upsampling")
    neighbours: int = Field(2, ge=1, le=10, description="frames compared on each side")
    min_quality: float = Field(0.2, ge=0, le=1, description="quality below which a frame is flagged")
    g_tolerance: float = Field(0.03, gt=0, lt=1, description="warn when measured G differs more")
    max_row_step_px: float = Field(
        3.0, gt=0, le=50, description="largest row drift between neighbouring frames searched, px"
    )


class ReconstructConfig(Strict):
    voxel_um: tuple[float, float, float] | None = Field(
        None, description="[dz, dy, dx] um; null = natural sampling"
    )
    chunk_voxels: tuple[int, int, int] = Field((64, 128, 128), description="zarr chunk (z, y, x)")
    levels: int = Field(3, ge=3, le=8, description="multiscale levels")


class SegmentConfig(Strict):
    sheet_sigmas_um: list[Annotated[float, Field(gt=0)]] = Field(
        default_factory=lambda: [4.0, 8.0], description="Hessian scales for crack sheets, um"
    )
    line_sigmas_um: list[Annotated[float, Field(gt=0)]] = Field(
        default_factory=lambda: [4.0], description="Hessian scales for dislocation lines, um"
    )
    high_sigma: float | None = Field(None, gt=0, description="hysteresis high threshold, noise sigmas")
    low_sigma: float | None = Field(None, gt=0, description="hysteresis low threshold, noise sigmas")
    min_size_um: float = Field(15.0, ge=0, description="smallest kept component extent, um")
    surface_gate_deg: float = Field(
        20.0, ge=0, le=90,
        description="sheets whose normal is within this angle of z are surface lines or fringes "
        "and are dropped, deg (a {111} crack has its normal 35.3 deg from z)",
    )
    edge_zone_um: float = Field(
        20.0, ge=0,
        description="lateral band inside the wafer edge where sheets facing the edge (the edge "
        "face) are dropped and a component counts as meeting the edge, um",
    )
    edge_gate_deg: float = Field(
        30.0, ge=0, le=90,
        description="in the edge zone, sheets whose normal is within this angle of the edge "
        "normal are the edge face and are dropped, deg",
    )
    boundary_contact_um: float = Field(
        12.0, ge=0,
        description="a component reaching this close to the entrance or exit surface (or into "
        "the edge zone) meets the boundary: it is a crack, never a dislocation loop, um",
    )
    slip_coherence_min: float = Field(
        0.74, ge=0.5, le=1,
        description="an interior component whose voxels share one line direction across the "
        "diffracted ray at least this well (1 = all parallel, 1/2 = turning) is a slip band of "
        "parallel lines merged into one ribbon",
    )
    slip_family_angle_deg: float = Field(
        12.0, gt=0, le=90, description="slip lines join one band when parallel within this angle, deg"
    )
    slip_family_gap_um: float = Field(
        120.0, gt=0, description="slip lines join one band when closer than this, um"
    )


class MeasureConfig(Strict):
    bootstrap: int = Field(50, ge=0, le=2000, description="bootstrap resamples for uncertainties")
    seed: int = 0
    detector_blur_px: float = Field(
        0.7,
        ge=0,
        le=20,
        description="detector point-spread, Gaussian sigma in pixels (part of the volume's "
        "point-spread that measure takes out; the acquisition does not record it)",
    )
    slit_edge_um: float = Field(
        1.0,
        ge=0,
        le=100,
        description="Gaussian softness of the slit's edges, um (adds to the top hat's width in "
        "the volume's point-spread)",
    )


class AssessConfig(Strict):
    recipe: str | None = Field(None, description="recipe YAML; null = no assessment")


class ComputeConfig(Strict):
    scheduler: Literal["threads", "processes", "local-cluster", "slurm", "address"] = "threads"
    workers: int = Field(2, ge=1, le=4096)
    threads_per_worker: int = Field(1, ge=1, le=256)
    memory_limit: str = "4GiB"
    address: str | None = None
    dashboard_address: str = "127.0.0.1:0"
    slurm: dict[str, Any] = Field(default_factory=dict, description="SLURMCluster keyword args")


class RunConfig(Strict):
    """The run configuration (`--config run.yaml`); every section optional."""

    correct: CorrectConfig = CorrectConfig()
    registration: RegisterConfig = RegisterConfig()
    reconstruct: ReconstructConfig = ReconstructConfig()
    segment: SegmentConfig = SegmentConfig()
    measure: MeasureConfig = MeasureConfig()
    assess: AssessConfig = AssessConfig()
    compute: ComputeConfig = ComputeConfig()


# ---------------------------------------------------------------------------------------------
# Loading with readable errors.

M = TypeVar("M", bound=BaseModel)


def _models_in(ann: Any) -> type[BaseModel] | None:
    """The pydantic model inside an annotation such as ``Model``, ``Model | None``, ``list[Model]``."""
    if isinstance(ann, type) and issubclass(ann, BaseModel):
        return ann
    for arg in getattr(ann, "__args__", ()) or ():
        found = _models_in(arg)
        if found is not None:
            return found
    return None


def _model_at(model: type[BaseModel], loc: tuple) -> type[BaseModel] | None:
    """The model class that owns the key at ``loc`` (for did-you-mean suggestions)."""
    cur: type[BaseModel] | None = model
    for part in loc[:-1]:
        if cur is None:
            return None
        if isinstance(part, int):  # an index into a list of models
            continue
        field = cur.model_fields.get(str(part))
        if field is None:
            # A tagged union member name (pydantic puts it in the location); stay put.
            continue
        cur = _models_in(field.annotation)
    return cur


def format_validation_error(err: ValidationError, model: type[BaseModel], source: str) -> str:
    """One line per problem: ``source: key.path: message``, with a did-you-mean for typos."""
    lines = []
    for e in err.errors()[:4]:
        loc = tuple(p for p in e["loc"] if not str(p).startswith("function-after"))
        key = ".".join(str(p) for p in loc) or "(top level)"
        msg = e["msg"].removeprefix("Value error, ")
        if e["type"] == "extra_forbidden":
            owner = _model_at(model, loc)
            names = list(owner.model_fields) if owner else []
            close = difflib.get_close_matches(str(loc[-1]), names, n=1)
            hint = f"; did you mean '{close[0]}'?" if close else ""
            msg = f"unknown key{hint} (accepted: {', '.join(names)})"
        elif "input" in e and e["type"] not in ("missing",) and not isinstance(e["input"], dict):
            msg = f"{msg} (got {e['input']!r})"
        m = re.match(r"^([A-Za-z_][\w.]*): (.*)$", msg)
        if m and loc == ():
            # Model-level checks name the key they concern at the start of the message.
            key, msg = m.group(1), m.group(2)
        lines.append(f"{source}: {key}: {msg}")
    return "\n".join(lines)


def read_yaml_mapping(path: str | Path, what: str = "file") -> dict:
    """Read a YAML file that must hold a mapping; errors as :class:`InputError`."""
    path = Path(path)
    if not path.exists():
        raise InputError(f"{path}: {what} not found")
    if path.is_dir():
        raise InputError(f"{path}: is a folder; expected a YAML {what}")
    try:
        data = yaml.safe_load(path.read_text())
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f" line {mark.line + 1}" if mark else ""
        raise InputError(f"{path}:{where}: not valid YAML ({getattr(exc, 'problem', exc)})") from None
    except UnicodeDecodeError:
        raise InputError(f"{path}: not a text YAML file") from None
    if data is None:
        data = {}
    if not isinstance(data, dict):
        raise InputError(
            f"{path}: the top level must be a mapping of keys (got a {type(data).__name__}); "
            f"see the {what} example in the README"
        )
    return data


def validate_model(model: type[M], data: Any, source: str) -> M:
    """Validate ``data`` against ``model``; errors as :class:`InputError`."""
    try:
        return model.model_validate(data)
    except ValidationError as err:
        raise InputError(format_validation_error(err, model, source)) from None


def load_yaml_model(model: type[M], path: str | Path, what: str = "file") -> M:
    """Read and validate a YAML file."""
    return validate_model(model, read_yaml_mapping(path, what), str(path))


def load_acquisition(path: str | Path) -> tuple[Acquisition, Path]:
    """Load ``acquisition.yaml``; returns the model and the folder paths are relative to."""
    path = Path(path)
    return load_yaml_model(Acquisition, path, "acquisition file"), path.resolve().parent


def load_run_config(path: str | Path | None) -> RunConfig:
    """Load a run configuration, or the defaults when ``path`` is None."""
    if path is None:
        return RunConfig()
    return load_yaml_model(RunConfig, path, "run configuration")

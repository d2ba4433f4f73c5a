"""The scenario file of a synthetic series: wafer, acquisition, contrast, instrument and defects.

A scenario is YAML of our own format, validated like the acquisition file: frozen pydantic models
that reject unknown keys with a did-you-mean suggestion (:func:`pipeline.config.validate_model`).
The acquisition part reuses :class:`pipeline.config.Beam` and :class:`pipeline.config.Detector`
as they are, so a scenario accepts exactly the beam and detector settings an acquisition file
accepts. All positions are in the wafer frame of SPEC section 3 (x scan axis, y along the slit,
z depth below the entrance surface), micrometres.
"""

from __future__ import annotations

import difflib
from pathlib import Path
from typing import Annotated, Any, Literal

import numpy as np
from pydantic import Field, field_validator, model_validator

from pipeline import crystal as cx
from pipeline.config import (
    Acquisition,
    Beam,
    Crystal,
    Detector,
    Frames,
    Sample,
    Scan,
    Strict,
    Vec3,
    read_yaml_mapping,
    validate_model,
)
from pipeline.errors import InputError
from pipeline.geometry import Geometry

Float3 = tuple[float, float, float]
Float2 = tuple[float, float]


# --- wafer and acquisition ---------------------------------------------------------------------


class Wafer(Strict):
    diameter_mm: float = Field(300.0, gt=0, le=500, description="wafer diameter, mm")
    thickness_um: float = Field(775.0, gt=0, le=5000, description="wafer thickness, um")
    crystal: Crystal = Crystal()
    center_xy_mm: Float2 = Field(
        (0.0, 0.0), description="wafer centre in the scan frame (x, y), mm"
    )

    @property
    def radius_um(self) -> float:
        return self.diameter_mm * 500.0

    @property
    def center_um(self) -> np.ndarray:
        return np.asarray(self.center_xy_mm, float) * 1000.0


class ScanSpec(Strict):
    start_um: float = Field(0.0, description="stage position X_0 of the first frame, um")
    step_um: float | None = Field(None, gt=0, le=1000, description="scan step, um")
    positions_um: list[float] | None = Field(None, description="explicit stage positions, um")
    n_frames: int | None = Field(None, ge=2, le=100_000, description="number of frames")

    @model_validator(mode="after")
    def _consistent(self) -> ScanSpec:
        if (self.step_um is None) == (self.positions_um is None):
            raise ValueError("give exactly one of step_um (with n_frames) or positions_um")
        if self.step_um is not None and self.n_frames is None:
            raise ValueError("step_um needs n_frames")
        if self.positions_um is not None:
            if self.n_frames is not None and self.n_frames != len(self.positions_um):
                raise ValueError(
                    f"n_frames {self.n_frames} differs from the {len(self.positions_um)} "
                    "positions_um; give one of them"
                )
            # the acquisition file's own check (strictly monotonic, >= 2 values)
            Scan(positions_um=self.positions_um)
        return self

    @property
    def count(self) -> int:
        return len(self.positions_um) if self.positions_um is not None else int(self.n_frames)

    def positions(self) -> np.ndarray:
        """Stage position X_k of every frame (dropped ones included), um."""
        if self.positions_um is not None:
            return np.asarray(self.positions_um, float)
        return self.start_um + self.step_um * np.arange(self.count, dtype=float)


class FrameSpec(Strict):
    rows: int = Field(256, ge=8, le=16384, description="frame rows (along y, the slit)")
    cols: int = Field(512, ge=8, le=16384, description="frame columns (along depth)")
    margin_px: float = Field(
        32.0,
        ge=-16384,
        le=16384,
        description="c0 before drift: column of the entrance surface at the ribbon centre, px",
    )
    origin_row_px: float = Field(
        0.0, ge=-16384, le=16384, description="r0 before drift: row of y = 0, px"
    )


class AcquisitionSpec(Strict):
    beam: Beam
    detector: Detector = Detector()
    scan: ScanSpec
    frame: FrameSpec = FrameSpec()
    write_center: bool = Field(
        True, description="write the true wafer centre into acquisition.yaml (false: null)"
    )


# --- contrast and instrument -------------------------------------------------------------------


class FeatureContrast(Strict):
    amplitude: float = Field(1.5, ge=0, le=100, description="peak of the sharp core, band units")
    sigma_um: float = Field(1.2, gt=0, le=100, description="Gaussian half-width of the core, um")
    halo: float = Field(0.3, ge=0, le=100, description="halo amplitude at the core, band units")
    halo_um: float = Field(4.0, gt=0, le=500, description="halo decay length (1/e), um")


class ContrastSpec(Strict):
    band_level: float = Field(1.0, gt=0, le=100, description="perfect-crystal band level")
    fringe_visibility: float = Field(
        0.2, ge=0, le=1, description="relative amplitude of the Pendellosung-like fringes"
    )
    pendellosung_um: float | None = Field(
        None,
        gt=0,
        le=10_000,
        description="Pendellosung distance; null = computed with xraylib (optional package)",
    )
    surface_line_amplitude: float = Field(
        1.5, ge=0, le=100, description="extra intensity of the entrance/exit surface lines"
    )
    surface_line_um: float = Field(4.0, gt=0, le=100, description="surface line half-width, um")
    attenuation_length_um: float | None = Field(
        None,
        gt=0,
        le=1e6,
        description="1/mu of Si (reflection geometry); null = computed with xraylib",
    )
    slit_edge_um: float = Field(
        1.0, ge=0, le=100, description="Gaussian softness of the slit profile edges, um"
    )
    d_step_um: float = Field(
        0.75, gt=0, le=50, description="sampling step across the slit (integration over D), um"
    )
    crack: FeatureContrast = FeatureContrast()
    line: FeatureContrast = FeatureContrast(amplitude=1.2, sigma_um=1.0, halo=0.25, halo_um=3.0)
    zone: FeatureContrast = FeatureContrast(amplitude=1.5, sigma_um=2.0, halo=0.4, halo_um=5.0)
    point_amplitude: float = Field(2.0, ge=0, le=1000, description="peak of a point defect")


class CorruptFrame(Strict):
    frame: int = Field(ge=0, description="frame number (0-based, before dropping)")
    kind: Literal["zeros", "garbage"] = "zeros"


class InstrumentSpec(Strict):
    photons_per_px: float = Field(
        2000.0, gt=0, le=60_000, description="expected counts of the band level (1.0)"
    )
    noise: bool = Field(True, description="Poisson and read noise (false: expected counts)")
    read_noise: float = Field(2.0, ge=0, le=1000, description="read noise, counts rms")
    blur_px: float = Field(0.7, ge=0, le=20, description="detector blur, Gaussian sigma, px")
    flat_amplitude: float = Field(
        0.05, ge=0, lt=0.9, description="rms of the detector gain pattern (flat field)"
    )
    dark_offset: float = Field(100.0, ge=0, le=60_000, description="dark offset, counts")
    monitor_variation: float = Field(
        0.02, ge=0, lt=0.5, description="rms relative variation of the beam monitor per frame"
    )
    hot_pixels: int = Field(0, ge=0, le=1_000_000, description="number of hot pixels")
    drift_step_px: Float2 = Field(
        (0.0, 0.0), description="random-walk step (rms per frame) of the origin [rows, cols], px"
    )
    dropped_frames: list[int] = Field(
        default_factory=list, description="frame numbers whose files are not written"
    )
    corrupt_frames: list[CorruptFrame] = Field(
        default_factory=list, description="frames written as zeros or garbage"
    )
    seed: int = Field(0, ge=0, description="random seed (noise, drift, patterns)")

    @field_validator("drift_step_px")
    @classmethod
    def _drift(cls, v: Float2) -> Float2:
        if not all(0 <= s <= 5 for s in v):
            raise ValueError(f"drift_step_px must be in [0, 5] px (got {list(v)})")
        return v

    @field_validator("corrupt_frames", mode="before")
    @classmethod
    def _int_frames(cls, v: Any) -> Any:
        if isinstance(v, list):
            return [{"frame": i} if isinstance(i, int) else i for i in v]
        return v


# --- defects ---------------------------------------------------------------------------------


class PlaneSpec(Strict):
    hkl: Vec3 | None = Field(None, description="Miller indices in the crystal frame")
    normal: Float3 | None = Field(None, description="unit normal in the wafer frame")

    @model_validator(mode="after")
    def _one(self) -> PlaneSpec:
        if (self.hkl is None) == (self.normal is None):
            raise ValueError("give exactly one of hkl or normal")
        v = self.hkl if self.hkl is not None else self.normal
        if not any(abs(c) > 0 for c in v):
            raise ValueError("the plane normal must be non-zero")
        return self

    def normal_wafer(self, R: np.ndarray) -> np.ndarray:
        if self.hkl is not None:
            return cx.to_wafer(R, self.hkl)
        return cx.unit(self.normal)


def _is_111(hkl: Vec3) -> bool:
    return sorted(abs(v) for v in hkl) == [1, 1, 1]


def _check_111(hkl: Vec3) -> Vec3:
    if not _is_111(hkl):
        raise ValueError(f"{list(hkl)} is not a {{111}} plane (e.g. [1, 1, 1], [1, -1, 1])")
    return hkl


class CrackSpec(Strict):
    type: Literal["crack"]
    name: str = ""
    plane: PlaneSpec
    start: Literal["edge", "surface_top", "surface_bottom", "internal", "through"]
    front: Literal["semi_elliptical", "quarter_elliptical", "elliptical", "through"] | None = Field(
        None, description="null = semi_elliptical (edge, surface), elliptical (internal), through"
    )
    corner: Literal["top", "bottom"] = Field(
        "top", description="quarter-elliptical edge cracks: the corner at the top or bottom surface"
    )
    a_um: float | None = Field(
        None, gt=0, le=1e6, description="semi-axis into the wafer from the mouth (in the plane), um"
    )
    c_um: float = Field(gt=0, le=1e6, description="semi-axis along the mouth, um")
    position_um: Float3 = Field(
        description="mouth centre (edge: snapped onto the edge; surface: z ignored), or centre"
    )
    strength: float = Field(1.0, ge=0, le=100, description="contrast relative to contrast.crack")

    @model_validator(mode="after")
    def _combination(self) -> CrackSpec:
        default = {"internal": "elliptical", "through": "through"}.get(
            self.start, "semi_elliptical"
        )
        front = self.front or default
        allowed = {
            "edge": ("semi_elliptical", "quarter_elliptical"),
            "surface_top": ("semi_elliptical",),
            "surface_bottom": ("semi_elliptical",),
            "internal": ("elliptical",),
            "through": ("through",),
        }[self.start]
        if front not in allowed:
            raise ValueError(
                f"front {front!r} does not fit start {self.start!r} (accepted: {', '.join(allowed)})"
            )
        if front != "through" and self.a_um is None:
            raise ValueError("a_um is required (only through cracks have no a)")
        return self

    @property
    def shape(self) -> str:
        """The front shape, with the default for the start kind filled in."""
        default = {"internal": "elliptical", "through": "through"}.get(
            self.start, "semi_elliptical"
        )
        return self.front or default


class LoopSpec(Strict):
    type: Literal["loop"]
    name: str = ""
    plane: Vec3 = Field(description="{111} glide plane, crystal Miller indices")
    center_um: Float3
    radius_um: float = Field(gt=0, le=1e5, description="radius (hexagon: to the corners), um")
    shape: Literal["circle", "hexagon"] = "circle"
    strength: float = Field(1.0, ge=0, le=100)

    @field_validator("plane")
    @classmethod
    def _plane_111(cls, v: Vec3) -> Vec3:
        return _check_111(v)


class SlipBandSpec(Strict):
    type: Literal["slip_band"]
    name: str = ""
    plane: Vec3 = Field(description="{111} slip plane, crystal Miller indices")
    direction: Vec3 = Field(description="<110> line direction in that plane, crystal indices")
    center_um: Float3
    count: int = Field(5, ge=1, le=1000, description="number of parallel lines")
    spacing_um: float = Field(6.0, gt=0, le=1e4, description="line spacing within the plane, um")
    length_um: float = Field(80.0, gt=0, le=1e6, description="line length, um")
    strength: float = Field(1.0, ge=0, le=100)

    @field_validator("plane")
    @classmethod
    def _plane_111(cls, v: Vec3) -> Vec3:
        return _check_111(v)

    @model_validator(mode="after")
    def _in_plane(self) -> SlipBandSpec:
        if sorted(abs(v) for v in self.direction) != [0, 1, 1]:
            raise ValueError(f"direction {list(self.direction)} is not a <110> (e.g. [1, -1, 0])")
        if int(np.dot(self.plane, self.direction)) != 0:
            raise ValueError(
                f"direction {list(self.direction)} does not lie in plane {list(self.plane)} "
                "(their dot product must be 0)"
            )
        return self


class IndentSpec(Strict):
    type: Literal["indent"]
    name: str = ""
    position_um: Float2 = Field(description="indent centre (x, y) on the top surface, um")
    zone_radius_um: float = Field(8.0, gt=0, le=1e4, description="damaged-zone radius, um")
    crack_planes: list[Vec3] = Field(
        default_factory=lambda: [(1, 1, 0), (1, -1, 0)],
        description="planes of the radial (half-penny) cracks through the centre",
    )
    crack_length_um: float = Field(40.0, gt=0, le=1e5, description="radial crack reach c, um")
    crack_depth_um: float = Field(30.0, gt=0, le=1e5, description="radial crack depth a, um")
    loop_planes: list[Vec3] = Field(
        default_factory=lambda: [(1, 1, 1), (-1, -1, 1), (1, -1, 1), (-1, 1, 1)],
        description="{111} planes of the loops punched out below the zone",
    )
    loops_per_plane: int = Field(1, ge=0, le=50)
    loop_radius_um: float = Field(12.0, gt=0, le=1e4)
    loop_spacing_um: float = Field(30.0, gt=0, le=1e4, description="loop-to-loop distance, um")
    loop_shape: Literal["circle", "hexagon"] = "hexagon"
    strength: float = Field(1.0, ge=0, le=100)

    @field_validator("loop_planes")
    @classmethod
    def _loops_111(cls, v: list[Vec3]) -> list[Vec3]:
        for hkl in v:
            _check_111(hkl)
        return v


class PointSpec(Strict):
    type: Literal["point"]
    name: str = ""
    position_um: Float3
    size_um: float = Field(1.0, gt=0, le=100, description="Gaussian sigma of the point, um")
    strength: float = Field(1.0, ge=0, le=1000)


Defect = Annotated[
    CrackSpec | LoopSpec | SlipBandSpec | IndentSpec | PointSpec, Field(discriminator="type")
]
DEFECT_TYPES: dict[str, type[Strict]] = {
    "crack": CrackSpec,
    "loop": LoopSpec,
    "slip_band": SlipBandSpec,
    "indent": IndentSpec,
    "point": PointSpec,
}


# --- the scenario ----------------------------------------------------------------------------


class Scenario(Strict):
    """A synthetic section-topograph series: what is in the wafer and how it is imaged."""

    name: str = "synthetic scenario"
    description: str = ""
    wafer: Wafer = Wafer()
    acquisition: AcquisitionSpec
    contrast: ContrastSpec = ContrastSpec()
    instrument: InstrumentSpec = InstrumentSpec()
    defects: list[Defect] = Field(default_factory=list)

    @model_validator(mode="after")
    def _frames_and_geometry(self) -> Scenario:
        n = self.acquisition.scan.count
        ins = self.instrument
        for i in ins.dropped_frames:
            if not 0 <= i < n:
                raise ValueError(f"instrument.dropped_frames: frame {i} is not in 0..{n - 1}")
        corrupt = [c.frame for c in ins.corrupt_frames]
        for i in corrupt:
            if not 0 <= i < n:
                raise ValueError(f"instrument.corrupt_frames: frame {i} is not in 0..{n - 1}")
        both = sorted(set(corrupt) & set(ins.dropped_frames))
        if both:
            raise ValueError(f"frames {both} are listed as both dropped and corrupt")
        if n - len(set(ins.dropped_frames)) < 2:
            raise ValueError("at least 2 frames must remain after dropping")
        try:
            Geometry.from_acquisition(self.acquisition_model())
        except InputError as exc:
            raise ValueError(str(exc)) from None
        return self

    def acquisition_model(self, positions_um: list[float] | None = None) -> Acquisition:
        """The :class:`pipeline.config.Acquisition` this scenario records (``acquisition.yaml``).

        ``positions_um`` replaces the scan (used when frames are dropped).
        """
        acq = self.acquisition
        w = self.wafer
        if positions_um is not None:
            scan = Scan(positions_um=list(positions_um))
        elif acq.scan.positions_um is not None:
            scan = Scan(positions_um=list(acq.scan.positions_um))
        else:
            scan = Scan(start_um=acq.scan.start_um, step_um=acq.scan.step_um)
        return Acquisition(
            sample=Sample(
                thickness_um=w.thickness_um,
                diameter_mm=w.diameter_mm,
                center_xy_mm=tuple(w.center_xy_mm) if acq.write_center else None,
                crystal=w.crystal,
            ),
            beam=acq.beam,
            detector=acq.detector,
            scan=scan,
            frames=Frames(),
        )

    def geometry(self) -> Geometry:
        return Geometry.from_acquisition(self.acquisition_model())


def _check_defects(data: dict, source: str) -> None:
    """Validate each defect on its own so errors name ``defects[i]`` and suggest key names."""
    defects = data.get("defects")
    if not isinstance(defects, list):
        return
    for i, item in enumerate(defects):
        where = f"{source}: defects[{i}]"
        if not isinstance(item, dict):
            raise InputError(f"{where}: each defect must be a mapping with a 'type' key")
        kind = item.get("type")
        if kind not in DEFECT_TYPES:
            close = difflib.get_close_matches(str(kind), list(DEFECT_TYPES), n=1)
            hint = f"; did you mean '{close[0]}'?" if close else ""
            raise InputError(
                f"{where}: type: {kind!r} is not a defect type{hint} "
                f"(accepted: {', '.join(DEFECT_TYPES)})"
            )
        validate_model(DEFECT_TYPES[kind], item, where)


def scenario_from_mapping(data: dict, source: str = "scenario") -> Scenario:
    """Validate a scenario mapping; errors as :class:`InputError` naming the key path."""
    _check_defects(data, source)
    return validate_model(Scenario, data, source)


def load_scenario(path: str | Path) -> Scenario:
    """Read and validate a scenario YAML file.

    Raises
    ------
    InputError
        For a missing file, invalid YAML, an unknown key (with the nearest accepted name), or
        a value out of range; the message names the file and the key path.
    """
    path = Path(path)
    return scenario_from_mapping(read_yaml_mapping(path, "scenario file"), str(path))

"""The thermal-process recipe file (our own YAML format) for the ``assess`` stage.

A recipe lists segments in order, starting from ``start_C``::

    name: spike anneal
    start_C: 25
    chamber_C: 25
    emissivity: 0.7
    segments:
      - {type: ramp, target_C: 650, rate_K_per_s: 50}
      - {type: hold, duration_s: 5}
      - {type: cool, target_C: 150, rate_K_per_s: 60, gas_h_W_per_m2K: 1000}
    material: {K_IC_111_MPa_sqrt_m: 0.75}     # optional overrides, each with a default + source
    model: {tau_c_MPa: 5, n_cells: 120}        # optional model parameters

Unknown keys are errors with a did-you-mean suggestion (:func:`pipeline.config.load_yaml_model`).
"""

from __future__ import annotations

from pathlib import Path
from typing import Literal

from pydantic import Field, model_validator

from pipeline.config import Strict, read_yaml_mapping, validate_model
from pipeline.errors import InputError
from pipeline.thermal import KELVIN, SetpointPiece

#: Melting point of silicon, degC (1414 degC; from memory): recipes must stay below it.
SI_MELT_C = 1414.0


class Segment(Strict):
    """One recipe segment: a ramp up, a hold, or a cool-down."""

    type: Literal["ramp", "hold", "cool"] = Field(description="ramp (heat), hold, or cool")
    target_C: float | None = Field(None, ge=-50, lt=SI_MELT_C, description="end temperature of a ramp or cool, degC")
    rate_K_per_s: float | None = Field(None, gt=0, le=1000, description="ramp or cool rate of the wafer centre, K/s")
    duration_s: float | None = Field(None, gt=0, le=36000, description="hold duration, s")
    gas_h_W_per_m2K: float = Field(
        0.0, ge=0, le=20000,
        description="forced-gas heat-transfer coefficient on both faces and the edge (fast cool), W/(m^2 K)",
    )

    @model_validator(mode="after")
    def _fields_for_type(self) -> Segment:
        if self.type == "hold":
            if self.duration_s is None:
                raise ValueError("a hold needs duration_s (seconds)")
            if self.target_C is not None or self.rate_K_per_s is not None:
                raise ValueError("a hold takes duration_s only (no target_C or rate_K_per_s)")
        else:
            if self.target_C is None or self.rate_K_per_s is None:
                raise ValueError(f"a {self.type} needs target_C (degC) and rate_K_per_s (K/s)")
            if self.duration_s is not None:
                raise ValueError(f"a {self.type} takes target_C and rate_K_per_s, not duration_s")
        return self


class MaterialOverrides(Strict):
    """Optional replacements of the default material data (defaults and sources: pipeline.fracture)."""

    K_IC_111_MPa_sqrt_m: float | None = Field(None, gt=0, le=10, description="K_IC on {111}; default 0.82 (Chen & Leipold 1980)")
    K_IC_110_MPa_sqrt_m: float | None = Field(None, gt=0, le=10, description="K_IC on {110}; default 0.90 (Chen & Leipold 1980)")
    K_IC_100_MPa_sqrt_m: float | None = Field(None, gt=0, le=10, description="K_IC on {100}; default 0.95 (Chen & Leipold 1980)")
    E_GPa: float | None = Field(None, gt=10, le=400, description="Young's modulus; default the in-plane mean for the wafer orientation")
    alpha_per_K: float | None = Field(None, gt=0, le=2e-5, description="constant expansion coefficient instead of Okada & Tokumaru (1984)")
    conductivity_W_per_mK: float | None = Field(None, gt=0, le=2000, description="constant conductivity instead of 299/(T-99) W/(cm K)")
    heat_capacity_J_per_kgK: float | None = Field(None, gt=0, le=5000, description="constant heat capacity instead of the Shomate fit")
    density_kg_per_m3: float = Field(2329.0, gt=1000, le=5000, description="density of silicon, kg/m^3")


class ModelParams(Strict):
    """Numerical and physical model parameters."""

    n_cells: int = Field(120, ge=10, le=2000, description="radial finite-volume cells")
    edge_refinement: float = Field(30.0, ge=1, le=1000, description="centre-cell width / rim-cell width")
    output_step_s: float = Field(0.05, gt=0, le=10, description="time step of the stored history, s")
    tracking_time_s: float = Field(0.5, gt=0, le=60, description="lamp controller: time constant of the centre's return to the recipe, s")
    max_lamp_kW_per_m2: float = Field(1500.0, gt=0, le=1e5, description="largest lamp irradiance on each face, kW/m^2")
    edge_irradiance_fraction: float = Field(1.0, ge=0, le=1, description="lamp irradiance on the edge face relative to the faces")
    settle_max_s: float = Field(120.0, ge=0, le=3600, description="longest time simulated after the recipe for the centre to reach the last target, s")
    tau_c_MPa: float | None = Field(None, gt=0, le=1000, description="critical resolved shear stress for thermal slip, set by the user (no reliable default)")
    lefm_max_C: float = Field(700.0, ge=0, le=1400, description="above this crack temperature LEFM is not applied (brittle-to-ductile range ~500-700 degC)")
    slip_min_C: float = Field(500.0, ge=0, le=1400, description="at and above this temperature the slip check is made")


class Recipe(Strict):
    """A thermal-process recipe (SPEC section 8, ``--recipe``)."""

    name: str = Field("recipe", description="a label for the report")
    description: str = ""
    start_C: float = Field(25.0, ge=-50, lt=SI_MELT_C, description="wafer temperature at t = 0, degC")
    chamber_C: float = Field(25.0, ge=-50, le=1000, description="chamber wall (radiation) temperature, degC")
    gas_C: float | None = Field(None, ge=-50, le=1000, description="cooling-gas temperature, degC; null = chamber_C")
    emissivity: float = Field(0.7, gt=0, le=1, description="total hemispherical emissivity of the wafer (grey body)")
    segments: list[Segment] = Field(min_length=1, description="ramps, holds and cool-downs in order")
    material: MaterialOverrides = MaterialOverrides()
    model: ModelParams = ModelParams()

    @model_validator(mode="after")
    def _chain(self) -> Recipe:
        T = self.start_C
        for i, s in enumerate(self.segments):
            if s.type == "ramp" and not s.target_C > T:
                raise ValueError(f"segments[{i}]: ramp target_C {s.target_C} is not above the "
                                 f"current {T} degC; use type: cool to go down")
            if s.type == "cool" and not s.target_C < T:
                raise ValueError(f"segments[{i}]: cool target_C {s.target_C} is not below the "
                                 f"current {T} degC; use type: ramp to go up")
            if s.target_C is not None:
                T = s.target_C
        if self.model.slip_min_C > self.model.lefm_max_C:
            raise ValueError("model.slip_min_C must not exceed model.lefm_max_C")
        return self

    def setpoint_pieces(self) -> list[SetpointPiece]:
        """The recipe as set-temperature pieces (K, s) for :func:`pipeline.thermal.simulate_process`."""
        pieces = []
        t, T = 0.0, self.start_C
        for i, s in enumerate(self.segments):
            if s.type == "hold":
                dur, rate, T_end = s.duration_s, 0.0, T
            else:
                dur = abs(s.target_C - T) / s.rate_K_per_s
                rate = s.rate_K_per_s if s.type == "ramp" else -s.rate_K_per_s
                T_end = s.target_C
            pieces.append(SetpointPiece(t_start_s=t, t_end_s=t + dur, T_start_K=T + KELVIN,
                                        rate_K_s=rate, gas_h_W_m2K=s.gas_h_W_per_m2K,
                                        label=f"segments[{i}] {s.type}"))
            t, T = t + dur, T_end
        return pieces

    @property
    def duration_s(self) -> float:
        p = self.setpoint_pieces()
        return p[-1].t_end_s


def load_recipe(path: str | Path) -> Recipe:
    """Read and validate a recipe YAML file.

    Each segment is validated on its own first, so that a misspelt key inside a segment gets
    its did-you-mean suggestion (the whole-file error names only the list index).

    Raises
    ------
    InputError
        Naming the file, the key path and what is accepted.
    """
    path = Path(path)
    data = read_yaml_mapping(path, "recipe")
    segs = data.get("segments")
    if isinstance(segs, list):
        for i, seg in enumerate(segs):
            if not isinstance(seg, dict):
                raise InputError(f"{path}: segments[{i}]: each segment must be a mapping such as "
                                 "{type: ramp, target_C: 600, rate_K_per_s: 50}")
            validate_model(Segment, seg, f"{path}: segments[{i}]")
    return validate_model(Recipe, data, str(path))

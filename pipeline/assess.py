"""The ``assess`` stage: will each measured crack grow during a thermal process? (SPEC section 8)

Input: a validated ``defects.json`` (ours or from another tool) and exactly one load source:

* a recipe YAML (:mod:`pipeline.recipe`): the built-in lamp-heated thin-disk model
  (:mod:`pipeline.thermal`) gives T(r, t), and Timoshenko & Goodier's thin-disk solution the
  plane-stress field;
* a temperature CSV ``time_s,r_mm,T_C`` from the user's own furnace model (stresses as above);
* a stress CSV ``time_s,r_mm,sigma_r_MPa,sigma_theta_MPa`` (plane stress of the wafer).

For every crack the stress normal to (and along) its plane is taken from the field at its
position and direction, a stress-intensity solution (:mod:`pipeline.fracture`) is chosen from
its kind and shape, and K_I(t) is compared with K_IC of its plane below the brittle-to-ductile
range; above it the resolved shear stress on the twelve {111}<110> slip systems is reported
against the user's critical value instead. Output: the ``assessment.json`` document.
"""

from __future__ import annotations

import csv
import difflib
import logging
import math
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from pipeline import __version__, runfolder
from pipeline import fracture as fr
from pipeline import thermal as th
from pipeline.errors import InputError
from pipeline.recipe import MaterialOverrides, ModelParams, Recipe, load_recipe

log = logging.getLogger(__name__)

SCHEMA_VERSION = 1
KELVIN = th.KELVIN
#: Plots and histories are thinned to at most this many time points.
MAX_HISTORY_POINTS = 400

#: SPEC section 10, one paragraph (the README and the report print it too).
CAUTIONS = (
    "Break-risk results are screening estimates from linear-elastic fracture mechanics with "
    "handbook material data; they do not replace a qualified process engineer's judgement, "
    "validated furnace models, or the site's own rules. Radiation work follows the facility's "
    "radiation-safety rules. Broken wafers have sharp fragments: handle with the site's procedures."
)

TEMPERATURE_COLUMNS = ("time_s", "r_mm", "T_C")
STRESS_COLUMNS = ("time_s", "r_mm", "sigma_r_MPa", "sigma_theta_MPa")


# ---------------------------------------------------------------------------------------------
# The load field.


@dataclass
class ProcessField:
    """Plane-stress field of the wafer over the process, SI units, radii increasing."""

    time_s: np.ndarray  # (nt,)
    r_m: np.ndarray  # (nr,)
    sigma_r_Pa: np.ndarray  # (nt, nr)
    sigma_theta_Pa: np.ndarray  # (nt, nr)
    T_K: np.ndarray | None  # (nt, nr) or None for a stress CSV
    notes: list[str] = field(default_factory=list)
    timeline_extra: dict[str, np.ndarray] = field(default_factory=dict)

    def sample(self, r_query_m) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
        """Linear interpolation in r at fixed query radii: arrays (nt, m)."""
        rq = np.clip(np.asarray(r_query_m, float), self.r_m[0], self.r_m[-1])
        j = np.clip(np.searchsorted(self.r_m, rq, side="right") - 1, 0, self.r_m.size - 2)
        w = (rq - self.r_m[j]) / (self.r_m[j + 1] - self.r_m[j])

        def lerp(v):
            return v[:, j] * (1.0 - w) + v[:, j + 1] * w

        T = None if self.T_K is None else lerp(self.T_K)
        return lerp(self.sigma_r_Pa), lerp(self.sigma_theta_Pa), T

    def covers(self, r_query_m, tol_m: float) -> bool:
        rq = np.asarray(r_query_m, float)
        return bool(rq.min() >= self.r_m[0] - tol_m and rq.max() <= self.r_m[-1] + tol_m)


@dataclass(frozen=True)
class Materials:
    E_Pa: float
    E_info: dict
    thermal_strain: Callable[[np.ndarray], np.ndarray]
    alpha_info: dict
    K_IC: dict[str, fr.Sourced]
    thermal: th.ThermalProperties


def resolve_materials(overrides: MaterialOverrides, z_uvw) -> Materials:
    """Material data: the defaults with their sources, replaced where the recipe overrides them."""
    E_vals = fr.youngs_modulus_GPa(fr.in_plane_directions(z_uvw))
    if overrides.E_GPa is not None:
        E_GPa = overrides.E_GPa
        E_info = {"value_GPa": E_GPa, "source": "recipe override"}
    else:
        E_GPa = fr.in_plane_mean_modulus_GPa(z_uvw)
        E_info = {
            "value_GPa": round(E_GPa, 2),
            "choice": f"mean of the directional Young's modulus over the in-plane directions of a "
                      f"{_uvw(z_uvw)} wafer (isotropic stand-in for the thin-disk solution)",
            "in_plane_range_GPa": [round(float(E_vals.min()), 1), round(float(E_vals.max()), 1)],
            "source": fr.ELASTIC_CONSTANTS_GPA.source, "status": fr.ELASTIC_CONSTANTS_GPA.status,
        }
    if overrides.alpha_per_K is not None:
        strain = th.constant_alpha_strain(overrides.alpha_per_K)
        alpha_info = {"value_per_K": overrides.alpha_per_K, "source": "recipe override"}
    else:
        strain = th.strain_okada_tokumaru
        alpha_info = {
            "model": "alpha = [3.725 (1 - exp(-5.88e-3 (T - 124))) + 5.548e-4 T] 1e-6 /K, T in K, "
                     "120-1500 K; thermal strain = integral of alpha dT",
            "source": "Okada & Tokumaru (1984), J. Appl. Phys. 56, 314",
            "status": "read in source (abstract)",
        }
    kic = dict(fr.K_IC_DEFAULTS)
    for fam, val in (("{111}", overrides.K_IC_111_MPa_sqrt_m), ("{110}", overrides.K_IC_110_MPa_sqrt_m),
                     ("{100}", overrides.K_IC_100_MPa_sqrt_m)):
        if val is not None:
            kic[fam] = fr.Sourced(val, "MPa*sqrt(m)", "recipe override", "user")
    thermal = th.ThermalProperties(density_kg_m3=overrides.density_kg_per_m3,
                                   conductivity_W_mK=overrides.conductivity_W_per_mK,
                                   heat_capacity_J_kgK=overrides.heat_capacity_J_per_kgK)
    return Materials(E_GPa * 1e9, E_info, strain, alpha_info, kic, thermal)


def _uvw(v) -> str:
    return "(" + "".join(str(int(x)) for x in v) + ")"


def field_from_recipe(recipe: Recipe, radius_m: float, thickness_m: float, mat: Materials) -> ProcessField:
    """Simulate the recipe and compute the thin-disk thermal stresses."""
    m = recipe.model
    gas_C = recipe.chamber_C if recipe.gas_C is None else recipe.gas_C
    chamber = th.ChamberModel(
        emissivity=recipe.emissivity, chamber_K=recipe.chamber_C + KELVIN, gas_K=gas_C + KELVIN,
        max_lamp_W_m2=m.max_lamp_kW_per_m2 * 1e3, edge_irradiance_fraction=m.edge_irradiance_fraction,
        tracking_time_s=m.tracking_time_s,
    )
    hist = th.simulate_process(
        recipe.setpoint_pieces(), radius_m=radius_m, thickness_m=thickness_m,
        T_start_K=recipe.start_C + KELVIN, props=mat.thermal, chamber=chamber, n_cells=m.n_cells,
        edge_refinement=m.edge_refinement, output_step_s=m.output_step_s, settle_max_s=m.settle_max_s,
    )
    sr, st = th.disk_thermal_stress(hist.r_m, hist.T_K, E_Pa=mat.E_Pa, thermal_strain=mat.thermal_strain)
    balance = hist.energy_in_J[-1] - hist.stored_J[-1]
    log.info("thermal model: %d times x %d radii; energy balance residual %.3g J", hist.t_s.size,
             hist.r_m.size, balance)
    notes = list(hist.notes)
    if hist.T_K.max() > 1500.0:
        notes.append("temperatures above 1500 K: the Okada-Tokumaru expansion fit is extrapolated")
    return ProcessField(
        time_s=hist.t_s, r_m=hist.r_m, sigma_r_Pa=sr, sigma_theta_Pa=st, T_K=hist.T_K, notes=notes,
        timeline_extra={"setpoint_C": hist.setpoint_K - KELVIN, "lamp_kW_per_m2": hist.lamp_W_m2 / 1e3},
    )


# ---------------------------------------------------------------------------------------------
# CSV fields.


def read_field_csv(path: str | Path, columns: tuple[str, ...]) -> tuple[np.ndarray, np.ndarray, dict[str, np.ndarray]]:
    """Read a long-format field CSV (one row per time and radius) into a full grid.

    Returns the sorted times (s), sorted radii (mm) and, per value column, an (nt, nr) array.
    Blank lines and lines starting with ``#`` are skipped; columns may come in any order.

    Raises
    ------
    InputError
        Naming the file, the line and the column of the first problem and what is accepted.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: CSV file not found")
    want = ", ".join(columns)
    try:
        text = path.read_text()
    except UnicodeDecodeError:
        raise InputError(f"{path}: not a text CSV file (expected columns {want})") from None
    reader = csv.reader(text.splitlines())
    header: list[str] | None = None
    rows: list[list[float]] = []
    lines: list[int] = []
    for rec in reader:
        line = reader.line_num
        if not rec or all(not f.strip() for f in rec) or rec[0].lstrip().startswith("#"):
            continue
        if header is None:
            header = [h.strip() for h in rec]
            unknown = [h for h in header if h not in columns]
            if unknown or len(set(header)) != len(header) or set(header) != set(columns):
                hint = ""
                if unknown:
                    close = difflib.get_close_matches(unknown[0], columns, n=1)
                    hint = f"; '{unknown[0]}' unknown" + (f", did you mean '{close[0]}'?" if close else "")
                raise InputError(f"{path}: line {line}: header must name the columns {want} "
                                 f"(got {', '.join(header)}){hint}")
            continue
        if len(rec) != len(header):
            raise InputError(f"{path}: line {line}: expected {len(header)} values ({want}), got {len(rec)}")
        vals = []
        for name, cell in zip(header, rec, strict=True):
            try:
                v = float(cell)
            except ValueError:
                raise InputError(f"{path}: line {line}, column '{name}': '{cell.strip()}' is not a number") from None
            if not math.isfinite(v):
                raise InputError(f"{path}: line {line}, column '{name}': {cell.strip()} is not finite")
            vals.append(v)
        rows.append([vals[header.index(c)] for c in columns])
        lines.append(line)
    if header is None or not rows:
        raise InputError(f"{path}: no data; expected a header {want} and one row per time and radius")
    data = np.asarray(rows, float)
    line_no = np.asarray(lines)
    bad_r = np.nonzero(data[:, 1] < 0)[0]
    if bad_r.size:
        raise InputError(f"{path}: line {line_no[bad_r[0]]}, column 'r_mm': radius {data[bad_r[0], 1]} is negative")
    times, ti = np.unique(data[:, 0], return_inverse=True)
    radii, ri = np.unique(data[:, 1], return_inverse=True)
    slot = ti * radii.size + ri
    order = np.argsort(slot, kind="stable")
    dup = np.nonzero(np.diff(slot[order]) == 0)[0]
    if dup.size:
        k1, k2 = order[dup[0]], order[dup[0] + 1]
        raise InputError(f"{path}: lines {line_no[k1]} and {line_no[k2]}: two rows for time_s = "
                         f"{data[k1, 0]:g}, r_mm = {data[k1, 1]:g}; give each (time, radius) once")
    if slot.size != times.size * radii.size:
        have = np.zeros(times.size * radii.size, bool)
        have[slot] = True
        miss = int(np.nonzero(~have)[0][0])
        raise InputError(f"{path}: no row for time_s = {times[miss // radii.size]:g}, r_mm = "
                         f"{radii[miss % radii.size]:g}: the field must be a full grid (every time at "
                         "the same radii)")
    if radii.size < 2:
        raise InputError(f"{path}: column 'r_mm': at least two radii are needed (got {radii.size})")
    values = {}
    for k, c in enumerate(columns[2:], start=2):
        grid = np.empty(times.size * radii.size)
        grid[slot] = data[:, k]
        values[c] = grid.reshape(times.size, radii.size)
    values["_lines"] = np.empty(times.size * radii.size, int)
    values["_lines"][slot] = line_no
    values["_lines"] = values["_lines"].reshape(times.size, radii.size)
    return times, radii, values


def field_from_temperature_csv(path: Path, radius_m: float, mat: Materials) -> ProcessField:
    """T(r, t) from the user's furnace model -> thin-disk stresses."""
    times, r_mm, vals = read_field_csv(path, TEMPERATURE_COLUMNS)
    T_C = vals["T_C"]
    bad = np.argwhere((T_C <= -KELVIN) | (T_C >= 1414.0))
    if bad.size:
        i, j = bad[0]
        raise InputError(f"{path}: line {vals['_lines'][i, j]}, column 'T_C': {T_C[i, j]:g} degC is "
                         "outside (-273.15, 1414) (solid silicon)")
    notes = []
    R_mm = radius_m * 1e3
    if r_mm[-1] < 0.99 * R_mm or r_mm[-1] > 1.01 * R_mm:
        raise InputError(f"{path}: column 'r_mm': the field must reach the wafer edge r = {R_mm:g} mm "
                         f"(within 1 %); its largest radius is {r_mm[-1]:g} mm")
    if r_mm[0] > 0.05 * R_mm:
        raise InputError(f"{path}: column 'r_mm': the field must start near the centre (r <= "
                         f"{0.05 * R_mm:g} mm, 5 % of the radius); its smallest radius is {r_mm[0]:g} mm")
    T_K = T_C + KELVIN
    if r_mm[0] > 0:
        r_mm = np.concatenate([[0.0], r_mm])
        T_K = np.concatenate([T_K[:, :1], T_K], axis=1)
        notes.append(f"temperature CSV starts at r = {r_mm[1]:g} mm: the centre takes that value")
    if abs(r_mm[-1] - R_mm) > 1e-9 * R_mm:
        notes.append(f"the temperature field's rim is r = {r_mm[-1]:g} mm (wafer radius {R_mm:g} mm); "
                     "the stresses use the field's rim")
    r_m = r_mm * 1e-3
    sr, st = th.disk_thermal_stress(r_m, T_K, E_Pa=mat.E_Pa, thermal_strain=mat.thermal_strain)
    return ProcessField(time_s=times, r_m=r_m, sigma_r_Pa=sr, sigma_theta_Pa=st, T_K=T_K, notes=notes)


def field_from_stress_csv(path: Path) -> ProcessField:
    """Plane-stress field of the wafer from the user's model."""
    times, r_mm, vals = read_field_csv(path, STRESS_COLUMNS)
    notes = ["stress field given without temperatures: the brittle-to-ductile limit cannot be "
             "checked, so LEFM is applied at all times and the slip check uses all times; no "
             "critical temperature difference can be given"]
    return ProcessField(time_s=times, r_m=r_mm * 1e-3, sigma_r_Pa=vals["sigma_r_MPa"] * 1e6,
                        sigma_theta_Pa=vals["sigma_theta_MPa"] * 1e6, T_K=None, notes=notes)


# ---------------------------------------------------------------------------------------------
# One crack.


@dataclass
class _Model:
    """A K solution bound to one crack's geometry."""

    name: str
    radii_m: np.ndarray  # where the field is sampled
    K_of: Callable[[np.ndarray], np.ndarray]  # (nt, m) stress normal to the plane -> (nt,) K
    validity: fr.Validity
    geometry: dict
    edge_mouth: bool = False  # True: report the stress at radii_m[0] (the rim); else the span maximum

    def reported_stress(self, sig: np.ndarray) -> np.ndarray:
        """The stress quoted as sigma_at_worst / history: (nt, m) -> (nt,)."""
        return sig[:, 0] if self.edge_mouth else np.max(sig, axis=-1)


def _span_radii(r_m: float, angle_deg: float | None, azimuth_deg: float, half_len_m: float,
                R_m: float) -> np.ndarray:
    """Radii of 5 points along a crack's surface trace centred at (r, angle)."""
    s = np.linspace(-half_len_m, half_len_m, 5)
    if angle_deg is None:
        return np.clip(r_m + s, 0.0, R_m)
    a, z = math.radians(angle_deg), math.radians(azimuth_deg)
    x = r_m * math.cos(a) + s * math.cos(z)
    y = r_m * math.sin(a) + s * math.sin(z)
    return np.clip(np.hypot(x, y), 0.0, R_m)


def _max_over_span(factor: float) -> Callable[[np.ndarray], np.ndarray]:
    # conservative: the largest stress over the crack's extent loads the whole crack
    def K(sig):
        return factor * np.max(sig, axis=-1)

    return K


def _choose_model(crack: dict, R_m: float, t_m: float, r_m: float | None, angle: float | None,
                  field_r_m: np.ndarray, notes: list[str]) -> _Model:
    kind = crack["kind"]
    um = 1e-6
    depth = crack["depth_um"] * um
    length = crack["length_um"] * um
    z0, z1 = (v * um for v in crack["thickness_span_um"])
    az = float(crack["plane"]["azimuth_deg"])

    def through_edge(a: float) -> _Model:
        x, w = fr.edge_weight_function_points(a)
        fw = float(fr.edge_crack_factor_tada(a / (2 * R_m)) / fr.edge_crack_factor_tada(0.0))
        radii = np.concatenate([[R_m], R_m - x])
        ok = a <= 0.1 * R_m
        val = fr.Validity(ok, fr.EDGE_LIMITS, [] if ok else [f"a = {a * 1e3:.2f} mm > 0.1 R"])
        return _Model("edge_through_weight_function", radii, lambda sig: (sig[:, 1:] @ w) * fw, val,
                      {"a_um": a / um, "a_over_W": a / (2 * R_m), "finite_width_factor": fw},
                      edge_mouth=True)

    if kind == "edge":
        tol = 0.05 * t_m
        top, bottom = z0 <= tol, z1 >= t_m - tol
        extent = z1 - z0
        if depth <= 0:
            return _Model("edge_through_weight_function", np.array([R_m]), lambda s: 0.0 * s[:, 0],
                          fr.Validity(False, fr.EDGE_LIMITS, ["depth_um is 0"]), {"a_um": 0.0})
        if (top and bottom) or extent >= 0.9 * t_m:
            return through_edge(depth)
        if top or bottom:
            # quarter ellipse at the rim corner: a through the thickness, c radial (Newman-Raju corner)
            a, c = extent, depth
            ac, at, cb = a / c, a / t_m, c / (2 * R_m)
            phi = np.linspace(0.0, 0.5 * np.pi, 19)
            nr = fr.newman_raju_corner(ac, at, cb, phi)
            k = int(np.argmax(nr.F))
            factor = math.sqrt(math.pi * a / nr.Q) * float(nr.F[k])
            radii = np.linspace(R_m - c, R_m, 5)[::-1]
            return _Model("corner_newman_raju", radii, _max_over_span(factor),
                          fr.corner_validity(ac, at, cb),
                          {"a_um": a / um, "c_um": c / um, "t_um": t_m / um, "a_over_c": ac,
                           "a_over_t": at, "c_over_b": cb, "phi_at_max_deg": math.degrees(phi[k]),
                           "face": "entrance (z = 0)" if top else "exit (z = t)"})
        # semi-ellipse on the edge face: a radial, 2c along the thickness; plate "width" = t
        a, c = depth, 0.5 * extent
        ac, at, cb = a / c if c > 0 else math.inf, a / R_m, c / (0.5 * t_m)
        if cb >= 0.5:
            notes.append(f"edge crack spans {extent / t_m:.0%} of the thickness without reaching a "
                         "face: treated as through the thickness (conservative)")
            return through_edge(depth)
        phi = np.linspace(0.0, np.pi, 37)
        nr = fr.newman_raju_surface(min(ac, 1e9), at, cb, phi)
        k = int(np.argmax(nr.F))
        factor = math.sqrt(math.pi * a / nr.Q) * float(nr.F[k])
        radii = np.linspace(R_m - a, R_m, 5)[::-1]
        return _Model("edge_face_newman_raju", radii, _max_over_span(factor),
                      fr.surface_validity(ac, at, cb),
                      {"a_um": a / um, "c_um": c / um, "a_over_c": ac, "c_over_b": cb,
                       "phi_at_max_deg": math.degrees(phi[k])})

    if r_m is None:
        radii = field_r_m.copy()
    elif kind in ("surface_top", "surface_bottom", "through"):
        radii = _span_radii(r_m, angle, az, 0.5 * length, R_m)
    else:
        radii = _span_radii(r_m, angle, az, max(crack["front"]["c_um"] * um, 0.5 * length), R_m)

    if kind in ("surface_top", "surface_bottom"):
        a = depth if depth > 0 else crack["front"]["a_um"] * um
        c = 0.5 * length if length > 0 else crack["front"]["c_um"] * um
        if a <= 0 or c <= 0:
            return _Model("surface_newman_raju", radii, lambda s: 0.0 * s[:, 0],
                          fr.Validity(False, fr.SURFACE_LIMITS, ["zero depth or length"]), {})
        ac, at, cb = a / c, a / t_m, c / R_m
        phi = np.linspace(0.0, np.pi, 37)
        nr = fr.newman_raju_surface(ac, at, cb, phi)
        root = math.sqrt(math.pi * a / nr.Q)
        H = nr.H

        def K_surface(sig):
            # the thin-disk field is uniform through the thickness: bending S_b = 0 (wafer bow
            # is not modelled); the linearisation is kept so a through-thickness profile can be used
            z = np.array([0.0, t_m])
            prof = np.repeat(np.max(sig, axis=-1)[:, None], 2, axis=1)
            S_t, S_b = fr.linearise_through_thickness(z, prof, t_m)
            if kind == "surface_bottom":
                S_b = -S_b
            return np.max((S_t[:, None] + H[None, :] * S_b[:, None]) * (root * nr.F)[None, :], axis=1)

        k = int(np.argmax(nr.F))
        if r_m is not None and R_m - r_m < c + a:
            notes.append("surface crack within its own size of the rim: the plate solution ignores the rim")
        return _Model("surface_newman_raju", radii, K_surface, fr.surface_validity(ac, at, cb),
                      {"a_um": a / um, "c_um": c / um, "t_um": t_m / um, "a_over_c": ac,
                       "a_over_t": at, "c_over_b": cb, "phi_at_max_deg": math.degrees(phi[k])})

    if kind == "through":
        a = 0.5 * length
        b = R_m if r_m is None else max(R_m - r_m, 1e-9)
        x = a / b
        F = float(fr.centre_crack_factor_tada(min(x, 0.999)))
        val = fr.Validity(x < 0.5 and a > 0, fr.CENTRE_LIMITS, [] if x < 0.5 and a > 0 else [f"a/b = {x:.3g}"])
        return _Model("through_centre_tada", radii, _max_over_span(F * math.sqrt(math.pi * a)), val,
                      {"a_um": a / um, "b_um": b / um, "a_over_b": x, "finite_width_factor": F})

    # internal: embedded ellipse (Irwin 1962)
    a = crack["front"]["a_um"] * um or 0.5 * depth
    c = crack["front"]["c_um"] * um or 0.5 * length
    if a <= 0 or c <= 0:
        return _Model("embedded_irwin", radii, lambda s: 0.0 * s[:, 0],
                      fr.Validity(False, fr.EMBEDDED_LIMITS, ["zero size"]), {})
    minor = min(a, c)
    lig = min(z0, t_m - z1)
    val = fr.Validity(lig >= minor, fr.EMBEDDED_LIMITS,
                      [] if lig >= minor else [f"ligament {lig / um:.0f} um < minor semi-axis {minor / um:.0f} um"])
    factor = float(fr.embedded_ellipse_K_max(a, c, 1.0))
    return _Model("embedded_irwin", radii, _max_over_span(factor), val,
                  {"a_um": a / um, "c_um": c / um, "ligament_um": lig / um})


def _pick(n: int, must=(), limit: int = MAX_HISTORY_POINTS) -> np.ndarray:
    """At most ``limit`` evenly spread indices of ``range(n)`` that include ``must``."""
    if n <= limit:
        return np.arange(n)
    must = sorted({int(m) for m in must if 0 <= m < n})
    base = np.linspace(0, n - 1, limit - len(must)).round().astype(int)
    return np.unique(np.concatenate([base, np.asarray(must, int)]))


def _kic_for(crack: dict, mat: Materials, notes: list[str]) -> tuple[str, fr.Sourced]:
    plane = crack["plane"]
    fam = plane.get("family") or fr.family_of(plane["nearest_hkl"])
    misfit = float(plane.get("misfit_deg", 0.0))
    if fam in mat.K_IC and misfit <= 10.0:
        return fam, mat.K_IC[fam]
    low_fam = min(mat.K_IC, key=lambda f: mat.K_IC[f].value)
    why = f"plane {fam}" + (f" with misfit {misfit:.1f} deg" if misfit > 10 else "")
    notes.append(f"{why} is not a tabulated cleavage plane: the lowest K_IC ({low_fam}) is used")
    return low_fam, mat.K_IC[low_fam]


@dataclass
class _Context:
    R_m: float
    t_m: float
    z_uvw: tuple
    x_uvw: tuple
    field: ProcessField
    mat: Materials
    params: ModelParams


def _assess_crack(crack: dict, ctx: _Context) -> dict:
    notes: list[str] = []
    R, t_m, fld, p = ctx.R_m, ctx.t_m, ctx.field, ctx.params
    kind = crack["kind"]
    pos = crack["position"]
    angle = pos.get("angle_deg")
    # position
    r_c: float | None
    if kind == "edge":
        r_c = R
        if pos.get("r_mm") is None and pos.get("distance_to_edge_um") is None:
            notes.append("position unknown (r_mm null): the crack is assumed to start at the wafer edge")
        d = pos.get("distance_to_edge_um")
        if d is not None and d > max(crack["depth_um"], 0.0) + 50.0:
            notes.append(f"an edge crack whose centroid lies {d:.0f} um from the rim (depth "
                         f"{crack['depth_um']:.0f} um): treated as starting at the rim")
    elif pos.get("r_mm") is not None:
        r_c = min(max(pos["r_mm"] * 1e-3, 0.0), R)
        if pos["r_mm"] * 1e-3 > R * 1.001:
            notes.append(f"r_mm {pos['r_mm']:g} is beyond the wafer radius; the rim is used")
    elif pos.get("distance_to_edge_um") is not None:
        r_c = max(R - pos["distance_to_edge_um"] * 1e-6, 0.0)
        notes.append("r_mm null: radius taken as the wafer radius minus distance_to_edge_um")
    else:
        r_c = None
        notes.append("position unknown (r_mm and distance_to_edge_um null): the largest stress at any "
                     "radius is used (worst case)")
    if angle is None and kind != "edge":
        notes.append("angle_deg null: the worse of the radial and hoop stress directions is used")

    # plane normal in polar components at the crack
    n = np.asarray(crack["plane"]["normal"], float)
    nn = float(np.linalg.norm(n))
    if not nn > 1e-9:
        notes.append("plane normal is zero: a vertical plane normal to the hoop direction is assumed")
        n = np.array([0.0, 1.0, 0.0]) if angle is None else np.array(
            [-math.sin(math.radians(angle)), math.cos(math.radians(angle)), 0.0])
        nn = 1.0
    n = n / nn
    n_ip = math.sqrt(max(1.0 - n[2] ** 2, 0.0))
    if angle is not None:
        a = math.radians(angle)
        e_r, e_t = np.array([math.cos(a), math.sin(a), 0.0]), np.array([-math.sin(a), math.cos(a), 0.0])
        orientations = [(float(n @ e_r), float(n @ e_t))]
        if kind == "edge":
            trace = math.radians(crack["plane"]["azimuth_deg"])
            off = math.degrees(math.acos(min(1.0, abs(math.cos(trace - a)))))
            if off > 20.0:
                notes.append(f"edge crack trace is {off:.0f} deg from radial: the stress is sampled "
                             "along the radial line, the normal stress from the actual plane")
    elif kind == "edge":
        orientations = [(0.0, n_ip)]
    else:
        orientations = [(n_ip, 0.0), (0.0, n_ip)]
    incl = float(crack["plane"]["inclination_deg"])
    if incl < 10.0:
        notes.append(f"crack plane nearly parallel to the surface ({incl:.0f} deg): the plane-stress "
                     "field has no through-thickness stress to open it")
    elif incl < 85.0:
        notes.append(f"inclined plane ({incl:.0f} deg to the surface): stress resolved into normal "
                     "and shear parts; K_II uses the mode-I geometry factor and the shear is treated "
                     "as mode II; K_eq = sqrt(K_I^2 + K_II^2) from the energy release rate")

    model = _choose_model(crack, R, t_m, r_c, angle, fld.r_m, notes)
    tol = 1e-3 * R + 1e-6
    covered = fld.covers(model.radii_m, tol)
    validity = model.validity
    if not covered:
        validity = fr.Validity(False, validity.limits, validity.problems + [
            f"the stress field (r = {fld.r_m[0] * 1e3:g}-{fld.r_m[-1] * 1e3:g} mm) does not cover the "
            f"crack (r = {model.radii_m.min() * 1e3:g}-{model.radii_m.max() * 1e3:g} mm)"])
    sr, st, T_pts = fld.sample(model.radii_m)
    best = None
    for n_r, n_t in orientations:
        sig_n, tau = fr.resolve_on_plane(sr, st, n_r, n_t)
        K_I = np.asarray(model.K_of(sig_n), float)
        K_II = np.abs(np.asarray(model.K_of(tau), float))
        if best is None or K_I.max() > best[0].max():
            best = (K_I, K_II, sig_n, tau)
    K_I, K_II, sig_n, tau = best
    K_eq = np.sqrt(np.maximum(K_I, 0.0) ** 2 + K_II**2)

    # temperature windows at the crack (rim for edge cracks; the crack centre otherwise)
    if fld.T_K is not None:
        T_crack = T_pts.mean(axis=1)
        lefm = T_crack < p.lefm_max_C + KELVIN
        slip_win = T_crack >= p.slip_min_C + KELVIN
    else:
        T_crack = None
        lefm = np.ones(fld.time_s.size, bool)
        slip_win = lefm.copy()

    fam, kic = _kic_for(crack, ctx.mat, notes)
    K_IC = kic.value * 1e6
    out: dict[str, Any] = {"id": crack["id"], "kind": kind, "model": model.name}
    if not lefm.any():
        i_w = int(np.argmax(K_I))
        notes.append("the crack is above the LEFM limit temperature throughout: no fracture verdict")
        validity = fr.Validity(False, validity.limits, validity.problems + ["no brittle-range time"])
    else:
        i_w = int(np.flatnonzero(lefm)[np.argmax(K_I[lefm])])
    K_max = float(K_I[i_w])
    i_eq = int(np.flatnonzero(lefm)[np.argmax(K_eq[lefm])]) if lefm.any() else i_w
    K_eq_max = float(K_eq[i_eq])
    margin = K_IC / K_max if K_max > 0 else None
    margin_eq = K_IC / K_eq_max if K_eq_max > 0 else None
    governing = min((m for m in (margin, margin_eq) if m is not None), default=None)
    if governing is None:
        notes.append("no tension or shear on the crack in the brittle range (K_I <= 0): margin unbounded")
    if not validity.ok:
        verdict = "outside_validity"
        notes.append("outside the solution's validity (" + "; ".join(validity.problems) + "); the "
                     "figures are indicative only")
    elif governing is not None and governing <= 1.0:
        verdict = "grows"
    else:
        verdict = "does_not_grow"
    if margin is not None and margin_eq is not None and margin_eq < margin * 0.999:
        notes.append(f"mixed mode: the verdict uses K_eq (margin {margin_eq:.2f}) rather than K_I alone")

    i_all = int(np.argmax(K_I))
    if T_crack is not None and not lefm[i_all] and K_I[i_all] > K_max * 1.001:
        notes.append(f"the largest K_I ({K_I[i_all] / 1e6:.3f} MPa sqrt(m) at t = {fld.time_s[i_all]:.1f} s, "
                     f"{T_crack[i_all] - KELVIN:.0f} degC) falls above {p.lefm_max_C:g} degC, where LEFM "
                     "no longer holds (brittle-to-ductile transition, " + fr.BDT_SOURCE + "); see the slip check")
    if T_crack is not None and lefm.any() and T_crack[i_w] >= p.slip_min_C + KELVIN:
        notes.append(f"the worst brittle-range moment is at {T_crack[i_w] - KELVIN:.0f} degC, inside the "
                     "brittle-to-ductile range: K_IC rises there, so the room-temperature value is conservative")

    # critical edge-to-centre temperature difference: same profile shape, scaled
    crit = None
    dT_worst = None
    if fld.T_K is not None:
        dT_worst = float(fld.T_K[i_w, -1] - fld.T_K[i_w, 0])
        if governing is not None and abs(dT_worst) > 1e-3:
            crit = dT_worst * governing
            if abs(crit) > 1000.0:
                notes.append("the critical edge-centre difference is beyond any process range")
        elif governing is not None:
            notes.append("edge and centre at the same temperature at the worst moment: no critical dT")

    out.update({
        "K_I_max_MPa_sqrt_m": K_max / 1e6,
        "K_IC_MPa_sqrt_m": kic.value,
        "K_IC_plane": fam,
        "K_IC_source": f"{kic.source}; {kic.status}",
        "margin": margin,
        "worst_time_s": float(fld.time_s[i_w]),
        "sigma_at_worst_MPa": float(model.reported_stress(sig_n)[i_w]) / 1e6,
        "critical_dT_C": crit,
        "verdict": verdict,
        "notes": notes,
        "K_II_at_worst_MPa_sqrt_m": float(K_II[i_w]) / 1e6,
        "K_II_max_MPa_sqrt_m": float(K_II[lefm].max() if lefm.any() else K_II.max()) / 1e6,
        "K_eq_max_MPa_sqrt_m": K_eq_max / 1e6,
        "margin_eq": margin_eq,
        "margin_at_low_K_IC": (fr.K_IC_LOW.value * 1e6 / K_max) if (K_max > 0 and fam == "{111}") else None,
        "tau_at_worst_MPa": float(model.reported_stress(tau)[i_w]) / 1e6,
        "T_at_worst_C": None if T_crack is None else float(T_crack[i_w] - KELVIN),
        "dT_edge_center_at_worst_C": dT_worst,
        "position_used": {"r_mm": None if r_c is None else r_c * 1e3, "angle_deg": angle},
        "geometry": model.geometry,
        "validity": {"ok": validity.ok, "limits": validity.limits, "problems": validity.problems},
    })
    if out["margin_at_low_K_IC"] is not None:
        out["K_IC_low_source"] = fr.K_IC_LOW.source
    out["slip"] = _slip_at(fld, r_c, angle, slip_win, ctx, T_crack)
    idx = _pick(fld.time_s.size, must=(i_w,))
    out["history"] = {
        "time_s": fld.time_s[idx],
        "sigma_MPa": model.reported_stress(sig_n)[idx] / 1e6,
        "K_I_MPa_sqrt_m": K_I[idx] / 1e6,
        "K_eq_MPa_sqrt_m": K_eq[idx] / 1e6,
    }
    if T_crack is not None:
        out["history"]["T_C"] = T_crack[idx] - KELVIN
    return out


def _slip_at(fld: ProcessField, r_c: float | None, angle: float | None, window: np.ndarray,
             ctx: _Context, T_crack) -> dict:
    """Largest resolved shear stress on the 12 {111}<110> systems at the crack, in the slip window."""
    p = ctx.params
    base = {"tau_c_MPa": p.tau_c_MPa, "window": (f"T >= {p.slip_min_C:g} degC" if fld.T_K is not None
                                                  else "all times (no temperatures)")}
    if not window.any():
        return {**base, "tau_max_MPa": None, "risk": "no_high_temperature"}
    r_q = np.array([ctx.R_m if r_c is None else r_c])
    sr, st, _ = fld.sample(r_q)
    sr, st = sr[window, 0], st[window, 0]
    angles = [angle] if angle is not None else list(np.arange(0.0, 180.0, 5.0))
    _, _, labels = fr.slip_systems()
    best = (-1.0, 0, 0, 0.0)
    for ang in angles:
        S_r, S_t = fr.slip_factors(ang, ctx.z_uvw, ctx.x_uvw)
        tau = np.abs(sr[:, None] * S_r + st[:, None] * S_t)
        i, k = np.unravel_index(int(np.argmax(tau)), tau.shape)
        if tau[i, k] > best[0]:
            best = (float(tau[i, k]), int(i), int(k), float(ang))
    tau_max, i, k, ang = best
    t_idx = int(np.flatnonzero(window)[i])
    out = {**base, "tau_max_MPa": tau_max / 1e6, "system": labels[k], "time_s": float(fld.time_s[t_idx]),
           "T_C": None if T_crack is None else float(T_crack[t_idx] - KELVIN)}
    if angle is None:
        out["angle_deg_worst"] = ang
    if p.tau_c_MPa is None:
        out["risk"] = "not_judged"
        out["note"] = "set model.tau_c_MPa in the recipe to judge slip (no reliable default exists)"
    else:
        out["risk"] = "slip_likely" if tau_max / 1e6 >= p.tau_c_MPa else "below_tau_c"
    return out


def _wafer_slip(ctx: _Context) -> dict:
    """Largest resolved shear stress anywhere in the wafer (all radii, azimuths 0-355 deg)."""
    fld, p = ctx.field, ctx.params
    if fld.T_K is not None:
        win = fld.T_K >= p.slip_min_C + KELVIN  # (nt, nr)
    else:
        win = np.ones(fld.sigma_r_Pa.shape, bool)
    if not win.any():
        return {"tau_max_MPa": None, "risk": "no_high_temperature", "tau_c_MPa": p.tau_c_MPa}
    rows = np.flatnonzero(win.any(axis=1))
    rows = rows[_pick(rows.size)]
    sr = np.where(win[rows], fld.sigma_r_Pa[rows], 0.0)
    st = np.where(win[rows], fld.sigma_theta_Pa[rows], 0.0)
    _, _, labels = fr.slip_systems()
    best = (-1.0, 0, 0, 0, 0.0)
    for ang in np.arange(0.0, 360.0, 5.0):
        S_r, S_t = fr.slip_factors(float(ang), ctx.z_uvw, ctx.x_uvw)
        tau = np.abs(sr[..., None] * S_r + st[..., None] * S_t)
        i, j, k = np.unravel_index(int(np.argmax(tau)), tau.shape)
        if tau[i, j, k] > best[0]:
            best = (float(tau[i, j, k]), int(i), int(j), int(k), float(ang))
    tau_max, i, j, k, ang = best
    ti = int(rows[i])
    out = {"tau_max_MPa": tau_max / 1e6, "system": labels[k], "time_s": float(fld.time_s[ti]),
           "r_mm": float(fld.r_m[j] * 1e3), "angle_deg": ang, "tau_c_MPa": p.tau_c_MPa,
           "T_C": None if fld.T_K is None else float(fld.T_K[ti, j] - KELVIN)}
    if p.tau_c_MPa is None:
        out["risk"] = "not_judged"
    else:
        out["risk"] = "slip_likely" if tau_max / 1e6 >= p.tau_c_MPa else "below_tau_c"
    return out


# ---------------------------------------------------------------------------------------------
# Public API.


def assess_defects(
    defects: dict,
    *,
    recipe_path: Path | None = None,
    temperature_csv: Path | None = None,
    stress_csv: Path | None = None,
) -> dict:
    """Assess every crack of a defect export against one thermal load.

    Parameters
    ----------
    defects : dict
        A ``defects.json`` document already validated (``runfolder.read_defects``).
    recipe_path, temperature_csv, stress_csv : Path, optional
        Exactly one load source (SPEC section 8).

    Returns
    -------
    dict
        The ``assessment.json`` document: ``schema_version``, ``inputs``, ``cautions``,
        ``wafer_verdict``, ``wafer`` (process summary and slip check), ``cracks`` (per crack:
        id, model, K_I_max_MPa_sqrt_m, K_IC_MPa_sqrt_m, margin, worst_time_s,
        sigma_at_worst_MPa, critical_dT_C, verdict, notes, K_II/K_eq, slip, history),
        ``skipped_cracks`` and ``timeline``.

    Raises
    ------
    InputError
        No or several load sources, or a bad recipe or CSV (naming file, line/key).
    """
    given = [(k, v) for k, v in (("recipe", recipe_path), ("temperature_csv", temperature_csv),
                                 ("stress_csv", stress_csv)) if v is not None]
    if len(given) != 1:
        raise InputError("give exactly one of a recipe, a temperature CSV (time_s,r_mm,T_C) or a "
                         "stress CSV (time_s,r_mm,sigma_r_MPa,sigma_theta_MPa)")
    source, src_path = given[0]
    src_path = Path(src_path)
    wafer = defects["wafer"]
    R_m = wafer["diameter_mm"] * 0.5e-3
    t_m = wafer["thickness_um"] * 1e-6
    z_uvw = tuple(wafer["crystal"]["z_uvw"])
    x_uvw = tuple(wafer["crystal"]["x_uvw"])
    recipe = load_recipe(src_path) if source == "recipe" else None
    overrides = recipe.material if recipe else MaterialOverrides()
    params = recipe.model if recipe else ModelParams()
    mat = resolve_materials(overrides, z_uvw)
    if source == "recipe":
        fld = field_from_recipe(recipe, R_m, t_m, mat)
    elif source == "temperature_csv":
        fld = field_from_temperature_csv(src_path, R_m, mat)
    else:
        fld = field_from_stress_csv(src_path)
    ctx = _Context(R_m, t_m, z_uvw, x_uvw, fld, mat, params)

    cracks, skipped = [], []
    for c in defects.get("cracks", []):
        if c.get("review", {}).get("status") == "rejected":
            skipped.append({"id": c["id"], "reason": "rejected in review"})
            continue
        cracks.append(_assess_crack(c, ctx))

    verdicts = [c["verdict"] for c in cracks]
    if "grows" in verdicts:
        wafer_verdict = "grows"
    elif "outside_validity" in verdicts:
        wafer_verdict = "outside_validity"
    else:
        wafer_verdict = "does_not_grow"
    margins = [c["margin"] for c in cracks if c["margin"] is not None]

    # timeline
    edge_i = -1
    s_edge = fld.sample(np.array([R_m]))
    dT = None if fld.T_K is None else fld.T_K[:, edge_i] - fld.T_K[:, 0]
    must = [] if dT is None else [int(np.argmax(dT)), int(np.argmin(dT))]
    must += [int(np.argmax(s_edge[1][:, 0])), int(np.argmin(s_edge[1][:, 0]))]
    idx = _pick(fld.time_s.size, must=must)
    timeline: dict[str, Any] = {
        "time_s": fld.time_s[idx],
        "T_center_C": None if fld.T_K is None else fld.T_K[idx, 0] - KELVIN,
        "T_edge_C": None if fld.T_K is None else fld.T_K[idx, edge_i] - KELVIN,
        "dT_edge_center_C": None if dT is None else dT[idx],
        "sigma_theta_edge_MPa": s_edge[1][idx, 0] / 1e6,
        "sigma_center_MPa": fld.sample(np.array([0.0]))[1][idx, 0] / 1e6,
    }
    for k, v in fld.timeline_extra.items():
        timeline[k] = v[idx]

    summary: dict[str, Any] = {
        "n_cracks": len(defects.get("cracks", [])), "n_assessed": len(cracks),
        "n_grow": verdicts.count("grows"), "n_outside_validity": verdicts.count("outside_validity"),
        "min_margin": min(margins) if margins else None,
        "sigma_theta_edge_max_MPa": float(s_edge[1][:, 0].max()) / 1e6,
        "sigma_theta_edge_max_time_s": float(fld.time_s[int(np.argmax(s_edge[1][:, 0]))]),
        "sigma_theta_edge_min_MPa": float(s_edge[1][:, 0].min()) / 1e6,
        "sigma_theta_edge_min_time_s": float(fld.time_s[int(np.argmin(s_edge[1][:, 0]))]),
        "slip": _wafer_slip(ctx),
        "notes": fld.notes,
    }
    if dT is not None:
        summary.update({
            "dT_edge_center_max_C": float(dT.max()), "dT_edge_center_max_time_s": float(fld.time_s[int(np.argmax(dT))]),
            "dT_edge_center_min_C": float(dT.min()), "dT_edge_center_min_time_s": float(fld.time_s[int(np.argmin(dT))]),
        })

    inputs: dict[str, Any] = {
        "source": source, "path": str(src_path),
        "defects_software": defects.get("software"),
        "wafer": {"diameter_mm": wafer["diameter_mm"], "thickness_um": wafer["thickness_um"],
                  "crystal": wafer["crystal"]},
        "material": {
            "E": mat.E_info, "alpha": mat.alpha_info,
            "K_IC_MPa_sqrt_m": {f: v.as_dict() for f, v in mat.K_IC.items()},
            "K_IC_low": fr.K_IC_LOW.as_dict(),
            "thermal": mat.thermal.describe(),
            "brittle_to_ductile": fr.BDT_SOURCE,
        },
        "model": params.model_dump(),
        "stress_model": "plane-stress thin solid disk, axisymmetric temperature (Timoshenko & "
                        "Goodier 1970, Theory of Elasticity, 3rd ed.)",
    }
    if recipe is not None:
        inputs["recipe"] = recipe.model_dump()
        inputs["thermal_model"] = (
            "axisymmetric transient conduction in a thin disk, finite volumes in r, BDF; grey-body "
            "radiation of both faces and the edge face to the chamber, lamp irradiance on all "
            "faces (edge fraction model.edge_irradiance_fraction), lamp controlled so the centre "
            "follows the recipe")
    doc = {
        "schema_version": SCHEMA_VERSION,
        "software": {"name": "crackstack", "version": __version__},
        "inputs": inputs,
        "cautions": CAUTIONS,
        "wafer_verdict": wafer_verdict,
        "wafer": summary,
        "cracks": cracks,
        "skipped_cracks": skipped,
        "timeline": timeline,
    }
    return _clean(doc)


def _clean(obj: Any) -> Any:
    """JSON-ready copy: NumPy to Python, non-finite floats to None (JSON has no inf/NaN)."""
    if isinstance(obj, dict):
        return {str(k): _clean(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [_clean(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _clean(obj.tolist())
    if isinstance(obj, np.bool_ | bool):
        return bool(obj)
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, float | np.floating):
        f = float(obj)
        return f if math.isfinite(f) else None
    return obj


def write_assessment(path: str | Path, doc: dict) -> None:
    """Write ``assessment.json`` atomically."""
    runfolder.write_json_atomic(path, _clean(doc))


def format_rows(doc: dict) -> list[dict]:
    """One row per crack for the CLI's table."""
    rows = []
    for c in doc.get("cracks", []):
        rows.append({
            "id": c["id"], "model": c["model"], "K_I_max": c.get("K_I_max_MPa_sqrt_m"),
            "K_IC": c.get("K_IC_MPa_sqrt_m"), "margin": c.get("margin"),
            "worst_time_s": c.get("worst_time_s"), "verdict": c.get("verdict"),
        })
    return rows

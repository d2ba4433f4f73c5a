"""Transient heat conduction in a thin silicon disk and its plane-stress thermal stresses.

SI units inside (m, s, K, W, Pa). The wafer is a thin disk of radius b and thickness t whose
temperature is uniform through the thickness (Biot number h t / (2 k) below 0.01 for radiative
exchange at 1000 degC), so the field is T(r, t).

* Heat conduction: finite volumes in r (cells graded toward the rim, where the edge face makes a
  boundary layer a few millimetres wide), method of lines, :func:`scipy.integrate.solve_ivp`
  with the stiff BDF method and a sparse Jacobian pattern. Conductivity and heat capacity depend
  on temperature. Both faces and the edge face exchange radiation with the chamber (grey body,
  emissivity epsilon) and absorb the lamp irradiance; an optional forced-gas heat-transfer
  coefficient models a fast cool.
* Lamp control: exact inversion of the centre cell's energy balance with a first-order tracking
  term, clipped to [0, maximum lamp irradiance], so the centre follows the recipe wherever the
  lamps can make it; the rim, with its extra face, heats and cools faster.
* Stress: Timoshenko & Goodier (1970), *Theory of Elasticity*, 3rd ed., thin circular disk with a
  temperature symmetric about the centre (plane stress), with the thermal strain integrated from
  the temperature-dependent expansion coefficient of Okada & Tokumaru (1984).

Material data and their status
------------------------------
* conductivity ``k = 299 / (T - 99)`` W/(cm K), T in K, about 300-1400 K: fit from memory, origin
  not verified; the underlying data are Glassbrenner & Slack (1964), Phys. Rev. 134, A1058
  (from memory). Spot data 1.25 W/(cm K) at 30 degC, 0.46 at 425 degC agree within 10-20 %.
* heat capacity: Shomate equation for Si(cr), 298-1685 K, NIST Chemistry WebBook / NIST-JANAF
  Thermochemical Tables (Chase 1998); coefficients from memory.
* density 2329 kg/m^3 (from memory).
* expansion coefficient: Okada & Tokumaru (1984), J. Appl. Phys. 56, 314, fit valid 120-1500 K
  (read in the abstract).
"""

from __future__ import annotations

import logging
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np
from scipy import sparse
from scipy.integrate import solve_ivp

log = logging.getLogger(__name__)

#: Stefan-Boltzmann constant, W m^-2 K^-4 (CODATA 2018, exact from h, c, k).
STEFAN_BOLTZMANN = 5.670374419e-8
KELVIN = 273.15
#: Molar mass of silicon, kg/mol (IUPAC standard atomic weight 28.085).
SI_MOLAR_MASS = 28.0855e-3
#: Density of silicon at room temperature, kg/m^3 (from memory).
SI_DENSITY = 2329.0
#: Shomate coefficients A..E for Si(cr), 298-1685 K (NIST-JANAF, Chase 1998; from memory).
_SHOMATE = (22.81719, 3.899510, -0.082885, 0.042111, -0.354063)
#: Okada & Tokumaru (1984) thermal-expansion fit reference temperature for the strain, K.
STRAIN_REFERENCE_K = 293.15


# ---------------------------------------------------------------------------------------------
# Material functions.


def conductivity_si(T_K) -> np.ndarray:
    """Thermal conductivity of silicon, W/(m K): ``29900 / (T - 99)`` (fit, about 300-1400 K).

    Below 200 K the fit's pole at 99 K makes it meaningless; it is evaluated at 200 K there.
    """
    T = np.maximum(np.asarray(T_K, float), 200.0)
    return 29900.0 / (T - 99.0)


def heat_capacity_si(T_K) -> np.ndarray:
    """Specific heat capacity of silicon, J/(kg K), Shomate form (298-1685 K).

    ``cp = A + B t + C t^2 + D t^3 + E / t^2`` J/(mol K) with t = T / 1000 K; evaluated at
    250 K or above (the fit starts at 298 K; below it cp is held near its 250 K value).
    """
    A, B, C, D, E = _SHOMATE
    t = np.maximum(np.asarray(T_K, float), 250.0) / 1000.0
    return (A + B * t + C * t**2 + D * t**3 + E / t**2) / SI_MOLAR_MASS


def enthalpy_si(T_K) -> np.ndarray:
    """Specific enthalpy of silicon, J/kg, up to a constant (antiderivative of :func:`heat_capacity_si`).

    Exact antiderivative above 250 K; below, linear with the 250 K heat capacity.
    """
    A, B, C, D, E = _SHOMATE
    T = np.asarray(T_K, float)
    Tc = np.maximum(T, 250.0)
    t = Tc / 1000.0
    h = 1000.0 * (A * t + B * t**2 / 2 + C * t**3 / 3 + D * t**4 / 4 - E / t) / SI_MOLAR_MASS
    return h + heat_capacity_si(250.0) * np.minimum(T - 250.0, 0.0)


def alpha_okada_tokumaru(T_K) -> np.ndarray:
    """Linear expansion coefficient of silicon, 1/K (Okada & Tokumaru 1984, 120-1500 K).

    ``alpha = [3.725 (1 - exp(-5.88e-3 (T - 124))) + 5.548e-4 T] * 1e-6``.
    """
    T = np.asarray(T_K, float)
    return (3.725 * (1.0 - np.exp(-5.88e-3 * (T - 124.0))) + 5.548e-4 * T) * 1e-6


def strain_okada_tokumaru(T_K) -> np.ndarray:
    """Thermal strain ``int_{293.15 K}^{T} alpha dT`` from the Okada & Tokumaru fit (exact integral)."""

    def prim(T):
        return (3.725 * (T + np.exp(-5.88e-3 * (T - 124.0)) / 5.88e-3) + 2.774e-4 * T**2) * 1e-6

    return prim(np.asarray(T_K, float)) - prim(STRAIN_REFERENCE_K)


def constant_alpha_strain(alpha_per_K: float) -> Callable[[np.ndarray], np.ndarray]:
    """Thermal strain for a constant expansion coefficient (for checks and user overrides)."""

    def strain(T_K):
        return alpha_per_K * (np.asarray(T_K, float) - STRAIN_REFERENCE_K)

    return strain


@dataclass(frozen=True)
class ThermalProperties:
    """Silicon's thermal properties, each optionally replaced by a constant (recipe overrides)."""

    density_kg_m3: float = SI_DENSITY
    conductivity_W_mK: float | None = None
    heat_capacity_J_kgK: float | None = None

    def k(self, T_K) -> np.ndarray:
        if self.conductivity_W_mK is not None:
            return np.full(np.shape(T_K), float(self.conductivity_W_mK))
        return conductivity_si(T_K)

    def c_vol(self, T_K) -> np.ndarray:
        """Volumetric heat capacity, J/(m^3 K)."""
        if self.heat_capacity_J_kgK is not None:
            return np.full(np.shape(T_K), self.density_kg_m3 * self.heat_capacity_J_kgK)
        return self.density_kg_m3 * heat_capacity_si(T_K)

    def h_vol(self, T_K) -> np.ndarray:
        """Volumetric enthalpy up to a constant, J/m^3."""
        if self.heat_capacity_J_kgK is not None:
            return self.density_kg_m3 * self.heat_capacity_J_kgK * np.asarray(T_K, float)
        return self.density_kg_m3 * enthalpy_si(T_K)

    def describe(self) -> dict:
        return {
            "density_kg_per_m3": self.density_kg_m3,
            "conductivity": (
                {"value_W_per_mK": self.conductivity_W_mK, "source": "recipe override"}
                if self.conductivity_W_mK is not None else
                {"model": "k = 299/(T - 99) W/(cm K), T in K, ~300-1400 K",
                 "source": "fit of Glassbrenner & Slack (1964), Phys. Rev. 134, A1058 data",
                 "status": "from memory; origin of the fit not verified"}),
            "heat_capacity": (
                {"value_J_per_kgK": self.heat_capacity_J_kgK, "source": "recipe override"}
                if self.heat_capacity_J_kgK is not None else
                {"model": "Shomate equation for Si(cr), 298-1685 K",
                 "source": "NIST-JANAF Thermochemical Tables (Chase 1998) via the NIST WebBook",
                 "status": "coefficients from memory"}),
        }


# ---------------------------------------------------------------------------------------------
# Finite-volume mesh and the conduction solver.


@dataclass(frozen=True)
class DiskMesh:
    """Annular finite-volume cells of a disk; cell i spans faces_m[i]..faces_m[i+1]."""

    radius_m: float
    thickness_m: float
    faces_m: np.ndarray

    @property
    def n(self) -> int:
        return len(self.faces_m) - 1

    @property
    def centres_m(self) -> np.ndarray:
        return 0.5 * (self.faces_m[:-1] + self.faces_m[1:])

    @property
    def face_area_m2(self) -> np.ndarray:
        """Area of one flat face of each annulus, m^2."""
        return np.pi * (self.faces_m[1:] ** 2 - self.faces_m[:-1] ** 2)

    @property
    def volume_m3(self) -> np.ndarray:
        return self.face_area_m2 * self.thickness_m

    @property
    def edge_area_m2(self) -> float:
        return 2.0 * np.pi * self.radius_m * self.thickness_m

    @property
    def nodes_m(self) -> np.ndarray:
        """Radii where temperatures are reported: 0, the cell centres and the rim."""
        return np.concatenate([[0.0], self.centres_m, [self.radius_m]])

    def node_temperatures(self, T_cells) -> np.ndarray:
        """Temperatures at :attr:`nodes_m` from cell values (..., n) -> (..., n + 2).

        The centre takes the first cell's value (zero gradient by symmetry); the rim is
        extrapolated linearly from the last two cells (second order like the scheme).
        """
        T = np.asarray(T_cells, float)
        c = self.centres_m
        slope = (T[..., -1] - T[..., -2]) / (c[-1] - c[-2])
        rim = T[..., -1] + slope * (self.radius_m - c[-1])
        return np.concatenate([T[..., :1], T, rim[..., None]], axis=-1)


def disk_mesh(radius_m: float, thickness_m: float, n_cells: int, *, edge_refinement: float = 30.0) -> DiskMesh:
    """Cells whose widths shrink geometrically from the centre to the rim.

    ``edge_refinement`` is the ratio of the centre cell's width to the rim cell's (1 = uniform).
    Refinement keeps the rim boundary layer (its width ``sqrt(k t / (2 h))`` is about 5 mm for
    radiation at 1000 degC) resolved with a few hundred cells across a 300 mm wafer.
    """
    if n_cells < 3:
        raise ValueError(f"n_cells must be >= 3 (got {n_cells})")
    q = edge_refinement ** (-1.0 / (n_cells - 1)) if edge_refinement != 1.0 else 1.0
    widths = q ** np.arange(n_cells)
    faces = np.concatenate([[0.0], np.cumsum(widths)])
    faces *= radius_m / faces[-1]
    faces[-1] = radius_m
    return DiskMesh(radius_m=float(radius_m), thickness_m=float(thickness_m), faces_m=faces)


FluxFn = Callable[[float, np.ndarray], np.ndarray]


@dataclass
class ConductionResult:
    t_s: np.ndarray  # (nt,)
    T_K: np.ndarray  # (nt, n) cell temperatures
    energy_in_J: np.ndarray  # (nt,) heat that entered through the faces and the edge since start
    status_message: str = ""


def integrate_disk(
    mesh: DiskMesh,
    props: ThermalProperties,
    T_start_K: np.ndarray,
    t_eval_s: np.ndarray,
    *,
    face_flux: FluxFn,
    edge_flux: Callable[[float, float, np.ndarray], float],
    coupled_cells: Sequence[int] = (),
    energy_start_J: float = 0.0,
    rtol: float = 1e-6,
    atol_K: float = 1e-4,
    events=None,
) -> ConductionResult:
    """Integrate ``rho c(T) dT/dt = div(k(T) grad T) + boundary fluxes`` over ``t_eval_s``.

    Parameters
    ----------
    mesh : DiskMesh
    props : ThermalProperties
    T_start_K : (n,) array
        Cell temperatures at ``t_eval_s[0]``.
    t_eval_s : (nt,) array
        Output times, increasing; integration runs from the first to the last.
    face_flux : callable ``(t_s, T_K) -> (n,)``
        Heat flux into the wafer through each flat face of each cell, W/m^2 (both faces alike).
    edge_flux : callable ``(t_s, T_rim_K, T_K) -> float``
        Heat flux into the wafer through the edge face, W/m^2, given the rim temperature
        (extrapolated linearly from the last two cells, second order like the scheme) and the
        cell temperatures.
    coupled_cells : sequence of int
        Cells on whose temperature every flux depends (e.g. the controller's sensing cells);
        they make dense columns in the Jacobian pattern.
    energy_start_J : float
        Initial value of the accumulated boundary heat.
    rtol, atol_K : float
        Solver tolerances (relative; absolute in K).

    Returns
    -------
    ConductionResult
        Cell temperatures and the accumulated boundary heat at ``t_eval_s``.

    Notes
    -----
    Face conductance between cells i and i + 1: ``k((T_i + T_{i+1})/2) 2 pi r_f t / (r_{i+1} - r_i)``;
    the fluxes telescope, so conduction moves energy without creating it. The boundary heat is
    integrated as an extra state so that the energy balance can be checked to solver accuracy.
    """
    n = mesh.n
    c = mesh.centres_m
    r_int = mesh.faces_m[1:-1]
    geom = 2.0 * np.pi * r_int * mesh.thickness_m / np.diff(c)
    area2 = 2.0 * mesh.face_area_m2
    vol = mesh.volume_m3
    a_edge = mesh.edge_area_m2
    rim_w = (mesh.radius_m - c[-1]) / (c[-1] - c[-2])

    def rhs(t, y):
        T = y[:n]
        flow = props.k(0.5 * (T[:-1] + T[1:])) * geom * (T[1:] - T[:-1])
        q = np.zeros(n)
        q[:-1] += flow
        q[1:] -= flow
        boundary = area2 * face_flux(t, T)
        T_rim = T[-1] + (T[-1] - T[-2]) * rim_w
        boundary[-1] += a_edge * edge_flux(t, T_rim, T)
        out = np.empty(n + 1)
        out[:n] = (q + boundary) / (props.c_vol(T) * vol)
        out[n] = boundary.sum()
        return out

    diag = np.arange(n)
    rows = [diag, diag[:-1], diag[1:], np.array([n - 1])]
    cols = [diag, diag[1:], diag[:-1], np.array([n - 2])]
    for j in coupled_cells:
        rows.append(diag)
        cols.append(np.full(n, j))
    # the heat state depends on every boundary cell: a dense last row (it costs n + 1 right-hand
    # sides per Jacobian, which BDF rarely rebuilds; leaving it out lets Newton stop before the
    # heat state has converged and the energy balance drifts by ~1e-4)
    rows.append(np.full(n, n))
    cols.append(diag)
    rr, cc = np.concatenate(rows), np.concatenate(cols)
    pattern = sparse.coo_matrix((np.ones(rr.size), (rr, cc)), shape=(n + 1, n + 1)).tocsc()
    pattern.data[:] = 1.0

    y0 = np.concatenate([np.asarray(T_start_K, float), [energy_start_J]])
    # the heat state's absolute tolerance: the energy of atol_K over the whole wafer
    heat_cap = float(props.c_vol(y0[:n]) @ vol)
    atol = np.concatenate([np.full(n, atol_K), [atol_K * heat_cap]])
    t_eval_s = np.asarray(t_eval_s, float)
    sol = solve_ivp(rhs, (t_eval_s[0], t_eval_s[-1]), y0, method="BDF", t_eval=t_eval_s,
                    jac_sparsity=pattern, rtol=rtol, atol=atol, events=events)
    if sol.status < 0:
        raise RuntimeError(f"heat-conduction solver failed: {sol.message}")
    return ConductionResult(t_s=sol.t, T_K=sol.y[:n].T, energy_in_J=sol.y[n], status_message=sol.message)


# ---------------------------------------------------------------------------------------------
# Lamp-controlled rapid thermal process.


@dataclass(frozen=True)
class SetpointPiece:
    """One recipe segment: the set temperature runs linearly from ``T_start_K`` at ``rate_K_s``."""

    t_start_s: float
    t_end_s: float
    T_start_K: float
    rate_K_s: float
    gas_h_W_m2K: float = 0.0
    label: str = ""

    def T_set(self, t_s: float) -> float:
        return self.T_start_K + self.rate_K_s * (t_s - self.t_start_s)


@dataclass(frozen=True)
class ChamberModel:
    """Radiative chamber with lamps: every surface sees ``sigma T_chamber^4 + lamp`` irradiance."""

    emissivity: float = 0.7
    chamber_K: float = 298.15
    gas_K: float = 298.15
    max_lamp_W_m2: float = 1.5e6
    edge_irradiance_fraction: float = 1.0
    tracking_time_s: float = 0.5


@dataclass
class ThermalHistory:
    """Temperatures of a simulated recipe at output times."""

    t_s: np.ndarray  # (nt,)
    r_m: np.ndarray  # (nr,) node radii: 0, cell centres, rim
    T_K: np.ndarray  # (nt, nr)
    setpoint_K: np.ndarray  # (nt,)
    lamp_W_m2: np.ndarray  # (nt,) lamp irradiance on each face
    energy_in_J: np.ndarray  # (nt,)
    stored_J: np.ndarray  # (nt,) enthalpy change of the wafer since the start
    mesh: DiskMesh
    notes: list[str] = field(default_factory=list)


def _lamp_irradiance(t, T, piece: SetpointPiece, mesh: DiskMesh, props: ThermalProperties,
                     chamber: ChamberModel, geom01: float, T_final_K: float | None) -> float:
    """Lamp irradiance that makes the centre cell follow the set temperature (clipped)."""
    T0, T1 = T[0], T[1]
    eps, sig = chamber.emissivity, STEFAN_BOLTZMANN
    if T_final_K is None:
        T_set, rate = piece.T_set(t), piece.rate_K_s
    else:  # settling after the recipe: hold the final set temperature
        T_set, rate = T_final_K, 0.0
    want = rate + (T_set - T0) / chamber.tracking_time_s
    a2 = 2.0 * mesh.face_area_m2[0]
    cond = props.k(0.5 * (T0 + T1)) * geom01 * (T1 - T0)
    passive = a2 * (eps * sig * (chamber.chamber_K**4 - T0**4) - piece.gas_h_W_m2K * (T0 - chamber.gas_K))
    need = props.c_vol(T0) * mesh.volume_m3[0] * want - cond - passive
    return float(np.clip(need / (a2 * eps), 0.0, chamber.max_lamp_W_m2))


def simulate_process(
    pieces: Sequence[SetpointPiece],
    *,
    radius_m: float,
    thickness_m: float,
    T_start_K: float,
    props: ThermalProperties,
    chamber: ChamberModel,
    n_cells: int = 120,
    edge_refinement: float = 30.0,
    output_step_s: float = 0.05,
    settle_max_s: float = 120.0,
    settle_tolerance_K: float = 2.0,
) -> ThermalHistory:
    """Simulate a lamp-heated process whose centre follows the set-temperature pieces.

    After the last piece the set temperature is held until the centre is within
    ``settle_tolerance_K`` of it (or ``settle_max_s`` has passed), because a requested cooling
    rate may be faster than the wafer can radiate.

    Returns
    -------
    ThermalHistory
        Node temperatures at every ``output_step_s`` and at segment ends.
    """
    mesh = disk_mesh(radius_m, thickness_m, n_cells, edge_refinement=edge_refinement)
    c = mesh.centres_m
    geom01 = 2.0 * np.pi * mesh.faces_m[1] * thickness_m / (c[1] - c[0])
    eps, sig = chamber.emissivity, STEFAN_BOLTZMANN
    T = np.full(mesh.n, float(T_start_K))
    energy = 0.0
    ts, Ts, Es, sets, lamps = [], [], [], [], []

    def run_piece(piece: SetpointPiece, t0: float, t1: float, T_final: float | None, events=None):
        memo: dict = {}

        def lamp(t, TT):
            # face() and edge() are called with the same state in one right-hand side
            key = (t, TT[0], TT[1])
            if memo.get("key") != key:
                memo["key"] = key
                memo["value"] = _lamp_irradiance(t, TT, piece, mesh, props, chamber, geom01, T_final)
            return memo["value"]

        def face(t, TT):
            return (eps * (lamp(t, TT) + sig * (chamber.chamber_K**4 - TT**4))
                    - piece.gas_h_W_m2K * (TT - chamber.gas_K))

        def edge(t, Te, TT):
            return (eps * (chamber.edge_irradiance_fraction * lamp(t, TT)
                           + sig * (chamber.chamber_K**4 - Te**4))
                    - piece.gas_h_W_m2K * (Te - chamber.gas_K))

        n_out = max(int(math.ceil((t1 - t0) / output_step_s)), 1)
        t_eval = np.linspace(t0, t1, n_out + 1)
        res = integrate_disk(mesh, props, T, t_eval, face_flux=face, edge_flux=edge,
                             coupled_cells=(0, 1), energy_start_J=energy, events=events)
        lamp_vals = np.array([lamp(t, TT) for t, TT in zip(res.t_s, res.T_K, strict=True)])
        set_vals = (np.full(res.t_s.size, T_final) if T_final is not None
                    else np.array([piece.T_set(t) for t in res.t_s]))
        return res, lamp_vals, set_vals

    for k, piece in enumerate(pieces):
        res, lamp_vals, set_vals = run_piece(piece, piece.t_start_s, piece.t_end_s, None)
        sl = slice(0 if k == 0 else 1, None)
        ts.append(res.t_s[sl])
        Ts.append(res.T_K[sl])
        Es.append(res.energy_in_J[sl])
        lamps.append(lamp_vals[sl])
        sets.append(set_vals[sl])
        T, energy = res.T_K[-1].copy(), float(res.energy_in_J[-1])

    notes: list[str] = []
    last = pieces[-1]
    T_final = last.T_set(last.t_end_s)
    if abs(T[0] - T_final) > settle_tolerance_K and settle_max_s > 0:
        def settled(t, y):
            return abs(y[0] - T_final) - settle_tolerance_K

        settled.terminal = True
        t0 = last.t_end_s
        res, lamp_vals, set_vals = run_piece(last, t0, t0 + settle_max_s, T_final, events=settled)
        ts.append(res.t_s[1:])
        Ts.append(res.T_K[1:])
        Es.append(res.energy_in_J[1:])
        lamps.append(lamp_vals[1:])
        sets.append(set_vals[1:])
        notes.append(
            f"the centre reached the final set temperature {T_final - KELVIN:.0f} degC only "
            f"{res.t_s[-1] - t0:.1f} s after the recipe's end (the requested cooling was faster "
            "than the wafer can lose heat); the simulation ran on with the lamps off")

    t_all = np.concatenate(ts)
    T_cells = np.concatenate(Ts)
    setpoint = np.concatenate(sets)
    lamp_all = np.concatenate(lamps)
    stored = (props.h_vol(T_cells) - props.h_vol(np.full(mesh.n, float(T_start_K)))) @ mesh.volume_m3
    lag = T_cells[:, 0] - setpoint
    in_recipe = t_all <= last.t_end_s
    worst = int(np.argmax(np.abs(lag) * in_recipe))
    if abs(lag[worst]) > 5.0:
        notes.append(
            f"the centre departed from the recipe by up to {lag[worst]:+.0f} K (at t = "
            f"{t_all[worst]:.1f} s): the lamps were {'off' if lamp_all[worst] <= 0 else 'at full power'} there")
    return ThermalHistory(
        t_s=t_all, r_m=mesh.nodes_m, T_K=mesh.node_temperatures(T_cells), setpoint_K=setpoint,
        lamp_W_m2=lamp_all, energy_in_J=np.concatenate(Es), stored_J=stored, mesh=mesh, notes=notes,
    )


# ---------------------------------------------------------------------------------------------
# Thin-disk thermal stress.


def disk_thermal_stress(
    r_m,
    T_K,
    *,
    E_Pa: float,
    thermal_strain: Callable[[np.ndarray], np.ndarray] = strain_okada_tokumaru,
) -> tuple[np.ndarray, np.ndarray]:
    """Plane-stress radial and hoop stress of a thin solid disk with an axisymmetric temperature.

    ``sigma_r = E [ (1/b^2) int_0^b eps r dr - (1/r^2) int_0^r eps r dr ]``,
    ``sigma_theta = E [ (1/b^2) int_0^b eps r dr + (1/r^2) int_0^r eps r dr - eps(r) ]``
    with the thermal strain ``eps(T)`` in place of ``alpha T`` (Timoshenko & Goodier 1970,
    *Theory of Elasticity*, thin circular disk, temperature symmetrical about the centre).

    Parameters
    ----------
    r_m : (nr,) array
        Increasing radii from 0 to the rim b, m. The first must be 0.
    T_K : (..., nr) array
        Temperatures at those radii, K.
    E_Pa : float
        Young's modulus (isotropic stand-in), Pa.
    thermal_strain : callable
        ``T_K -> strain``; default the integrated Okada & Tokumaru (1984) coefficient.

    Returns
    -------
    sigma_r_Pa, sigma_theta_Pa : (..., nr) arrays

    Notes
    -----
    The strain is taken piecewise linear between the given radii and ``int eps r dr`` is
    integrated exactly for that interpolant, so the rim identity
    ``sigma_theta(b) = E (mean eps - eps(b))`` holds to rounding and a parabolic profile is
    reproduced to O(dr^2). At r = 0 the limit ``(1/r^2) int_0^r eps r dr -> eps(0)/2`` is used.
    """
    r = np.asarray(r_m, float)
    if r.ndim != 1 or r.size < 2 or r[0] != 0.0 or np.any(np.diff(r) <= 0):
        raise ValueError("r_m must be increasing radii starting at 0")
    eps = np.asarray(thermal_strain(np.asarray(T_K, float)), float)
    h = np.diff(r)
    seg = h / 6.0 * (eps[..., :-1] * (2 * r[:-1] + r[1:]) + eps[..., 1:] * (r[:-1] + 2 * r[1:]))
    integral = np.concatenate([np.zeros(eps.shape[:-1] + (1,)), np.cumsum(seg, axis=-1)], axis=-1)
    b = r[-1]
    mean_term = integral[..., -1:] / b**2
    inner = np.empty_like(eps)
    inner[..., 1:] = integral[..., 1:] / r[1:] ** 2
    inner[..., 0] = 0.5 * eps[..., 0]
    sigma_r = E_Pa * (mean_term - inner)
    sigma_r[..., -1] = 0.0  # exactly: the rim is traction free (differs from the above by rounding)
    sigma_theta = E_Pa * (mean_term + inner - eps)
    return sigma_r, sigma_theta


def area_mean(r_m, values) -> np.ndarray:
    """Area-weighted mean ``(2/b^2) int_0^b v r dr`` for piecewise-linear ``values`` (..., nr)."""
    r = np.asarray(r_m, float)
    v = np.asarray(values, float)
    h = np.diff(r)
    seg = h / 6.0 * (v[..., :-1] * (2 * r[:-1] + r[1:]) + v[..., 1:] * (r[:-1] + 2 * r[1:]))
    return 2.0 * seg.sum(axis=-1) / r[-1] ** 2

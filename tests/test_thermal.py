"""Heat conduction in the wafer disk and its thermal stresses, against analytic solutions and data."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import optimize, special

from pipeline import thermal as th

KELVIN = th.KELVIN


# --- material data -----------------------------------------------------------------------------------


@pytest.mark.parametrize("T_K, alpha", [(300.0, 2.568e-6), (500.0, 3.594e-6), (1000.0, 4.258e-6), (1500.0, 4.556e-6)])
def test_okada_tokumaru_alpha(T_K, alpha):
    # Okada & Tokumaru (1984), J. Appl. Phys. 56, 314: alpha = [3.725 (1 - exp(-5.88e-3 (T - 124)))
    # + 5.548e-4 T] 1e-6 /K; the fit gives 2.568e-6 at 300 K and 4.258e-6 at 1000 K [computed].
    assert float(th.alpha_okada_tokumaru(T_K)) == pytest.approx(alpha, abs=1e-9)


def test_thermal_strain_is_the_integral_of_alpha():
    T = np.linspace(300.0, 1500.0, 13)
    dT = 1e-3
    deriv = (th.strain_okada_tokumaru(T + dT) - th.strain_okada_tokumaru(T - dT)) / (2 * dT)
    np.testing.assert_allclose(deriv, th.alpha_okada_tokumaru(T), rtol=1e-7)
    assert float(th.strain_okada_tokumaru(th.STRAIN_REFERENCE_K)) == pytest.approx(0.0, abs=1e-15)


def test_conductivity_against_measured_spot_values():
    # Measured 1.25 +/- 0.19 W/(cm K) at 30 degC and 0.46 +/- 0.07 at 425 degC ("Thermal conductivity
    # measurements of silicon from 30 to 425 degC", abstract). The fit 299/(T - 99) W/(cm K)
    # (origin from memory; data of Glassbrenner & Slack 1964) lies within 20 % of both.
    k30 = float(th.conductivity_si(30 + KELVIN)) / 100
    k425 = float(th.conductivity_si(425 + KELVIN)) / 100
    assert k30 == pytest.approx(1.25, rel=0.2)
    assert k425 == pytest.approx(0.46, rel=0.2)
    # and the fit's own values quoted with it: ~149 W/(m K) at 300 K, ~33 at 1000 K
    assert float(th.conductivity_si(300.0)) == pytest.approx(149, abs=1)
    assert float(th.conductivity_si(1000.0)) == pytest.approx(33, abs=0.5)


def test_heat_capacity_shomate():
    # Si(cr) standard heat capacity at 298.15 K: 20.00 J/(mol K) (NIST-JANAF, Chase 1998; from
    # memory) -> 0.712 J/(g K); the Shomate fit reproduces it within 0.5 %.
    assert float(th.heat_capacity_si(298.15)) * th.SI_MOLAR_MASS == pytest.approx(20.00, rel=5e-3)
    # enthalpy is the antiderivative of cp (used by the energy balance)
    T = np.linspace(300.0, 1600.0, 14)
    dh = (th.enthalpy_si(T + 1e-3) - th.enthalpy_si(T - 1e-3)) / 2e-3
    np.testing.assert_allclose(dh, th.heat_capacity_si(T), rtol=1e-7)


# --- thin-disk thermal stress (Timoshenko & Goodier 1970) ----------------------------------------------

ALPHA, E = 2.568e-6, 150e9


def _const_alpha():
    return th.constant_alpha_strain(ALPHA)


def test_disk_stress_parabolic_profile():
    # Timoshenko & Goodier (1970), Theory of Elasticity, thin disk with T = T0 + dT (r/b)^2:
    # sigma_r = (a E dT/4)(1 - r^2/b^2), sigma_theta = (a E dT/4)(1 - 3 r^2/b^2): the rim hoop
    # stress is -a E dT/2, the centre a E dT/4, and sigma_theta(b/2) = a E dT/16.
    # Piecewise-linear strain integrates exactly, the quadratic profile to O(dr^2).
    b, dT = 0.15, 40.0
    r = np.linspace(0.0, b, 4001)
    T = 600.0 + dT * (r / b) ** 2
    sr, st = th.disk_thermal_stress(r, T, E_Pa=E, thermal_strain=_const_alpha())
    unit = ALPHA * E * dT
    assert st[-1] / unit == pytest.approx(-0.5, abs=1e-6)
    assert st[0] / unit == pytest.approx(0.25, abs=1e-6)
    assert sr[0] / unit == pytest.approx(0.25, abs=1e-6)
    assert st[2000] / unit == pytest.approx(0.0625, abs=1e-6)
    np.testing.assert_allclose(st / unit, 0.25 * (1 - 3 * (r / b) ** 2), atol=1e-6)
    np.testing.assert_allclose(sr / unit, 0.25 * (1 - (r / b) ** 2), atol=1e-6)


def test_disk_rim_identity():
    # Any profile: sigma_theta(b) = a E (mean T - T(b)) (Timoshenko & Goodier 1970); for
    # T = 1000 - 30 r/b the mean is 980, so sigma_theta(b) = +10 a E (exact for a linear profile).
    b = 0.1
    r = np.linspace(0.0, b, 51)
    T = 1000.0 - 30.0 * r / b
    sr, st = th.disk_thermal_stress(r, T, E_Pa=E, thermal_strain=_const_alpha())
    assert st[-1] == pytest.approx(10 * ALPHA * E, rel=1e-9)
    assert sr[-1] == 0.0
    # the identity for an arbitrary profile, with the temperature-dependent strain
    rng = np.random.default_rng(0)
    T = 900.0 + 30 * rng.standard_normal(51).cumsum() / 7
    _, st = th.disk_thermal_stress(r, T, E_Pa=E)
    eps = th.strain_okada_tokumaru(T)
    assert st[-1] == pytest.approx(E * (float(th.area_mean(r, eps)) - eps[-1]), rel=1e-9)


def test_rim_hoop_stress_number():
    # alpha = 2.568e-6 /K, E = 150 GPa, rim 50 K colder than the centre with a parabolic profile:
    # sigma_theta(b) = -a E dT/2 = +9.63 MPa (tension) [computed from Timoshenko & Goodier].
    r = np.linspace(0.0, 0.15, 3001)
    T = 700.0 - 50.0 * (r / 0.15) ** 2
    _, st = th.disk_thermal_stress(r, T, E_Pa=E, thermal_strain=_const_alpha())
    assert st[-1] / 1e6 == pytest.approx(9.63, abs=0.01)


def test_uniform_temperature_gives_no_stress():
    r = np.linspace(0.0, 0.15, 101)
    T = np.full((3, r.size), [[300.0], [800.0], [1300.0]])
    sr, st = th.disk_thermal_stress(r, T, E_Pa=E)
    assert np.abs(sr).max() < 1e-3 and np.abs(st).max() < 1e-3  # Pa, against ~1e8 of alpha E T


def test_stress_is_linear_in_the_temperature_difference():
    r = np.linspace(0.0, 0.15, 301)
    shape = np.cos(3 * r / 0.15) * (r / 0.15) ** 2
    _, st1 = th.disk_thermal_stress(r, 500.0 + 10 * shape, E_Pa=E, thermal_strain=_const_alpha())
    _, st3 = th.disk_thermal_stress(r, 500.0 + 30 * shape, E_Pa=E, thermal_strain=_const_alpha())
    np.testing.assert_allclose(st3, 3 * st1, rtol=1e-9, atol=1e-6)


def test_disk_stress_rejects_bad_radii():
    with pytest.raises(ValueError, match="starting at 0"):
        th.disk_thermal_stress(np.array([0.01, 0.02]), np.array([1.0, 2.0]), E_Pa=E)


# --- heat conduction ---------------------------------------------------------------------------------


def _bessel_cooling(r, t, *, b, thickness, k, rho_c, h_face, h_edge, theta0):
    """Disk with constant properties, uniform start theta0 above ambient, linear losses.

    rho c t dT/dt = k t lap T - 2 h (T - Tinf); -k dT/dr = h_e (T - Tinf) at r = b:
    theta = theta0 exp(-2 h t/(rho c t_w)) sum C_n J0(l_n r/b) exp(-kappa l_n^2 t/b^2),
    l_n J1(l_n) = Bi J0(l_n), Bi = h_e b/k, C_n = 2 J1(l_n) / (l_n (J0^2 + J1^2))
    (Carslaw & Jaeger 1959, Conduction of Heat in Solids, sec. 7.6; Incropera & DeWitt, infinite
    cylinder series).
    """
    Bi = h_edge * b / k
    j0 = special.jn_zeros(0, 40)
    j1 = np.concatenate([[0.0], special.jn_zeros(1, 39)])
    lam = np.array([optimize.brentq(lambda x: x * special.j1(x) - Bi * special.j0(x), j1[i] + 1e-12, j0[i] - 1e-12)
                    for i in range(40)])
    C = 2 * special.j1(lam) / (lam * (special.j0(lam) ** 2 + special.j1(lam) ** 2))
    kappa = k / rho_c
    series = np.sum(C[:, None] * special.j0(lam[:, None] * r[None, :] / b) * np.exp(-kappa * lam[:, None] ** 2 * t / b**2), axis=0)
    return theta0 * np.exp(-2 * h_face * t / (rho_c * thickness)) * series


@pytest.fixture(scope="module")
def bessel_case():
    p = dict(b=0.02, thickness=1e-3, k=30.0, rho_c=1.6e6, h_face=20.0, h_edge=1500.0, theta0=100.0)
    props = th.ThermalProperties(conductivity_W_mK=p["k"], heat_capacity_J_kgK=p["rho_c"] / th.SI_DENSITY)
    return p, props


def _solve_bessel(p, props, n, times):
    mesh = th.disk_mesh(p["b"], p["thickness"], n, edge_refinement=1.0)
    Tinf = 300.0
    res = th.integrate_disk(
        mesh, props, np.full(n, Tinf + p["theta0"]), times,
        face_flux=lambda t, T: -p["h_face"] * (T - Tinf),
        edge_flux=lambda t, T_rim, T: -p["h_edge"] * (T_rim - Tinf),
        rtol=1e-9, atol_K=1e-8,
    )
    return mesh, res, Tinf


def test_heat_solver_against_bessel_series(bessel_case):
    p, props = bessel_case
    times = np.array([0.0, 1.0, 3.0, 10.0])
    errors = []
    for n in (50, 100):
        mesh, res, Tinf = _solve_bessel(p, props, n, times)
        exact = np.array([_bessel_cooling(mesh.centres_m, t, **p) for t in times[1:]]) + Tinf
        errors.append(np.abs(res.T_K[1:] - exact).max())
    # 100 cells: within 0.003 K of a 100 K transient; the scheme is second order
    assert errors[1] < 3e-3
    assert errors[0] / errors[1] == pytest.approx(4.0, rel=0.1)


def test_heat_solver_energy_balance(bessel_case):
    p, props = bessel_case
    times = np.linspace(0.0, 10.0, 11)
    mesh, res, _ = _solve_bessel(p, props, 80, times)
    stored = (props.h_vol(res.T_K) - props.h_vol(res.T_K[0])) @ mesh.volume_m3
    np.testing.assert_allclose(res.energy_in_J, stored, rtol=1e-8, atol=1e-8 * np.abs(stored).max())


def _short_process():
    K = KELVIN
    return [
        th.SetpointPiece(0.0, 7.75, 25 + K, 100.0),            # 25 -> 800 degC at 100 K/s
        th.SetpointPiece(7.75, 9.75, 800 + K, 0.0),             # hold 2 s
        th.SetpointPiece(9.75, 17.75, 800 + K, -50.0, 800.0),   # cool to 400 degC with gas
    ]


def _simulate(n):
    return th.simulate_process(_short_process(), radius_m=0.15, thickness_m=775e-6, T_start_K=25 + KELVIN,
                               props=th.ThermalProperties(), chamber=th.ChamberModel(), n_cells=n,
                               settle_max_s=0.0)


@pytest.fixture(scope="module")
def process_runs():
    return {n: _simulate(n) for n in (20, 40, 80, 160)}


def test_mesh_convergence_of_edge_centre_difference(process_runs):
    # the cooling-phase extreme of T(rim) - T(centre) converges as the mesh is refined
    d = {n: float((h.T_K[:, -1] - h.T_K[:, 0]).min()) for n, h in process_runs.items()}
    steps = [abs(d[40] - d[20]), abs(d[80] - d[40]), abs(d[160] - d[80])]
    assert steps[0] > steps[1] > steps[2]
    assert d[80] == pytest.approx(d[160], rel=1e-3)


def test_process_energy_balance(process_runs):
    # heat in through the faces and the edge = enthalpy gained (Shomate enthalpy, same cp)
    h = process_runs[80]
    scale = np.abs(h.stored_J).max()
    np.testing.assert_allclose(h.energy_in_J, h.stored_J, atol=1e-5 * scale)


def test_rim_leads_on_ramps_and_lags_on_cooling(process_runs):
    # The rim, with its extra (edge) face, heats and cools faster (Hu 1969, J. Appl. Phys. 40, 4413,
    # for radiative cooling): hotter than the centre on the ramp, colder on the cool-down. By the
    # rim identity, heating puts the rim in hoop compression and cooling in tension.
    h = process_runs[80]
    d = h.T_K[:, -1] - h.T_K[:, 0]
    ramp = (h.t_s > 1.0) & (h.t_s < 7.7)
    cool = (h.t_s > 11.0) & (h.t_s < 17.7)
    assert np.all(d[ramp] > 0) and np.all(d[cool] < 0)
    _, st = th.disk_thermal_stress(h.r_m, h.T_K, E_Pa=148e9)
    assert np.all(st[ramp, -1] < 0) and np.all(st[cool, -1] > 0)


def test_lamp_control_follows_the_recipe(process_runs):
    h = process_runs[80]
    unclipped = (h.lamp_W_m2 > 0) & (h.lamp_W_m2 < th.ChamberModel().max_lamp_W_m2)
    assert unclipped.mean() > 0.9
    assert np.abs(h.T_K[unclipped, 0] - h.setpoint_K[unclipped]).max() < 2.0


def test_recipe_faster_than_radiation_is_reported():
    # 1000 degC -> 100 degC at 200 K/s cannot be followed by radiation alone: lamps go off, the
    # centre lags, and the history says so.
    K = KELVIN
    pieces = [th.SetpointPiece(0.0, 1.0, 1000 + K, 0.0), th.SetpointPiece(1.0, 5.5, 1000 + K, -200.0)]
    h = th.simulate_process(pieces, radius_m=0.1, thickness_m=725e-6, T_start_K=1000 + K,
                            props=th.ThermalProperties(), chamber=th.ChamberModel(), n_cells=30,
                            settle_max_s=5.0)
    assert any("departed from the recipe" in n for n in h.notes)
    assert any("after the recipe's end" in n for n in h.notes)
    assert h.lamp_W_m2[(h.t_s > 2.0)].max() == 0.0


def test_mesh_grading():
    m = th.disk_mesh(0.15, 775e-6, 100, edge_refinement=30.0)
    w = np.diff(m.faces_m)
    assert m.faces_m[0] == 0.0 and m.faces_m[-1] == 0.15
    assert w[0] / w[-1] == pytest.approx(30.0, rel=1e-9)
    assert m.volume_m3.sum() == pytest.approx(math.pi * 0.15**2 * 775e-6, rel=1e-12)

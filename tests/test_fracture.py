"""Stress-intensity solutions, silicon elastic data and slip systems against published values.

Sources are named beside each check. "[computed]" values were computed from the published
formula (independently of this code) and agree with the source's tabulated figures where those
are quoted; "from memory" marks values not re-read in the original.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import special

from pipeline import fracture as fr
from pipeline.crystal import orientation_matrix

HALF_PI = 0.5 * math.pi


# --- Newman & Raju (1981) semi-elliptical surface crack ------------------------------------------


def test_newman_raju_shallow_semicircle():
    # Newman & Raju (1981), Eng. Fract. Mech. 15, 185, a/c <= 1 equations, a/t -> 0, c/b -> 0:
    # deepest point F = 1.040, Q = 2.464, K/(S sqrt(pi a)) = 0.6625 (the classical ~0.66 of a
    # shallow semicircular surface flaw); surface point F = 1.144, 0.7288 [computed].
    nr = fr.newman_raju_surface(1.0, 0.0, 0.0, [HALF_PI, 0.0])
    assert nr.Q == pytest.approx(2.464, abs=1e-4)
    assert nr.F == pytest.approx([1.040, 1.144], abs=1e-4)
    assert nr.F / math.sqrt(nr.Q) == pytest.approx([0.6625, 0.7288], abs=1e-4)


def test_newman_raju_long_shallow_crack_with_bending():
    # Newman & Raju (1981) a/c <= 1 branch and the bending multiplier H of Newman & Raju (1984,
    # NASA TM-85793): a/c = 0.2, a/t = 0.2, c/b = 0.01 [computed].
    nr = fr.newman_raju_surface(0.2, 0.2, 0.01, [HALF_PI, 0.0])
    assert nr.F == pytest.approx([1.1784, 0.5871], abs=1e-4)
    assert nr.F / math.sqrt(nr.Q) == pytest.approx([1.1221, 0.5590], abs=1e-4)
    assert nr.H == pytest.approx([0.7623, 0.9276], abs=1e-4)


def test_newman_raju_deep_branch():
    # Newman & Raju (1981) a/c > 1 branch: a/c = 2, a/t = 0.4, c/b = 0.05, deepest point [computed].
    nr = fr.newman_raju_surface(2.0, 0.4, 0.05, HALF_PI)
    assert float(nr.F) == pytest.approx(0.5116, abs=1e-4)
    assert float(nr.F) / math.sqrt(nr.Q) == pytest.approx(0.4225, abs=1e-4)


def test_newman_raju_third_party_regression():
    # Expected value of the public PROCESS repository's unit test of its Newman-Raju surface-crack
    # function (tests/unit/models/test_cs_fatigue.py): t = b = 6.3104538380405924 mm,
    # a = 0.89 mm, c = 2.67 mm, phi = pi/2, S_t = 659.99351867335338 MPa -> K = 35.744426954844926
    # MPa sqrt(m) (that code passes the plate half-width to the sec() width term).
    t = b = 6.3104538380405924e-3
    a, c, S = 0.89e-3, 2.67e-3, 659.99351867335338
    nr = fr.newman_raju_surface(a / c, a / t, c / b, HALF_PI)
    K = S * math.sqrt(math.pi * a / nr.Q) * float(nr.F)
    assert K == pytest.approx(35.744426954844926, rel=1e-6)


@pytest.mark.parametrize("a_over_c, rel_err", [(0.2, -0.0006), (0.5, -0.0001), (1.0, -0.0014)])
def test_shape_factor_against_elliptic_integral(a_over_c, rel_err):
    # Q approximates Phi^2, Phi the complete elliptic integral of the second kind with modulus
    # k^2 = 1 - (a/c)^2 (Newman & Raju 1981). scipy.special.ellipe takes the PARAMETER m = k^2.
    phi2 = special.ellipe(1.0 - a_over_c**2) ** 2
    Q = fr.shape_factor_Q(a_over_c)
    assert Q / phi2 - 1.0 == pytest.approx(rel_err, abs=1e-4)


def test_shape_factor_at_half_aspect():
    # a/c = 0.5: Q = 1.46649 against Phi^2 = 1.46666 [computed from scipy.special.ellipe].
    assert fr.shape_factor_Q(0.5) == pytest.approx(1.46649, abs=1e-5)
    assert special.ellipe(0.75) ** 2 == pytest.approx(1.46666, abs=1e-5)
    # the a/c > 1 branch inverts the ratio (Newman & Raju 1981)
    assert fr.shape_factor_Q(2.0) == pytest.approx(fr.shape_factor_Q(0.5), rel=1e-12)


@pytest.mark.parametrize("a_over_t", [0.0, 0.3, 0.6, 0.8])
def test_newman_raju_branches_meet_at_unit_aspect(a_over_t):
    # The two empirical branches of Newman & Raju (1981) nearly coincide at a/c = 1 (exactly for
    # a/t -> 0; the M2, M3 fits differ slightly: 0.2017 vs 0.2, -0.106 vs -0.11), well inside the
    # equations' quoted ~5 % accuracy. H is continuous.
    phi = np.linspace(0, math.pi / 2, 7)
    lo = fr.newman_raju_surface(1.0, a_over_t, 0.1, phi)
    hi = fr.newman_raju_surface(1.0 + 1e-9, a_over_t, 0.1, phi)
    np.testing.assert_allclose(hi.F, lo.F, rtol=3e-3)
    np.testing.assert_allclose(hi.H, lo.H, rtol=1e-6)


# --- Newman & Raju corner crack -------------------------------------------------------------------


def test_newman_raju_corner_quarter_circle():
    # Newman & Raju (1984) NASA TM-85793 corner-crack equations, a/c = 1, a/t -> 0, c/b -> 0:
    # F = 1.134 at phi = 0 and pi/2 (both free surfaces), K/(S sqrt(pi a)) = 0.7224; phi = pi/4:
    # F = 1.0542 [computed].
    nr = fr.newman_raju_corner(1.0, 0.0, 0.0, [0.0, HALF_PI, 0.25 * math.pi])
    assert nr.F == pytest.approx([1.1340, 1.1340, 1.0542], abs=1e-4)
    assert nr.F[:2] / math.sqrt(nr.Q) == pytest.approx([0.7224, 0.7224], abs=1e-4)


def test_newman_raju_corner_finite():
    # a/c = 0.5, a/t = 0.3, c/b = 0.1, phi = pi/2: F = 1.2662, K/(S sqrt(pi a)) = 1.0456 [computed].
    nr = fr.newman_raju_corner(0.5, 0.3, 0.1, HALF_PI)
    assert float(nr.F) == pytest.approx(1.2662, abs=1e-4)
    assert float(nr.F) / math.sqrt(nr.Q) == pytest.approx(1.0456, abs=1e-4)


def test_validity_flags():
    # Limits as usually quoted for Newman & Raju (1981, 1984): 0 < a/c <= 2 (corner 0.2..2),
    # a/t <= 0.8 (accuracy claim), c/b < 0.5.
    assert fr.surface_validity(0.5, 0.3, 0.1).ok
    assert not fr.surface_validity(2.5, 0.3, 0.1).ok
    assert not fr.surface_validity(0.5, 0.85, 0.1).ok
    assert not fr.surface_validity(0.5, 0.3, 0.6).ok
    assert fr.corner_validity(1.0, 0.5, 0.1).ok
    assert not fr.corner_validity(0.1, 0.5, 0.1).ok


# --- edge and centre cracks through the thickness -----------------------------------------------


@pytest.mark.parametrize("aW, F", [(1e-9, 1.1220), (0.1, 1.1957), (0.3, 1.6551), (0.5, 2.8266)])
def test_tada_edge_crack_factor(aW, F):
    # Tada, Paris & Irwin, The Stress Analysis of Cracks Handbook, single edge crack in a strip
    # in tension (p. 2.10-2.11), formula as printed there [values computed].
    assert float(fr.edge_crack_factor_tada(aW)) == pytest.approx(F, abs=1e-4)


def test_tada_edge_crack_limit_is_the_free_surface_factor():
    # a/W -> 0 must approach the half-plane value 1.1215 (Koiter; Tada, Paris & Irwin handbook);
    # the strip formula gives 0.752 + 0.37 = 1.122, within its stated 0.5 % accuracy.
    assert float(fr.edge_crack_factor_tada(1e-8)) == pytest.approx(1.1215, rel=5e-3)


@pytest.mark.parametrize("aW, F", [(0.3, 1.6599), (0.5, 2.8264)])
def test_edge_crack_polynomial(aW, F):
    # Brown & Srawley polynomial (Gross et al. 1964), a/W <= 0.6 [computed].
    assert float(fr.edge_crack_factor_polynomial(aW)) == pytest.approx(F, abs=1e-4)


def test_two_edge_crack_fits_agree():
    # Two independent published fits (Tada handbook; Brown & Srawley) agree within 1.5 % over
    # 0 <= a/W <= 0.6 (largest difference 1.3 % near a/W = 0.06, where the polynomial dips
    # below 1.12 and the handbook formula does not).
    a = np.linspace(0.0, 0.6, 61)
    np.testing.assert_allclose(fr.edge_crack_factor_tada(a), fr.edge_crack_factor_polynomial(a), rtol=0.015)


def test_centre_crack_factors():
    # Feddersen (1966) sqrt(sec(pi a / 2b)) and Tada's corrected form, a/b = 0.5: 1.1892 / 1.1862.
    assert float(fr.centre_crack_factor_feddersen(0.5)) == pytest.approx(1.1892, abs=1e-4)
    assert float(fr.centre_crack_factor_tada(0.5)) == pytest.approx(1.1862, abs=1e-4)


def test_edge_weight_function_uniform_stress():
    # Uniform stress on an edge crack in a half plane: K = 1.1215 sigma sqrt(pi a) (Koiter 1965;
    # Tada, Paris & Irwin handbook). The point-force weight function with F = 1.3 - 0.3 u^(5/4)
    # (Hartranft & Sih, tabulated in the handbook; from memory; quoted accuracy ~1 %) gives 1.1222.
    a = 1e-4
    K = float(fr.edge_crack_K(a, lambda x: np.full_like(x, 50e6)))
    assert K / (50e6 * math.sqrt(math.pi * a)) == pytest.approx(1.1215, rel=2e-3)
    # and the quadrature has converged: the closed form of the integral is
    # (2/pi) [1.3 pi/2 - 0.3 B(9/8, 1/2)/2] = 1.122216
    closed = 2 / math.pi * (1.3 * math.pi / 2 - 0.3 * 0.5 * special.beta(9 / 8, 0.5))
    assert K / (50e6 * math.sqrt(math.pi * a)) == pytest.approx(closed, rel=1e-6)


@pytest.mark.parametrize("profile, expected", [("rising", 0.683), ("falling", 0.439)])
def test_edge_weight_function_linear_stress(profile, expected):
    # Edge crack in a half plane under a linear crack-face stress, Tada, Paris & Irwin handbook
    # (from memory): sigma0 x/a (zero at the mouth) -> 0.683 sigma0 sqrt(pi a); sigma0 (1 - x/a)
    # -> 0.439 sigma0 sqrt(pi a). Within the weight function's ~1 %.
    a = 2e-3

    def s(x):
        return 1e6 * (x / a if profile == "rising" else 1 - x / a)

    K = float(fr.edge_crack_K(a, s))
    assert K / (1e6 * math.sqrt(math.pi * a)) == pytest.approx(expected, rel=0.01)


def test_edge_weight_function_invariants():
    # zero stress -> zero K; K linear in the stress; K ~ sqrt(a) for a uniform stress
    assert float(fr.edge_crack_K(1e-4, lambda x: np.zeros_like(x))) == 0.0
    k1 = float(fr.edge_crack_K(1e-4, lambda x: 1e6 + 2e9 * x))
    k3 = float(fr.edge_crack_K(1e-4, lambda x: 3 * (1e6 + 2e9 * x)))
    assert k3 == pytest.approx(3 * k1, rel=1e-12)
    ka = float(fr.edge_crack_K(1e-4, lambda x: np.full_like(x, 1e6)))
    kb = float(fr.edge_crack_K(4e-4, lambda x: np.full_like(x, 1e6)))
    assert kb == pytest.approx(2 * ka, rel=1e-12)


def test_embedded_ellipse_limits():
    # Penny-shaped crack: K = (2/pi) sigma sqrt(pi a) (Sneddon 1946); a very elongated ellipse
    # tends to the plane-strain tunnel crack sigma sqrt(pi a) (Irwin 1962, J. Appl. Mech. 29, 651).
    assert float(fr.embedded_ellipse_K_max(1e-4, 1e-4, 1.0)) == pytest.approx(2 / math.pi * math.sqrt(math.pi * 1e-4), rel=1e-12)
    assert float(fr.embedded_ellipse_K_max(1e-4, 1.0, 1.0)) == pytest.approx(math.sqrt(math.pi * 1e-4), rel=1e-3)


def test_linearisation_through_thickness():
    # Moment-equivalent membrane/bending split: a linear profile S_t + S_b (1 - 2z/t) is returned
    # exactly; z^2 on [0, t] has mean t^2/3 and bending (6/t^2) int z^2 (t/2 - z) dz = -t^2/2.
    t = 775e-6
    z = np.linspace(0, t, 201)
    m, b = fr.linearise_through_thickness(z, 30e6 + 12e6 * (1 - 2 * z / t), t)
    assert float(m) == pytest.approx(30e6, rel=1e-12)
    assert float(b) == pytest.approx(12e6, rel=1e-12)
    zz = np.linspace(0, 1.0, 20001)
    m, b = fr.linearise_through_thickness(zz, zz**2, 1.0)
    assert float(m) == pytest.approx(1 / 3, abs=1e-8)
    assert float(b) == pytest.approx(-0.5, abs=1e-8)


# --- elastic constants -----------------------------------------------------------------------------


def test_directional_youngs_modulus():
    # C11/C12/C44 = 165.7/63.9/79.6 GPa (Hall 1967, quoted by Hopcroft, Nix & Kenny 2010, J. MEMS
    # 19, 229): E<100>, E<110>, E<111> = 130.1, 169.1, 187.9 GPa (Hopcroft et al. table values;
    # xrayutilities with 165.8/63.9/79.6 gives 130.18/169.16/187.91).
    E = fr.youngs_modulus_GPa([[1, 0, 0], [1, 1, 0], [1, 1, 1]])
    np.testing.assert_allclose(E, [130.1, 169.1, 187.9], atol=0.2)


def test_biaxial_modulus_and_poisson():
    # (001) biaxial modulus 180.3 GPa (Hopcroft et al. 2010 quote ~180.5) and
    # nu([100],[010]) = -S12/S11 = 0.2783; nu([110],[-110]) = 0.062, nu([110],[001]) = 0.362.
    assert fr.biaxial_modulus_001_GPa() == pytest.approx(180.3, abs=0.1)
    assert fr.poisson_ratio([1, 0, 0], [0, 1, 0]) == pytest.approx(0.2783, abs=1e-4)
    assert fr.poisson_ratio([1, 1, 0], [-1, 1, 0]) == pytest.approx(0.062, abs=1e-3)
    assert fr.poisson_ratio([1, 1, 0], [0, 0, 1]) == pytest.approx(0.362, abs=1e-3)


def test_in_plane_mean_modulus():
    # direction-averaged in-plane E of a (001) wafer 148.3 GPa; the (111) plane is elastically
    # isotropic (cubic crystals), so its mean equals E<110> = 169.1 GPa.
    assert fr.in_plane_mean_modulus_GPa([0, 0, 1]) == pytest.approx(148.3, abs=0.1)
    assert fr.in_plane_mean_modulus_GPa([1, 1, 1]) == pytest.approx(169.1, abs=0.1)


# --- stress resolution and slip ----------------------------------------------------------------------


def test_stress_resolution_on_inclined_111():
    # Unit hoop stress across a radial <110> trace of a (001) wafer; the inclined {111} plane
    # containing the trace has sigma_n = 2/3, tau = sqrt(2)/3 = 0.4714 (cubic geometry: the normal
    # is 35.26 deg from the load, sigma_n = cos^2, tau = sin cos; Erdogan & Sih 1963 resolution).
    z_uvw, x_uvw = (0, 0, 1), (1, 1, 0)
    A = orientation_matrix(z_uvw, x_uvw).T  # columns: wafer axes in the crystal frame
    n_w = A.T @ (np.array([1.0, -1.0, 1.0]) / math.sqrt(3.0))  # (1-11) contains [110] = wafer x
    assert abs(n_w[0]) < 1e-12
    angle = 0.0  # crack along +x: e_r = x, e_theta = y
    e_r, e_t = np.array([1.0, 0, 0]), np.array([0, 1.0, 0])
    sig_n, tau = fr.resolve_on_plane(0.0, 1.0, float(n_w @ e_r), float(n_w @ e_t))
    assert float(sig_n) == pytest.approx(0.6667, abs=1e-4)
    assert float(tau) == pytest.approx(0.4714, abs=1e-4)
    # the same through the crystal-frame tensor: traction on the plane
    s_c = fr.polar_stress_in_crystal(0.0, 1.0, angle, z_uvw, x_uvw)
    n_c = np.array([1.0, -1.0, 1.0]) / math.sqrt(3.0)
    t_c = s_c @ n_c
    assert float(n_c @ t_c) == pytest.approx(2 / 3, abs=1e-12)
    # G ratio {111}/{110} = 2/3 for equal crack size (isotropic LEFM): (K_I^2 + K_II^2) / K^2
    assert float(sig_n**2 + tau**2) == pytest.approx(2 / 3, abs=1e-12)


def test_schmid_factors():
    # Schmid's law on the twelve {111}<110> systems: uniaxial stress along [110] gives the maximum
    # factor 1/sqrt(6) = 0.4082 on 4 systems, along [100] on 8 systems.
    n, b, labels = fr.slip_systems()
    assert len(labels) == 12 and len(set(labels)) == 12
    np.testing.assert_allclose(np.einsum("ij,ij->i", n, b), 0.0, atol=1e-15)
    for d, count in (([1, 1, 0], 4), ([1, 0, 0], 8)):
        u = np.asarray(d, float) / np.linalg.norm(d)
        tau = np.abs(fr.resolved_shear_stresses(np.outer(u, u)))
        assert tau.max() == pytest.approx(0.4082, abs=1e-4)
        assert int(np.sum(np.isclose(tau, tau.max(), atol=1e-9))) == count


def test_slip_factors_equal_full_rotation():
    rng = np.random.default_rng(3)
    for angle in (0.0, 22.5, 45.0, 117.0):
        sr, st = rng.normal(size=2) * 1e6
        full = fr.resolved_shear_stresses(fr.polar_stress_in_crystal(sr, st, angle, (0, 0, 1), (1, 1, 0)))
        S_r, S_t = fr.slip_factors(angle, (0, 0, 1), (1, 1, 0))
        np.testing.assert_allclose(sr * S_r + st * S_t, full, atol=1e-6)


def test_family_of():
    assert fr.family_of([1, -1, 1]) == "{111}"
    assert fr.family_of([0, 2, -2]) == "{110}"
    assert fr.family_of([0, 0, -1]) == "{100}"

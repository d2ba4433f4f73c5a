"""Stress-intensity solutions, silicon material data and the thermal-slip check.

Pure functions on arrays, SI units inside (m, Pa, Pa*sqrt(m)); names carry units. The stage
entry (:mod:`pipeline.assess`) maps measured cracks onto these solutions.

Solutions and their validity ranges (each function states its own):

* through-thickness edge crack with a non-uniform stress: the point-load weight function of an
  edge crack in a half plane, ``K = 2P/sqrt(pi a) * F(b/a) / sqrt(1 - (b/a)^2)``,
  ``F = 1.3 - 0.3 (b/a)^(5/4)`` (Hartranft & Sih 1973, as tabulated in Tada, Paris & Irwin,
  *The Stress Analysis of Cracks Handbook*, edge crack in a half plane, point forces on the
  crack faces; from memory); uniform stress gives 1.1222 sigma sqrt(pi a) against the exact
  1.1215 (0.06 %);
* finite-width single-edge-crack factor (Tada, Paris & Irwin handbook, p. 2.10-2.11) and the
  Brown & Srawley polynomial; centre-crack factors (Feddersen 1966; Tada);
* semi-elliptical surface crack, tension and bending: Newman & Raju (1981), "An empirical
  stress-intensity factor equation for the surface crack", Eng. Fract. Mech. 15, 185-192;
* quarter-elliptical corner crack, tension: Newman & Raju (1984), NASA TM-85793 / (1986) in
  Atluri (ed.), *Computational Methods in the Mechanics of Fracture*;
* embedded elliptical crack in an infinite body: Irwin (1962), J. Appl. Mech. 29, 651.

The twelve {111}<110> slip systems and the resolved shear stress follow Schmid's law.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass, field

import numpy as np
from scipy import special

from pipeline import crystal

# ---------------------------------------------------------------------------------------------
# Material data with sources.


@dataclass(frozen=True)
class Sourced:
    """A material value with its unit, source and how sure it is."""

    value: float
    unit: str
    source: str
    status: str  # "from memory", "read in source (abstract)", "computed from ...", "user"

    def as_dict(self) -> dict:
        return {"value": self.value, "unit": self.unit, "source": self.source, "status": self.status}


#: Fracture toughness of silicon by cleavage-plane family, MPa*sqrt(m), room temperature.
K_IC_DEFAULTS: dict[str, Sourced] = {
    "{111}": Sourced(0.82, "MPa*sqrt(m)", "Chen & Leipold (1980), Am. Ceram. Soc. Bull. 59, 469",
                     "from memory (design value)"),
    "{110}": Sourced(0.90, "MPa*sqrt(m)", "Chen & Leipold (1980), Am. Ceram. Soc. Bull. 59, 469",
                     "from memory (design value)"),
    "{100}": Sourced(0.95, "MPa*sqrt(m)", "Chen & Leipold (1980), Am. Ceram. Soc. Bull. 59, 469",
                     "from memory (design value)"),
}
#: Lowest published {111} value used for the sensitivity figure ``margin_at_low_K_IC``.
K_IC_LOW = Sourced(0.72, "MPa*sqrt(m)",
                   "DelRio et al. (2022), Mater. Res. Lett. 10, 728 (nanoscale DCB on {111}, "
                   "0.72 +/- 0.07)", "read in source (abstract)")

#: Cubic elastic constants of silicon at room temperature, GPa.
ELASTIC_CONSTANTS_GPA = Sourced(float("nan"), "GPa",
                                "C11 = 165.7, C12 = 63.9, C44 = 79.6: Hall (1967) as quoted by "
                                "Hopcroft, Nix & Kenny (2010), 'What is the Young's modulus of "
                                "silicon?', J. MEMS 19, 229", "from memory")
C11_GPA, C12_GPA, C44_GPA = 165.7, 63.9, 79.6

#: Brittle-to-ductile transition of silicon, degC (strain-rate, doping and dislocation dependent).
BDT_SOURCE = ("St John (1975), Phil. Mag. 32, 1193; Samuels & Roberts (1989), Proc. R. Soc. A "
              "421, 1 (from memory): about 500-700 degC")


def compliance_from_cubic(c11_GPa: float = C11_GPA, c12_GPa: float = C12_GPA,
                          c44_GPa: float = C44_GPA) -> tuple[float, float, float]:
    """Compliances S11, S12, S44 (1/GPa) of a cubic crystal from its stiffnesses.

    ``S11 = (C11 + C12) / ((C11 - C12)(C11 + 2 C12))``, ``S12 = -C12 / ((C11 - C12)(C11 + 2 C12))``,
    ``S44 = 1 / C44`` (Nye 1957, *Physical Properties of Crystals*, cubic system).
    """
    d = (c11_GPa - c12_GPa) * (c11_GPa + 2 * c12_GPa)
    return (c11_GPa + c12_GPa) / d, -c12_GPa / d, 1.0 / c44_GPa


def youngs_modulus_GPa(direction_crystal, c11_GPa: float = C11_GPA, c12_GPa: float = C12_GPA,
                       c44_GPa: float = C44_GPA) -> np.ndarray:
    """Young's modulus of a cubic crystal along a crystal direction, GPa.

    ``1/E = S11 - 2 (S11 - S12 - S44/2)(l^2 m^2 + m^2 n^2 + n^2 l^2)`` with direction cosines
    (l, m, n) (Nye 1957; Hopcroft, Nix & Kenny 2010, eq. 8). ``direction_crystal``: (..., 3).
    """
    s11, s12, s44 = compliance_from_cubic(c11_GPa, c12_GPa, c44_GPa)
    d = np.asarray(direction_crystal, float)
    d = d / np.linalg.norm(d, axis=-1, keepdims=True)
    dl, dm, dn = d[..., 0], d[..., 1], d[..., 2]
    aniso = dl * dl * dm * dm + dm * dm * dn * dn + dn * dn * dl * dl
    return 1.0 / (s11 - 2.0 * (s11 - s12 - 0.5 * s44) * aniso)


def biaxial_modulus_001_GPa(c11_GPa: float = C11_GPA, c12_GPa: float = C12_GPA) -> float:
    """Biaxial modulus E/(1 - nu) of the (001) plane, ``C11 + C12 - 2 C12^2 / C11``, GPa."""
    return c11_GPa + c12_GPa - 2.0 * c12_GPa**2 / c11_GPa


def poisson_ratio(load_crystal, lateral_crystal, c11_GPa: float = C11_GPA,
                  c12_GPa: float = C12_GPA, c44_GPa: float = C44_GPA) -> float:
    """Poisson ratio ``-eps_lateral / eps_load`` for a uniaxial stress along ``load_crystal``.

    Strain from the full cubic compliance tensor (Nye 1957): ``eps = S : sigma``.
    """
    s11, s12, s44 = compliance_from_cubic(c11_GPa, c12_GPa, c44_GPa)
    u = np.asarray(load_crystal, float)
    u = u / np.linalg.norm(u)
    v = np.asarray(lateral_crystal, float)
    v = v / np.linalg.norm(v)
    sig = np.outer(u, u)
    # Voigt: eps_ii = S11 s_ii + S12 (s_jj + s_kk); eps_ij (tensor) = S44/2 * s_ij for i != j
    eps = np.empty((3, 3))
    tr = np.trace(sig)
    for i in range(3):
        eps[i, i] = s11 * sig[i, i] + s12 * (tr - sig[i, i])
    for i, j in ((0, 1), (1, 2), (0, 2)):
        eps[i, j] = eps[j, i] = 0.5 * s44 * sig[i, j]
    return float(-(v @ eps @ v) / (u @ eps @ u))


def in_plane_directions(z_uvw, n: int = 360) -> np.ndarray:
    """``n`` unit directions (crystal frame) evenly over a half turn in the plane normal to
    ``z_uvw``; a half turn suffices for properties even in the direction (``E(d) = E(-d)``)."""
    z = np.asarray(z_uvw, float)
    z = z / np.linalg.norm(z)
    trial = np.array([1.0, 0.0, 0.0]) if abs(z[0]) < 0.9 else np.array([0.0, 1.0, 0.0])
    e1 = np.cross(z, trial)
    e1 /= np.linalg.norm(e1)
    e2 = np.cross(z, e1)
    psi = np.linspace(0.0, np.pi, n, endpoint=False)
    return np.cos(psi)[:, None] * e1 + np.sin(psi)[:, None] * e2


def in_plane_mean_modulus_GPa(z_uvw, *, n_angles: int = 720) -> float:
    """Young's modulus averaged over the in-plane directions of a wafer with normal ``z_uvw``, GPa.

    The thin-disk solution is isotropic; this average is our stand-in for an anisotropic wafer
    (148.3 GPa for (001), 169.1 GPa for the isotropic (111) plane).
    """
    return float(np.mean(youngs_modulus_GPa(in_plane_directions(z_uvw, n_angles))))


def family_of(hkl) -> str:
    """Family label from Miller indices: (1, -1, 1) -> ``"{111}"``."""
    idx = sorted((abs(int(v)) for v in hkl), reverse=True)
    g = math.gcd(*idx)
    if g > 1:
        idx = [v // g for v in idx]
    return "{" + "".join(str(v) for v in idx) + "}"


# ---------------------------------------------------------------------------------------------
# Validity ranges (as usually quoted; the original reports were not re-read: see PHYSICS.md).


@dataclass(frozen=True)
class Validity:
    ok: bool
    limits: str
    problems: list[str] = field(default_factory=list)


SURFACE_LIMITS = "0 < a/c <= 2, a/t <= 0.8, c/b < 0.5 (Newman & Raju 1981, as usually quoted)"
CORNER_LIMITS = "0.2 <= a/c <= 2, a/t <= 0.8, c/b < 0.5 (Newman & Raju 1984, as usually quoted)"
EDGE_LIMITS = ("a <= 0.1 * wafer radius (half-plane weight function inside a disk; our limit), "
               "a/W < 0.6 for the finite-width factor")
CENTRE_LIMITS = "a/b < 0.5 with b the distance from the crack centre to the nearer edge (our limit)"
EMBEDDED_LIMITS = ("ligament to each surface >= the minor semi-axis (free surfaces raise K by a "
                   "few per cent at that distance; common practice)")


def surface_validity(a_over_c: float, a_over_t: float, c_over_b: float) -> Validity:
    problems = []
    if not 0.0 < a_over_c <= 2.0:
        problems.append(f"a/c = {a_over_c:.3g} outside (0, 2]")
    if not 0.0 <= a_over_t <= 0.8:
        problems.append(f"a/t = {a_over_t:.3g} outside [0, 0.8]")
    if not 0.0 <= c_over_b < 0.5:
        problems.append(f"c/b = {c_over_b:.3g} outside [0, 0.5)")
    return Validity(not problems, SURFACE_LIMITS, problems)


def corner_validity(a_over_c: float, a_over_t: float, c_over_b: float) -> Validity:
    problems = []
    if not 0.2 <= a_over_c <= 2.0:
        problems.append(f"a/c = {a_over_c:.3g} outside [0.2, 2]")
    if not 0.0 <= a_over_t <= 0.8:
        problems.append(f"a/t = {a_over_t:.3g} outside [0, 0.8]")
    if not 0.0 <= c_over_b < 0.5:
        problems.append(f"c/b = {c_over_b:.3g} outside [0, 0.5)")
    return Validity(not problems, CORNER_LIMITS, problems)


# ---------------------------------------------------------------------------------------------
# Newman-Raju surface crack.


@dataclass(frozen=True)
class NewmanRaju:
    """Boundary-correction factor ``F``, shape factor ``Q`` and bending multiplier ``H``.

    ``K = (S_t + H S_b) sqrt(pi a / Q) F``.
    """

    F: np.ndarray
    Q: float
    H: np.ndarray


def shape_factor_Q(a_over_c: float) -> float:
    """Newman-Raju approximation of the squared elliptic integral, ``1 + 1.464 (a/c)^1.65``.

    For a/c > 1 the ratio is inverted (Newman & Raju 1981).
    """
    r = a_over_c if a_over_c <= 1.0 else 1.0 / a_over_c
    return 1.0 + 1.464 * r**1.65


def newman_raju_surface(a_over_c: float, a_over_t: float, c_over_b: float, phi_rad) -> NewmanRaju:
    """Newman-Raju (1981) semi-elliptical surface crack in a plate, tension and bending.

    Parameters
    ----------
    a_over_c : float
        Aspect ratio (depth / surface half-length), valid 0 < a/c <= 2.
    a_over_t : float
        Depth over plate thickness, valid a/t <= 0.8.
    c_over_b : float
        Surface half-length over plate half-width, valid c/b < 0.5.
    phi_rad : float or array
        Parametric angle: 0 at the free surface, pi/2 at the deepest point.

    Returns
    -------
    NewmanRaju
        ``F`` and ``H`` with the shape of ``phi_rad``; ``Q``.

    References
    ----------
    Newman & Raju (1981), Eng. Fract. Mech. 15, 185-192, equations for a/c <= 1 and a/c > 1;
    bending multiplier H from Newman & Raju (1984), NASA TM-85793.
    """
    phi = np.asarray(phi_rad, float)
    ac, at = float(a_over_c), float(a_over_t)
    s, co = np.sin(phi), np.cos(phi)
    if ac <= 1.0:
        m1 = 1.13 - 0.09 * ac
        m2 = -0.54 + 0.89 / (0.2 + ac)
        m3 = 0.5 - 1.0 / (0.65 + ac) + 14.0 * (1.0 - ac) ** 24
        g = 1.0 + (0.1 + 0.35 * at**2) * (1.0 - s) ** 2
        f_phi = (ac**2 * co**2 + s**2) ** 0.25
        p = 0.2 + ac + 0.6 * at
        h1 = 1.0 - 0.34 * at - 0.11 * ac * at
        g1 = -1.22 - 0.12 * ac
        g2 = 0.55 - 1.05 * ac**0.75 + 0.47 * ac**1.5
    else:
        ca = 1.0 / ac
        m1 = math.sqrt(ca) * (1.0 + 0.04 * ca)
        m2 = 0.2 * ca**4
        m3 = -0.11 * ca**4
        g = 1.0 + (0.1 + 0.35 * ca * at**2) * (1.0 - s) ** 2
        f_phi = (ca**2 * s**2 + co**2) ** 0.25
        p = 0.2 + ca + 0.6 * at
        h1 = 1.0 - (0.04 + 0.41 * ca) * at + (0.55 - 1.93 * ca**0.75 + 1.38 * ca**1.5) * at**2
        g1 = -2.11 + 0.77 * ca
        g2 = 0.55 - 0.72 * ca**0.75 + 0.14 * ca**1.5
    f_w = math.sqrt(1.0 / math.cos(math.pi * c_over_b / 2.0 * math.sqrt(at)))
    F = (m1 + m2 * at**2 + m3 * at**4) * g * f_phi * f_w
    h2 = 1.0 + g1 * at + g2 * at**2
    H = h1 + (h2 - h1) * s**p
    return NewmanRaju(F=F, Q=shape_factor_Q(ac), H=H)


def newman_raju_corner(a_over_c: float, a_over_t: float, c_over_b: float, phi_rad) -> NewmanRaju:
    """Newman-Raju quarter-elliptical corner crack in a plate, remote tension.

    Both ends (phi = 0 and pi/2) lie on free surfaces. ``c_over_b`` uses the full plate width b.
    Valid 0.2 <= a/c <= 2, a/t <= 0.8, c/b < 0.5. Bending is not implemented (its coefficients
    were not verified): ``H`` is returned as NaN.

    References
    ----------
    Newman & Raju (1984), NASA TM-85793; (1986) ch. 9 in Atluri (ed.), *Computational Methods in
    the Mechanics of Fracture*, Elsevier.
    """
    phi = np.asarray(phi_rad, float)
    ac, at = float(a_over_c), float(a_over_t)
    s, co = np.sin(phi), np.cos(phi)
    if ac <= 1.0:
        m1 = 1.08 - 0.03 * ac
        m2 = -0.44 + 1.06 / (0.3 + ac)
        m3 = -0.5 + 0.25 * ac + 14.8 * (1.0 - ac) ** 15
        g1 = 1.0 + (0.08 + 0.4 * at**2) * (1.0 - s) ** 3
        g2 = 1.0 + (0.08 + 0.15 * at**2) * (1.0 - co) ** 3
        f_phi = (ac**2 * co**2 + s**2) ** 0.25
    else:
        ca = 1.0 / ac
        ct = at * ca  # c/t: the report prints c/t in g1, g2 for this branch
        m1 = math.sqrt(ca) * (1.08 - 0.03 * ca)
        m2 = 0.375 * ca**2
        m3 = -0.25 * ca**2
        g1 = 1.0 + (0.08 + 0.4 * ct**2) * (1.0 - s) ** 3
        g2 = 1.0 + (0.08 + 0.15 * ct**2) * (1.0 - co) ** 3
        f_phi = (ca**2 * s**2 + co**2) ** 0.25
    lam = c_over_b * math.sqrt(at)
    f_w = 1.0 - 0.2 * lam + 9.4 * lam**2 - 19.4 * lam**3 + 27.1 * lam**4
    F = (m1 + m2 * at**2 + m3 * at**4) * g1 * g2 * f_phi * f_w
    return NewmanRaju(F=F, Q=shape_factor_Q(ac), H=np.full_like(F, np.nan))


def linearise_through_thickness(z_m, sigma_Pa, thickness_m: float) -> tuple[np.ndarray, np.ndarray]:
    """Membrane and bending parts of a stress profile through the plate thickness.

    ``S_t = (1/t) int sigma dz``; ``S_b = (6/t^2) int sigma (t/2 - z) dz``, the outer-fibre
    bending stress at z = 0 (positive: tension at z = 0), so ``S_t + S_b (1 - 2 z/t)`` is the
    linearised profile (the moment-equivalent split Newman & Raju's tension/bending form expects).

    Parameters
    ----------
    z_m : (nz,) array
        Depths from the surface z = 0, m, covering [0, t].
    sigma_Pa : (..., nz) array
        Stress normal to the crack plane at those depths, Pa.
    thickness_m : float
        Plate thickness, m.
    """
    z = np.asarray(z_m, float)
    sig = np.asarray(sigma_Pa, float)
    t = float(thickness_m)
    h = np.diff(z)
    # exact moments of the piecewise-linear interpolant (a linear profile is returned exactly)
    m0 = np.sum(0.5 * h * (sig[..., :-1] + sig[..., 1:]), axis=-1)
    m1 = np.sum(h / 6.0 * (sig[..., :-1] * (2 * z[:-1] + z[1:]) + sig[..., 1:] * (z[:-1] + 2 * z[1:])), axis=-1)
    membrane = m0 / t
    bending = 6.0 / t**2 * (0.5 * t * m0 - m1)
    return membrane, bending


# ---------------------------------------------------------------------------------------------
# Edge and centre cracks through the thickness.


def edge_crack_factor_tada(a_over_W) -> np.ndarray:
    """Finite-width single-edge-crack factor F(a/W) in tension (K = F sigma sqrt(pi a)).

    ``F = sqrt(2/(pi alpha) tan(pi alpha/2)) [0.752 + 2.02 alpha + 0.37 (1 - sin(pi alpha/2))^3]
    / cos(pi alpha/2)`` (Tada, Paris & Irwin, *The Stress Analysis of Cracks Handbook*, p. 2.10-2.11;
    better than 0.5 % for any alpha). ``alpha -> 0`` gives 1.122.
    """
    a = np.asarray(a_over_W, float)
    x = 0.5 * np.pi * np.maximum(a, 1e-12)
    root = np.sqrt(np.tan(x) / x)
    return root * (0.752 + 2.02 * a + 0.37 * (1.0 - np.sin(x)) ** 3) / np.cos(x)


def edge_crack_factor_polynomial(a_over_W) -> np.ndarray:
    """Brown & Srawley polynomial ``1.12 - 0.231a + 10.55a^2 - 21.72a^3 + 30.39a^4`` (a/W <= 0.6)."""
    a = np.asarray(a_over_W, float)
    return 1.12 - 0.231 * a + 10.55 * a**2 - 21.72 * a**3 + 30.39 * a**4


def centre_crack_factor_tada(a_over_b) -> np.ndarray:
    """Centre crack 2a in a plate of width 2b: ``[1 - 0.025 x^2 + 0.06 x^4] sqrt(sec(pi x/2))``.

    Tada, Paris & Irwin handbook (about 0.1 % for any x = a/b).
    """
    x = np.asarray(a_over_b, float)
    return (1.0 - 0.025 * x**2 + 0.06 * x**4) * np.sqrt(1.0 / np.cos(0.5 * np.pi * x))


def centre_crack_factor_feddersen(a_over_b) -> np.ndarray:
    """Feddersen (1966) centre-crack factor ``sqrt(sec(pi a / (2 b)))``."""
    x = np.asarray(a_over_b, float)
    return np.sqrt(1.0 / np.cos(0.5 * np.pi * x))


#: Gauss-Legendre nodes on [0, pi/2] for the weight-function integral (after u = sin(phi) the
#: integrand is smooth; 32 nodes integrate the uniform case to 1e-7, see the tests).
_GL_X, _GL_W = np.polynomial.legendre.leggauss(32)
_WF_PHI = 0.25 * np.pi * (_GL_X + 1.0)
_WF_W = 0.25 * np.pi * _GL_W


def edge_weight_function_points(a_m: float) -> tuple[np.ndarray, np.ndarray]:
    """Quadrature for the edge-crack weight-function integral.

    Returns distances from the crack mouth ``x_m`` and weights ``w_sqrt_m`` such that
    ``K_I = sum(w * sigma(x))`` for a crack of depth ``a_m`` loaded by ``sigma(x)`` normal to its
    faces (Pa in, Pa*sqrt(m) out).

    Notes
    -----
    Point-force weight function of an edge crack in a half plane (Hartranft & Sih 1973, as
    tabulated in the Tada, Paris & Irwin handbook; from memory)::

        K = (2 / sqrt(pi a)) int_0^a sigma(x) F(x/a) / sqrt(1 - (x/a)^2) dx,
        F(u) = 1.3 - 0.3 u^(5/4).

    With ``x = a sin(phi)`` the inverse-square-root singularity at the tip disappears:
    ``K = 2 sqrt(a/pi) int_0^(pi/2) sigma(a sin phi) F(sin phi) dphi``.
    """
    u = np.sin(_WF_PHI)
    weights = 2.0 * math.sqrt(a_m / math.pi) * _WF_W * (1.3 - 0.3 * u**1.25)
    return a_m * u, weights


def edge_crack_K(a_m: float, sigma_of_x) -> np.ndarray:
    """K_I of a through-thickness edge crack of depth ``a_m`` under ``sigma_of_x(x_m)`` (Pa).

    ``sigma_of_x`` maps distances from the mouth (array) to stresses with the distance on the
    last axis, e.g. shape (n_times, n_points). Returns Pa*sqrt(m), shape without the last axis.
    """
    x, w = edge_weight_function_points(a_m)
    return np.asarray(sigma_of_x(x), float) @ w


def embedded_ellipse_K_max(a_m: float, c_m: float, sigma_Pa) -> np.ndarray:
    """Largest K_I on an embedded elliptical crack in an infinite body (at the minor-axis end).

    ``K = sigma sqrt(pi a) / E(k)``, ``k^2 = 1 - (a/c)^2``, a <= c the semi-axes (Irwin 1962,
    J. Appl. Mech. 29, 651). scipy's ``ellipe`` takes the parameter m = k^2.
    """
    lo, hi = min(a_m, c_m), max(a_m, c_m)
    phi_sq = special.ellipe(1.0 - (lo / hi) ** 2)
    return np.asarray(sigma_Pa, float) * math.sqrt(math.pi * lo) / phi_sq


# ---------------------------------------------------------------------------------------------
# Stress on a crack plane and on slip systems.


def resolve_on_plane(sigma_r_Pa, sigma_theta_Pa, n_r: float, n_theta: float):
    """Normal and shear traction on a plane in a plane-stress polar field (no r-theta shear).

    ``t = sigma_r n_r e_r + sigma_theta n_theta e_theta``; ``sigma_n = n . t``;
    ``tau = |t - sigma_n n|``. ``n_r``, ``n_theta``: components of the unit plane normal along
    e_r and e_theta (its z component carries no traction, sigma_z = 0).
    """
    sr = np.asarray(sigma_r_Pa, float)
    st = np.asarray(sigma_theta_Pa, float)
    sig_n = sr * n_r**2 + st * n_theta**2
    t2 = (sr * n_r) ** 2 + (st * n_theta) ** 2
    tau = np.sqrt(np.maximum(t2 - sig_n**2, 0.0))
    return sig_n, tau


def slip_systems() -> tuple[np.ndarray, np.ndarray, list[str]]:
    """The twelve a/2<110>{111} slip systems of the diamond lattice.

    Returns unit plane normals (12, 3), unit slip directions (12, 3) and labels like
    ``"(111)[1-10]"``.
    """
    normals, dirs, labels = [], [], []
    planes = [(1, 1, 1), (-1, 1, 1), (1, -1, 1), (1, 1, -1)]
    directions = [d for d in itertools.product((-1, 0, 1), repeat=3)
                  if sorted(map(abs, d)) == [0, 1, 1] and next(v for v in d if v) > 0]
    for p in planes:
        for d in directions:
            if sum(a * b for a, b in zip(p, d, strict=True)) == 0:
                normals.append(np.array(p, float) / math.sqrt(3.0))
                dirs.append(np.array(d, float) / math.sqrt(2.0))
                labels.append(f"({''.join(map(str, p))})[{''.join(map(str, d))}]")
    return np.array(normals), np.array(dirs), labels


def resolved_shear_stresses(sigma_crystal) -> np.ndarray:
    """Resolved shear stress ``b . sigma . n`` on the 12 slip systems; (..., 3, 3) -> (..., 12)."""
    n, b, _ = slip_systems()
    s = np.asarray(sigma_crystal, float)
    return np.einsum("ki,...ij,kj->...k", b, s, n)


def polar_stress_in_crystal(sigma_r_Pa, sigma_theta_Pa, angle_deg: float, z_uvw, x_uvw) -> np.ndarray:
    """Plane-stress polar tensor at azimuth ``angle_deg`` rotated into crystal axes, (..., 3, 3).

    Wafer frame: ``sigma = sigma_r e_r e_r + sigma_theta e_theta e_theta`` with
    ``e_r = (cos a, sin a, 0)``; crystal frame ``A sigma A^T`` (:func:`pipeline.crystal.orientation_matrix`, transposed).
    """
    a = math.radians(angle_deg)
    e_r = np.array([math.cos(a), math.sin(a), 0.0])
    e_t = np.array([-math.sin(a), math.cos(a), 0.0])
    A = crystal.orientation_matrix(z_uvw, x_uvw).T  # columns: wafer axes in the crystal frame
    er_c, et_c = A @ e_r, A @ e_t
    sr = np.asarray(sigma_r_Pa, float)[..., None, None]
    st = np.asarray(sigma_theta_Pa, float)[..., None, None]
    return sr * np.outer(er_c, er_c) + st * np.outer(et_c, et_c)


def slip_factors(angle_deg: float, z_uvw, x_uvw) -> tuple[np.ndarray, np.ndarray]:
    """Factors ``S_r, S_theta`` (12,) with ``tau_k = sigma_r S_r[k] + sigma_theta S_theta[k]``.

    The resolved shear stress ``b . sigma . n`` of the polar plane-stress tensor at azimuth
    ``angle_deg`` is linear in its two components; precomputing the factors keeps the slip check
    over every time and radius cheap. Equal to :func:`resolved_shear_stresses` of
    :func:`polar_stress_in_crystal`.
    """
    a = math.radians(angle_deg)
    A = crystal.orientation_matrix(z_uvw, x_uvw).T  # columns: wafer axes in the crystal frame
    er_c = A @ np.array([math.cos(a), math.sin(a), 0.0])
    et_c = A @ np.array([-math.sin(a), math.cos(a), 0.0])
    n, b, _ = slip_systems()
    return (b @ er_c) * (n @ er_c), (b @ et_c) * (n @ et_c)

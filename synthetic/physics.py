"""Material numbers the contrast model needs: Pendellosung distance and attenuation length of Si.

Both use xraylib (an optional package, installed with the ``test`` extra); a scenario can give the
values explicitly instead (``contrast.pendellosung_um``, ``contrast.attenuation_length_um``).

References
----------
- Pendellosung distance ``Lambda_0 = pi V sqrt(gamma_0 |gamma_h|) / (r_e lambda |C| sqrt(F_h F_-h))``:
  A. Authier, International Tables for Crystallography Vol. B (2006), section 5.1.3.5.
- Structure factors and attenuation: T. Schoonjans et al. (2011), "The xraylib library for X-ray
  matter interactions. Recent developments", Spectrochim. Acta B 66, 776-784.
"""

from __future__ import annotations

import math

from pipeline.errors import InputError
from pipeline.geometry import Geometry

#: classical electron radius, angstrom (CODATA 2018)
R_E_A = 2.8179403262e-5
#: density of silicon, g/cm^3 (handbook value; from memory)
SI_DENSITY_G_CM3 = 2.329
#: room-temperature Debye-Waller B of Si, angstrom^2 (from memory; PHYSICS.md section 2.4)
SI_DEBYE_B_A2 = 0.4632


def _xraylib(what: str):
    try:
        import xraylib
    except ImportError:  # pragma: no cover - xraylib is installed in the test environment
        raise InputError(
            f"contrast.{what}: computing it needs the optional package xraylib "
            f"(pip install xraylib); or give contrast.{what} in the scenario"
        ) from None
    return xraylib


def pendellosung_um(
    geom: Geometry,
    hkl: tuple[int, int, int],
    *,
    debye_waller: bool = True,
    polarization: str = "sigma",
) -> float:
    """Pendellosung distance of silicon for the acquisition's reflection and beam angles, um.

    ``gamma_0 = cos(psi0)`` and ``gamma_h = cos(psi_h)`` are the direction cosines with the
    inward surface normal (+z). ``polarization`` is ``"sigma"`` (C = 1) or ``"pi"``
    (C = |cos 2 theta_B|).
    """
    xrl = _xraylib("pendellosung_um")
    c = xrl.Crystal_GetCrystal("Si")
    h, k, l = hkl
    s = 1.0 / (2.0 * geom.d_A)  # sin(theta)/lambda
    dw = math.exp(-SI_DEBYE_B_A2 * s * s) if debye_waller else 1.0
    f = xrl.Crystal_F_H_StructureFactor(c, geom.energy_keV, h, k, l, dw, 1.0)
    fb = xrl.Crystal_F_H_StructureFactor(c, geom.energy_keV, -h, -k, -l, dw, 1.0)
    vol = xrl.Crystal_UnitCellVolume(c)
    g0 = math.cos(math.radians(geom.psi0_deg))
    gh = math.cos(math.radians(geom.psi_h_deg))
    pol = 1.0 if polarization == "sigma" else abs(math.cos(2 * math.radians(geom.theta_B_deg)))
    lam = (
        math.pi
        * vol
        * math.sqrt(abs(g0 * gh))
        / (R_E_A * geom.wavelength_A * pol * math.sqrt(abs(f * fb)))
    )
    return lam * 1e-4


def attenuation_length_um(energy_keV: float) -> float:
    """``1/mu`` of silicon (total attenuation with coherent scattering), um."""
    xrl = _xraylib("attenuation_length_um")
    mu_per_cm = xrl.CS_Total_CP("Si", energy_keV) * SI_DENSITY_G_CM3
    return 1e4 / mu_per_cm


def absorption_depth_um(geom: Geometry, attenuation_um: float) -> float:
    """Depth from which reflected intensity comes (1/e), ``1 / (mu (1/gamma_0 + 1/|gamma_h|))``,
    um (reflection geometry; PHYSICS.md section 1.3)."""
    g0 = math.cos(math.radians(geom.psi0_deg))
    gh = abs(math.cos(math.radians(geom.psi_h_deg)))
    return attenuation_um / (1.0 / g0 + 1.0 / gh)

"""Crystal directions and plane descriptors of a cubic (diamond-lattice) wafer in the wafer frame.

The wafer frame is the one of SPEC section 3: ``x`` the scan axis, ``y`` along the slit, ``z``
depth. ``crystal.z_uvw`` is the crystal direction along +z and ``crystal.x_uvw`` the one along +x;
y completes the right-handed set. For a cubic lattice the normal of plane (hkl) is direction
[hkl], so one rotation matrix serves directions and plane normals.

References
----------
Interplanar angles of cubic crystals, ``cos phi = n1.n2 / (|n1||n2|)``: any crystallography text,
e.g. B. D. Cullity & S. R. Stock (2001), Elements of X-Ray Diffraction, 3rd ed., appendix 3.
"""

from __future__ import annotations

import itertools
import math
from functools import lru_cache

import numpy as np


def unit(v) -> np.ndarray:
    """``v / |v|`` as float64; raises ValueError for a zero vector."""
    a = np.asarray(v, float)
    n = float(np.linalg.norm(a))
    if n == 0:
        raise ValueError(f"zero vector {list(a)} has no direction")
    return a / n


def orientation_matrix(z_uvw, x_uvw) -> np.ndarray:
    """Rotation from crystal to wafer coordinates, ``v_wafer = R @ v_crystal``.

    The rows of ``R`` are the crystal-frame unit vectors of the wafer axes x, y, z.
    """
    z = unit(z_uvw)
    x = unit(x_uvw)
    if abs(float(z @ x)) > 1e-9:
        raise ValueError(f"x_uvw {list(x_uvw)} is not perpendicular to z_uvw {list(z_uvw)}")
    y = np.cross(z, x)
    return np.array([x, y, z])


def _clean(v: np.ndarray) -> np.ndarray:
    """Round-off below 1e-12 set to 0, so that exact zeros stay exact in the exports."""
    v = np.array(v, float)
    v[np.abs(v) < 1e-12] = 0.0
    return v


def to_wafer(R: np.ndarray, v_crystal) -> np.ndarray:
    """Unit wafer-frame vector of a crystal direction (or plane normal [hkl])."""
    return _clean(R @ unit(v_crystal))


def to_crystal(R: np.ndarray, v_wafer) -> np.ndarray:
    """Unit crystal-frame vector of a wafer-frame direction."""
    return _clean(R.T @ unit(v_wafer))


def canonical_normal(n) -> np.ndarray:
    """The sign of a plane normal fixed for reporting: ``n_z > 0``; for vertical planes the first
    non-zero of ``n_x, n_y`` is positive (a plane and its negative normal are the same plane)."""
    n = unit(n)
    for comp in (n[2], n[0], n[1]):
        if abs(comp) > 1e-12:
            return n if comp > 0 else -n
    return n


def plane_angles(n_wafer) -> tuple[float, float]:
    """Inclination and azimuth of a plane with normal ``n_wafer`` (SPEC section 7).

    Returns
    -------
    inclination_deg : float
        Angle between the plane and the wafer surface, 0-90 (90 = perpendicular to the surface).
    azimuth_deg : float
        Direction of the surface trace, from +x toward +y, in [0, 180). 0 for a plane parallel
        to the surface (no trace).
    """
    n = unit(n_wafer)
    incl = math.degrees(math.acos(min(1.0, abs(float(n[2])))))
    tx, ty = -float(n[1]), float(n[0])  # trace = z x n
    if math.hypot(tx, ty) < 1e-12:
        return incl, 0.0
    az = math.degrees(math.atan2(ty, tx)) % 180.0
    return incl, 0.0 if az >= 180.0 - 1e-9 else az


def family(hkl) -> str:
    """Family symbol of a plane: absolute indices in decreasing order, e.g.
    ``(1, -1, 1) -> "{111}"``, ``(0, 1, -1) -> "{110}"``, ``(1, 1, 3) -> "{311}"`` (the format
    of :func:`pipeline.crystal.family_name`, so truth and measured exports read alike)."""
    digits = sorted((abs(int(v)) for v in hkl), reverse=True)
    sep = "," if digits[0] >= 10 else ""
    return "{" + sep.join(str(d) for d in digits) + "}"


def same_family(a, b) -> bool:
    """True when two Miller triples belong to one family ({111}, {110}, ...)."""
    return sorted(abs(int(v)) for v in primitive(a)) == sorted(abs(int(v)) for v in primitive(b))


def primitive(hkl) -> tuple[int, int, int]:
    """Miller indices divided by their greatest common divisor (``(2, 2, 0) -> (1, 1, 0)``)."""
    h, k, l = (int(v) for v in hkl)
    g = math.gcd(math.gcd(abs(h), abs(k)), abs(l))
    if g == 0:
        raise ValueError("(000) is not a plane")
    return (h // g, k // g, l // g)


@lru_cache(maxsize=8)
def _candidates(h_max: int) -> tuple[np.ndarray, np.ndarray]:
    """Primitive (hkl) with |h|,|k|,|l| <= h_max, one of each +-pair, sorted by h^2+k^2+l^2."""
    seen = set()
    out = []
    for hkl in itertools.product(range(-h_max, h_max + 1), repeat=3):
        if hkl == (0, 0, 0):
            continue
        p = primitive(hkl)
        neg = tuple(-v for v in p)
        if p in seen or neg in seen:
            continue
        seen.add(p)
        out.append(p)
    out.sort(key=lambda p: (p[0] ** 2 + p[1] ** 2 + p[2] ** 2, tuple(-abs(v) for v in p)))
    arr = np.array(out, float)
    return np.array(out, int), arr / np.linalg.norm(arr, axis=1, keepdims=True)


def nearest_hkl(n_crystal, h_max: int = 3) -> tuple[tuple[int, int, int], float]:
    """Nearest low-index plane to a crystal-frame normal.

    Enumerates primitive (hkl) with indices up to ``h_max``, takes the largest ``|n . hkl|``
    (sign-insensitive), and on ties (within 1e-9) the lowest ``h^2+k^2+l^2``. The returned
    indices carry the sign that makes ``hkl . n > 0``.

    Returns
    -------
    hkl : tuple of int
    misfit_deg : float
        Angle between ``n_crystal`` and the returned plane normal.
    """
    n = unit(n_crystal)
    ints, units = _candidates(h_max)
    cos = units @ n
    best = int(np.argmax(np.abs(cos) - 1e-9 * np.arange(len(cos)) / len(cos)))
    c = float(cos[best])
    hkl = ints[best] if c >= 0 else -ints[best]
    misfit = math.degrees(math.acos(min(1.0, abs(c))))
    return (int(hkl[0]), int(hkl[1]), int(hkl[2])), (0.0 if misfit < 1e-6 else misfit)


def plane_descriptor(n_wafer, R: np.ndarray, hkl=None) -> dict:
    """The ``plane`` object of the defect export (SPEC section 7) for an exactly known plane.

    ``hkl``, when the plane was given by its Miller indices, is reported as ``nearest_hkl``
    (reduced, signed like the reported normal) with misfit 0; otherwise the nearest plane with
    indices up to 3 is searched. ``fit_rms_um`` is 0 (the plane is known, not fitted).
    """
    n = canonical_normal(n_wafer)
    incl, az = plane_angles(n)
    if hkl is not None:
        p = np.array(primitive(hkl))
        if float(to_wafer(R, p) @ n) < 0:
            p = -p
        hkl, misfit = (int(p[0]), int(p[1]), int(p[2])), 0.0
    else:
        hkl, misfit = nearest_hkl(to_crystal(R, n))
    return {
        "normal": [float(v) for v in n],
        "inclination_deg": incl,
        "azimuth_deg": az,
        "nearest_hkl": list(hkl),
        "family": family(hkl),
        "misfit_deg": misfit,
        "fit_rms_um": 0.0,
    }

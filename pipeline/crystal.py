"""Miller-index plane geometry of cubic crystals (silicon) in the wafer frame.

The wafer frame is x (scan), y (slit), z (depth); the acquisition names the crystal directions
along +z (``z_uvw``) and +x (``x_uvw``), and y completes the right-handed set (SPEC section 3).
In a cubic crystal the normal of plane (hkl) is parallel to direction [hkl], so a plane normal
measured in the wafer frame is compared with Miller indices after one rotation.

References
----------
Cubic interplanar angle ``cos(phi) = (h1 h2 + k1 k2 + l1 l2) / (|h1| |h2|)``: Kelly & Knowles
(2012), *Crystallography and Crystal Defects*, 2nd ed., Wiley, appendix on the cubic system; any
crystallography text gives the same formula. The nearest-low-index-plane search (maximum of
``|n . h|`` over the members of each family, ties to the lowest ``h^2 + k^2 + l^2``) follows the
project's PHYSICS.md section 3.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Sequence
from functools import lru_cache

import numpy as np

#: Plane families searched by default: the low-index planes silicon cracks and slips on.
DEFAULT_FAMILIES: tuple[tuple[int, int, int], ...] = ((1, 0, 0), (1, 1, 0), (1, 1, 1), (1, 1, 2))


def _unit(v: Sequence[float], what: str) -> np.ndarray:
    a = np.asarray(v, float).reshape(3)
    n = float(np.linalg.norm(a))
    if not np.isfinite(n) or n == 0:
        raise ValueError(f"{what} must be a non-zero 3-vector, got {list(np.ravel(v))}")
    return a / n


def unit(v: Sequence[float]) -> np.ndarray:
    """``v / |v|`` as float64; raises ValueError for a zero vector."""
    a = np.asarray(v, float)
    n = float(np.linalg.norm(a))
    if not np.isfinite(n) or n == 0:
        raise ValueError(f"zero vector {list(np.ravel(a))} has no direction")
    return a / n


def orientation_matrix(z_uvw: Sequence[float], x_uvw: Sequence[float]) -> np.ndarray:
    """Rotation between the wafer frame and the crystal frame.

    Parameters
    ----------
    z_uvw, x_uvw : 3-sequences
        Crystal directions [uvw] along wafer +z (depth) and +x (scan); must be perpendicular.

    Returns
    -------
    (3, 3) ndarray
        Rows are the unit crystal-frame vectors of the wafer x, y and z axes, so a wafer-frame
        vector ``v`` has crystal components ``M.T @ v`` and a crystal vector ``c`` has wafer
        components ``M @ c``.

    Raises
    ------
    ValueError
        When a direction is zero or the two are not perpendicular.
    """
    z = _unit(z_uvw, "z_uvw")
    x = _unit(x_uvw, "x_uvw")
    if abs(float(z @ x)) > 1e-9:
        raise ValueError(
            f"x_uvw {list(x_uvw)} is not perpendicular to z_uvw {list(z_uvw)} (dot product must be 0)"
        )
    y = np.cross(z, x)  # right-handed: x cross y = z  <=>  y = z cross x
    return np.vstack([x, y, z])


def wafer_to_crystal(
    v_wafer: Sequence[float], z_uvw: Sequence[float], x_uvw: Sequence[float]
) -> np.ndarray:
    """Components of a wafer-frame vector (or rows of vectors) in the crystal frame."""
    m = orientation_matrix(z_uvw, x_uvw)
    return np.asarray(v_wafer, float) @ m


def crystal_to_wafer(
    v_crystal: Sequence[float], z_uvw: Sequence[float], x_uvw: Sequence[float]
) -> np.ndarray:
    """Components of a crystal-frame vector (or rows of vectors) in the wafer frame."""
    m = orientation_matrix(z_uvw, x_uvw)
    return np.asarray(v_crystal, float) @ m.T


def _clean(v: np.ndarray) -> np.ndarray:
    """Round-off below 1e-12 set to 0, so that exact zeros stay exact in the exports."""
    v = np.array(v, float)
    v[np.abs(v) < 1e-12] = 0.0
    return v


def to_wafer(m: np.ndarray, v_crystal: Sequence[float]) -> np.ndarray:
    """Unit wafer-frame vector of a crystal direction (or plane normal [hkl]); ``m`` from
    :func:`orientation_matrix`."""
    return _clean(m @ unit(v_crystal))


def to_crystal(m: np.ndarray, v_wafer: Sequence[float]) -> np.ndarray:
    """Unit crystal-frame vector of a wafer-frame direction; ``m`` from :func:`orientation_matrix`."""
    return _clean(m.T @ unit(v_wafer))


def canonical_normal(n: Sequence[float]) -> np.ndarray:
    """The sign of a plane normal fixed for reporting: ``n_z > 0``; for vertical planes the first
    non-zero of ``n_x, n_y`` is positive (a plane and its negative normal are the same plane)."""
    u = unit(n)
    for comp in (u[2], u[0], u[1]):
        if abs(comp) > 1e-12:
            return u if comp > 0 else -u
    return u


def plane_angles(n_wafer: Sequence[float]) -> tuple[float, float]:
    """Inclination and azimuth of a plane with normal ``n_wafer`` (SPEC section 7).

    Returns
    -------
    inclination_deg : float
        Angle between the plane and the wafer surface, 0-90 (90 = perpendicular to the surface).
    azimuth_deg : float
        Direction of the surface trace ``z x n``, from +x toward +y, in [0, 180); 0 for a plane
        parallel to the surface (no trace).
    """
    n = unit(n_wafer)
    incl = math.degrees(math.acos(min(1.0, abs(float(n[2])))))
    tx, ty = -float(n[1]), float(n[0])  # trace = z x n
    if math.hypot(tx, ty) < 1e-12:
        return incl, 0.0
    az = math.degrees(math.atan2(ty, tx)) % 180.0
    return incl, 0.0 if az >= 180.0 - 1e-9 else az


def primitive(hkl: Sequence[int]) -> tuple[int, int, int]:
    """Miller indices divided by their greatest common divisor (``(2, 2, 0) -> (1, 1, 0)``)."""
    h, k, l = (int(v) for v in hkl)
    g = math.gcd(math.gcd(abs(h), abs(k)), abs(l))
    if g == 0:
        raise ValueError("(000) is not a plane")
    return (h // g, k // g, l // g)


def same_family(a: Sequence[int], b: Sequence[int]) -> bool:
    """True when two Miller triples belong to one family ({111}, {110}, ...)."""
    return sorted(abs(v) for v in primitive(a)) == sorted(abs(v) for v in primitive(b))


def angle_between_planes_deg(hkl1: Sequence[int], hkl2: Sequence[int]) -> float:
    """Angle between two cubic lattice planes, degrees, in [0, 90].

    ``cos(phi) = |h1 . h2| / (|h1| |h2|)`` (cubic system; Kelly & Knowles 2012). Planes have no
    sense, so the acute angle is returned: (111)/(11-1) is 70.5288 deg, not 109.47 deg.
    """
    a = _unit(hkl1, "hkl1")
    b = _unit(hkl2, "hkl2")
    c = min(1.0, abs(float(a @ b)))
    return math.degrees(math.acos(c))


def family_name(hkl: Sequence[int]) -> str:
    """Family label of a plane, e.g. (1, -1, 2) -> ``"{112}"`` (sorted absolute indices)."""
    idx = sorted((abs(int(v)) for v in hkl), reverse=True)
    if idx[0] >= 10:
        return "{" + ",".join(str(v) for v in idx) + "}"
    return "{" + "".join(str(v) for v in idx) + "}"


@lru_cache(maxsize=64)
def family_members(hkl: tuple[int, int, int]) -> tuple[tuple[int, int, int], ...]:
    """Distinct planes of a cubic family, one of each +/- pair (e.g. 4 for {111}, 6 for {110})."""
    base = tuple(abs(int(v)) for v in hkl)
    seen: set[tuple[int, int, int]] = set()
    out: list[tuple[int, int, int]] = []
    for perm in set(itertools.permutations(base)):
        for signs in itertools.product((1, -1), repeat=3):
            m = tuple(int(s * p) for s, p in zip(signs, perm, strict=True))
            if m == (0, 0, 0):
                continue
            neg = tuple(-v for v in m)
            if m in seen or neg in seen:
                continue
            # keep the member whose first non-zero index is positive (a plane and its negative
            # are the same plane)
            first = next(v for v in m if v != 0)
            keep = m if first > 0 else neg
            seen.add(keep)
            out.append(keep)
    return tuple(sorted(out, reverse=True))


def nearest_plane(
    normal_wafer: Sequence[float],
    z_uvw: Sequence[float],
    x_uvw: Sequence[float],
    families: Sequence[Sequence[int]] = DEFAULT_FAMILIES,
) -> tuple[tuple[int, int, int], str, float]:
    """Nearest low-index lattice plane to a plane normal measured in the wafer frame.

    Parameters
    ----------
    normal_wafer : 3-sequence
        Plane normal in the wafer frame (any length, any sign).
    z_uvw, x_uvw : 3-sequences
        Crystal orientation of the wafer (SPEC section 3).
    families : sequence of 3-sequences
        Representative indices of the families searched, default {100}, {110}, {111}, {112}.

    Returns
    -------
    hkl : tuple of int
        The member plane, signed so that its normal points along the measured one.
    family : str
        Its family, e.g. ``"{111}"``.
    misfit_deg : float
        Angle between the measured plane and that lattice plane, degrees.

    Notes
    -----
    The measured normal is rotated into the crystal frame (``M.T @ n``, :func:`orientation_matrix`)
    and compared with every member of every family by ``|n . h| / |h|`` (sign-insensitive). Ties
    within 1e-12 go to the lowest ``h^2 + k^2 + l^2`` (PHYSICS.md section 3).
    """
    if len(families) == 0:
        raise ValueError("families must name at least one plane family, e.g. ((1, 1, 1),)")
    n_c = wafer_to_crystal(_unit(normal_wafer, "plane normal"), z_uvw, x_uvw)
    best: tuple[float, int, tuple[int, int, int], str] | None = None
    for fam in families:
        fam_t = tuple(int(v) for v in fam)
        if len(fam_t) != 3 or fam_t == (0, 0, 0):
            raise ValueError(f"plane family {list(fam)} must be three integers, not all zero")
        name = family_name(fam_t)
        for m in family_members(fam_t):
            h = np.asarray(m, float)
            c = float(n_c @ h) / float(np.linalg.norm(h))
            key = (abs(c), -int(h @ h))
            if (
                best is None
                or key[0] > best[0] + 1e-12
                or (abs(key[0] - best[0]) <= 1e-12 and key[1] > best[1])
            ):
                signed = m if c >= 0 else tuple(-v for v in m)
                best = (key[0], key[1], signed, name)
    # atan2 of |n x h| and |n . h| keeps full precision near 0 deg (acos does not)
    h = np.asarray(best[2], float) / float(np.linalg.norm(best[2]))
    misfit = math.degrees(math.atan2(float(np.linalg.norm(np.cross(n_c, h))), abs(float(n_c @ h))))
    return best[2], best[3], misfit


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


def nearest_hkl(n_crystal: Sequence[float], h_max: int = 3) -> tuple[tuple[int, int, int], float]:
    """Nearest plane with indices up to ``h_max`` to a crystal-frame normal.

    Unlike :func:`nearest_plane` (a fixed list of families, for measured planes) this searches
    every primitive (hkl) with ``|h|, |k|, |l| <= h_max``: the synthetic ground truth names any
    plane it is given. Largest ``|n . hkl|`` wins, ties (within 1e-9) go to the lowest
    ``h^2+k^2+l^2``; the indices carry the sign that makes ``hkl . n > 0``.

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


def plane_descriptor(n_wafer: Sequence[float], m: np.ndarray, hkl: Sequence[int] | None = None) -> dict:
    """The ``plane`` object of the defect export (SPEC section 7) for an exactly known plane.

    ``hkl``, when the plane was given by its Miller indices, is reported as ``nearest_hkl``
    (reduced, signed like the reported normal) with misfit 0; otherwise the nearest plane with
    indices up to 3 is searched (:func:`nearest_hkl`). ``fit_rms_um`` is 0 (the plane is known,
    not fitted). ``m`` is the :func:`orientation_matrix`.
    """
    n = canonical_normal(n_wafer)
    incl, az = plane_angles(n)
    if hkl is not None:
        p = np.array(primitive(hkl))
        if float(to_wafer(m, p) @ n) < 0:
            p = -p
        hkl, misfit = (int(p[0]), int(p[1]), int(p[2])), 0.0
    else:
        hkl, misfit = nearest_hkl(to_crystal(m, n))
    return {
        "normal": [float(v) for v in n],
        "inclination_deg": incl,
        "azimuth_deg": az,
        "nearest_hkl": list(hkl),
        "family": family_name(hkl),
        "misfit_deg": misfit,
        "fit_rms_um": 0.0,
    }

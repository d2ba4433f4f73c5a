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

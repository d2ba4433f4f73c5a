"""Miller-index plane geometry (pipeline.crystal) against published crystallography.

Sources named beside each check:
- Cubic interplanar angle cos(phi) = h1.h2 / (|h1| |h2|): Kelly & Knowles (2012), Crystallography
  and Crystal Defects, 2nd ed., Wiley (cubic-system formulae); the same values are tabulated in
  most crystallography texts (e.g. Cullity & Stock, Elements of X-Ray Diffraction, 3rd ed.,
  2001, table of interplanar angles in cubic crystals). Values recomputed here by hand:
  acos(1/sqrt(3)) = 54.7356 deg, acos(1/3) = 70.5288 deg, acos(3/sqrt(11)) = 25.2394 deg,
  acos(2/sqrt(6)) = 35.2644 deg.
- Nearest-plane check row 7 of the project's PHYSICS.md check table (normal (111) rotated 2 deg
  toward [001] -> {111}, misfit 2.000 deg): a geometric identity, checked to 1e-6 deg.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from pipeline.config import Crystal
from pipeline.crystal import (
    angle_between_planes_deg,
    crystal_to_wafer,
    family_members,
    family_name,
    nearest_plane,
    orientation_matrix,
    wafer_to_crystal,
)


@pytest.mark.parametrize(
    ("hkl1", "hkl2", "expected"),
    [
        ((1, 1, 1), (0, 0, 1), 54.7356),  # Kelly & Knowles 2012: {111} on a (001) surface
        ((1, -1, 1), (0, 0, 1), 54.7356),
        ((1, 1, 0), (0, 0, 1), 90.0),  # {110} containing [001]: vertical on (001)
        ((1, 0, 1), (0, 0, 1), 45.0),  # the other {110}
        ((0, 1, 1), (0, 0, 1), 45.0),
        ((1, 1, 1), (1, 1, -1), 70.5288),  # Kelly & Knowles 2012 / Cullity & Stock 2001 table
        ((1, 1, 3), (0, 0, 1), 25.2394),
        ((1, 1, 1), (1, 1, 0), 35.2644),
        ((1, 1, 2), (0, 0, 1), 35.2644),
        ((1, 1, 0), (1, 0, 1), 60.0),
        ((1, 1, 1), (1, -1, 0), 90.0),
    ],
)
def test_interplanar_angles_cubic(hkl1, hkl2, expected):
    assert angle_between_planes_deg(hkl1, hkl2) == pytest.approx(expected, abs=1e-4)
    # planes have no sense: negating one index set changes nothing
    assert angle_between_planes_deg(tuple(-v for v in hkl1), hkl2) == pytest.approx(
        expected, abs=1e-4
    )


def test_orientation_matrix_is_a_rotation_with_the_given_axes():
    m = orientation_matrix((0, 0, 1), (1, 1, 0))
    np.testing.assert_allclose(m @ m.T, np.eye(3), atol=1e-12)
    assert np.linalg.det(m) == pytest.approx(1.0)
    np.testing.assert_allclose(m[0], np.array([1, 1, 0]) / math.sqrt(2))
    np.testing.assert_allclose(m[2], [0, 0, 1])
    # y completes the right-handed set: z x x = [001] x [110] = [-110]
    np.testing.assert_allclose(m[1], np.array([-1, 1, 0]) / math.sqrt(2))
    # round trip between frames
    v = np.array([0.3, -0.2, 0.9])
    np.testing.assert_allclose(
        crystal_to_wafer(wafer_to_crystal(v, (0, 0, 1), (1, 1, 0)), (0, 0, 1), (1, 1, 0)), v
    )


def test_orientation_matrix_rejects_non_perpendicular():
    with pytest.raises(ValueError, match="perpendicular"):
        orientation_matrix((0, 0, 1), (1, 0, 1))
    with pytest.raises(ValueError, match="non-zero"):
        orientation_matrix((0, 0, 0), (1, 0, 0))


def test_family_members_counts():
    # a plane and its negative are one plane: 3 {100}, 6 {110}, 4 {111}, 12 {112}
    assert len(family_members((1, 0, 0))) == 3
    assert len(family_members((1, 1, 0))) == 6
    assert len(family_members((1, 1, 1))) == 4
    assert len(family_members((1, 1, 2))) == 12
    assert family_name((1, -1, 2)) == "{211}"


def _rotate_toward(v: np.ndarray, target: np.ndarray, angle_deg: float) -> np.ndarray:
    v = v / np.linalg.norm(v)
    t = target - (target @ v) * v
    t /= np.linalg.norm(t)
    a = math.radians(angle_deg)
    return math.cos(a) * v + math.sin(a) * t


@pytest.mark.parametrize(
    ("z_uvw", "x_uvw"), [((0, 0, 1), (1, 0, 0)), ((0, 0, 1), (1, 1, 0)), ((1, 1, 1), (1, -1, 0))]
)
def test_nearest_plane_physics_row7(z_uvw, x_uvw):
    """PHYSICS.md check row 7: (111) rotated 2 deg toward [001] -> {111}, misfit 2.000 deg,
    for any wafer orientation (the measured normal is given in the wafer frame)."""
    n_crystal = _rotate_toward(np.array([1.0, 1.0, 1.0]), np.array([0.0, 0.0, 1.0]), 2.0)
    n_wafer = crystal_to_wafer(n_crystal, z_uvw, x_uvw)
    hkl, fam, misfit = nearest_plane(n_wafer, z_uvw, x_uvw)
    assert fam == "{111}"
    assert hkl == (1, 1, 1)
    assert misfit == pytest.approx(2.0, abs=1e-6)
    # sign-insensitive
    hkl2, fam2, misfit2 = nearest_plane(-n_wafer, z_uvw, x_uvw)
    assert fam2 == "{111}" and hkl2 == (-1, -1, -1) and misfit2 == pytest.approx(2.0, abs=1e-6)


def test_nearest_plane_on_a_001_wafer_with_110_flat():
    # default wafer (SPEC 4): z = [001], x = [110]; y = [-110]
    crystal = Crystal()
    z, x = crystal.z_uvw, crystal.x_uvw
    # a vertical crack whose trace runs along x = [110]: normal along y = [-110] -> {110}, 0 deg
    hkl, fam, mis = nearest_plane([0, 1, 0], z, x)
    assert fam == "{110}" and mis == pytest.approx(0.0, abs=1e-9)
    assert angle_between_planes_deg(hkl, (0, 0, 1)) == pytest.approx(90.0)
    # a vertical crack whose normal bisects x and y: ([110] + [-110]) / 2 = [010] -> {100}
    hkl, fam, mis = nearest_plane([math.sqrt(0.5), math.sqrt(0.5), 0], z, x)
    assert fam == "{100}" and hkl == (0, 1, 0) and mis == pytest.approx(0.0, abs=1e-9)
    # the (001) surface itself
    assert nearest_plane([0, 0, 1], z, x)[:2] == ((0, 0, 1), "{100}")


def test_nearest_plane_tie_goes_to_lowest_index():
    # halfway between (001) and (111)? no tie there; an exact member of {112} has misfit 0
    hkl, fam, mis = nearest_plane([1, 1, 2], (0, 0, 1), (1, 0, 0))
    assert fam == "{211}" and mis == pytest.approx(0.0, abs=1e-9)
    # restricting the families changes the answer: nearest of {100}, {111} to (112)
    hkl, fam, mis = nearest_plane([1, 1, 2], (0, 0, 1), (1, 0, 0), families=((1, 0, 0), (1, 1, 1)))
    assert fam == "{111}"
    assert mis == pytest.approx(angle_between_planes_deg((1, 1, 2), (1, 1, 1)), abs=1e-9)


def test_nearest_plane_rejects_bad_family():
    with pytest.raises(ValueError, match="three integers"):
        nearest_plane([0, 0, 1], (0, 0, 1), (1, 0, 0), families=((0, 0, 0),))
    with pytest.raises(ValueError, match="families"):
        nearest_plane([0, 0, 1], (0, 0, 1), (1, 0, 0), families=())

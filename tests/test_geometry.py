"""Geometry (SPEC section 5) against sources outside the project.

Sources named beside each check:
- xraylib 4.3 ``Bragg_angle`` (radians; energies in keV; its Si lattice is 5.4307 A, stored in
  single precision), Schoonjans et al. (2011), Spectrochim. Acta B 66, 776.
- xrayutilities 1.8 ``Crystal.planeDistance`` and ``HXRD.Q2Ang`` (energies in eV; its Si
  lattice is 5.43104 A), Kriegner, Wintersberger & Stangl (2013), J. Appl. Cryst. 46, 1162.
- CODATA 2018 recommended values via ``scipy.constants`` (Tiesinga et al. 2021,
  Rev. Mod. Phys. 93, 025010): Si lattice parameter and h c / e.
- Cu K-alpha1 8.04778 keV and Mo K-alpha1 17.47934 keV: Deslattes et al. (2003), Rev. Mod.
  Phys. 75, 35 (from memory, as quoted in ../shared/PHYSICS.md section 0).
- ../shared/PHYSICS.md "Check values for tests" rows 1-4, 11, 12 (values computed there from
  Bragg's law and the section-width formula W = 2 t sin(theta_B) of Lang (1959), J. Appl.
  Phys. 30, 1748, and Authier (2001), Dynamical Theory of X-ray Diffraction, ch. 5).
- Distance from a point to an ellipse: Eberly (2011), Distance from a point to an ellipse, an
  ellipsoid, or a hyperellipsoid (Geometric Tools), against a direct search with scipy.
- The parallel projection along the diffracted beam onto a (tilted) detector plane,
  PHYSICS.md section 1.4, evaluated here by ray-plane intersection as an independent oracle for
  ``Geometry.project``.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.constants as sc
import xraylib
import xrayutilities as xu
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from pipeline.config import HC_KEV_A, SI_LATTICE_A, Acquisition
from pipeline.errors import InputError
from pipeline.geometry import (
    Geometry,
    bragg_angle_deg,
    d_spacing_A,
    depth_magnification,
    ellipse_outside_d2,
    natural_voxel_um,
    wavelength_A,
)

CU_KA1_KEV = 8.04778  # Deslattes et al. (2003)
MO_KA1_KEV = 17.47934  # Deslattes et al. (2003)
REFLECTIONS = [(2, 2, 0), (0, 0, 4), (1, 1, 1), (1, 1, 3)]


def make_geometry(**beam_and_more) -> Geometry:
    """Geometry of an acquisition built through the validated model (as the pipeline does)."""
    beam = {"energy_keV": 17.479, "reflection": [2, 2, 0], "geometry": "transmission"}
    det = {"pixel_um": [2.5, 2.5], "tilt_deg": 0.0}
    sample = {"thickness_um": 775.0}
    for key in list(beam_and_more):
        if key in ("tilt_deg", "pixel_um", "depth_magnification"):
            det[key] = beam_and_more.pop(key)
        elif key in ("thickness_um", "lattice_A"):
            sample[key] = beam_and_more.pop(key)
    beam.update(beam_and_more)
    acq = Acquisition.model_validate(
        {"sample": sample, "beam": beam, "detector": det, "scan": {"step_um": 10}}
    )
    return Geometry.from_acquisition(acq)


# --- constants --------------------------------------------------------------------------------


def test_silicon_lattice_parameter_is_codata_2018():
    # CODATA 2018: a(Si) = 5.431 020 511(89) x 10^-10 m (scipy.constants, Tiesinga et al. 2021).
    a_m, unit, _ = sc.physical_constants["lattice parameter of silicon"]
    assert unit == "m"
    assert SI_LATTICE_A == pytest.approx(a_m * 1e10, abs=1e-12)
    assert SI_LATTICE_A == 5.431020511


def test_hc_constant():
    # h c / e from the exact SI 2019 constants (scipy.constants), in keV * angstrom.
    assert HC_KEV_A == pytest.approx(sc.h * sc.c / sc.e / 1e-10 / 1e3, rel=1e-8)
    # The same wavelength as xrayutilities' en2lam (which takes eV).
    assert wavelength_A(CU_KA1_KEV) == pytest.approx(xu.en2lam(CU_KA1_KEV * 1000.0), rel=1e-7)


# --- Bragg angles -------------------------------------------------------------------------


@pytest.mark.parametrize("energy_keV", [CU_KA1_KEV, MO_KA1_KEV], ids=["CuKa1", "MoKa1"])
@pytest.mark.parametrize("hkl", REFLECTIONS, ids=lambda h: "".join(map(str, h)))
def test_bragg_angle_vs_xraylib(hkl, energy_keV):
    crystal = xraylib.Crystal_GetCrystal("Si")
    ref_deg = math.degrees(xraylib.Bragg_angle(crystal, energy_keV, *hkl))  # xraylib: radians
    # Same lattice as xraylib (5.4307 A in single precision): only hc may differ (1e-8 rel).
    assert bragg_angle_deg(hkl, energy_keV, lattice_A=crystal["a"]) == pytest.approx(
        ref_deg, abs=1e-5
    )
    # CODATA lattice: differs from xraylib's 5.4307 A by 6e-5 rel, i.e. < 0.003 deg here.
    assert bragg_angle_deg(hkl, energy_keV) == pytest.approx(ref_deg, abs=0.003)


@pytest.mark.parametrize("energy_keV", [CU_KA1_KEV, MO_KA1_KEV], ids=["CuKa1", "MoKa1"])
@pytest.mark.parametrize("hkl", REFLECTIONS, ids=lambda h: "".join(map(str, h)))
def test_bragg_angle_vs_xrayutilities(hkl, energy_keV):
    si = xu.materials.Si
    d_ref = si.planeDistance(*hkl)  # angstrom, xrayutilities' a = 5.43104 A
    assert d_spacing_A(hkl, lattice_A=si.a) == pytest.approx(d_ref, rel=1e-12)
    lam_ref = xu.en2lam(energy_keV * 1000.0)  # xrayutilities takes eV
    theta_ref = math.degrees(math.asin(lam_ref / (2 * d_ref)))
    assert bragg_angle_deg(hkl, energy_keV, lattice_A=si.a) == pytest.approx(theta_ref, abs=1e-6)
    assert bragg_angle_deg(hkl, energy_keV) == pytest.approx(theta_ref, abs=0.003)


@pytest.mark.parametrize("energy_keV", [CU_KA1_KEV, MO_KA1_KEV], ids=["CuKa1", "MoKa1"])
def test_symmetric_bragg_004_vs_xrayutilities_diffractometer(energy_keV):
    # xrayutilities HXRD for a (001) wafer, in-plane [110]: for the symmetric 004 the
    # incidence angle omega equals theta_B and the detector angle is 2 theta_B.
    si = xu.materials.Si
    hx = xu.HXRD(si.Q(1, 1, 0), si.Q(0, 0, 1), en=energy_keV * 1000.0)
    om, _chi, _phi, tt = hx.Q2Ang(si.Q(0, 0, 4))
    tb = bragg_angle_deg((0, 0, 4), energy_keV, lattice_A=si.a)
    assert om == pytest.approx(tb, abs=1e-5)
    assert tt == pytest.approx(2 * tb, abs=1e-5)


def test_physics_check_rows_1_to_4():
    # PHYSICS.md check row 1: d(220) = a / sqrt(8) = 1.920156 A with the CODATA lattice.
    assert d_spacing_A((2, 2, 0)) == pytest.approx(1.920156, abs=1e-6)
    # Rows 2-4 (CODATA lattice, E as given there).
    assert bragg_angle_deg((2, 2, 0), 8.048) == pytest.approx(23.650, abs=0.003)
    assert bragg_angle_deg((2, 2, 0), 17.479) == pytest.approx(10.644, abs=0.002)
    for hkl, expected in [
        ((0, 0, 4), 34.563),
        ((1, 1, 1), 14.221),
        ((1, 1, 3), 28.060),
        ((2, 2, 4), 44.013),
    ]:
        assert bragg_angle_deg(hkl, 8.048) == pytest.approx(expected, abs=0.003), hkl


def test_energy_below_cutoff_raises():
    # lambda / 2d >= 1: Si 224 (d = 1.1086 A) needs E > 12.398 / 2.217 = 5.59 keV.
    with pytest.raises(ValueError, match="must be < 1"):
        bragg_angle_deg((2, 2, 4), 5.0)


# --- depth magnification and section width -----------------------------------------------


@pytest.mark.parametrize("thickness_um, expected_um", [(725.0, 267.8), (775.0, 286.3)])
def test_section_width_symmetric_laue_physics_row_11(thickness_um, expected_um):
    # PHYSICS.md row 11: W = 2 t sin(theta_B), Si 220 at 17.479 keV (Lang 1959; Authier 2001).
    geom = make_geometry(energy_keV=17.479, thickness_um=thickness_um)
    assert geom.band_width_px * geom.p_col_um == pytest.approx(expected_um, abs=0.2)


@pytest.mark.parametrize("hkl", [(2, 2, 0), (1, 1, 1), (0, 0, 4), (1, 1, 3), (4, 0, 0)])
@pytest.mark.parametrize("energy_keV", [CU_KA1_KEV, MO_KA1_KEV, 22.1629])
def test_symmetric_laue_G_is_2_sin_theta(hkl, energy_keV):
    # Symmetric Laue (psi0 = theta_B, untilted detector): G = 2 sin(theta_B), L = cos(theta_B)
    # (PHYSICS.md 1.2, the standard result of Lang 1959 / Authier 2001 ch. 5, from memory).
    geom = make_geometry(energy_keV=energy_keV, reflection=list(hkl))
    tb = math.radians(geom.theta_B_deg)
    assert geom.psi0_deg == geom.theta_B_deg
    assert geom.G == pytest.approx(2 * math.sin(tb), rel=1e-12)
    assert geom.L == pytest.approx(math.cos(tb), rel=1e-12)


def test_grazing_incidence_224_G_physics_row_12():
    # PHYSICS.md row 12: Si 224, Cu Ka1, (001) wafer, grazing incidence: M_z = sin(2 theta_B) /
    # sin(alpha_in) = 6.571. alpha_in comes from xrayutilities (HXRD 'lo_hi', PHYSICS row 5:
    # omega = 8.748 deg). Mapping to our convention: omega is the glancing angle between the
    # incident beam and the surface; psi0 is the angle between the incident beam and the inward
    # normal +z, so psi0 = 90 - omega (cos psi0 = sin alpha_in). The diffracted beam leaves
    # through the entrance surface: reflection (Bragg) geometry, psi_h = psi0 + 2 theta_B.
    si = xu.materials.Si
    hx = xu.HXRD(si.Q(1, 1, 0), si.Q(0, 0, 1), en=8048.0, geometry="lo_hi")
    om, _chi, _phi, tt = hx.Q2Ang(si.Q(2, 2, 4))
    assert om == pytest.approx(8.748, abs=0.002)
    geom = make_geometry(
        energy_keV=8.048, reflection=[2, 2, 4], geometry="reflection", incidence_deg=90.0 - om
    )
    assert geom.G == pytest.approx(6.571, abs=1e-3)
    # The exit glancing angle follows too: 90 - (180 - psi_h) equals xrayutilities' 2theta - omega.
    assert 90.0 - (180.0 - geom.psi_h_deg) == pytest.approx(tt - om, abs=0.002)


@pytest.mark.parametrize(
    "hkl, geometry_name, expected_G",
    [((0, 0, 4), "hi_lo", 1.647), ((1, 1, 3), "lo_hi", 16.9)],
    ids=["004-symmetric", "113-grazing-incidence"],
)
def test_bragg_case_magnifications_physics_1_3(hkl, geometry_name, expected_G):
    # PHYSICS.md 1.3 worked values (Cu Ka1): 004 symmetric Bragg M_z = 1.647; 113 grazing
    # incidence (alpha_in = 2.82 deg) M_z = 16.9. Incidence angles from xrayutilities.
    si = xu.materials.Si
    hx = xu.HXRD(si.Q(1, 1, 0), si.Q(0, 0, 1), en=8048.0, geometry=geometry_name)
    om = hx.Q2Ang(si.Q(*hkl))[0]
    geom = make_geometry(
        energy_keV=8.048, reflection=list(hkl), geometry="reflection", incidence_deg=90.0 - om
    )
    assert geom.G == pytest.approx(expected_G, rel=2e-3)


def test_tilted_detector_stretches_by_one_over_cos_delta():
    # PHYSICS.md 1.4: a detector inclined by delta from normal-to-K_h records in-plane distances
    # multiplied by 1 / cos(delta) (parallel-beam projection).
    g0, g1 = make_geometry(), make_geometry(tilt_deg=30.0)
    assert g1.G == pytest.approx(g0.G / math.cos(math.radians(30)), rel=1e-12)
    assert g1.L == pytest.approx(g0.L / math.cos(math.radians(30)), rel=1e-12)
    assert depth_magnification(g0.theta_B_deg, g0.psi0_deg, 30.0) == pytest.approx(g1.G)


def test_reflection_needs_exit_through_entrance_surface():
    # psi0 = 10 deg with 2 theta_B = 21 deg: psi_h = 31 deg points into the crystal, no Bragg case.
    with pytest.raises(InputError, match="incidence_deg"):
        make_geometry(geometry="reflection", incidence_deg=10.0)


def test_natural_voxel():
    geom = make_geometry()
    dz, dy, dx = natural_voxel_um(geom, -10.0)
    assert dz == pytest.approx(2.5 / (2 * math.sin(math.radians(geom.theta_B_deg))))
    assert (dy, dx) == (2.5, 10.0)


# --- projection: independent ray-plane oracle and property tests -------------------------


def _ray_plane_column_um(geom: Geometry, dx_um: np.ndarray, z_um: np.ndarray) -> np.ndarray:
    """Detector coordinate (um) along the tilted detector of the point at (x - X_k, z),
    relative to the ribbon's entrance point, by intersecting the ray along k_h with the
    detector plane (PHYSICS.md 1.4). Written here from vectors, without Geometry's formulas."""
    ph, dl = math.radians(geom.psi_h_deg), math.radians(geom.tilt_deg)
    k_h = np.array([math.sin(ph), math.cos(ph)])  # (x, z), from +z toward +x
    rot = np.array([[math.cos(dl), -math.sin(dl)], [math.sin(dl), math.cos(dl)]])
    n_d = rot @ k_h  # detector normal, tilted by delta from k_h
    e_u = rot @ np.array([k_h[1], -k_h[0]])  # in-plane detector axis in the x-z plane
    d0 = np.array([0.0, -1.0e4])  # any point of the detector plane
    # Orient e_u so that depth along the incident ray increases along it.
    probe = np.array([math.tan(math.radians(geom.psi0_deg)), 1.0])

    def u(points: np.ndarray) -> np.ndarray:
        s = ((d0 - points) @ n_d) / (k_h @ n_d)
        img = points + s[:, None] * k_h
        return (img - d0) @ e_u

    pts = np.stack([np.ravel(dx_um), np.ravel(z_um)], axis=1)
    sign = 1.0 if u(probe[None])[0] > u(np.zeros((1, 2)))[0] else -1.0
    return sign * (u(pts) - u(np.zeros((1, 2))))


@st.composite
def geometries(draw):
    hkl = draw(st.sampled_from([(2, 2, 0), (0, 0, 4), (1, 1, 1), (1, 1, 3), (2, 2, 4), (4, 0, 0)]))
    energy = draw(st.floats(8.0, 40.0))
    tb = bragg_angle_deg(hkl, energy)
    tilt = draw(st.floats(-45.0, 45.0))
    if draw(st.booleans()):  # transmission (Laue), symmetric or asymmetric
        psi0 = draw(st.one_of(st.none(), st.floats(-60.0, 60.0)))
        p0 = tb if psi0 is None else psi0
        assume(abs(p0 - 2 * tb) < 80.0 and abs(math.sin(math.radians(2 * tb))) > 0.05)
        return make_geometry(
            energy_keV=energy, reflection=list(hkl), incidence_deg=psi0, tilt_deg=tilt
        )
    psi0 = draw(st.floats(1.0, 88.0))
    assume(psi0 + 2 * tb > 95.0)
    return make_geometry(
        energy_keV=energy,
        reflection=list(hkl),
        geometry="reflection",
        incidence_deg=psi0,
        tilt_deg=tilt,
    )


@st.composite
def scans(draw):
    n = draw(st.integers(2, 30))
    steps = draw(st.lists(st.floats(1.0, 50.0), min_size=n - 1, max_size=n - 1))
    direction = draw(st.sampled_from([1.0, -1.0]))
    start = draw(st.floats(-1.0e4, 1.0e4))
    pos = start + direction * np.concatenate([[0.0], np.cumsum(steps)])
    r0 = np.array(draw(st.lists(st.floats(-50.0, 50.0), min_size=n, max_size=n)))
    c0 = np.array(draw(st.lists(st.floats(-500.0, 2000.0), min_size=n, max_size=n)))
    return pos, r0, c0


@settings(max_examples=150, deadline=None)
@given(geom=geometries(), scan=scans(), data=st.data())
def test_wafer_detector_maps_invert_each_other(geom, scan, data):
    pos, r0, c0 = scan
    n = pos.size
    m = 20
    # Points inside the valid range: the ribbon-centre frame lies within the scan (fractional
    # frame 0..n-1), depth within the wafer, y across a large detector.
    k = np.array(data.draw(st.lists(st.floats(0.0, n - 1.0), min_size=m, max_size=m)))
    z = np.array(data.draw(st.lists(st.floats(0.0, geom.thickness_um), min_size=m, max_size=m)))
    y = np.array(data.draw(st.lists(st.floats(-5000.0, 5000.0), min_size=m, max_size=m)))
    x = np.interp(k, np.arange(n), pos) + z * geom.tan_psi0
    scale = max(np.abs(pos).max(), np.abs(x).max(), geom.thickness_um, 5000.0)

    fk, row, col = geom.wafer_to_detector(x, y, z, pos, r0, c0)
    xb, yb, zb = geom.detector_to_wafer(fk, row, col, pos, r0, c0)
    # 1e-9 relative to the problem's length scale (x may be near 0, so not per value).
    for a, b in ((xb, x), (yb, y), (zb, z)):
        np.testing.assert_allclose(a, b, rtol=1e-9, atol=1e-9 * scale)
    np.testing.assert_allclose(fk, k, rtol=1e-9, atol=1e-9 * n)

    # And the other way: detector -> wafer -> detector.
    fk2, row2, col2 = geom.wafer_to_detector(xb, yb, zb, pos, r0, c0)
    np.testing.assert_allclose(fk2, fk, rtol=1e-9, atol=1e-9 * n)
    np.testing.assert_allclose(row2, row, rtol=1e-9, atol=1e-9 * (abs(row).max() + 1))
    np.testing.assert_allclose(col2, col, rtol=1e-9, atol=1e-9 * (abs(col).max() + 1))


@settings(max_examples=100, deadline=None)
@given(geom=geometries(), scan=scans(), data=st.data())
def test_project_at_ribbon_centre_equals_wafer_to_detector(geom, scan, data):
    pos, r0, c0 = scan
    k = data.draw(st.integers(0, pos.size - 1))
    m = 10
    z = np.array(data.draw(st.lists(st.floats(0.0, geom.thickness_um), min_size=m, max_size=m)))
    y = np.array(data.draw(st.lists(st.floats(-5000.0, 5000.0), min_size=m, max_size=m)))
    x = pos[k] + z * geom.tan_psi0  # on frame k's ribbon centre: D = 0
    row, col, D = geom.project(x, y, z, pos[k], r0[k], c0[k])
    fk, row_w, col_w = geom.wafer_to_detector(x, y, z, pos, r0, c0)
    scale = max(abs(pos).max(), abs(x).max(), geom.thickness_um)
    np.testing.assert_allclose(D, 0.0, atol=1e-9 * scale)
    np.testing.assert_allclose(fk, k, atol=1e-9 * pos.size)
    np.testing.assert_allclose(row, row_w, rtol=1e-9, atol=1e-9 * (abs(row).max() + 1))
    np.testing.assert_allclose(col, col_w, rtol=1e-9, atol=1e-9 * (abs(col).max() + 1))


@settings(max_examples=100, deadline=None)
@given(geom=geometries(), data=st.data())
def test_project_matches_ray_plane_intersection(geom, data):
    # Off the ribbon centre too (D != 0): the exact projection of SPEC 5 must equal the
    # parallel projection along k_h onto the tilted detector plane (PHYSICS.md 1.4).
    m = 10
    z = np.array(data.draw(st.lists(st.floats(0.0, geom.thickness_um), min_size=m, max_size=m)))
    D = np.array(data.draw(st.lists(st.floats(-30.0, 30.0), min_size=m, max_size=m)))
    X_k = data.draw(st.floats(-1.0e4, 1.0e4))
    x = X_k + z * geom.tan_psi0 + D
    row, col, D_out = geom.project(x, np.zeros(m), z, X_k, 0.0, 0.0)
    expected_um = _ray_plane_column_um(geom, x - X_k, z)
    scale = max(geom.thickness_um * abs(geom.G), 30.0 * abs(geom.L), 1.0)
    np.testing.assert_allclose(col * geom.p_col_um, expected_um, rtol=1e-9, atol=1e-9 * scale)
    np.testing.assert_allclose(D_out, D, atol=1e-9 * (abs(X_k) + abs(x).max() + 1))


@settings(max_examples=200, deadline=None)
@given(
    log_a=st.floats(0.0, math.log(500.0)),
    log_c=st.floats(0.0, math.log(500.0)),
    s=st.floats(-3.0, 3.0),
    t=st.floats(-3.0, 3.0),
)
def test_ellipse_distance_equals_nearest_point_on_the_ellipse(log_a, log_c, s, t):
    """Distance to the crack front (exact nearest point, Eberly 2011) against a direct search:
    the squared distance to points (a cos phi, c sin phi) at 20001 angles, refined by scipy's
    bounded scalar minimiser about the best one; 0 inside the ellipse."""
    from scipy.optimize import minimize_scalar

    a, c = math.exp(log_a), math.exp(log_c)
    p0, p1 = s * a, t * c
    got = math.sqrt(float(ellipse_outside_d2(np.array([p0]), np.array([p1]), a, c)[0]))
    if (p0 / a) ** 2 + (p1 / c) ** 2 <= 1.0:
        assert got == 0.0
        return
    phi = np.linspace(0.0, 2.0 * math.pi, 20001)

    def d2(f):
        return (a * math.cos(f) - p0) ** 2 + (c * math.sin(f) - p1) ** 2

    i = int(np.argmin((a * np.cos(phi) - p0) ** 2 + (c * np.sin(phi) - p1) ** 2))
    ref = minimize_scalar(
        d2, bounds=(phi[i] - 4e-4, phi[i] + 4e-4), method="bounded", options={"xatol": 1e-12}
    )
    assert got == pytest.approx(math.sqrt(ref.fun), abs=1e-6 * max(a, c))

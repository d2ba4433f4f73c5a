"""Hessian kernels (pipeline.hessian) against reference libraries and named invariants.

References: numpy.linalg.eigvalsh (LAPACK syevd) and scikit-image 0.26
``feature.hessian_matrix_eigvals`` for the eigenvalues; ``skimage.feature.hessian_matrix``
(finite differences on the Gaussian-smoothed array) for the Hessian; the analytic Hessian of a
quadratic polynomial (Gaussian smoothing leaves second derivatives of a quadratic unchanged, and
central second differences are exact on quadratics); ``skimage.filters.frangi`` for the claim
of PHYSICS.md 6.2 that the vessel filters give zero on sheets (Frangi et al. 1998 in 3D weighs
plate-like structure down).
"""

from __future__ import annotations

from itertools import combinations_with_replacement

import dask.array as da
import numpy as np
import pytest
from skimage.feature import hessian_matrix, hessian_matrix_eigvals
from skimage.filters import frangi

from pipeline import hessian as hs

VOXEL = (6.8, 2.5, 10.0)


def _random_symmetric(n: int, rng) -> np.ndarray:
    a = rng.normal(size=(n, 3, 3))
    return (a + a.transpose(0, 2, 1)) / 2


def _elems(m: np.ndarray) -> list[np.ndarray]:
    return [m[..., i, j].astype(np.float32) for i, j in combinations_with_replacement(range(3), 2)]


def test_eigvalsh3_matches_numpy_on_random_matrices():
    rng = np.random.default_rng(1)
    m = _random_symmetric(200_000, rng) * rng.lognormal(0, 2, size=(200_000, 1, 1))
    m = m.astype(np.float32)
    ref = np.linalg.eigvalsh(m.astype(np.float64))[:, ::-1]
    got = np.stack(hs.eigvalsh3(*_elems(m)), axis=1)
    norm = np.linalg.norm(m.reshape(len(m), -1), axis=1)
    err = np.abs(got - ref).max(axis=1) / norm
    # float32 closed form: ~1e-6 of the norm typically, <= 3e-4 near degenerate pairs.
    assert np.percentile(err, 99) < 2e-5
    assert err.max() < 5e-4


@pytest.mark.parametrize(
    "diag",
    [(1.0, 1.0, 1.0), (0.0, 0.0, 0.0), (2.0, 2.0, -1.0), (-3.0, 0.5, 0.5), (1e-3, 0.0, -1e-3),
     (5.0, 0.0, 0.0)],
)
def test_eigvalsh3_degenerate_and_special_spectra(diag):
    rng = np.random.default_rng(2)
    q, _ = np.linalg.qr(rng.normal(size=(500, 3, 3)))
    m = (q @ np.diag(diag) @ q.transpose(0, 2, 1)).astype(np.float32)
    got = np.stack(hs.eigvalsh3(*_elems(m)), axis=1)
    expected = np.sort(np.asarray(diag))[::-1]
    scale = max(1.0, float(np.abs(diag).max()))
    np.testing.assert_allclose(got, np.broadcast_to(expected, got.shape), atol=5e-4 * scale)
    assert np.all(np.isfinite(got))


def test_eigvalsh3_matches_skimage_hessian_matrix_eigvals():
    rng = np.random.default_rng(3)
    vol = rng.normal(size=(20, 24, 28)).astype(np.float32)
    h = hessian_matrix(vol, sigma=1.5, mode="nearest", use_gaussian_derivatives=False)
    ref = hessian_matrix_eigvals(h)
    got = np.stack(hs.eigvalsh3(*h))
    np.testing.assert_allclose(got, ref, atol=2e-4 * float(np.abs(ref).max()))


def _quadratic(shape, voxel_um, a):
    """f = x^T A x / 2 + linear terms on the (z, y, x) um grid; returns f and its Hessian A."""
    zz, yy, xx = np.meshgrid(*[np.arange(n) * d for n, d in zip(shape, voxel_um, strict=True)], indexing="ij")
    p = np.stack([zz, yy, xx]) - np.array([n * d / 2 for n, d in zip(shape, voxel_um, strict=True)])[:, None, None, None]
    f = 0.5 * np.einsum("i...,ij,j...->...", p, a, p) + 0.3 * p[0] - 0.1 * p[2]
    return f


@pytest.mark.parametrize("mode", ["nearest", "constant"])
def test_hessian_um_is_exact_on_a_quadratic(mode):
    a = np.array([[0.02, -0.01, 0.004], [-0.01, 0.05, 0.002], [0.004, 0.002, -0.03]])
    shape = (40, 60, 36)
    f = _quadratic(shape, VOXEL, a)
    sigma = 8.0
    h = hs.hessian_um(f, sigma_um=sigma, voxel_um=VOXEL, mode=mode)
    halo = hs.halo_voxels(sigma, VOXEL)
    inner = tuple(slice(d, n - d) for d, n in zip(halo, shape, strict=True))
    for k, (i, j) in enumerate(combinations_with_replacement(range(3), 2)):
        # float32 smoothing of values up to ~1e3: absolute error ~1e-4 * 1e3 / dx^2 * sigma^2.
        np.testing.assert_allclose(h[k][inner], a[i, j] * sigma**2, atol=2e-3 * sigma**2 * abs(a).max() + 0.05)


def test_hessian_um_agrees_with_skimage_hessian_matrix_on_a_quadratic():
    # skimage works in voxel units with np.gradient twice; after the unit conversion both are
    # exact on a quadratic, so they agree in the interior.
    a = np.array([[0.03, 0.01, 0.0], [0.01, -0.02, 0.005], [0.0, 0.005, 0.01]])
    shape = (40, 60, 36)
    f = _quadratic(shape, VOXEL, a).astype(np.float32)
    sigma = 8.0
    ours = hs.hessian_um(f, sigma_um=sigma, voxel_um=VOXEL)
    ref = hessian_matrix(f, sigma=hs.sigma_voxels(sigma, VOXEL), mode="nearest", use_gaussian_derivatives=False)
    halo = hs.halo_voxels(sigma, VOXEL)
    inner = tuple(slice(d + 2, n - d - 2) for d, n in zip(halo, shape, strict=True))
    for k, (i, j) in enumerate(combinations_with_replacement(range(3), 2)):
        ref_um = ref[k] * sigma**2 / (VOXEL[i] * VOXEL[j])
        np.testing.assert_allclose(ours[k][inner], ref_um[inner], atol=0.05)


def _sheet(shape, voxel_um, normal_xyz, width_um=4.0, amp=1.0, offset_um=0.0):
    zz, yy, xx = np.meshgrid(*[np.arange(n) * d for n, d in zip(shape, voxel_um, strict=True)], indexing="ij")
    c = [n * d / 2 for n, d in zip(shape, voxel_um, strict=True)]
    n = np.asarray(normal_xyz, float) / np.linalg.norm(normal_xyz)
    dist = (xx - c[2]) * n[0] + (yy - c[1]) * n[1] + (zz - c[0]) * n[2] - offset_um
    return (amp * np.exp(-0.5 * (dist / width_um) ** 2)).astype(np.float32)


def _tube(shape, voxel_um, direction_xyz, width_um=3.0, amp=1.0):
    zz, yy, xx = np.meshgrid(*[np.arange(n) * d for n, d in zip(shape, voxel_um, strict=True)], indexing="ij")
    c = [n * d / 2 for n, d in zip(shape, voxel_um, strict=True)]
    p = np.stack([xx - c[2], yy - c[1], zz - c[0]], axis=-1)
    u = np.asarray(direction_xyz, float) / np.linalg.norm(direction_xyz)
    d2 = (p**2).sum(-1) - (p @ u) ** 2
    return (amp * np.exp(-0.5 * d2 / width_um**2)).astype(np.float32)


def test_zero_volume_gives_zero_response():
    z = np.zeros((16, 20, 24), np.float32)
    for fn in (hs.sheet_measure, hs.line_measure):
        assert np.all(fn(z, sigma_um=4.0, voxel_um=VOXEL, signed=True) == 0)


def test_responses_scale_linearly_with_contrast():
    iso = (2.0, 2.0, 2.0)
    v = _sheet((32, 32, 32), iso, (1, 0, 0)) + _tube((32, 32, 32), iso, (0, 1, 0))
    for fn in (hs.sheet_measure, hs.line_measure):
        r1 = fn(v, sigma_um=4.0, voxel_um=iso, signed=True)
        r3 = fn(3 * v, sigma_um=4.0, voxel_um=iso, signed=True)
        # Where the eigenvalue ordering is a tie (float32 round-off) a response may flip sign at
        # ~1e-5 of the peak; everywhere else the measures are homogeneous of degree 1.
        np.testing.assert_allclose(r3, 3 * r1, rtol=1e-4, atol=1e-4 * float(np.abs(3 * r1).max()))


def test_sheet_polarity_and_shape_selectivity():
    iso = (2.0, 2.0, 2.0)
    shape = (40, 40, 40)
    c = tuple(n // 2 for n in shape)
    sheet = _sheet(shape, iso, (1, 0, 0))
    tube = _tube(shape, iso, (0, 0, 1))
    s_sheet = hs.sheet_measure(sheet, sigma_um=4.0, voxel_um=iso)[c]
    s_tube = hs.sheet_measure(tube, sigma_um=4.0, voxel_um=iso)[c]
    l_sheet = hs.line_measure(sheet, sigma_um=4.0, voxel_um=iso)[c]
    l_tube = hs.line_measure(tube, sigma_um=4.0, voxel_um=iso)[c]
    assert s_sheet > 0.2
    assert s_tube < 0.2 * s_sheet  # exp(-(l2/l3)^2 / (2 alpha^2)) = exp(-2) on a round tube
    assert l_tube > 0.1
    assert abs(l_sheet) < 0.02 * l_tube
    # A dark sheet: zero bright response, negative signed response of the same size.
    assert hs.sheet_measure(-sheet, sigma_um=4.0, voxel_um=iso)[c] == 0
    np.testing.assert_allclose(hs.sheet_measure(-sheet, sigma_um=4.0, voxel_um=iso, signed=True)[c], -s_sheet, rtol=1e-4)


def test_sheet_response_is_rotation_invariant_in_physical_units():
    # The same sheet perpendicular to the surface and inclined 54.7 deg ({111} on a (001)
    # wafer), on anisotropic voxels: the peak responses agree within 15 %.
    shape = (60, 120, 60)
    vox = (4.0, 2.5, 4.0)
    inc = np.radians(54.7356)
    peaks = []
    for n in ((1.0, 0.0, 0.0), (np.sin(inc), 0.0, np.cos(inc))):
        v = _sheet(shape, vox, n, width_um=5.0)
        peaks.append(hs.sheet_measure(v, sigma_um=8.0, voxel_um=vox).max())
    assert peaks[1] == pytest.approx(peaks[0], rel=0.15)


def test_skimage_frangi_misses_sheets_that_the_plate_measure_finds():
    # PHYSICS.md 6.2 [C]: frangi(black_ridges=False) gives ~0 on a bright sheet.
    iso = (1.0, 1.0, 1.0)
    shape = (32, 32, 32)
    c = tuple(n // 2 for n in shape)
    sheet = _sheet(shape, iso, (1, 0, 0), width_um=1.5)
    fr = frangi(sheet, sigmas=[2], black_ridges=False)
    ours = hs.sheet_measure(sheet, sigma_um=2.0, voxel_um=iso)
    assert fr[c] < 0.01 * fr.max() + 1e-6 or fr.max() < 1e-3
    assert ours[c] > 0.3 * ours.max() and ours.max() > 0.1


def test_sheet_normal_z2_matches_numpy_eigenvectors():
    rng = np.random.default_rng(4)
    m = _random_symmetric(20_000, rng).astype(np.float32)
    el = _elems(m)
    e = hs.eigvalsh3(*el)
    got = hs.sheet_normal_z2(tuple(el), *e)
    w, v = np.linalg.eigh(m.astype(np.float64))
    big = np.argmax(np.abs(w), axis=1)
    ref = v[np.arange(len(m)), 0, big] ** 2  # axis 0 of (z, y, x) is z
    gap = np.sort(np.abs(w), axis=1)
    ok = (gap[:, 2] - gap[:, 1]) > 0.05 * gap[:, 2]  # well-separated largest eigenvalue
    np.testing.assert_allclose(got[ok], ref[ok], atol=2e-3)


@pytest.mark.parametrize("mode", ["nearest", "constant"])
def test_chunked_equals_whole_array(mode):
    rng = np.random.default_rng(5)
    shape = (36, 90, 50)
    vol = (rng.normal(size=shape) + _sheet(shape, VOXEL, (1, 0.3, 0), amp=3.0)).astype(np.float32)
    sigma = 8.0
    depth = hs.halo_voxels(sigma, VOXEL)

    def f(b):
        return hs.sheet_measure(b, sigma_um=sigma, voxel_um=VOXEL, mode=mode)

    whole = f(vol)
    arr = da.from_array(vol, chunks=(12, 30, 17))
    chunked = arr.map_overlap(f, depth=depth, boundary="none", dtype=np.float32).compute()
    np.testing.assert_array_equal(chunked, whole)
    # ... and a halo short of the Gaussian's reach does not.
    short = arr.map_overlap(f, depth=(1, 1, 1), boundary="none", dtype=np.float32).compute()
    assert np.abs(short - whole).max() > 1e-3


def test_sigma_voxels_floor_and_halo():
    assert hs.sigma_voxels(4.0, VOXEL) == pytest.approx((4 / 6.8, 1.6, hs.MIN_SIGMA_VOX))
    assert hs.halo_voxels(8.0, VOXEL) == (7, 15, 6)  # ceil(4 sigma_vox) + 2


def test_input_not_modified():
    rng = np.random.default_rng(6)
    vol = rng.normal(size=(16, 20, 24)).astype(np.float32)
    before = vol.copy()
    hs.sheet_measure(vol, sigma_um=4.0, voxel_um=VOXEL)
    hs.line_measure(vol, sigma_um=4.0, voxel_um=VOXEL, mode="constant")
    np.testing.assert_array_equal(vol, before)


def test_bad_mode_and_shape():
    with pytest.raises(ValueError, match="mode"):
        hs.hessian_um(np.zeros((4, 4, 4)), sigma_um=1.0, voxel_um=(1, 1, 1), mode="wrap")
    with pytest.raises(ValueError, match="3D"):
        hs.hessian_um(np.zeros((4, 4)), sigma_um=1.0, voxel_um=(1, 1, 1))

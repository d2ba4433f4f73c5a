"""Hessian kernels on one block: scale-normalised Hessian in micrometres, closed-form 3x3
eigenvalues, and the sheet (plate) and line measures built from them.

Everything here is a pure NumPy function on one in-memory array (axes z, y, x) in float32; the
chunked drivers live in :mod:`pipeline.segment`.

Conventions
-----------
- ``voxel_um = (dz, dy, dx)``: voxels may be anisotropic. Derivatives are taken in micrometres,
  so eigenvectors are physical directions and a sheet inclined 54.7 deg stays inclined 54.7 deg.
- The Gaussian scale is given in micrometres and converted per axis to voxels; scales below
  :data:`MIN_SIGMA_VOX` voxels are raised to it (a Gaussian of 0.4 voxel has weights
  [0.04, 0.92, 0.04] and smooths nothing, so the second differences would be pure noise).
- The Hessian is scale-normalised by ``sigma_um**2`` (Lindeberg 1998, "Feature detection with
  automatic scale selection", IJCV 30, 79-116, gamma = 1), so responses at different scales share
  the intensity unit.
- Eigenvalues are returned in decreasing order ``e1 >= e2 >= e3`` (the order of
  ``skimage.feature.hessian_matrix_eigvals``).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage as ndi

#: Smallest Gaussian scale per axis, voxels (see the module notes).
MIN_SIGMA_VOX = 0.5
#: Gaussian kernel radius in sigmas (scipy's default).
TRUNCATE = 4.0
#: Frangi et al. (1998) plate-vs-line weight alpha (their default 0.5).
FRANGI_ALPHA = 0.5
#: Sato et al. (1998) weight of a positive third eigenvalue (their alpha = 0.25) [from memory].
SATO_ALPHA = 0.25
#: Voxels per slab for the eigenvalue step (bounds its temporaries to a few MB).
SLAB_VOXELS = 1 << 20


def slabs(shape: tuple[int, ...]) -> list[slice]:
    """Slices along axis 0 of about :data:`SLAB_VOXELS` voxels each."""
    step = max(1, SLAB_VOXELS // max(1, int(np.prod(shape[1:]))))
    return [slice(i, min(i + step, shape[0])) for i in range(0, shape[0], step)]


def sigma_voxels(sigma_um: float, voxel_um: tuple[float, float, float]) -> tuple[float, float, float]:
    """Gaussian scale per axis in voxels for a scale ``sigma_um`` on voxels ``voxel_um``.

    Parameters
    ----------
    sigma_um : float
        Scale in micrometres (> 0).
    voxel_um : (dz, dy, dx)
        Voxel size in micrometres.

    Returns
    -------
    (sz, sy, sx) : tuple of float
        ``max(sigma_um / d, MIN_SIGMA_VOX)`` per axis.
    """
    return tuple(max(float(sigma_um) / float(d), MIN_SIGMA_VOX) for d in voxel_um)  # type: ignore[return-value]


def halo_voxels(sigma_um: float, voxel_um: tuple[float, float, float]) -> tuple[int, int, int]:
    """Voxels a Hessian at ``sigma_um`` reads beyond an output voxel, per axis.

    ``ceil(TRUNCATE * sigma_vox) + 2``: the Gaussian's radius plus the second-difference stencil
    (1) plus one spare; the reach was verified by comparing chunked with whole-array results
    (tests/test_hessian.py), as in the project's Dask notes (ECOSYSTEM.md 3.1).
    """
    return tuple(int(math.ceil(TRUNCATE * s)) + 2 for s in sigma_voxels(sigma_um, voxel_um))  # type: ignore[return-value]


def hessian_um(
    volume: np.ndarray, *, sigma_um: float, voxel_um: tuple[float, float, float],
    mode: str = "nearest",
) -> tuple[np.ndarray, ...]:
    """Scale-normalised Hessian of a volume in micrometres.

    Gaussian smoothing (per-axis scale in voxels) followed by central second
    differences divided by the voxel sizes; multiplied by ``sigma_um**2``.

    Parameters
    ----------
    volume : ndarray, shape (nz, ny, nx)
        Intensity; computed in float32.
    sigma_um : float
        Gaussian scale, um.
    voxel_um : (dz, dy, dx)
        Voxel size, um.
    mode : {"nearest", "constant"}
        Extension beyond the array: ``"nearest"`` repeats the border (for intensities);
        ``"constant"`` extends with 0 (for zero-mean residuals: repeating a noisy border plane
        makes streaks perpendicular to it that respond like sheets and lines, with responses
        up to 4x the interior noise maximum in our tests).

    Returns
    -------
    (hzz, hzy, hzx, hyy, hyx, hxx) : tuple of float32 ndarray, shape (nz, ny, nx)
        Upper-triangle Hessian entries, intensity units (scale-normalised).

    Notes
    -----
    Central second differences ``f[i+1] - 2 f[i] + f[i-1]`` are exact on quadratics, and
    Gaussian smoothing leaves the second derivatives of a quadratic unchanged, so on a quadratic
    volume the result equals the analytic Hessian away from the borders (tested). scikit-image's
    ``hessian_matrix(use_gaussian_derivatives=False)`` applies ``np.gradient`` twice instead
    (a 5-point stencil on every axis), which is also exact on quadratics.
    """
    vol = np.asarray(volume, dtype=np.float32)
    if vol.ndim != 3:
        raise ValueError(f"volume must be 3D (z, y, x), got shape {vol.shape}")
    dz, dy, dx = (float(d) for d in voxel_um)
    s2 = float(sigma_um) ** 2
    sig = sigma_voxels(sigma_um, voxel_um)
    if mode == "constant":
        # Zero extension: smooth the volume padded by one zero voxel, so the stencil's outer
        # neighbours are the smoothed zero extension too.
        gp = ndi.gaussian_filter(np.pad(vol, 1), sig, mode="constant", cval=0.0, truncate=TRUNCATE)
        g = gp[1:-1, 1:-1, 1:-1]
    elif mode == "nearest":
        g = ndi.gaussian_filter(vol, sig, mode="nearest", truncate=TRUNCATE)
        gp = np.pad(g, 1, mode="edge")
    else:
        raise ValueError(f"mode must be 'nearest' or 'constant', got {mode!r}")
    c = slice(1, -1)
    lo, hi = slice(None, -2), slice(2, None)

    def second(ax_slices_hi, ax_slices_lo, scale):
        out = gp[ax_slices_hi] + gp[ax_slices_lo]
        out -= g
        out -= g
        out *= np.float32(scale)
        return out

    def mixed(pp, pm, mp, mm, scale):
        out = gp[pp] - gp[pm]
        out -= gp[mp]
        out += gp[mm]
        out *= np.float32(scale)
        return out

    hzz = second((hi, c, c), (lo, c, c), s2 / dz**2)
    hyy = second((c, hi, c), (c, lo, c), s2 / dy**2)
    hxx = second((c, c, hi), (c, c, lo), s2 / dx**2)
    hzy = mixed((hi, hi, c), (hi, lo, c), (lo, hi, c), (lo, lo, c), s2 / (4 * dz * dy))
    hzx = mixed((hi, c, hi), (hi, c, lo), (lo, c, hi), (lo, c, lo), s2 / (4 * dz * dx))
    hyx = mixed((c, hi, hi), (c, hi, lo), (c, lo, hi), (c, lo, lo), s2 / (4 * dy * dx))
    return hzz, hzy, hzx, hyy, hyx, hxx


def eigvalsh3(
    a: np.ndarray, b: np.ndarray, c: np.ndarray, d: np.ndarray, e: np.ndarray, f: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Eigenvalues of symmetric 3x3 matrices ``[[a, b, c], [b, d, e], [c, e, f]]``, vectorised.

    Closed-form trigonometric solution of the characteristic cubic (Smith 1961, "Eigenvalues of
    a symmetric 3 x 3 matrix", Commun. ACM 4(4), 168; numerical discussion in Kopp 2008,
    "Efficient numerical diagonalization of hermitian 3x3 matrices", Int. J. Mod. Phys. C 19,
    523): with ``q = tr/3``, ``p = sqrt(tr((A - qI)^2) / 6)``, ``r = det((A - qI) / p) / 2``,
    ``phi = acos(r) / 3``: ``e1 = q + 2p cos(phi)``, ``e3 = q + 2p cos(phi + 2 pi / 3)``,
    ``e2 = 3q - e1 - e3``.

    Parameters
    ----------
    a, b, c, d, e, f : ndarray (same shape)
        Entries (for a Hessian in (z, y, x): zz, zy, zx, yy, yx, xx).

    Returns
    -------
    (e1, e2, e3) : tuple of float32 ndarray
        Eigenvalues in decreasing order.

    Notes
    -----
    Computed in float32. The absolute error is about 1e-6 of the matrix norm in general and
    about 3e-4 of it for nearly degenerate pairs (the arccos is ill-conditioned near r = +-1);
    tests compare against ``numpy.linalg.eigvalsh``. We keep it because it beats
    ``skimage.feature.hessian_matrix_eigvals`` (a batched LAPACK ``eigvalsh``) by several times
    in ``crackstack bench`` (row ``eigvals_speedup``).
    """
    f32 = np.float32
    a, b, c, d, e, f = (np.asarray(v, dtype=f32) for v in (a, b, c, d, e, f))
    q = a + d
    q += f
    q *= f32(1.0 / 3.0)
    am, dm, fm = a - q, d - q, f - q
    p1 = b * b
    p1 += c * c
    p1 += e * e
    p2 = am * am
    p2 += dm * dm
    p2 += fm * fm
    p2 += 2 * p1
    del p1
    p = np.sqrt(p2 * f32(1.0 / 6.0))
    del p2
    # det(A - qI) by cofactors along the first row.
    det = dm * fm
    det -= e * e
    det *= am
    t = b * fm
    t -= e * c
    t *= b
    det -= t
    t = b * e
    t -= dm * c
    t *= c
    det += t
    del t, am, dm, fm
    p3 = p * p
    p3 *= p
    p3 *= 2
    with np.errstate(divide="ignore", invalid="ignore"):
        r = np.divide(det, p3, out=np.zeros_like(det), where=p3 > 0)
    del det, p3
    np.clip(r, -1.0, 1.0, out=r)
    phi = np.arccos(r)
    phi *= f32(1.0 / 3.0)
    p *= 2
    e1 = np.cos(phi)
    e1 *= p
    e1 += q
    phi += f32(2.0 * np.pi / 3.0)
    e3 = np.cos(phi)
    e3 *= p
    e3 += q
    e2 = q * 3
    e2 -= e1
    e2 -= e3
    return e1, e2, e3


def sheet_from_eigs(
    e1: np.ndarray, e2: np.ndarray, e3: np.ndarray, *, signed: bool = False, alpha: float = FRANGI_ALPHA
) -> np.ndarray:
    """Plate (sheet) measure from Hessian eigenvalues ``e1 >= e2 >= e3``.

    With the eigenvalues sorted by magnitude ``|l1| <= |l2| <= |l3|``, the plate-like variant of
    Frangi et al. (1998, "Multiscale vessel enhancement filtering", MICCAI, LNCS 1496, 130-137,
    doi:10.1007/BFb0056195), without the saturating structure term so that the response stays
    proportional to the contrast (thresholds are then set in noise sigmas):
    ``P = -l3 * exp(-(l2 / l3)^2 / (2 alpha^2))``, kept where ``l3 < 0`` (a bright sheet).
    A sheetness of this type is also used by Descoteaux et al. (2006, Comput. Aided Surg. 11, 247).

    Parameters
    ----------
    e1, e2, e3 : ndarray
        Eigenvalues in decreasing order.
    signed : bool
        False: bright sheets only (>= 0). True: bright minus dark sheets (dark ones, ``l3 > 0``,
        come out negative), whose noise distribution is symmetric about 0 so that a median
        absolute deviation measures its spread.
    alpha : float
        Plate-versus-line weight (Frangi's alpha).

    Returns
    -------
    ndarray, float32
    """
    big_is_e3 = np.abs(e3) >= np.abs(e1)
    big = np.where(big_is_e3, e3, e1)
    mid = np.where(big_is_e3, np.maximum(np.abs(e1), np.abs(e2)), np.maximum(np.abs(e2), np.abs(e3)))
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.divide(mid, big, out=np.zeros_like(mid), where=big != 0)
    ratio *= ratio
    ratio *= np.float32(-1.0 / (2.0 * alpha * alpha))
    out = np.exp(ratio)
    out *= -big
    if not signed:
        np.maximum(out, 0, out=out)
    return out.astype(np.float32, copy=False)


def _sato_bright(e1: np.ndarray, e2: np.ndarray, alpha: float) -> np.ndarray:
    # Sato et al. (1998) Eq. for bright lines with gamma12 = gamma23 = 1 (from memory): with
    # e3 <= e2 < 0, the response is |e2| + e1 when e1 <= 0 and |e2| - alpha e1 when e1 > 0;
    # it vanishes on sheets (e2 ~ 0) and on blobs (e1 ~ e2).
    out = np.where(e1 <= 0, -e2 + e1, -e2 - np.float32(alpha) * e1)
    out = np.where(e2 < 0, np.maximum(out, 0), 0)
    return out.astype(np.float32, copy=False)


def line_from_eigs(
    e1: np.ndarray, e2: np.ndarray, e3: np.ndarray, *, signed: bool = False, alpha: float = SATO_ALPHA
) -> np.ndarray:
    """Line (tube) measure from Hessian eigenvalues ``e1 >= e2 >= e3``.

    Sato et al. (1998), "Three-dimensional multi-scale line filter for segmentation and
    visualization of curvilinear structures in medical images", Med. Image Anal. 2, 143-168,
    doi:10.1016/S1361-8415(98)80009-1, with gamma12 = gamma23 = 1 [form from memory]:
    bright lines need ``e3 <= e2 < 0``; the response is ``-e2 + e1`` for ``e1 <= 0`` and
    ``-e2 - alpha * e1`` for ``e1 > 0`` (clipped at 0). Linear in the contrast; zero on a
    sheet (``e2 ~ 0``) and on a blob (``e1 ~ e2``).

    Parameters
    ----------
    e1, e2, e3 : ndarray
        Eigenvalues in decreasing order.
    signed : bool
        True: bright minus dark lines (the dark measure is the bright one of ``-H``).
    alpha : float
        Weight of a positive ``e1`` (Sato's alpha).

    Returns
    -------
    ndarray, float32
    """
    bright = _sato_bright(e1, e2, alpha)
    if not signed:
        return bright
    # Eigenvalues of -H in decreasing order are (-e3, -e2, -e1).
    dark = _sato_bright(-e3, -e2, alpha)
    bright -= dark
    return bright


def sheet_normal_z2(
    h: tuple[np.ndarray, ...], e1: np.ndarray, e2: np.ndarray, e3: np.ndarray
) -> np.ndarray:
    """Squared z component of the unit normal of the sheet (the eigenvector of the eigenvalue
    with the largest magnitude).

    From the spectral projector ``P_k = prod_{j != k} (H - e_j I) / (e_k - e_j)``:
    ``n_z^2 = [(H - e_a I)(H - e_b I)]_zz / ((e_k - e_a)(e_k - e_b))`` with
    ``[(H - e_a)(H - e_b)]_zz = (h_zz - e_a)(h_zz - e_b) + h_zy^2 + h_zx^2``.
    Three multiplications per voxel instead of an eigenvector solve; 0 where the largest
    eigenvalue is degenerate (then the voxel is no sheet anyway).

    Parameters
    ----------
    h : (hzz, hzy, hzx, hyy, hyx, hxx)
        Hessian entries.
    e1, e2, e3 : ndarray
        Eigenvalues in decreasing order.

    Returns
    -------
    ndarray, float32, in [0, 1]
    """
    hzz, hzy, hzx = h[0], h[1], h[2]
    big_is_e3 = np.abs(e3) >= np.abs(e1)
    ek = np.where(big_is_e3, e3, e1)
    ea = e2
    eb = np.where(big_is_e3, e1, e3)
    num = (hzz - ea) * (hzz - eb)
    num += hzy * hzy
    num += hzx * hzx
    den = (ek - ea) * (ek - eb)
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.divide(num, den, out=np.zeros_like(num), where=den > 0)
    np.clip(out, 0.0, 1.0, out=out)
    return out


def sheet_measure(
    volume: np.ndarray, *, sigma_um: float, voxel_um: tuple[float, float, float], signed: bool = False,
    mode: str = "nearest",
) -> np.ndarray:
    """Plate (sheet) response of one block at one scale (see :func:`sheet_from_eigs`).

    Parameters
    ----------
    volume : ndarray, shape (nz, ny, nx)
        Intensity (bright sheets on a darker background give positive values).
    sigma_um : float
        Gaussian scale, um.
    voxel_um : (dz, dy, dx)
        Voxel size, um.
    signed : bool
        Bright minus dark sheets (for noise statistics).
    mode : {"nearest", "constant"}
        Extension beyond the array (see :func:`hessian_um`).

    Returns
    -------
    ndarray, float32, shape (nz, ny, nx)
        Intensity units (scale-normalised Hessian).
    """
    h = hessian_um(volume, sigma_um=sigma_um, voxel_um=voxel_um, mode=mode)
    out = np.empty(h[0].shape, np.float32)
    for sl in slabs(out.shape):
        out[sl] = sheet_from_eigs(*eigvalsh3(*(c[sl] for c in h)), signed=signed)
    return out


def line_measure(
    volume: np.ndarray, *, sigma_um: float, voxel_um: tuple[float, float, float], signed: bool = False,
    mode: str = "nearest",
) -> np.ndarray:
    """Line (tube) response of one block at one scale (see :func:`line_from_eigs`).

    Parameters
    ----------
    volume : ndarray, shape (nz, ny, nx)
        Intensity (bright lines give positive values).
    sigma_um : float
        Gaussian scale, um.
    voxel_um : (dz, dy, dx)
        Voxel size, um.
    signed : bool
        Bright minus dark lines (for noise statistics).
    mode : {"nearest", "constant"}
        Extension beyond the array (see :func:`hessian_um`).

    Returns
    -------
    ndarray, float32, shape (nz, ny, nx)
    """
    h = hessian_um(volume, sigma_um=sigma_um, voxel_um=voxel_um, mode=mode)
    out = np.empty(h[0].shape, np.float32)
    for sl in slabs(out.shape):
        out[sl] = line_from_eigs(*eigvalsh3(*(c[sl] for c in h)), signed=signed)
    return out


def sheet_normal_lateral(
    h: tuple[np.ndarray, ...], e1: np.ndarray, e2: np.ndarray, e3: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Lateral entries ``(P_yy, P_yx, P_xx)`` of the projector ``n n^T`` on the sheet normal
    (the eigenvector of the eigenvalue with the largest magnitude), so that the squared
    component of the normal along a lateral unit vector ``e = (e_y, e_x)`` is
    ``e_y^2 P_yy + 2 e_y e_x P_yx + e_x^2 P_xx``.

    The same spectral projector as :func:`sheet_normal_z2`:
    ``P = (H - e_a I)(H - e_b I) / ((e_k - e_a)(e_k - e_b))``, with
    ``[(H - a)(H - b)]_ij = (H^2)_ij - (a + b) H_ij + a b delta_ij``. 0 where the largest
    eigenvalue is degenerate.

    Parameters
    ----------
    h : (hzz, hzy, hzx, hyy, hyx, hxx)
        Hessian entries.
    e1, e2, e3 : ndarray
        Eigenvalues in decreasing order.

    Returns
    -------
    (pyy, pyx, pxx) : tuple of float32 ndarray
    """
    _, hzy, hzx, hyy, hyx, hxx = h
    big_is_e3 = np.abs(e3) >= np.abs(e1)
    ek = np.where(big_is_e3, e3, e1)
    ea = e2
    eb = np.where(big_is_e3, e1, e3)
    s, prod = ea + eb, ea * eb
    den = (ek - ea) * (ek - eb)
    ok = den > 0
    yy = hzy * hzy + hyy * hyy + hyx * hyx - s * hyy + prod
    xx = hzx * hzx + hyx * hyx + hxx * hxx - s * hxx + prod
    yx = hzy * hzx + hyy * hyx + hyx * hxx - s * hyx
    out = []
    for num in (yy, yx, xx):
        with np.errstate(divide="ignore", invalid="ignore"):
            out.append(np.divide(num, den, out=np.zeros_like(num), where=ok).astype(np.float32))
    np.clip(out[0], 0.0, 1.0, out=out[0])
    np.clip(out[2], 0.0, 1.0, out=out[2])
    return out[0], out[1], out[2]

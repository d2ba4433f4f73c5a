"""Section-topography geometry (SPEC section 5): Bragg angle, depth magnification and the map
between wafer coordinates (x, y, z in um) and detector coordinates (frame, row, column).

Conventions
-----------
- Wafer frame: x along the scan (the stage steps along +x), y along the slit, z depth below the
  entrance surface. The incident beam makes ``psi0`` with +z, leaning toward +x, so the ribbon of
  frame k sits at ``x = X_k + z tan(psi0)``.
- A wafer point at lateral offset ``D = x - X_k - z tan(psi0)`` from the ribbon centre of frame k
  lands at ``r = r0_k + y / p_row`` and ``c = c0_k + (z G + D L) / p_col``.
- All public functions are vectorised over NumPy arrays (broadcasting).

References
----------
Bragg's law and the cubic d-spacing: any crystallography text, e.g. International Tables for
Crystallography Vol. C. The symmetric-Laue section width 2 t sin(theta_B) follows Lang (1959),
J. Appl. Phys. 30, 1748, and Authier (2001), Dynamical Theory of X-ray Diffraction, ch. 5.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from pipeline.config import HC_KEV_A, SI_LATTICE_A, Acquisition
from pipeline.errors import InputError


def wavelength_A(energy_keV: float | np.ndarray) -> float | np.ndarray:
    """Photon wavelength in angstrom, ``lambda = hc / E``."""
    return HC_KEV_A / np.asarray(energy_keV, float)


def d_spacing_A(hkl: tuple[int, int, int], lattice_A: float = SI_LATTICE_A) -> float:
    """Cubic lattice-plane spacing ``d = a / sqrt(h^2 + k^2 + l^2)`` in angstrom."""
    h, k, l = hkl
    return lattice_A / math.sqrt(h * h + k * k + l * l)


def bragg_angle_deg(
    hkl: tuple[int, int, int], energy_keV: float, lattice_A: float = SI_LATTICE_A
) -> float:
    """Bragg angle ``theta_B = asin(lambda / 2d)`` in degrees.

    Raises
    ------
    ValueError
        When ``lambda >= 2d`` (the energy is below the reflection's cut-off).
    """
    s = float(wavelength_A(energy_keV)) / (2.0 * d_spacing_A(hkl, lattice_A))
    if not 0 < s < 1:
        raise ValueError(
            f"no Bragg reflection {list(hkl)} at {energy_keV} keV: lambda/2d = {s:.4f} must be < 1"
        )
    return math.degrees(math.asin(s))


def depth_magnification(theta_B_deg: float, psi0_deg: float, tilt_deg: float = 0.0) -> float:
    """Depth magnification ``G = sin(2 theta_B) / (cos(psi0) cos(delta))``, detector um per um
    of depth. In the symmetric Laue case (psi0 = theta_B, delta = 0) this is ``2 sin(theta_B)``.
    """
    tb, p0, dl = (math.radians(v) for v in (theta_B_deg, psi0_deg, tilt_deg))
    return math.sin(2 * tb) / (math.cos(p0) * math.cos(dl))


@dataclass(frozen=True)
class Geometry:
    """Everything needed to map wafer points to detector pixels for one acquisition.

    Attributes are in degrees and micrometres; ``G`` and ``L`` are dimensionless.
    """

    geometry: str
    energy_keV: float
    wavelength_A: float
    d_A: float
    theta_B_deg: float
    psi0_deg: float
    psi_h_deg: float
    tilt_deg: float
    G: float
    G_computed: float
    L: float
    p_row_um: float
    p_col_um: float
    thickness_um: float
    slit_width_um: float

    @property
    def tan_psi0(self) -> float:
        return math.tan(math.radians(self.psi0_deg))

    @property
    def band_width_px(self) -> float:
        """Width of the section band on the detector, columns: ``t G / p_col``."""
        return self.thickness_um * self.G / self.p_col_um

    @property
    def depth_per_column_um(self) -> float:
        """Natural depth sampling: um of depth per detector column (``p_col / G``)."""
        return self.p_col_um / self.G

    @property
    def ribbon_blur_um(self) -> float:
        """Blur of the ribbon-centre approximation along the diffracted direction,
        ``w / sin(2 theta_B)`` (SPEC section 5)."""
        return self.slit_width_um / math.sin(2 * math.radians(self.theta_B_deg))

    @classmethod
    def from_acquisition(cls, acq: Acquisition) -> Geometry:
        """Build the geometry of an acquisition; inconsistent angles raise :class:`InputError`."""
        beam, det = acq.beam, acq.detector
        lam = beam.wavelength
        d = d_spacing_A(beam.reflection, acq.sample.lattice_A)
        try:
            tb = bragg_angle_deg(beam.reflection, HC_KEV_A / lam, acq.sample.lattice_A)
        except ValueError as exc:
            raise InputError(f"beam: {exc}") from None
        if beam.geometry == "transmission":
            psi0 = tb if beam.incidence_deg is None else beam.incidence_deg
            psi_h = psi0 - 2 * tb if beam.exit_deg is None else beam.exit_deg
            if not -90 < psi_h < 90:
                raise InputError(
                    f"beam.exit_deg: the diffracted beam at {psi_h:.2f} deg from +z does not leave "
                    "through the exit surface; transmission (Laue) needs -90 < psi_h < 90"
                )
        else:
            psi0 = beam.incidence_deg
            psi_h = psi0 + 2 * tb if beam.exit_deg is None else beam.exit_deg
            if not abs(psi_h) > 90:
                raise InputError(
                    f"beam.incidence_deg: with psi0 = {psi0} deg the diffracted beam "
                    f"({psi_h:.2f} deg from +z) does not leave through the entrance surface; "
                    "reflection (Bragg) needs |psi0 + 2 theta_B| > 90"
                )
        g_calc = depth_magnification(tb, psi0, det.tilt_deg)
        s = math.copysign(1.0, math.sin(math.radians(psi0 - psi_h)))
        L = s * math.cos(math.radians(psi_h)) / math.cos(math.radians(det.tilt_deg))
        return cls(
            geometry=beam.geometry,
            energy_keV=HC_KEV_A / lam,
            wavelength_A=lam,
            d_A=d,
            theta_B_deg=tb,
            psi0_deg=psi0,
            psi_h_deg=psi_h,
            tilt_deg=det.tilt_deg,
            G=det.depth_magnification or g_calc,
            G_computed=g_calc,
            L=L,
            p_row_um=det.pixel_um[0],
            p_col_um=det.pixel_um[1],
            thickness_um=acq.sample.thickness_um,
            slit_width_um=beam.slit_width_um,
        )

    # --- the exact projection of SPEC section 5 -------------------------------------------

    def project(
        self,
        x_um: np.ndarray,
        y_um: np.ndarray,
        z_um: np.ndarray,
        X_k_um: np.ndarray,
        r0_k: np.ndarray = 0.0,
        c0_k: np.ndarray = 0.0,
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Project wafer points into the frame whose ribbon is at stage position ``X_k_um``.

        Returns
        -------
        row, col : ndarray
            Detector coordinates, pixels (after the acquisition's orientation is applied).
        D_um : ndarray
            Lateral offset from the ribbon centre, um; the slit profile's weight is taken there.
        """
        x, y, z = (np.asarray(v, float) for v in (x_um, y_um, z_um))
        D = x - X_k_um - z * self.tan_psi0
        row = r0_k + y / self.p_row_um
        col = c0_k + (z * self.G + D * self.L) / self.p_col_um
        return row, col, D

    def wafer_to_detector(
        self,
        x_um: np.ndarray,
        y_um: np.ndarray,
        z_um: np.ndarray,
        positions_um: np.ndarray,
        r0: np.ndarray | None = None,
        c0: np.ndarray | None = None,
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Forward map voxel -> (fractional frame, row, column) in the ribbon-centre sense.

        The frame index is where the ribbon passes through the point (``D = 0``), found by
        linear interpolation of the stage positions; the frame origins ``r0, c0`` (per frame,
        default 0) are interpolated at that fractional index.
        """
        x, y, z = (np.asarray(v, float) for v in (x_um, y_um, z_um))
        pos = np.asarray(positions_um, float)
        idx = np.arange(pos.size, dtype=float)
        sign = 1.0 if pos[-1] > pos[0] else -1.0
        X = x - z * self.tan_psi0
        k = _interp_extrap(sign * X, sign * pos, idx)
        r0k = 0.0 if r0 is None else _interp_extrap(k, idx, np.asarray(r0, float))
        c0k = 0.0 if c0 is None else _interp_extrap(k, idx, np.asarray(c0, float))
        row = r0k + y / self.p_row_um
        col = c0k + z * self.G / self.p_col_um
        return k, row, col

    def detector_to_wafer(
        self,
        frame: np.ndarray,
        row: np.ndarray,
        col: np.ndarray,
        positions_um: np.ndarray,
        r0: np.ndarray | None = None,
        c0: np.ndarray | None = None,
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Inverse of :meth:`wafer_to_detector`: (fractional frame, row, column) -> (x, y, z) um."""
        k, r, c = (np.asarray(v, float) for v in (frame, row, col))
        pos = np.asarray(positions_um, float)
        idx = np.arange(pos.size, dtype=float)
        r0k = 0.0 if r0 is None else _interp_extrap(k, idx, np.asarray(r0, float))
        c0k = 0.0 if c0 is None else _interp_extrap(k, idx, np.asarray(c0, float))
        z = (c - c0k) * self.p_col_um / self.G
        y = (r - r0k) * self.p_row_um
        x = _interp_extrap(k, idx, pos) + z * self.tan_psi0
        return x, y, z


def _interp_extrap(x: np.ndarray, xp: np.ndarray, fp: np.ndarray) -> np.ndarray:
    """Piecewise-linear interpolation with linear extrapolation beyond both ends."""
    x = np.asarray(x, float)
    out = np.interp(x, xp, fp)
    if xp.size >= 2:
        lo, hi = x < xp[0], x > xp[-1]
        out = np.where(lo, fp[0] + (x - xp[0]) * (fp[1] - fp[0]) / (xp[1] - xp[0]), out)
        out = np.where(hi, fp[-1] + (x - xp[-1]) * (fp[-1] - fp[-2]) / (xp[-1] - xp[-2]), out)
    return out


def natural_voxel_um(geom: Geometry, step_um: float) -> tuple[float, float, float]:
    """Natural sampling ``(dz, dy, dx)``: one detector column in depth, one row along y, one
    scan step along x."""
    return (geom.depth_per_column_um, geom.p_row_um, abs(step_um))


#: Newton steps (at most) of the nearest point on an ellipse, from t = 0. Checked in
#: tests/test_geometry.py to 1e-6 of the larger semi-axis for semi-axes 1-500 um (any ratio)
#: and points up to three semi-axes out.
ELLIPSE_NEWTON_STEPS = 40


def ellipse_outside_d2(y0: np.ndarray, y1: np.ndarray, a: float, c: float) -> np.ndarray:
    """Squared distance from points ``(y0, y1)`` (semi-axes ``a`` along y0, ``c`` along y1) to
    the ellipse, 0 inside it.

    The nearest point of the ellipse to an outside point p is ``x_i = e_i^2 p_i / (t + e_i^2)``
    with ``t > 0`` the root of ``F(t) = sum (e_i p_i / (t + e_i^2))^2 - 1`` (the Lagrange
    condition of the nearest point; Eberly 2011, "Distance from a point to an ellipse, an
    ellipsoid, or a hyperellipsoid", Geometric Tools). ``F`` is convex and falls from
    ``F(0) > 0``, so Newton's method from ``t = 0`` approaches the root from below, monotonically.
    """
    y0, y1 = np.abs(y0), np.abs(y1)
    out = np.zeros(np.broadcast(y0, y1).shape)
    y0, y1 = np.broadcast_to(y0, out.shape), np.broadcast_to(y1, out.shape)
    sel = (y0 / a) ** 2 + (y1 / c) ** 2 > 1.0
    if not sel.any():
        return out
    p0, p1 = y0[sel], y1[sel]
    a2, c2 = a * a, c * c
    t = np.zeros(p0.shape)
    for _ in range(ELLIPSE_NEWTON_STEPS):
        f0, f1 = a * p0 / (t + a2), c * p1 / (t + c2)
        f = f0 * f0 + f1 * f1 - 1.0
        df = -2.0 * (f0 * f0 / (t + a2) + f1 * f1 / (t + c2))
        step = f / df
        t = t - step
        if np.all(np.abs(step) <= 1e-9 * (t + a2 + c2)):
            break
    out[sel] = (p0 - a2 * p0 / (t + a2)) ** 2 + (p1 - c2 * p1 / (t + c2)) ** 2
    return out

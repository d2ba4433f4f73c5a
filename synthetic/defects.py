"""Defect geometry of a scenario: contrast primitives for the renderer and the exact ground truth.

Every scenario defect expands into one or more *primitives*: a local orthonormal frame (three
rows ``axes`` at ``center``), a bounding box in that frame (``lo``, ``hi``, um, halo included),
and a contrast field evaluated on local coordinates. The shapes:

- ``sheet``: a crack patch in the plane of ``axes[0]`` (into the wafer from the mouth) and
  ``axes[1]`` (along the mouth), normal ``axes[2]``: semi-, quarter- or full ellipse with
  semi-axes ``a`` (along axes[0]) and ``c`` (along axes[1]), or a through-thickness band.
- ``circle`` / ``hexagon``: a dislocation loop in the plane of axes[0..1] (a tube).
- ``lines``: parallel straight dislocation lines along axes[0], spaced along axes[1] (slip band).
- ``blob``: a point defect (Gaussian); ``zone``: the damaged zone of an indent (a ball).

Contrast of a feature at distance ``d`` from its core: ``A exp(-d^2 / 2 s^2) + H exp(-d / h)``
(a sharp core plus a strain halo that decays with distance), in units of the perfect-crystal band.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from pipeline import crystal as cx
from pipeline.errors import InputError
from pipeline.geometry import ellipse_outside_d2
from synthetic.scenario import (
    CrackSpec,
    FeatureContrast,
    IndentSpec,
    LoopSpec,
    PointSpec,
    Scenario,
    SlipBandSpec,
)

_Z = np.array([0.0, 0.0, 1.0])
#: halo reach kept in the bounding boxes, in decay lengths (exp(-4.5) = 1.1 % of the halo)
_HALO_REACH = 4.5
#: core reach kept, in core sigmas (exp(-4.5^2/2) ~ 4e-5 of the core)
_CORE_REACH = 4.5


@dataclass(frozen=True)
class Primitive:
    """One contrast primitive (see the module docstring)."""

    kind: str
    center: np.ndarray
    axes: np.ndarray
    lo: np.ndarray
    hi: np.ndarray
    amplitude: float
    sigma_um: float
    halo: float
    halo_um: float
    params: dict = field(default_factory=dict)
    #: evaluate depth attenuation and the wafer mask at the centre (point defects), not per sample
    point_like: bool = False
    label: str = ""

    def vertices(self) -> np.ndarray:
        """The 8 corners of the bounding box in the wafer frame, (8, 3) um."""
        corners = np.array(
            [
                [(self.lo, self.hi)[i][0], (self.lo, self.hi)[j][1], (self.lo, self.hi)[m][2]]
                for i in (0, 1)
                for j in (0, 1)
                for m in (0, 1)
            ]
        )
        return self.center + corners @ self.axes

    def field(self, u: np.ndarray, v: np.ndarray, w: np.ndarray) -> np.ndarray:
        """Contrast at local coordinates ``(u, v, w)`` (along axes[0], axes[1], axes[2]), um."""
        k = self.kind
        p = self.params
        if k == "sheet":
            d2 = _sheet_d2(u, v, w, p["a"], p["c"], p["shape"])
        elif k == "circle":
            rho = np.sqrt(u * u + v * v)
            d2 = w * w + (rho - p["radius"]) ** 2
        elif k == "hexagon":
            d2 = w * w + _hexagon_d2(u, v, p["radius"])
        elif k == "lines":
            return _lines_field(u, v, w, p, self)
        elif k == "blob":
            d2 = u * u + v * v + w * w
        elif k == "zone":
            r = np.sqrt(u * u + v * v + w * w)
            d2 = np.maximum(r - p["radius"], 0.0) ** 2
        else:  # pragma: no cover - kinds are fixed above
            raise ValueError(k)
        return _core_halo(d2, self.amplitude, self.sigma_um, self.halo, self.halo_um)


def _core_halo(d2, amp: float, sigma: float, halo: float, halo_um: float) -> np.ndarray:
    out = amp * np.exp(d2 * (-0.5 / sigma**2))
    if halo > 0:
        out += halo * np.exp(np.sqrt(d2) * (-1.0 / halo_um))
    return out


def _sheet_d2(u, v, w, a: float, c: float, shape: str) -> np.ndarray:
    """Squared distance to the crack patch: across the sheet (w), beyond the mouth line (u < 0,
    half and quarter ellipses), beyond the quarter ellipse's second straight side (v < 0) and
    to the elliptical front (exact nearest point, :func:`pipeline.geometry.ellipse_outside_d2`).

    The crack's own contrast (core and halo) is a function of this distance, so its strain
    field reaches equally far beyond every part of the front; an earlier radial approximation
    (distance along the ray from the ellipse's centre) shortened the reach at the flanks of a
    deep, narrow front by up to 1 um in the moment estimates of measure."""
    if shape == "through":
        dv = np.maximum(np.abs(v) - c, 0.0)
        return w * w + dv * dv
    uc = np.maximum(u, 0.0) if shape in ("semi_elliptical", "quarter_elliptical") else u
    vc = np.maximum(v, 0.0) if shape == "quarter_elliptical" else v
    return w * w + (u - uc) ** 2 + (v - vc) ** 2 + ellipse_outside_d2(uc, vc, a, c)


def _hexagon_d2(u, v, radius: float) -> np.ndarray:
    """Squared in-plane distance to a regular hexagon of corner radius ``radius`` whose edges
    face +-u (corners at 30 + 60 k deg from u toward v).

    Folds the point into one sector and measures to one edge (the exact hexagon distance of
    I. Quilez's distance-function notes, iquilezles.org "2D distance functions"), about 12 array
    passes instead of ~60 for six separate segment distances.
    """
    kx, ky, kz = -0.8660254037844386, 0.5, 0.5773502691896258
    r = radius * 0.8660254037844386  # apothem
    px, py = np.abs(v), np.abs(u)
    m = 2.0 * np.minimum(kx * px + ky * py, 0.0)
    px = px - m * kx
    py = py - m * ky
    px = px - np.clip(px, -kz * r, kz * r)
    py = py - r
    return px * px + py * py


def _lines_field(u, v, w, p: dict, prim: Primitive) -> np.ndarray:
    half = p["length"] / 2
    du = u - np.clip(u, -half, half)
    base = du * du + w * w
    out = None
    for off in p["offsets"]:
        f = _core_halo(
            base + (v - off) ** 2, prim.amplitude, prim.sigma_um, prim.halo, prim.halo_um
        )
        out = f if out is None else out + f
    return out


def _reach(fc: FeatureContrast) -> float:
    return max(_CORE_REACH * fc.sigma_um, _HALO_REACH * fc.halo_um if fc.halo > 0 else 0.0)


def _box(lo, hi) -> tuple[np.ndarray, np.ndarray]:
    return np.asarray(lo, float), np.asarray(hi, float)


# --- cracks ------------------------------------------------------------------------------------


@dataclass(frozen=True)
class CrackFrame:
    """Local frame of a crack: mouth centre ``m``; ``e_in`` into the wafer from the mouth (in the
    plane), ``e_len`` along the mouth (in the plane), ``n`` the plane normal."""

    m: np.ndarray
    e_in: np.ndarray
    e_len: np.ndarray
    n: np.ndarray
    start_normal: np.ndarray | None  # inward normal of the surface or edge the crack starts from


def _snap_to_edge(
    x: float, y: float, direction: np.ndarray, center: np.ndarray, R: float, where: str
) -> np.ndarray:
    """Point where the line through (x, y) along ``direction`` (horizontal) meets the edge,
    nearest to (x, y)."""
    d = direction[:2] / np.linalg.norm(direction[:2])
    p = np.array([x, y]) - center
    b = float(p @ d)
    disc = b * b - (float(p @ p) - R * R)
    if disc < 0:
        raise InputError(
            f"{where}: the crack's surface trace through ({x:g}, {y:g}) um misses the wafer edge; "
            "move position_um or change the plane"
        )
    taus = (-b - math.sqrt(disc), -b + math.sqrt(disc))
    tau = min(taus, key=abs)
    return center + p + tau * d


def crack_frame(spec: CrackSpec, scn: Scenario, R: np.ndarray, where: str) -> CrackFrame:
    """Build the local frame of a crack from its scenario entry (see the module docs)."""
    n = cx.unit(spec.plane.normal_wafer(R))
    t = scn.wafer.thickness_um
    x, y, z = spec.position_um
    trace = np.cross(_Z, n)
    has_trace = np.linalg.norm(trace) > 1e-9
    shape = spec.shape
    if spec.start == "edge":
        c = scn.wafer.center_um
        radial = np.array([x - c[0], y - c[1], 0.0])
        direction = trace if has_trace else radial
        mxy = _snap_to_edge(x, y, direction, c, scn.wafer.radius_um, where)
        nu = np.array([c[0] - mxy[0], c[1] - mxy[1], 0.0])
        nu /= np.linalg.norm(nu)
        e_len = np.cross(n, nu)
        if np.linalg.norm(e_len) < 1e-6:
            raise InputError(f"{where}: an edge crack cannot lie parallel to the wafer edge")
        e_len /= np.linalg.norm(e_len)
        if shape == "quarter_elliptical":
            if abs(e_len[2]) < 1e-6:
                raise InputError(
                    f"{where}: a quarter-elliptical (corner) crack needs a plane whose mouth leaves "
                    "the surface; this plane meets the edge along a horizontal line"
                )
            mz = 0.0 if spec.corner == "top" else t
            if (e_len[2] < 0) == (spec.corner == "top"):
                e_len = -e_len
        else:
            mz = z
            if e_len[2] < 0:
                e_len = -e_len
        m = np.array([mxy[0], mxy[1], mz])
        start_normal = nu
    elif spec.start in ("surface_top", "surface_bottom"):
        nu = _Z if spec.start == "surface_top" else -_Z
        if not has_trace:
            raise InputError(f"{where}: a crack from a surface cannot lie parallel to it")
        e_len = trace / np.linalg.norm(trace)
        m = np.array([x, y, 0.0 if spec.start == "surface_top" else t])
        start_normal = nu
    else:
        if spec.start == "through" and (not has_trace or abs(n[2]) > math.cos(math.radians(5))):
            raise InputError(
                f"{where}: a through crack must be inclined more than 5 deg to the surface"
            )
        e_len = trace / np.linalg.norm(trace) if has_trace else np.array([1.0, 0.0, 0.0])
        m = np.array([x, y, t / 2 if spec.start == "through" else z])
        nu = _Z
        start_normal = None
    e_in = np.cross(n, e_len)
    e_in /= np.linalg.norm(e_in)
    if float(e_in @ nu) < 0 or (abs(float(e_in @ nu)) < 1e-12 and e_in[2] < 0):
        e_in = -e_in
    return CrackFrame(m=m, e_in=e_in, e_len=e_len, n=n, start_normal=start_normal)


def _crack_local_extent(spec: CrackSpec, fr: CrackFrame, t: float) -> tuple[tuple, tuple]:
    """(u range, v range) of the patch in the crack frame, um (without halo)."""
    a = spec.a_um or 0.0
    c = spec.c_um
    shape = spec.shape
    if shape == "semi_elliptical":
        return (0.0, a), (-c, c)
    if shape == "quarter_elliptical":
        return (0.0, a), (0.0, c)
    if shape == "elliptical":
        return (-a, a), (-c, c)
    half = t / 2 / max(abs(float(fr.e_in[2])), 1e-6)
    return (-half, half), (-c, c)


def _inside_wafer(p: np.ndarray, scn: Scenario, tol: float = 1e-6) -> np.ndarray:
    t = scn.wafer.thickness_um
    c = scn.wafer.center_um
    r = np.hypot(p[:, 0] - c[0], p[:, 1] - c[1])
    return (p[:, 2] >= -tol) & (p[:, 2] <= t + tol) & (r <= scn.wafer.radius_um + tol)


def _crack_samples(spec: CrackSpec, fr: CrackFrame, scn: Scenario, n_grid: int = 241):
    """Area samples and front samples of the crack patch inside the wafer (wafer frame, um)."""
    t = scn.wafer.thickness_um
    (u0, u1), (v0, v1) = _crack_local_extent(spec, fr, t)
    uu, vv = np.meshgrid(np.linspace(u0, u1, n_grid), np.linspace(v0, v1, n_grid), indexing="ij")
    uu, vv = uu.ravel(), vv.ravel()
    shape = spec.shape
    a, c = spec.a_um or 1.0, spec.c_um
    if shape == "through":
        keep = np.abs(vv) <= c
    else:
        keep = (uu / a) ** 2 + (vv / c) ** 2 <= 1.0 + 1e-12
    uu, vv = uu[keep], vv[keep]
    area = fr.m + np.outer(uu, fr.e_in) + np.outer(vv, fr.e_len)
    # the front: the crack tip line inside the wafer
    if shape == "through":
        s = np.linspace(u0, u1, 400)
        fu = np.concatenate([s, s])
        fv = np.concatenate([np.full_like(s, -c), np.full_like(s, c)])
    else:
        phi = {
            "semi_elliptical": np.linspace(0, math.pi, 2001),
            "quarter_elliptical": np.linspace(0, math.pi / 2, 2001),
            "elliptical": np.linspace(0, 2 * math.pi, 2001)[:-1],
        }[shape]
        fu, fv = a * np.sin(phi), c * np.cos(phi)
    front = fr.m + np.outer(fu, fr.e_in) + np.outer(fv, fr.e_len)
    area_in = _inside_wafer(area, scn)
    front_in = _inside_wafer(front, scn)
    return area[area_in], (uu[area_in], vv[area_in]), front[front_in]


def _position(xy: np.ndarray, scn: Scenario) -> dict:
    c = scn.wafer.center_um
    dx, dy = float(xy[0] - c[0]), float(xy[1] - c[1])
    r = math.hypot(dx, dy)
    return {
        "r_mm": r / 1000.0,
        "angle_deg": math.degrees(math.atan2(dy, dx)) % 360.0,
        "distance_to_edge_um": scn.wafer.radius_um - r,
    }


def crack_truth(spec: CrackSpec, fr: CrackFrame, scn: Scenario, R: np.ndarray, where: str) -> dict:
    """The exact crack entry of the defect export (SPEC section 7; ``id`` set later).

    ``depth_um`` is the deepest reach normal to the surface or edge the crack starts from
    (internal cracks: their extent in z); ``length_um`` the extent along the mouth (internal and
    through cracks: along the surface trace), both within the wafer.
    """
    t = scn.wafer.thickness_um
    area, (uu, vv), front = _crack_samples(spec, fr, scn)
    if len(area) == 0:
        raise InputError(f"{where}: the crack lies entirely outside the wafer")
    pts = np.vstack([area, front]) if len(front) else area
    z = pts[:, 2]
    if spec.start == "edge":
        c = scn.wafer.center_um
        depth = float(np.max(scn.wafer.radius_um - np.hypot(pts[:, 0] - c[0], pts[:, 1] - c[1])))
    elif spec.start == "surface_top":
        depth = float(z.max())
    elif spec.start == "surface_bottom":
        depth = float(t - z.min())
    else:
        depth = float(z.max() - z.min())
    lv = (pts - fr.m) @ fr.e_len
    length = float(lv.max() - lv.min())
    centroid = area.mean(axis=0)
    step = max(1, len(front) // 64)
    a = float(spec.a_um) if spec.a_um is not None else t / max(abs(float(fr.e_in[2])), 1e-6)
    return {
        "kind": spec.start,
        "name": spec.name,
        "centroid_um": [float(v) for v in centroid],
        "position": _position(centroid, scn),
        "depth_um": depth,
        "length_um": length,
        "thickness_span_um": [float(max(z.min(), 0.0)), float(min(z.max(), t))],
        "front": {
            "a_um": a,
            "c_um": float(spec.c_um),
            "aspect": a / float(spec.c_um),
            "shape": spec.shape,
            "points_um": [[float(v) for v in p] for p in front[::step]],
            "fit_rms_um": 0.0,
        },
        "plane": cx.plane_descriptor(fr.n, R, spec.plane.hkl),
        "uncertainty": {
            "depth_um": 0.0,
            "length_um": 0.0,
            "inclination_deg": 0.0,
            "method": "exact (synthetic ground truth)",
        },
        "review": {"status": "unreviewed", "note": ""},
    }


def crack_primitive(spec: CrackSpec, fr: CrackFrame, scn: Scenario) -> Primitive:
    fc = scn.contrast.crack
    reach = _reach(fc)
    (u0, u1), (v0, v1) = _crack_local_extent(spec, fr, scn.wafer.thickness_um)
    lo, hi = _box((u0 - reach, v0 - reach, -reach), (u1 + reach, v1 + reach, reach))
    return Primitive(
        kind="sheet",
        center=fr.m,
        axes=np.array([fr.e_in, fr.e_len, fr.n]),
        lo=lo,
        hi=hi,
        amplitude=fc.amplitude * spec.strength,
        sigma_um=fc.sigma_um,
        halo=fc.halo * spec.strength,
        halo_um=fc.halo_um,
        params={"a": float(spec.a_um or 1.0), "c": float(spec.c_um), "shape": spec.shape},
        label=spec.name or "crack",
    )


# --- loops, slip bands, points -----------------------------------------------------------------


def _in_plane_110(hkl, R: np.ndarray) -> np.ndarray:
    """The <110> direction lying in plane ``hkl`` that is most nearly horizontal (wafer frame)."""
    best, best_z = None, 2.0
    for d in ((1, 1, 0), (1, -1, 0), (1, 0, 1), (1, 0, -1), (0, 1, 1), (0, 1, -1)):
        if int(np.dot(d, hkl)) != 0:
            continue
        w = cx.to_wafer(R, d)
        if abs(w[2]) < best_z - 1e-9:
            best, best_z = w, abs(w[2])
    if best is None:  # not a {111} plane: any in-plane direction
        n = cx.to_wafer(R, hkl)
        best = cx.unit(np.cross(n, _Z if abs(n[2]) < 0.9 else np.array([1.0, 0, 0])))
    return best


def loop_geometry(hkl, center, radius: float, shape: str, R: np.ndarray):
    """Plane frame and curve samples of a loop: returns (axes, polygon vertices or None, curve)."""
    n = cx.to_wafer(R, hkl)
    u1 = _in_plane_110(hkl, R)
    w1 = cx.unit(np.cross(n, u1))
    axes = np.array([w1, u1, n])
    if shape == "hexagon":
        th = np.radians(30.0 + 60.0 * np.arange(6))  # corners; edges face +-u (along u1)
        verts = radius * np.stack([np.cos(th), np.sin(th)], axis=1)
        s = np.linspace(0, 1, 60, endpoint=False)
        curve2 = np.concatenate(
            [verts[i] + np.outer(s, verts[(i + 1) % 6] - verts[i]) for i in range(6)]
        )
    else:
        verts = None
        th = np.linspace(0, 2 * math.pi, 360, endpoint=False)
        curve2 = radius * np.stack([np.cos(th), np.sin(th)], axis=1)
    curve = np.asarray(center, float) + curve2 @ axes[:2]
    return axes, verts, curve


def loop_truth(
    hkl, center, radius: float, shape: str, scn: Scenario, R: np.ndarray, name: str
) -> dict:
    axes, _, curve = loop_geometry(hkl, center, radius, shape, R)
    t = scn.wafer.thickness_um
    return {
        "name": name,
        "center_um": [float(v) for v in center],
        "diameter_um": 2.0 * float(radius),
        "shape": shape,
        "plane": cx.plane_descriptor(axes[2], R, hkl),
        "meets_surface": bool(curve[:, 2].min() <= 0.0 or curve[:, 2].max() >= t),
        "review": {"status": "unreviewed", "note": ""},
    }


def loop_primitive(
    hkl, center, radius: float, shape: str, strength: float, scn: Scenario, R: np.ndarray, name: str
) -> Primitive:
    fc = scn.contrast.line
    reach = _reach(fc)
    axes, verts, _ = loop_geometry(hkl, center, radius, shape, R)
    e = radius + reach
    return Primitive(
        kind="circle" if verts is None else "hexagon",
        center=np.asarray(center, float),
        axes=axes,
        lo=np.array([-e, -e, -reach]),
        hi=np.array([e, e, reach]),
        amplitude=fc.amplitude * strength,
        sigma_um=fc.sigma_um,
        halo=fc.halo * strength,
        halo_um=fc.halo_um,
        params={"radius": float(radius)},
        label=name or "loop",
    )


def _canonical_direction(d: np.ndarray) -> np.ndarray:
    for comp in d:
        if abs(comp) > 1e-12:
            return d if comp > 0 else -d
    return d


def slip_band(spec: SlipBandSpec, scn: Scenario, R: np.ndarray) -> tuple[Primitive, dict]:
    n = cx.to_wafer(R, spec.plane)
    u = cx.to_wafer(R, spec.direction)
    v = cx.unit(np.cross(n, u))
    fc = scn.contrast.line
    reach = _reach(fc)
    offsets = (np.arange(spec.count) - (spec.count - 1) / 2) * spec.spacing_um
    half_w = (spec.count - 1) / 2 * spec.spacing_um
    prim = Primitive(
        kind="lines",
        center=np.asarray(spec.center_um, float),
        axes=np.array([u, v, n]),
        lo=np.array([-spec.length_um / 2 - reach, -half_w - reach, -reach]),
        hi=np.array([spec.length_um / 2 + reach, half_w + reach, reach]),
        amplitude=fc.amplitude * spec.strength,
        sigma_um=fc.sigma_um,
        halo=fc.halo * spec.strength,
        halo_um=fc.halo_um,
        params={"length": float(spec.length_um), "offsets": tuple(float(o) for o in offsets)},
        label=spec.name or "slip band",
    )
    truth = {
        "name": spec.name,
        "direction": [float(c) for c in _canonical_direction(u)],
        "extent_um": float(spec.length_um),
        "count": int(spec.count),
        "spacing_um": float(spec.spacing_um),
        "width_um": 2 * half_w,
        "center_um": [float(c) for c in spec.center_um],
        "plane": cx.plane_descriptor(n, R, spec.plane),
        "review": {"status": "unreviewed", "note": ""},
    }
    return prim, truth


def point_primitive(spec: PointSpec, scn: Scenario) -> Primitive:
    e = _CORE_REACH * spec.size_um
    return Primitive(
        kind="blob",
        center=np.asarray(spec.position_um, float),
        axes=np.eye(3),
        lo=np.full(3, -e),
        hi=np.full(3, e),
        amplitude=scn.contrast.point_amplitude * spec.strength,
        sigma_um=spec.size_um,
        halo=0.0,
        halo_um=1.0,
        point_like=True,
        label=spec.name or "point",
    )


# --- expansion of the whole scenario -----------------------------------------------------------


@dataclass
class Expanded:
    """Primitives to render and the ground-truth lists (ids assigned, unique across kinds)."""

    primitives: list[Primitive]
    cracks: list[dict]
    loops: list[dict]
    slip_bands: list[dict]
    points: list[dict]
    indents: list[dict]


def expand(scn: Scenario, source: str = "scenario") -> Expanded:
    """Expand every scenario defect into primitives and exact ground-truth entries.

    Indents become a damaged zone (rendered, listed under ``indents``), one half-penny surface
    crack per ``crack_planes`` entry through the centre, and loops punched out along the dip of
    each ``loop_planes`` entry.
    """
    R = cx.orientation_matrix(scn.wafer.crystal.z_uvw, scn.wafer.crystal.x_uvw)
    prims: list[Primitive] = []
    cracks: list[tuple[dict, int]] = []
    loops: list[tuple[dict, int]] = []
    bands: list[dict] = []
    points: list[dict] = []
    indents: list[dict] = []

    def add_crack(spec: CrackSpec, where: str, owner: int | None) -> None:
        fr = crack_frame(spec, scn, R, where)
        cracks.append((crack_truth(spec, fr, scn, R, where), owner))
        prims.append(crack_primitive(spec, fr, scn))

    def add_loop(hkl, center, radius, shape, strength, name, owner) -> None:
        loops.append((loop_truth(hkl, center, radius, shape, scn, R, name), owner))
        prims.append(loop_primitive(hkl, center, radius, shape, strength, scn, R, name))

    for i, d in enumerate(scn.defects):
        where = f"{source}: defects[{i}]"
        if isinstance(d, CrackSpec):
            add_crack(d, where, None)
        elif isinstance(d, LoopSpec):
            add_loop(d.plane, d.center_um, d.radius_um, d.shape, d.strength, d.name, None)
        elif isinstance(d, SlipBandSpec):
            prim, truth = slip_band(d, scn, R)
            prims.append(prim)
            bands.append(truth)
        elif isinstance(d, PointSpec):
            prims.append(point_primitive(d, scn))
            points.append(
                {"name": d.name, "xyz_um": [float(v) for v in d.position_um], "size_um": d.size_um}
            )
        elif isinstance(d, IndentSpec):
            _expand_indent(d, i, scn, R, where, prims, add_crack, add_loop)
            indents.append(
                {
                    "name": d.name,
                    "index": i,
                    "center_um": [float(d.position_um[0]), float(d.position_um[1]), 0.0],
                    "zone_radius_um": d.zone_radius_um,
                }
            )
    next_id = 1
    crack_list, loop_list = [], []
    for entry, owner in cracks:
        crack_list.append({"id": next_id, **entry})
        if owner is not None:
            _indent_of(indents, owner).setdefault("crack_ids", []).append(next_id)
        next_id += 1
    for entry, owner in loops:
        loop_list.append({"id": next_id, **entry})
        if owner is not None:
            _indent_of(indents, owner).setdefault("loop_ids", []).append(next_id)
        next_id += 1
    band_list = []
    for entry in bands:
        band_list.append({"id": next_id, **entry})
        next_id += 1
    for ind in indents:
        ind.setdefault("crack_ids", [])
        ind.setdefault("loop_ids", [])
    return Expanded(prims, crack_list, loop_list, band_list, points, indents)


def _indent_of(indents: list[dict], index: int) -> dict:
    return next(ind for ind in indents if ind["index"] == index)


def _expand_indent(
    d: IndentSpec, index: int, scn: Scenario, R, where, prims, add_crack, add_loop
) -> None:
    x, y = d.position_um
    fc = scn.contrast.zone
    reach = _reach(fc)
    e = d.zone_radius_um + reach
    prims.append(
        Primitive(
            kind="zone",
            center=np.array([x, y, 0.0]),
            axes=np.eye(3),
            lo=np.array([-e, -e, -e]),
            hi=np.array([e, e, e]),
            amplitude=fc.amplitude * d.strength,
            sigma_um=fc.sigma_um,
            halo=fc.halo * d.strength,
            halo_um=fc.halo_um,
            params={"radius": d.zone_radius_um},
            label=d.name or "indent zone",
        )
    )
    for j, hkl in enumerate(d.crack_planes):
        spec = CrackSpec(
            type="crack",
            name=f"{d.name or 'indent'} radial crack {j + 1}",
            plane={"hkl": hkl},
            start="surface_top",
            a_um=d.crack_depth_um,
            c_um=d.crack_length_um,
            position_um=(x, y, 0.0),
            strength=d.strength,
        )
        add_crack(spec, f"{where}.crack_planes[{j}]", index)
    for j, hkl in enumerate(d.loop_planes):
        n = cx.to_wafer(R, hkl)
        trace = np.cross(_Z, n)
        if np.linalg.norm(trace) < 1e-9:
            raise InputError(f"{where}.loop_planes[{j}]: {list(hkl)} is parallel to the surface")
        dip = cx.unit(np.cross(n, trace))
        if dip[2] < 0:
            dip = -dip
        for m in range(d.loops_per_plane):
            dist = d.zone_radius_um + d.loop_radius_um + m * d.loop_spacing_um
            center = np.array([x, y, 0.0]) + dist * dip
            add_loop(
                hkl,
                center,
                d.loop_radius_um,
                d.loop_shape,
                d.strength,
                f"{d.name or 'indent'} loop {j + 1}.{m + 1}",
                index,
            )

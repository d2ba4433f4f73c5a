"""`report.html`: what a person reads first after a run (one wafer per run folder).

The report is one self-contained HTML file: every figure is a PNG made with matplotlib (Agg, no
display) and embedded as base64, the style sheet is inline, nothing is fetched from anywhere.
It reads only the run folder (the interface between stages):

- ``defects.json`` (required; a missing or invalid file is an :class:`InputError`),
- ``run.json``, ``registration.csv``, ``volume.ome.zarr`` (+ ``labels/defects``) and
  ``assessment.json`` when they are there; a missing one is said in the report instead.

Sections: the run at a glance (wafer, verdicts, cautions), scan and geometry (with the G
calibration of SPEC section 5), defects found, volume projections with the defects outlined and
numbered, one subsection per crack (front in the crack plane, depth profile), registration over
the scan, the thermal-process assessment, and the run record.

Large volumes stay cheap: the projections read the finest pyramid level that fits in
``MIP_VOXEL_BUDGET`` voxels, and each crack's depth profile reads only the crack's bounding box at
the finest level that fits in ``CRACK_VOXEL_BUDGET`` voxels.
"""

from __future__ import annotations

import base64
import csv
import html
import io
import logging
import math
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
from matplotlib import patheffects
from matplotlib.figure import Figure

from pipeline import __version__, omezarr
from pipeline import runfolder as rf
from pipeline.errors import InputError

log = logging.getLogger(__name__)

#: SPEC section 10, verbatim; used when ``pipeline.assess`` (which owns the text) is not importable.
FALLBACK_CAUTIONS = (
    "Break-risk results are screening estimates from linear-elastic fracture mechanics with "
    "handbook material data; they do not replace a qualified process engineer's judgement, "
    "validated furnace models, or the site's own rules. Radiation work follows the facility's "
    "radiation-safety rules. Broken wafers have sharp fragments: handle with the site's procedures."
)
#: SPEC section 5: warn when the measured G differs from the computed one by more than 3 %.
G_TOLERANCE = 0.03
#: Largest pyramid level (voxels) read whole for the projections: 2**24 float32 = 64 MiB.
MIP_VOXEL_BUDGET = 2**24
#: Largest bounding box (voxels) read for one crack's depth profile.
CRACK_VOXEL_BUDGET = 2**22
#: Per-crack figures beyond this many are left out (the tables still list every crack).
MAX_CRACK_FIGURES = 60
#: Cracks drawn in the assessment figure (those with the smallest margins); more lines than
#: this share colours and hide each other.
MAX_HISTORY_CRACKS = 8

_CLASS_COLOUR = {"crack": "#ff4d1a", "dislocation_loop": "#21b8ff", "slip_band": "#ffd400"}
_CATEGORY_CLASS = {
    "cracks": "crack",
    "dislocation_loops": "dislocation_loop",
    "slip_bands": "slip_band",
}
_KIND_TEXT = {
    "edge": "edge crack",
    "surface_top": "surface crack (entrance face)",
    "surface_bottom": "surface crack (exit face)",
    "through": "through-thickness crack",
    "internal": "internal crack",
}
#: Readable names of the stress-intensity solutions pipeline.assess reports (unknown names pass
#: through with underscores as spaces).
_MODEL_TEXT = {
    "edge_through_weight_function": "edge crack through the thickness, weight function (Bueckner 1970)",
    "corner_newman_raju": "corner crack (Newman & Raju 1986)",
    "edge_face_newman_raju": "crack on the edge face (Newman & Raju 1981)",
    "surface_newman_raju": "semi-elliptical surface crack (Newman & Raju 1981)",
    "through_centre_tada": "through-thickness crack (Tada, Paris & Irwin)",
    "embedded_irwin": "embedded elliptical crack (Irwin 1962)",
}
_MODEL_SHORT = {
    "edge_through_weight_function": "edge, through",
    "corner_newman_raju": "corner",
    "edge_face_newman_raju": "edge face",
    "surface_newman_raju": "surface",
    "through_centre_tada": "through",
    "embedded_irwin": "embedded",
}
_SLIP_TEXT = {
    "below_tau_c": "below the critical resolved shear stress",
    "slip_likely": "SLIP LIKELY: the critical resolved shear stress is reached",
    "not_judged": "not judged (no critical resolved shear stress given in the recipe)",
    "no_high_temperature": "no time in the slip temperature range",
}
_VERDICT_TEXT = {
    "grows": "grows",
    "does_not_grow": "does not grow",
    "outside_validity": "outside validity",
}


# --- small helpers ------------------------------------------------------------------------------


def cautions() -> list[str]:
    """The cautions the report must show (SPEC section 10), as paragraphs.

    ``pipeline.assess.CAUTIONS`` owns the text; it is imported lazily so the report also works
    in an install where the assessment module is absent.
    """
    try:
        from pipeline.assess import CAUTIONS  # type: ignore[attr-defined]
    except ImportError:
        CAUTIONS = FALLBACK_CAUTIONS
    if isinstance(CAUTIONS, str):
        return [CAUTIONS]
    return [str(c) for c in CAUTIONS]


def _esc(v: Any) -> str:
    return html.escape(str(v), quote=True)


def _num(v: Any, nd: int = 1) -> str:
    """A number for a table cell: fixed decimals, '-' for missing."""
    if v is None:
        return "&ndash;"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, int | np.integer):
        return str(int(v))
    try:
        f = float(v)
    except (TypeError, ValueError):
        return _esc(v)
    if not math.isfinite(f):
        return "&ndash;"
    if f != 0 and abs(f) < 0.5 * 10.0**-nd:  # never print a non-zero value as 0.000
        return f"{f:.2g}"
    return f"{f:.{nd}f}"


def _margin(v: Any) -> str:
    """A safety margin K_IC / K_I: two decimals, large ones as '> 100' (more digits mean nothing)."""
    if isinstance(v, int | float) and math.isfinite(v) and v > 100:
        return "&gt; 100"
    return _num(v, 2)


def _vec(v: Sequence[Any] | None, nd: int = 1) -> str:
    if v is None:
        return "&ndash;"
    return "(" + ", ".join(_num(x, nd) for x in v) + ")"


def _hkl(v: Sequence[int] | None) -> str:
    if not v:
        return "&ndash;"
    return '<span class="nw">(' + " ".join(str(int(x)) for x in v) + ")</span>"


def _verdict_html(v: str | None) -> str:
    if not v:
        return "&ndash;"
    return f'<span class="verdict v-{_esc(v)} nw">{_esc(_VERDICT_TEXT.get(v, v))}</span>'


def _png_data_uri(fig: Figure) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100, metadata={"Software": None})
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def _unit(v: np.ndarray) -> np.ndarray | None:
    v = np.asarray(v, float)
    n = float(np.linalg.norm(v))
    return v / n if n > 1e-12 else None


def _mid_range(a: np.ndarray, default: float = 0.0) -> float:
    return float((a.min() + a.max()) / 2) if a.size else default


def _stroke(width: float = 2.5) -> list:
    return [patheffects.withStroke(linewidth=width, foreground="black")]


class _Figures:
    """Numbers figures in order and renders them as <figure> blocks."""

    def __init__(self) -> None:
        self.n = 0

    def block(self, fig: Figure, caption: str, alt: str, fig_id: str = "") -> str:
        self.n += 1
        uri = _png_data_uri(fig)
        ident = f' id="{_esc(fig_id)}"' if fig_id else ""
        return (
            f'<figure{ident}><img src="{uri}" alt="{_esc(alt)}">'
            f"<figcaption><b>Figure {self.n}.</b> {caption}</figcaption></figure>"
        )


def _table(headers: Sequence[str], rows: Sequence[Sequence[str]], cls: str = "") -> str:
    """An HTML table; ``headers`` are escaped, cells are trusted HTML (built with _num/_esc)."""
    c = f' class="{cls}"' if cls else ""
    head = "".join(f"<th>{_esc(h)}</th>" for h in headers)
    body = "".join("<tr>" + "".join(f"<td>{cell}</td>" for cell in r) + "</tr>" for r in rows)
    return f"<table{c}><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _kv(rows: Sequence[tuple[str, str]]) -> str:
    body = "".join(f'<tr><th scope="row">{_esc(k)}</th><td>{v}</td></tr>' for k, v in rows)
    return f'<table class="kv"><tbody>{body}</tbody></table>'


def _note(text: str) -> str:
    return f'<p class="note">{text}</p>'


# --- run-folder inputs --------------------------------------------------------------------------


@dataclass
class Inputs:
    """What the report read from the run folder; absent parts are None, with a reason."""

    root: Path
    defects: dict
    run: dict | None
    run_note: str
    registration: dict[str, np.ndarray] | None
    registration_note: str
    assessment: dict | None
    assessment_note: str


_REG_COLUMNS = ("frame", "position_um", "r0_px", "c0_px", "quality", "flagged", "interpolated")


def read_registration_table(path: Path) -> dict[str, np.ndarray]:
    """Read ``registration.csv`` into float columns.

    Raises
    ------
    InputError
        When a required column (frame, position_um, r0_px, c0_px, quality, flagged,
        interpolated) is missing or a value is not a number; the message names the row.
    """
    with open(path, newline="") as fh:
        reader = csv.DictReader(fh)
        missing = [c for c in _REG_COLUMNS if c not in (reader.fieldnames or [])]
        if missing:
            raise InputError(
                f"{path}: missing column(s) {', '.join(missing)} (need {', '.join(_REG_COLUMNS)})"
            )
        cols: dict[str, list[float]] = {c: [] for c in reader.fieldnames or []}
        for i, row in enumerate(reader, start=2):
            for c in cols:
                v = row.get(c)
                try:
                    cols[c].append(float(v) if v not in (None, "") else math.nan)
                except ValueError:
                    raise InputError(
                        f"{path}: line {i}, column {c}: {v!r} is not a number"
                    ) from None
    return {c: np.asarray(v, float) for c, v in cols.items()}


def _optional_json(path: Path, what: str) -> tuple[dict | None, str]:
    if not path.exists():
        return None, f"{path.name} is not in this run folder"
    try:
        doc = rf.read_json(path, what)
    except InputError as exc:
        log.warning("report: %s", exc)
        return None, f"{path.name} could not be read ({_esc(exc)})"
    if not isinstance(doc, dict):
        return None, f"{path.name} does not hold a JSON object"
    return doc, ""


def read_inputs(run_root: Path) -> Inputs:
    """Read everything the report uses; only ``defects.json`` is required."""
    root = Path(run_root)
    if not root.is_dir():
        raise InputError(f"{root}: not a folder; expected a crackstack run folder")
    defects = rf.read_defects(root / rf.DEFECTS_JSON)
    run, run_note = _optional_json(root / rf.RUN_JSON, "run record")
    reg_path = root / rf.REGISTRATION_CSV
    reg, reg_note = None, ""
    if not reg_path.exists():
        reg_note = f"{rf.REGISTRATION_CSV} is not in this run folder"
    else:
        try:
            reg = read_registration_table(reg_path)
        except (InputError, OSError, UnicodeDecodeError) as exc:
            log.warning("report: %s", exc)
            reg_note = f"{rf.REGISTRATION_CSV} could not be read ({_esc(exc)})"
    assessment, a_note = _optional_json(root / rf.ASSESSMENT_JSON, "assessment")
    return Inputs(root, defects, run, run_note, reg, reg_note, assessment, a_note)


# --- crack-plane coordinates --------------------------------------------------------------------


@dataclass(frozen=True)
class PlaneView:
    """Plot coordinates in one crack's plane.

    A wafer point X maps to ``p = (X - origin_um) . along`` (horizontal) and
    ``q = (X - origin_um) . down`` (vertical, into the material, 0 on the face the crack starts
    from). The fitted front is drawn as the ellipse with centre ``center_pq`` and semi-axes
    ``semi_pq`` (c along p and a along q, or the reverse for edge cracks), clipped to the material
    (``p_range``, ``q_range``).
    """

    along: np.ndarray
    down: np.ndarray
    origin_um: np.ndarray
    center_pq: tuple[float, float]
    semi_pq: tuple[float, float]
    p_label: str
    q_label: str
    p_range: tuple[float, float] | None
    q_range: tuple[float, float] | None
    face: str
    note: str = ""

    def pq(self, xyz_um: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        d = np.asarray(xyz_um, float).reshape(-1, 3) - self.origin_um
        return d @ self.along, d @ self.down


def _wafer_centre_um(wafer: dict) -> np.ndarray | None:
    c = wafer.get("center_xy_mm")
    return None if c is None else np.asarray(c, float) * 1000.0


def _edge_distance_along(
    cxy: np.ndarray, t_xy: np.ndarray, centre: np.ndarray, R: float
) -> float | None:
    """Distance s > 0 from ``cxy`` along ``t_xy`` to the wafer edge circle, or None."""
    d = cxy - centre
    A = float(t_xy @ t_xy)
    B = float(d @ t_xy)
    C = float(d @ d) - R * R
    disc = B * B - A * C
    if A < 1e-12 or disc < 0:
        return None
    return (-B + math.sqrt(disc)) / A


def plane_view(crack: dict, wafer: dict) -> PlaneView:
    """Coordinates in the crack plane for the front-fit plot.

    The plane's in-plane axes are the surface trace ``t = (cos az, sin az, 0)`` (azimuth from
    +x toward +y) made perpendicular to ``plane.normal``, and ``w = n x t`` turned to point to +z.
    Surface cracks: p along the trace (0 at the middle of the front), q the in-plane distance
    from the face they start from. Edge cracks: p the in-plane position through the thickness from
    the entrance face, q the in-plane distance inward from the wafer edge along the trace (the
    edge is found from ``wafer.center_xy_mm`` and ``diameter_mm``; without a centre, from the
    crack's ``position.distance_to_edge_um`` or the outermost front point).

    Raises
    ------
    ValueError
        When ``plane.normal`` is the zero vector.
    """
    n = _unit(crack["plane"]["normal"])
    if n is None:
        raise ValueError(f"crack {crack['id']}: plane.normal is the zero vector")
    az = math.radians(float(crack["plane"]["azimuth_deg"]))
    t = np.array([math.cos(az), math.sin(az), 0.0])
    t = t - (t @ n) * n
    t_u = _unit(t)
    if t_u is None:  # azimuth inconsistent with the normal: take any in-plane direction
        t_u = _unit(np.cross(n, [0.0, 0.0, 1.0])) if abs(n[2]) < 0.99 else np.array([1.0, 0.0, 0.0])
    t = t_u
    thickness = float(wafer["thickness_um"])
    c = np.asarray(crack["centroid_um"], float)
    front = np.asarray(crack["front"]["points_um"], float).reshape(-1, 3)
    a_um, c_um = float(crack["front"]["a_um"]), float(crack["front"]["c_um"])
    kind = crack["kind"]
    note = ""

    def basis(t: np.ndarray) -> tuple[np.ndarray, float | None, float | None]:
        w = np.cross(n, t)
        if w[2] < 0:
            w = -w
        if w[2] > 0.05:  # plane more than 3 deg from the wafer surface
            return w, (0.0 - c[2]) / w[2], (thickness - c[2]) / w[2]
        return w, None, None

    if kind == "edge":
        centre = _wafer_centre_um(wafer)
        R = float(wafer["diameter_mm"]) * 500.0
        u_edge = None
        if centre is not None:
            if t[:2] @ (c[:2] - centre) < 0:
                t = -t
            u_edge = _edge_distance_along(c[:2], t[:2], centre, R)
        if u_edge is None:
            u = (front - c) @ t
            d_edge = crack.get("position", {}).get("distance_to_edge_um")
            if d_edge is not None and u.size:
                # the edge lies at the end of the trace nearer to an extreme of the front
                if abs(-d_edge - u.min()) < abs(d_edge - u.max()):
                    t = -t
                u_edge = float(d_edge)
                note = "wafer centre unknown: edge placed from the crack's distance to the edge"
            else:
                u_edge = float(u.max()) if u.size else 0.0
                note = "wafer centre unknown: edge placed at the outermost front point"
        w, v_top, v_bot = basis(t)
        origin = c + u_edge * t + (v_top if v_top is not None else 0.0) * w
        view = PlaneView(
            w,
            -t,
            origin,
            (0.0, 0.0),
            (c_um, a_um),
            "position through the thickness, in plane (µm)",
            "distance inward from the wafer edge, in plane (µm)",
            None if v_top is None else (0.0, v_bot - v_top),
            (0.0, math.inf),
            "wafer edge",
            note,
        )
        p, q = view.pq(front)
        shape = crack["front"].get("shape")
        if shape == "quarter_elliptical" and view.p_range is not None and p.size:
            # centred on the corner between the edge and the nearer face
            pc = 0.0 if _mid_range(p) < view.p_range[1] / 2 else view.p_range[1]
            return PlaneView(**{**view.__dict__, "center_pq": (pc, 0.0)})
        view = PlaneView(**{**view.__dict__, "center_pq": (_mid_range(p), 0.0)})
        return fit_centre(view, p, q, free_p=True, free_q=False)

    w, v_top, v_bot = basis(t)
    u = (front - c) @ t
    pc = _mid_range(u)
    if v_top is None:
        origin = c + pc * t
        return PlaneView(
            t,
            w,
            origin,
            (0.0, 0.0),
            (c_um, a_um),
            "along the surface trace (µm)",
            "in-plane distance from the centroid (µm)",
            None,
            None,
            "none",
            "crack plane within 3° of the wafer surface: no surface to measure from",
        )
    span = v_bot - v_top
    if kind == "surface_bottom":
        origin = c + pc * t + v_bot * w
        view = PlaneView(
            t,
            -w,
            origin,
            (0.0, 0.0),
            (c_um, a_um),
            "along the surface trace (µm)",
            "in-plane distance above the exit face (µm)",
            None,
            (0.0, span),
            "exit face",
        )
        return fit_centre(view, *view.pq(front), free_p=True, free_q=False)
    origin = c + pc * t + v_top * w
    view = PlaneView(
        t,
        w,
        origin,
        (0.0, 0.0),
        (c_um, a_um),
        "along the surface trace (µm)",
        "in-plane distance below the entrance face (µm)",
        None,
        (0.0, span),
        "entrance face",
    )
    if kind in ("internal", "through"):
        p, q = view.pq(front)
        qc = _mid_range(q, span / 2) if kind == "internal" else span / 2
        view = PlaneView(**{**view.__dict__, "center_pq": (0.0, qc), "face": "none"})
        return fit_centre(view, p, q, free_p=True, free_q=True) if kind == "internal" else view
    return fit_centre(view, *view.pq(front), free_p=True, free_q=False)


def fit_centre(
    view: PlaneView, p: np.ndarray, q: np.ndarray, *, free_p: bool, free_q: bool
) -> PlaneView:
    """Move the drawn ellipse's centre (semi-axes fixed) to best fit the front points.

    ``defects.json`` gives the fitted semi-axes but not the centre's position along the face,
    so it is recovered here by least squares on the first-order distances of
    :func:`front_distance_um` (the measure stage fits the same free shift).
    """
    if not (free_p or free_q) or p.size < 3:
        return view
    from scipy.optimize import least_squares

    pc0, qc0 = view.center_pq
    x0 = [v for v, f in ((pc0, free_p), (qc0, free_q)) if f]

    def resid(x):
        it = iter(x)
        cen = (next(it) if free_p else pc0, next(it) if free_q else qc0)
        return front_distance_um(PlaneView(**{**view.__dict__, "center_pq": cen}), p, q)

    res = least_squares(resid, x0)
    if not np.all(np.isfinite(res.x)):
        return view
    it = iter(res.x)
    cen = (float(next(it)) if free_p else pc0, float(next(it)) if free_q else qc0)
    return PlaneView(**{**view.__dict__, "center_pq": cen})


def ellipse_outline(view: PlaneView, n: int = 721) -> tuple[np.ndarray, np.ndarray]:
    """The fitted ellipse in plot coordinates, NaN where it leaves the material."""
    phi = np.linspace(0, 2 * np.pi, n)
    (pc, qc), (sp, sq) = view.center_pq, view.semi_pq
    p = pc + sp * np.cos(phi)
    q = qc + sq * np.sin(phi)
    keep = np.ones(n, bool)
    if view.q_range is not None:
        keep &= (q >= view.q_range[0] - 1e-9) & (q <= view.q_range[1] + 1e-9)
    if view.p_range is not None:
        keep &= (p >= view.p_range[0] - 1e-9) & (p <= view.p_range[1] + 1e-9)
    return np.where(keep, p, np.nan), np.where(keep, q, np.nan)


def front_distance_um(view: PlaneView, p: np.ndarray, q: np.ndarray) -> np.ndarray:
    """First-order (Sampson) distance of points from the drawn ellipse, um.

    For ``F = ((p - pc)/sp)^2 + ((q - qc)/sq)^2 - 1`` the distance is ``|F| / |grad F|``
    (Sampson 1982, Comput. Graph. Image Process. 18, 97), accurate when points lie near the curve.
    """
    (pc, qc), (sp, sq) = view.center_pq, view.semi_pq
    if sp <= 0 or sq <= 0:
        return np.full(np.shape(p), np.nan)
    x, y = (p - pc) / sp, (q - qc) / sq
    F = x * x + y * y - 1
    g = np.hypot(2 * x / sp, 2 * y / sq)
    return np.abs(F) / np.maximum(g, 1e-12)


def depth_coordinates(
    xyz_um: np.ndarray, crack: dict, wafer: dict, view: PlaneView
) -> tuple[np.ndarray, np.ndarray]:
    """Position along the crack and depth normal to the face it starts from, um.

    surface_top: (along trace, z); surface_bottom: (along trace, t - z); edge: (z, R - r) with r
    the radius about the wafer centre (without a centre: in-plane distance from the edge);
    internal and through: (along trace, z).
    """
    xyz = np.asarray(xyz_um, float).reshape(-1, 3)
    kind = crack["kind"]
    thickness = float(wafer["thickness_um"])
    if kind == "edge":
        centre = _wafer_centre_um(wafer)
        if centre is not None:
            R = float(wafer["diameter_mm"]) * 500.0
            return xyz[:, 2], R - np.hypot(xyz[:, 0] - centre[0], xyz[:, 1] - centre[1])
        return xyz[:, 2], view.pq(xyz)[1]
    along = (xyz - view.origin_um) @ view.along
    if kind == "surface_bottom":
        return along, thickness - xyz[:, 2]
    return along, xyz[:, 2]


def binned_profile(
    along: np.ndarray, depth: np.ndarray, bin_um: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per bin of ``along`` (width ``bin_um``): bin centres, min and max depth (NaN if empty)."""
    if along.size == 0:
        return np.array([]), np.array([]), np.array([])
    lo = math.floor(along.min() / bin_um)
    idx = np.floor(along / bin_um).astype(int) - lo
    nb = int(idx.max()) + 1
    dmax = np.full(nb, -np.inf)
    dmin = np.full(nb, np.inf)
    np.maximum.at(dmax, idx, depth)
    np.minimum.at(dmin, idx, depth)
    centres = (np.arange(nb) + lo + 0.5) * bin_um
    empty = ~np.isfinite(dmax)
    dmax[empty] = np.nan
    dmin[empty] = np.nan
    return centres, dmin, dmax


# --- volume access ------------------------------------------------------------------------------


def pick_level(shapes: Sequence[Sequence[int]], budget_voxels: int) -> int:
    """Finest pyramid level whose voxel count fits ``budget_voxels`` (else the coarsest)."""
    for k, shp in enumerate(shapes):
        if int(np.prod(shp)) <= budget_voxels:
            return k
    return len(shapes) - 1


def _level_centres(meta: dict, level: int, shape: Sequence[int]) -> list[np.ndarray]:
    """Voxel-centre coordinates (z, y, x) um of one level."""
    lv = meta["levels"][level]
    return [
        float(lv["translation"][i]) + float(lv["scale"][i]) * np.arange(shape[i]) for i in range(3)
    ]


@dataclass
class VolumeView:
    level: int
    meta: dict
    image: np.ndarray
    labels: np.ndarray | None
    centres: list[np.ndarray]
    boxes: dict[int, tuple[slice, slice, slice]]
    note: str


def load_volume_view(vol_path: Path) -> tuple[VolumeView | None, str]:
    """Read one coarse level of the volume (and its labels) for the projections."""
    if not vol_path.exists():
        return None, f"{rf.VOLUME} is not in this run folder"
    try:
        meta = omezarr.read_meta(vol_path)
        import zarr

        shapes = [
            zarr.open_array(str(vol_path / lv["path"]), mode="r").shape for lv in meta["levels"]
        ]
        level = pick_level(shapes, MIP_VOXEL_BUDGET)
        arr, meta = omezarr.open_image(vol_path, level)
        image = np.asarray(arr.compute(), np.float32)
    except (InputError, KeyError, FileNotFoundError, ValueError) as exc:
        log.warning("report: cannot read the volume: %s", exc)
        return None, f"{rf.VOLUME} could not be read ({_esc(exc)})"
    note = ""
    labels = None
    boxes: dict[int, tuple[slice, slice, slice]] = {}
    try:
        lab, _ = omezarr.open_labels(vol_path, "defects", level)
        labels = np.asarray(lab.compute())
        from scipy import ndimage

        if labels.size and labels.max() > 0:
            for i, sl in enumerate(ndimage.find_objects(labels.astype(np.int64)), start=1):
                if sl is not None:
                    boxes[i] = sl
    except (InputError, KeyError, FileNotFoundError, ValueError) as exc:
        note = (
            f"no defect labels in the volume ({_esc(exc)}); defects are marked at their centroids"
        )
    return VolumeView(
        level, meta, image, labels, _level_centres(meta, level, image.shape), boxes, note
    ), ""


def crack_voxels_um(vol_path: Path, view: VolumeView, label_id: int) -> tuple[np.ndarray, int]:
    """Wafer coordinates [x, y, z] um of one label's voxel centres, from the finest level whose
    bounding box of the label fits ``CRACK_VOXEL_BUDGET``; also returns the level used."""
    box = view.boxes.get(label_id)
    if box is None:
        return np.empty((0, 3)), view.level
    import zarr

    levels = view.meta["levels"]
    grp = vol_path / "labels" / "defects"
    for lev in range(view.level + 1):
        f = 2 ** (view.level - lev)
        arr = zarr.open_array(str(grp / levels[lev]["path"]), mode="r")
        sl = tuple(
            slice(s.start * f, min(s.stop * f, n)) for s, n in zip(box, arr.shape, strict=True)
        )
        if int(np.prod([s.stop - s.start for s in sl])) <= CRACK_VOXEL_BUDGET or lev == view.level:
            block = np.asarray(arr[sl])
            idx = np.argwhere(block == label_id) + np.array([s.start for s in sl])
            lv = levels[lev]
            zyx = idx * np.asarray(lv["scale"], float) + np.asarray(lv["translation"], float)
            return zyx[:, ::-1], lev
    return np.empty((0, 3)), view.level  # pragma: no cover - loop always returns at view.level


# --- figures ------------------------------------------------------------------------------------


def _all_defects(defects: dict) -> dict[int, tuple[str, dict]]:
    out: dict[int, tuple[str, dict]] = {}
    for cat, cls in _CATEGORY_CLASS.items():
        for d in defects.get(cat, []):
            out.setdefault(int(d["id"]), (cls, d))
    return out


def _defect_point(d: dict) -> np.ndarray | None:
    p = d.get("centroid_um") or d.get("center_um")
    return None if p is None else np.asarray(p, float)


def _outline(ax, mask: np.ndarray, xs: np.ndarray, ys: np.ndarray, colour: str) -> None:
    """Contour of a boolean mask on pixel-centre coordinates, padded so the outline closes."""
    m = np.pad(mask.astype(float), 1)
    dx = xs[1] - xs[0] if xs.size > 1 else 1.0
    dy = ys[1] - ys[0] if ys.size > 1 else 1.0
    xs2 = np.concatenate([[xs[0] - dx], xs, [xs[-1] + dx]])
    ys2 = np.concatenate([[ys[0] - dy], ys, [ys[-1] + dy]])
    ax.contour(xs2, ys2, m, levels=[0.5], colors=[colour], linewidths=1.3)


def _extent(c_h: np.ndarray, c_v: np.ndarray) -> list[float]:
    """imshow extent (left, right, bottom, top) with the first row at the top."""
    dh = c_h[1] - c_h[0] if c_h.size > 1 else 1.0
    dv = c_v[1] - c_v[0] if c_v.size > 1 else 1.0
    return [c_h[0] - dh / 2, c_h[-1] + dh / 2, c_v[-1] + dv / 2, c_v[0] - dv / 2]


def _contrast(img: np.ndarray) -> tuple[float, float]:
    finite = img[np.isfinite(img)]
    if finite.size == 0:
        return 0.0, 1.0
    lo, hi = np.percentile(finite, [1.0, 99.9])
    return float(lo), float(hi if hi > lo else lo + 1.0)


def _place_numbers(
    ax, items: list[tuple[int, str, np.ndarray]], lim: tuple[float, float, float, float]
) -> None:
    """Write each defect's number next to its outline where it is least crowded.

    ``items`` holds (id, colour, points) with points (n, 2) in data coordinates (h, v) on the
    defect (outline pixels or its centroid); the vertical axis is drawn downward. Candidate
    spots: the defect's extreme point in each of 8 directions, plus points spread along its
    longest extent (so long stripes can carry their number anywhere along them). A spot must
    first keep clear of the numbers already written, then of the other defects.
    """
    hmin, hmax, vmin, vmax = lim
    sh, sv = max(hmax - hmin, 1e-9), max(vmax - vmin, 1e-9)
    # screen-like normalised coordinates: x right, y up
    pts = [np.column_stack([(p[:, 0] - hmin) / sh, (vmax - p[:, 1]) / sv]) for _, _, p in items]
    dirs = [(1, 1), (0, 1), (-1, 1), (1, 0), (-1, 0), (1, -1), (0, -1), (-1, -1)]
    placed: list[np.ndarray] = []
    clear = 0.035  # about one number's width in axes units
    for k, (lid, colour, _) in enumerate(items):
        own = pts[k]
        cands: list[tuple[np.ndarray, tuple[int, int]]] = []
        for d in dirs:
            dv = np.asarray(d, float) / math.hypot(*d)
            cands.append((own[int(np.argmax(own @ dv))], d))
        span = np.ptp(own, axis=0)
        major = int(np.argmax(span))
        if span[major] > 0.15:
            order = np.argsort(own[:, major])
            side = (1, 0) if major == 1 else (0, 1)
            for f in np.linspace(0.1, 0.9, 9):
                cands.append((own[order[int(f * (len(order) - 1))]], side))
        others = [q for j, q in enumerate(pts) if j != k]
        best, best_key = None, None
        for anchor, d in cands:
            spot = anchor + 0.03 * np.asarray(d, float) / math.hypot(*d)
            if not (0.0 <= spot[0] <= 1.0 and 0.0 <= spot[1] <= 1.0):
                continue
            d_num = min((float(np.hypot(*(q - spot))) for q in placed), default=1.0)
            d_def = min((float(np.min(np.hypot(*(q - spot).T))) for q in others), default=1.0)
            key = (min(d_num, clear), d_def)
            if best_key is None or key > best_key:
                best, best_key = (anchor, d), key
        if best is None:
            best = (own[0], (1, 1))
        anchor, d = best
        placed.append(anchor + 0.03 * np.asarray(d, float) / math.hypot(*d))
        ha = {1: "left", 0: "center", -1: "right"}[d[0]]
        va = {1: "bottom", 0: "center", -1: "top"}[d[1]]
        ax.annotate(
            str(lid),
            (hmin + anchor[0] * sh, vmax - anchor[1] * sv),
            xytext=(4 * d[0], 4 * d[1]),
            textcoords="offset points",
            ha=ha,
            va=va,
            color=colour,
            fontsize=9,
            fontweight="bold",
            path_effects=_stroke(),
            annotation_clip=False,
        )


def _mask_points(
    mask: np.ndarray, hpos: np.ndarray, vpos: np.ndarray, n_max: int = 3000
) -> np.ndarray:
    """Data coordinates (h, v) of a 2D mask's pixels (rows along v), at most ``n_max`` of them."""
    iv, ih = np.nonzero(mask)
    step = max(1, iv.size // n_max)
    return np.column_stack([hpos[ih[::step]], vpos[iv[::step]]])


_UNLISTED_COLOUR = "#ff66ff"


def projection_figure(vv: VolumeView, defects: dict, axis: str) -> tuple[Figure, bool]:
    """Maximum-intensity projection along z (top view) or x (side view) with defects outlined.

    Returns the figure and whether it is drawn to scale (equal axes).
    """
    zc, yc, xc = vv.centres
    if axis == "z":
        img = np.fmax.reduce(vv.image, axis=0)  # (y, x); fmax skips NaN voxels
        ch, cv = xc, yc
        xlabel, ylabel = "x, scan axis (µm)", "y, along the slit (µm)"
    else:
        img = np.fmax.reduce(vv.image, axis=2)  # (z, y)
        ch, cv = yc, zc
        xlabel, ylabel = "y, along the slit (µm)", "z, depth below the entrance face (µm)"
    ext = _extent(ch, cv)
    span_h, span_v = ext[1] - ext[0], ext[2] - ext[3]
    ratio = span_v / max(span_h, 1e-9)
    equal = 0.15 <= ratio <= 6
    width = 10.0
    # axes about 8 in wide once the colour bar and the y labels have their room
    height = float(np.clip(8.0 * ratio + 1.1, 2.6, 11.0)) if equal else 5.5
    fig = Figure(figsize=(width, height), layout="constrained")
    ax = fig.add_subplot()
    vmin, vmax = _contrast(img)
    im = ax.imshow(
        img,
        cmap="gray",
        vmin=vmin,
        vmax=vmax,
        extent=ext,
        aspect="equal" if equal else "auto",
        interpolation="nearest",
    )
    fig.colorbar(im, ax=ax, shrink=0.9, label="corrected intensity\n(perfect crystal ≈ 1)")
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    known = _all_defects(defects)
    items: list[tuple[int, str, np.ndarray]] = []
    if vv.labels is not None:
        for lid, box in sorted(vv.boxes.items()):
            cls = known.get(lid, ("unknown", {}))[0]
            colour = _CLASS_COLOUR.get(cls, _UNLISTED_COLOUR)
            sub = vv.labels[box] == lid
            mask = sub.any(axis=0 if axis == "z" else 2)
            hpos, vpos = (xc[box[2]], yc[box[1]]) if axis == "z" else (yc[box[1]], zc[box[0]])
            _outline(ax, mask, hpos, vpos, colour)
            items.append((lid, colour, _mask_points(mask, hpos, vpos)))
    drawn = {i[0] for i in items}
    for lid, (cls, d) in sorted(known.items()):
        pt = _defect_point(d)
        if lid in drawn or pt is None:
            continue
        h, v = float(pt[0 if axis == "z" else 1]), float(pt[1 if axis == "z" else 2])
        colour = _CLASS_COLOUR[cls]
        ax.plot([h], [v], marker="o", mfc="none", mec=colour, ms=10, mew=1.5)
        items.append((lid, colour, np.array([[h, v]])))
    if axis == "x":
        t = float(defects["wafer"]["thickness_um"])
        ax.axhline(0.0, color="#9fd4ff", lw=0.8, ls="--", label=f"wafer faces (z = 0 and {t:g} µm)")
        ax.axhline(t, color="#9fd4ff", lw=0.8, ls="--")
        ax.legend(loc="upper left", bbox_to_anchor=(0.0, -0.13), fontsize=8, frameon=False)
    else:
        centre = _wafer_centre_um(defects["wafer"])
        if centre is not None:
            R = float(defects["wafer"]["diameter_mm"]) * 500.0
            # only the arc that can cross the window: angles of the window corners seen from the
            # centre (a window far from the centre spans a tiny angle, so a full circle would
            # need ~1e6 points to look smooth there)
            corners = np.array(
                [[ext[0], ext[3]], [ext[1], ext[3]], [ext[0], ext[2]], [ext[1], ext[2]]]
            )
            mid = math.atan2(corners[:, 1].mean() - centre[1], corners[:, 0].mean() - centre[0])
            ang = np.angle(
                np.exp(
                    1j * (np.arctan2(corners[:, 1] - centre[1], corners[:, 0] - centre[0]) - mid)
                )
            )
            inside_centre = ext[0] <= centre[0] <= ext[1] and ext[3] <= centre[1] <= ext[2]
            lo, hi = (-math.pi, math.pi) if inside_centre else (ang.min(), ang.max())
            phi = mid + np.linspace(lo, hi, 2001)
            ex, ey = centre[0] + R * np.cos(phi), centre[1] + R * np.sin(phi)
            inside = (ex >= ext[0]) & (ex <= ext[1]) & (ey >= ext[3]) & (ey <= ext[2])
            if inside.any():
                ax.plot(
                    np.where(inside, ex, np.nan),
                    np.where(inside, ey, np.nan),
                    color="#9fd4ff",
                    lw=0.8,
                    ls="--",
                    label="wafer edge",
                )
                ax.legend(loc="upper left", bbox_to_anchor=(0.0, -0.13), fontsize=8, frameon=False)
    ax.set_xlim(ext[0], ext[1])
    ax.set_ylim(ext[2], ext[3])
    _place_numbers(ax, items, (ext[0], ext[1], ext[3], ext[2]))
    return fig, equal


def crack_figure(
    crack: dict, wafer: dict, view: PlaneView, voxels_um: np.ndarray, voxel_um: Sequence[float]
) -> tuple[Figure, dict]:
    """Two panels: front points and fitted ellipse in the crack plane; depth profile.

    Returns the figure and numbers for the caption (rms distance of the front from the drawn
    ellipse, deepest reach found in the label voxels).
    """
    fig = Figure(figsize=(10.5, 4.2), layout="constrained")
    ax1, ax2 = fig.subplots(1, 2)
    front = np.asarray(crack["front"]["points_um"], float).reshape(-1, 3)
    fp, fq = view.pq(front)
    ep, eq = ellipse_outline(view)
    info: dict[str, float | None] = {"front_rms_um": None, "label_depth_um": None}
    if voxels_um.size:
        vp, vq = view.pq(voxels_um)
        ax1.scatter(vp, vq, s=3, c="#bbbbbb", lw=0, label="label voxels", rasterized=True)
    ax1.plot(
        ep,
        eq,
        color="#d62800",
        lw=1.8,
        label=f"fitted front: a = {crack['front']['a_um']:.1f} µm, c = {crack['front']['c_um']:.1f} µm",
    )
    if fp.size:
        ax1.plot(fp, fq, "o", ms=4.5, mfc="#1060c0", mec="white", mew=0.6, label="front points")
        dist = front_distance_um(view, fp, fq)
        if np.isfinite(dist).any():
            info["front_rms_um"] = float(np.sqrt(np.nanmean(dist**2)))
    if view.q_range is not None:
        ax1.axhline(view.q_range[0], color="k", lw=1.0)
        ax1.annotate(
            view.face,
            (0.01, 0.0),
            xycoords=("axes fraction", "data"),
            xytext=(0, 3),
            textcoords="offset points",
            fontsize=8,
        )
    if view.p_range is not None:
        for pv, name in zip(view.p_range, ("entrance face", "exit face"), strict=True):
            ax1.axvline(pv, color="k", lw=0.7, ls=":")
            ax1.text(
                pv,
                0.03,
                f" {name}",
                transform=ax1.get_xaxis_transform(),
                rotation=90,
                ha="right",
                va="bottom",
                fontsize=7.5,
            )
    ax1.set_xlabel(view.p_label)
    ax1.set_ylabel(view.q_label)
    ax1.set_aspect("equal", adjustable="datalim")
    ax1.invert_yaxis()
    ax1.set_title("front in the crack plane", fontsize=10)
    ax1.legend(fontsize=8, loc="upper center", bbox_to_anchor=(0.5, -0.17), ncols=2, frameon=False)

    kind = crack["kind"]
    thickness = float(wafer["thickness_um"])
    if voxels_um.size:
        along, depth = depth_coordinates(voxels_um, crack, wafer, view)
        # one bin per voxel column along the crack (finer would leave empty bins), at most 100 bins
        step = float(voxel_um[0]) if kind == "edge" else max(float(voxel_um[1]), float(voxel_um[2]))
        bin_um = max(step, float(np.ptp(along)) / 100 or step)
        centres, dmin, dmax = binned_profile(along, depth, bin_um)
        if kind in ("internal", "through"):
            ax2.fill_between(
                centres,
                dmin,
                dmax,
                step="mid",
                color="#f4a582",
                alpha=0.8,
                label="depth range of label voxels",
            )
        else:
            ax2.step(
                centres,
                dmax,
                where="mid",
                color="#b2182b",
                lw=1.6,
                label="deepest label voxel per bin",
            )
            ax2.fill_between(centres, 0, dmax, step="mid", color="#f4a582", alpha=0.5)
            info["label_depth_um"] = float(np.nanmax(dmax))
    if front.size:
        a_f, d_f = depth_coordinates(front, crack, wafer, view)
        ax2.plot(a_f, d_f, "o", ms=4, mfc="#1060c0", mec="white", mew=0.6, label="front points")
    if kind in ("internal", "through"):
        for z in (0.0, thickness):  # the two wafer faces
            ax2.axhline(z, color="k", lw=0.8)
        ax2.set_ylim(thickness * 1.05, -thickness * 0.05)
        ax2.set_ylabel("z, depth below the entrance face (µm)")
    else:
        ax2.axhline(
            float(crack["depth_um"]),
            color="#333333",
            ls="--",
            lw=1.0,
            label=f"reported depth a = {float(crack['depth_um']):.1f} µm",
        )
        ax2.axhline(0.0, color="k", lw=1.0)
        ax2.invert_yaxis()
        ax2.set_ylabel(
            {
                "edge": "inward from the wafer edge (µm)",
                "surface_bottom": "height above the exit face (µm)",
            }.get(kind, "depth below the entrance face (µm)")
        )
    ax2.set_xlabel(
        "z, position through the thickness (µm)"
        if kind == "edge"
        else "along the surface trace (µm)"
    )
    ax2.set_title("depth profile", fontsize=10)
    ax2.legend(fontsize=8, loc="upper center", bbox_to_anchor=(0.5, -0.17), ncols=2, frameon=False)
    return fig, info


def registration_figure(reg: dict[str, np.ndarray], min_quality: float | None) -> Figure:
    """Origin drift (r0, c0 relative to the first frame) and quality score against frame."""
    fig = Figure(figsize=(10, 5.2), layout="constrained")
    ax1, ax2 = fig.subplots(2, 1, sharex=True)
    f = reg["frame"]
    flagged = reg["flagged"] > 0.5
    interp = reg["interpolated"] > 0.5
    for col, name, colour in (
        ("r0_px", "r0 (reference row)", "#1b7837"),
        ("c0_px", "c0 (entrance-face column)", "#762a83"),
    ):
        v = (
            reg[col] - reg[col][np.isfinite(reg[col])][0]
            if np.isfinite(reg[col]).any()
            else reg[col]
        )
        ax1.plot(f, v, color=colour, lw=1.2, label=name)
        if interp.any():
            ax1.plot(f[interp], v[interp], "o", mfc="none", mec=colour, ms=5)
    ax1.set_ylabel("origin drift from\nfirst frame (px)")
    ax1.legend(fontsize=8, loc="best")
    ax1.grid(alpha=0.3)
    ax2.plot(f, reg["quality"], color="#2166ac", lw=1.2, label="quality score")
    if flagged.any():
        ax2.plot(
            f[flagged],
            reg["quality"][flagged],
            "x",
            color="#d62800",
            ms=7,
            mew=1.8,
            label="flagged frame",
        )
    if interp.any():
        ax2.plot(
            f[interp],
            reg["quality"][interp],
            "o",
            mfc="none",
            mec="#555555",
            ms=6,
            label="origin interpolated",
        )
    if min_quality is not None:
        ax2.axhline(
            min_quality, color="#d62800", ls="--", lw=0.9, label=f"flag threshold {min_quality:g}"
        )
    ax2.set_ylim(
        bottom=min(
            0.0, float(np.nanmin(reg["quality"])) if np.isfinite(reg["quality"]).any() else 0.0
        )
    )
    ax2.set_xlabel("frame index")
    ax2.set_ylabel("quality score")
    ax2.legend(fontsize=8, loc="upper center", bbox_to_anchor=(0.5, -0.28), ncol=4, frameon=False)
    ax2.grid(alpha=0.3)
    return fig


def _series(d: dict, key: str) -> np.ndarray | None:
    v = d.get(key)
    if not isinstance(v, list) or not v or any(x is None for x in v):
        return None
    return np.asarray(v, float)


def assessment_figure(assessment: dict, crack_ids: list[int]) -> Figure | None:
    """Temperatures, stress at each crack and K_I against K_IC over the process.

    The K panel turns logarithmic when every K_I stays below a tenth of the smallest K_IC, so
    small stress intensities remain readable next to the toughness line.
    """
    tl = assessment.get("timeline") or {}
    per = {
        int(c["id"]): c for c in assessment.get("cracks", []) if isinstance(c, dict) and "id" in c
    }
    with_hist = [i for i in crack_ids if isinstance(per.get(i, {}).get("history"), dict)][
        :MAX_HISTORY_CRACKS
    ]
    t_tl = _series(tl, "time_s")
    T_c, T_e = _series(tl, "T_center_C"), _series(tl, "T_edge_C")
    has_t = t_tl is not None and T_c is not None and T_e is not None
    if not has_t and not with_hist:
        return None
    fig = Figure(figsize=(10, 8.4), layout="constrained")
    ax_t, ax_s, ax_k = fig.subplots(3, 1, sharex=True)
    if has_t:
        ax_t.plot(t_tl, T_c, color="#b2182b", lw=1.5, label="wafer centre")
        ax_t.plot(t_tl, T_e, color="#2166ac", lw=1.5, ls="--", label="wafer edge")
        sp = _series(tl, "setpoint_C")
        if sp is not None and sp.size == t_tl.size:
            ax_t.plot(t_tl, sp, color="#999999", lw=0.8, label="recipe set point")
        ax_d = ax_t.twinx()
        ax_d.plot(
            t_tl, T_e - T_c, color="#777777", lw=1.0, ls=":", label="edge − centre (right axis)"
        )
        ax_d.set_ylabel("edge − centre (°C)", color="#555555")
        h1, l1 = ax_t.get_legend_handles_labels()
        h2, l2 = ax_d.get_legend_handles_labels()
        ax_t.legend(h1 + h2, l1 + l2, fontsize=8, loc="best")
    else:
        ax_t.text(
            0.5,
            0.5,
            "no temperatures in assessment.json (stress given directly)",
            ha="center",
            va="center",
            transform=ax_t.transAxes,
            color="#666666",
        )
    ax_t.set_ylabel("temperature (°C)")
    rim = _series(tl, "sigma_theta_edge_MPa")
    if rim is not None and t_tl is not None and rim.size == t_tl.size:
        ax_s.plot(t_tl, rim, color="#444444", lw=0.9, ls=":", label="hoop stress at the rim")
    colours = [f"C{i % 10}" for i in range(len(with_hist))]
    constant_kic: dict[float, list[int]] = {}
    any_keq = False
    for cid, colour in zip(with_hist, colours, strict=True):
        c = per[cid]
        h = c["history"]
        t = _series(h, "time_s")
        if t is None:
            continue
        sig, K, Keq = (
            _series(h, "sigma_MPa"),
            _series(h, "K_I_MPa_sqrt_m"),
            _series(h, "K_eq_MPa_sqrt_m"),
        )
        if sig is not None:
            ax_s.plot(t, sig, color=colour, lw=1.3)
        if K is not None:
            ax_k.plot(t, K, color=colour, lw=1.4, label=f"crack {cid}")
            # K_eq = sqrt(max(K_I, 0)^2 + K_II^2): worth a curve only where shear adds to it
            if Keq is not None and np.nanmax(Keq - np.maximum(K, 0)) > 0.01 * max(
                np.nanmax(Keq), 1e-12
            ):
                ax_k.plot(t, Keq, color=colour, lw=1.0, ls=":", label="_K_eq")
                any_keq = True
        kic = h.get("K_IC_MPa_sqrt_m", c.get("K_IC_MPa_sqrt_m"))
        if isinstance(kic, list):  # temperature-dependent toughness: one curve per crack
            ax_k.plot(
                t, np.asarray(kic, float), color=colour, lw=1.0, ls="--", label=f"crack {cid}: K_IC"
            )
        elif kic is not None:
            constant_kic.setdefault(round(float(kic), 3), []).append(cid)
        if c.get("worst_time_s") is not None and c.get("K_I_max_MPa_sqrt_m") is not None:
            ax_k.plot([c["worst_time_s"]], [c["K_I_max_MPa_sqrt_m"]], "v", color=colour, ms=7)
    # cracks that share a constant K_IC share one labelled line (same-valued lines would hide each
    # other); labels alternate above and below their lines so close values stay legible
    for i, (kic, ids) in enumerate(sorted(constant_kic.items(), reverse=True)):
        ax_k.axhline(kic, color="#333333", lw=1.0, ls="--")
        above = i % 2 == 0
        ax_k.annotate(
            f"K_IC {kic:.2f} MPa·√m (crack{'s' if len(ids) > 1 else ''} {', '.join(map(str, ids))})",
            (1.0, kic),
            xycoords=("axes fraction", "data"),
            xytext=(-4, 2 if above else -2),
            textcoords="offset points",
            ha="right",
            va="bottom" if above else "top",
            fontsize=8,
            color="#333333",
        )
    ax_s.axhline(0, color="k", lw=0.6)
    ax_s.set_ylabel("stress normal to the\ncrack plane (MPa)")
    ax_k.set_ylabel("K_I (MPa·√m)")
    ax_k.set_xlabel("process time (s)")
    k_lines = [v for v in ax_k.get_lines() if v.get_label().startswith("crack")]
    k_data = max((float(np.nanmax(v.get_ydata())) for v in k_lines), default=0.0)
    kics = list(constant_kic) + [
        float(np.nanmin(v.get_ydata())) for v in k_lines if v.get_label().endswith("K_IC")
    ]
    if kics and 0 < k_data < 0.1 * min(kics):
        ax_k.set_yscale("log")
        ax_k.set_ylim(k_data * 1e-3, 4.0 * max(kics))
        ax_k.set_ylabel("K_I (MPa·√m, log scale)")
    else:
        ax_k.set_ylim(0.0, 1.12 * max([k_data] + kics) if (kics or k_data > 0) else 1.0)
    for ax in (ax_t, ax_s, ax_k):
        ax.grid(alpha=0.3)
    if ax_s.get_legend_handles_labels()[0]:  # the rim curve only: crack colours are shared below
        ax_s.legend(fontsize=8, loc="best")
    if with_hist:
        handles, labels = ax_k.get_legend_handles_labels()
        if any_keq:
            from matplotlib.lines import Line2D

            handles.append(Line2D([], [], color="#555555", lw=1.0, ls=":"))
            labels.append("K_eq where shear adds (same colour)")
        ax_k.legend(
            handles,
            labels,
            fontsize=8,
            loc="upper center",
            bbox_to_anchor=(0.5, -0.3),
            ncol=min(5, len(labels)),
            frameon=False,
        )
    return fig


# --- sections -----------------------------------------------------------------------------------


def _stage_result(run: dict | None, stage: str) -> dict:
    if not run:
        return {}
    res = (run.get("stages") or {}).get(stage, {}).get("result")
    return res if isinstance(res, dict) else {}


def g_calibration(
    G_computed: float | None, G_measured: float | None, tol: float
) -> tuple[str, float | None]:
    """Verdict on the measured section-band width as a calibration of G (SPEC section 5)."""
    if G_computed is None or G_measured is None or not G_computed:
        return "not measured (no section band to measure, or registration did not report it)", None
    rel = G_measured / G_computed - 1.0
    if abs(rel) <= tol:
        return (
            f"consistent: measured G differs by {rel * 100:+.1f} % (within {tol * 100:.0f} %)",
            rel,
        )
    return (
        f"CHECK: measured G differs by {rel * 100:+.1f} % (more than {tol * 100:.0f} %); check "
        "thickness, energy, reflection and detector tilt, or set detector.depth_magnification"
    ), rel


def _scan_rows(inp: Inputs, vv: VolumeView | None) -> list[tuple[str, str]]:
    run = inp.run or {}
    acq = run.get("acquisition") or {}
    geo = run.get("geometry") or {}
    beam = acq.get("beam") or {}
    dacq = inp.defects["acquisition"]
    reg = inp.registration
    rows: list[tuple[str, str]] = []
    if reg is not None and reg["position_um"].size:
        pos = reg["position_um"]
        steps = np.diff(pos)
        step = f"{np.median(steps):.2f} µm (median)" if steps.size else "&ndash;"
        rows.append(("frames", str(pos.size)))
        rows.append(("stage positions", f"{pos[0]:.1f} to {pos[-1]:.1f} µm, step {step}"))
    else:
        scan = acq.get("scan") or {}
        rows.append(("frames", "not recorded (no registration.csv)"))
        if scan:
            step = scan.get("step_um")
            rows.append(
                (
                    "stage positions",
                    f"start {_num(scan.get('start_um'))} µm, "
                    + (f"step {_num(step, 2)} µm" if step is not None else "explicit positions"),
                )
            )
    rows.append(("photon energy", f"{_num(geo.get('energy_keV', dacq['energy_keV']), 3)} keV"))
    rows.append(("reflection", _hkl(dacq["reflection"])))
    rows.append(
        (
            "diffraction geometry",
            _esc(
                dacq["geometry"] + (" (Laue)" if dacq["geometry"] == "transmission" else " (Bragg)")
            ),
        )
    )
    if geo:
        rows.append(("Bragg angle θ_B", f"{_num(geo.get('theta_B_deg'), 3)}°"))
        rows.append(("incidence ψ0 (from +z)", f"{_num(geo.get('psi0_deg'), 3)}°"))
        rows.append(("exit ψh (from +z)", f"{_num(geo.get('psi_h_deg'), 3)}°"))
        rows.append(("detector tilt δ", f"{_num(geo.get('tilt_deg'), 2)}°"))
    else:
        from pipeline.geometry import bragg_angle_deg

        try:
            tb = bragg_angle_deg(tuple(dacq["reflection"]), float(dacq["energy_keV"]))
            rows.append(
                ("Bragg angle θ_B", f"{tb:.3f}° (computed from the defect export; run.json absent)")
            )
        except ValueError:
            pass
    if beam.get("slit_width_um") is not None:
        rows.append(("slit width", f"{_num(beam['slit_width_um'])} µm"))
    det = acq.get("detector") or {}
    if det.get("pixel_um"):
        rows.append(("detector pixel [row, column]", _vec(det["pixel_um"], 2) + " µm"))
    reg_res = _stage_result(inp.run, "register")
    G_comp = reg_res.get("G_computed", geo.get("G_computed"))
    G_meas = reg_res.get("G_measured")
    G_used = geo.get("G")
    tol = float(
        ((run.get("config") or {}).get("registration") or {}).get("g_tolerance", G_TOLERANCE)
    )
    if G_comp is not None or G_used is not None:
        used = _num(G_used, 4)
        if G_used is not None and G_comp is not None and abs(G_used - G_comp) > 1e-9:
            used += " (override from detector.depth_magnification)"
        rows.append(("depth magnification G used", used))
        rows.append(("G computed (SPEC 5)", _num(G_comp, 4)))
        rows.append(
            (
                "G measured (section-band width)",
                _num(G_meas, 4)
                + (
                    f" (band {_num(reg_res.get('band_width_px'), 1)} px)"
                    if reg_res.get("band_width_px") is not None
                    else ""
                ),
            )
        )
        verdict, rel = g_calibration(G_comp, G_meas, tol)
        cls = "ok" if rel is not None and abs(rel) <= tol else ("warn" if rel is not None else "")
        rows.append(("G calibration", f'<span class="{cls}">{_esc(verdict)}</span>'))
    if vv is not None:
        vox = vv.meta["voxel_um"]
        rows.append(("voxel size [dz, dy, dx]", _vec(vox, 2) + " µm"))
    else:
        rows.append(
            ("voxel size [dz, dy, dx]", _vec(dacq["voxel_um"], 2) + " µm (from the defect export)")
        )
    return rows


def _wafer_rows(defects: dict) -> list[tuple[str, str]]:
    w = defects["wafer"]
    cen = w.get("center_xy_mm")
    src = w.get("center_source")
    return [
        ("diameter", f"{_num(w['diameter_mm'])} mm"),
        ("thickness", f"{_num(w['thickness_um'])} µm"),
        (
            "crystal: along +z / along +x",
            f"[{' '.join(map(str, w['crystal']['z_uvw']))}] / "
            f"[{' '.join(map(str, w['crystal']['x_uvw']))}]",
        ),
        (
            "wafer centre in the scan frame",
            ("unknown" if cen is None else _vec(cen, 3) + " mm")
            + (f" ({_esc(src.replace('_', ' '))})" if src else ""),
        ),
    ]


def _counts_table(defects: dict) -> str:
    kinds: dict[str, int] = {}
    for c in defects["cracks"]:
        kinds[c["kind"]] = kinds.get(c["kind"], 0) + 1
    rows = [[_esc(_KIND_TEXT.get(k, k)), str(v)] for k, v in sorted(kinds.items())]
    rows.append(["<b>cracks, all kinds</b>", f"<b>{len(defects['cracks'])}</b>"])
    loops = defects["dislocation_loops"]
    at_surface = sum(1 for d in loops if d.get("meets_surface"))
    rows.append(
        [
            "dislocation loops",
            f"{len(loops)}" + (f" ({at_surface} meet a surface)" if loops else ""),
        ]
    )
    rows.append(["slip bands", str(len(defects["slip_bands"]))])
    return _table(["defect kind", "count"], rows, "narrow")


def _assessed(inp: Inputs) -> dict[int, dict]:
    if not inp.assessment:
        return {}
    return {
        int(c["id"]): c
        for c in inp.assessment.get("cracks", [])
        if isinstance(c, dict) and "id" in c
    }


def _notes_text(notes: Any) -> str:
    if not notes:
        return ""
    if isinstance(notes, str):
        return _esc(notes)
    return "; ".join(_esc(n) for n in notes)


def _governing_margin(c: dict) -> float | None:
    """The margin the verdict rests on: K_IC over the larger of K_I,max and K_eq,max."""
    ms = [c.get(k) for k in ("margin", "margin_eq") if isinstance(c.get(k), int | float)]
    return min(ms) if ms else None


def _verdict_summary(inp: Inputs) -> str:
    if inp.assessment is None:
        return _note(
            f"No thermal-process assessment: {_esc(inp.assessment_note)}. "
            "Give a recipe (<code>--recipe</code> or <code>assess.recipe</code>) to get "
            "verdicts."
        )
    per = _assessed(inp)
    counts: dict[str, int] = {}
    for c in per.values():
        counts[c.get("verdict", "?")] = counts.get(c.get("verdict", "?"), 0) + 1
    margins = [(m, cid) for cid, c in per.items() if (m := _governing_margin(c)) is not None]
    parts = [f"<p>Wafer verdict: {_verdict_html(inp.assessment.get('wafer_verdict'))}"]
    if counts:
        parts.append(
            " &mdash; "
            + ", ".join(f"{n} {_esc(_VERDICT_TEXT.get(v, v))}" for v, n in sorted(counts.items()))
        )
    if margins:
        m, cid = min(margins)
        parts.append(
            f". Smallest margin K_IC/K_I,max (K_eq,max where mixed mode governs) = <b>{_margin(m)}</b> at "
            f'<a href="#crack-{cid}">crack {cid}</a> (1 or less: the crack grows)'
        )
    parts.append(".</p>")
    skipped = inp.assessment.get("skipped_cracks") or []
    if skipped:
        parts.append(
            _note(
                "Not assessed: "
                + "; ".join(
                    f"crack {_esc(x.get('id'))} ({_esc(x.get('reason', ''))})"
                    for x in skipped
                    if isinstance(x, dict)
                )
                + "."
            )
        )
    return "".join(parts)


def _crack_rows(inp: Inputs) -> list[list[str]]:
    per = _assessed(inp)
    rows = []
    for c in inp.defects["cracks"]:
        a = per.get(int(c["id"]), {})
        pos = c.get("position", {})
        u = c.get("uncertainty", {})
        rows.append(
            [
                f'<a href="#crack-{c["id"]}">{c["id"]}</a>',
                _esc(c["kind"].replace("_", " ")),
                _num(pos.get("r_mm"), 2),
                _num(pos.get("angle_deg"), 1),
                _num(pos.get("distance_to_edge_um"), 0),
                f"<span class=nw>{_num(c['depth_um'])} ± {_num(u.get('depth_um'))}</span>",
                f"<span class=nw>{_num(c['length_um'])} ± {_num(u.get('length_um'))}</span>",
                _num(c["front"]["aspect"], 2),
                f"<span class=nw>{_num(c['plane']['inclination_deg'])} ± {_num(u.get('inclination_deg'))}</span>",
                _num(c["plane"]["azimuth_deg"]),
                _hkl(c["plane"]["nearest_hkl"]),
                _margin(a.get("margin")),
                _verdict_html(a.get("verdict")),
                _esc(c.get("review", {}).get("status", "")),
            ]
        )
    return rows


_CRACK_HEADERS = [
    "id",
    "kind",
    "r (mm)",
    "angle (°)",
    "to edge (µm)",
    "depth a (µm)",
    "length 2c (µm)",
    "a/c",
    "inclination (°)",
    "azimuth (°)",
    "plane",
    "margin K_IC/K_I",
    "verdict",
    "review",
]


def _defects_section(inp: Inputs) -> str:
    d = inp.defects
    out = ['<section id="defects"><h2>Defects found</h2>', _counts_table(d)]
    if d["cracks"]:
        out.append("<h3>Cracks</h3>")
        out.append(_table(_CRACK_HEADERS, _crack_rows(inp), "wide"))
        out.append(
            _note(
                "Depth a: deepest reach normal to the face (or edge) the crack starts from; "
                "length 2c: extent along that face; ± one sigma. Inclination: angle between "
                "the crack plane and the wafer surface (90° = perpendicular); azimuth: surface "
                "trace from +x toward +y. Margin = K_IC / K_I,max (below 1: grows)."
            )
        )
    else:
        out.append(_note("No cracks were found."))
    if d["dislocation_loops"]:
        out.append("<h3>Dislocation loops</h3>")
        rows = [
            [
                str(x["id"]),
                _vec(x["center_um"]),
                _num(x["diameter_um"]),
                _hkl(x["plane"]["nearest_hkl"]),
                _num(x["plane"]["inclination_deg"]),
                "yes" if x["meets_surface"] else "no",
            ]
            for x in d["dislocation_loops"]
        ]
        out.append(
            _table(
                [
                    "id",
                    "centre [x, y, z] (µm)",
                    "diameter (µm)",
                    "plane",
                    "inclination (°)",
                    "meets a surface",
                ],
                rows,
            )
        )
    if d["slip_bands"]:
        out.append("<h3>Slip bands</h3>")
        rows = [
            [str(x["id"]), _vec(x["direction"], 3), _num(x["extent_um"]), str(x["count"])]
            for x in d["slip_bands"]
        ]
        out.append(_table(["id", "direction (unit, wafer frame)", "extent (µm)", "lines"], rows))
    out.append("</section>")
    return "".join(out)


def _projection_section(inp: Inputs, vv: VolumeView | None, vv_note: str, figs: _Figures) -> str:
    out = ['<section id="projections"><h2>Volume projections</h2>']
    if vv is None:
        out.append(_note(f"No projections: {vv_note}."))
        out.append("</section>")
        return "".join(out)
    lv = vv.meta["levels"][vv.level]
    sz = " × ".join(str(s) for s in vv.image.shape)
    level_txt = (
        f"pyramid level {vv.level} ({sz} voxels in z, y, x; voxel {_vec(lv['scale'], 2)} µm)"
    )
    legend = (
        "Outlines: cracks red-orange, dislocation loops blue, slip bands yellow; numbers are the "
        "defect ids of the tables."
    )
    unlisted = sorted(set(vv.boxes) - set(_all_defects(inp.defects)))
    if unlisted:
        shown = ", ".join(map(str, unlisted[:12])) + (" ..." if len(unlisted) > 12 else "")
        legend += (
            f" Magenta: {len(unlisted)} labelled component(s) that defects.json does not list "
            f"(ids {shown}): in the label image, not in the export."
        )
    if vv.note:
        out.append(_note(vv.note))
    fig, equal = projection_figure(vv, inp.defects, "z")
    scale = "" if equal else " Axes not to scale (the region is very elongated)."
    out.append(
        figs.block(
            fig,
            f"Maximum-intensity projection along z (seen from the entrance face; "
            f"y increases downward), {level_txt}. {legend}{scale}",
            "maximum-intensity projection along z",
            "mip-z",
        )
    )
    fig, equal = projection_figure(vv, inp.defects, "x")
    scale = "" if equal else " Axes not to scale (the region is very elongated)."
    out.append(
        figs.block(
            fig,
            f"Maximum-intensity projection along x (side view across the scan; "
            f"depth increases downward; dashed: wafer faces), {level_txt}. {legend}{scale}",
            "maximum-intensity projection along x",
            "mip-x",
        )
    )
    out.append("</section>")
    return "".join(out)


def _crack_sections(inp: Inputs, vv: VolumeView | None, figs: _Figures) -> str:
    cracks = inp.defects["cracks"]
    out = ['<section id="cracks"><h2>Crack by crack</h2>']
    if not cracks:
        out.append(_note("No cracks were found."))
        out.append("</section>")
        return "".join(out)
    per = _assessed(inp)
    wafer = inp.defects["wafer"]
    vol_path = inp.root / rf.VOLUME
    voxel = vv.meta["voxel_um"] if vv is not None else inp.defects["acquisition"]["voxel_um"]
    if len(cracks) > MAX_CRACK_FIGURES:
        out.append(
            _note(
                f"Figures for the first {MAX_CRACK_FIGURES} of {len(cracks)} cracks; the "
                "table above lists all of them."
            )
        )
    for i, c in enumerate(cracks):
        cid = int(c["id"])
        a = per.get(cid, {})
        out.append(
            f'<section class="crack" id="crack-{cid}"><h3>Crack {cid}: '
            f"{_esc(_KIND_TEXT.get(c['kind'], c['kind']))}</h3>"
        )
        rows = [
            ("centroid [x, y, z]", _vec(c["centroid_um"]) + " µm"),
            ("depth a / length 2c", f"{_num(c['depth_um'])} µm / {_num(c['length_um'])} µm"),
            (
                "front semi-axes a, c; aspect a/c; fit rms",
                f"{_num(c['front']['a_um'])} µm, {_num(c['front']['c_um'])} µm; {_num(c['front']['aspect'], 2)}; "
                f"{_num(c['front']['fit_rms_um'])} µm ({_esc(c['front'].get('shape', 'shape not given').replace('_', ' '))})",
            ),
            ("thickness span z", _vec(c["thickness_span_um"]) + " µm"),
            (
                "plane",
                f"{_hkl(c['plane']['nearest_hkl'])} within {_num(c['plane']['misfit_deg'])}°, "
                f"inclination {_num(c['plane']['inclination_deg'])}°, azimuth {_num(c['plane']['azimuth_deg'])}°, "
                f"normal {_vec(c['plane']['normal'], 3)}",
            ),
        ]
        if a:
            plane = f" {_esc(a['K_IC_plane'])}" if a.get("K_IC_plane") else ""
            rows.append(
                (
                    "assessment",
                    f"{_model_text(a.get('model', ''))}: K_I,max "
                    f"{_num(a.get('K_I_max_MPa_sqrt_m'), 3)} MPa·√m vs K_IC{plane} "
                    f"{_num(a.get('K_IC_MPa_sqrt_m'), 3)} MPa·√m, margin "
                    f"{_margin(a.get('margin'))} &rarr; {_verdict_html(a.get('verdict'))}",
                )
            )
        review = c.get("review", {})
        rows.append(
            (
                "review",
                _esc(review.get("status", ""))
                + (f": {_esc(review['note'])}" if review.get("note") else ""),
            )
        )
        out.append(_kv(rows))
        if i >= MAX_CRACK_FIGURES:
            out.append("</section>")
            continue
        try:
            view = plane_view(c, wafer)
        except ValueError as exc:
            out.append(_note(f"No front plot: {_esc(exc)}."))
            out.append("</section>")
            continue
        vox = np.empty((0, 3))
        level_txt = "no label voxels (volume or labels absent)"
        if vv is not None and vv.labels is not None:
            vox, lev = crack_voxels_um(vol_path, vv, cid)
            level_txt = (
                f"{len(vox)} label voxels from pyramid level {lev}"
                if len(vox)
                else "this id has no voxels in the label image"
            )
            voxel = vv.meta["levels"][lev]["scale"]
        fig, info = crack_figure(c, wafer, view, vox, voxel)
        rms = info["front_rms_um"]
        cap = (
            f"Crack {cid}. Left: the front points of defects.json projected onto the crack plane "
            f"(normal {_vec(c['plane']['normal'], 3)}, surface trace at azimuth "
            f"{_num(c['plane']['azimuth_deg'])}°) with the fitted ellipse of semi-axes a = "
            f"{_num(c['front']['a_um'])} µm and c = {_num(c['front']['c_um'])} µm, clipped to the wafer"
        )
        cap += (
            f"; rms distance of the front points from the drawn ellipse {rms:.1f} µm "
            f"(the fit reported {_num(c['front']['fit_rms_um'])} µm)."
            if rms is not None
            else "."
        )
        if view.note:
            cap += f" Note: {_esc(view.note)}."
        cap += (
            " Right: depth normal to the face the crack starts from, along the crack, from "
            f"{_esc(level_txt)}; dashed: the reported depth."
        )
        if info["label_depth_um"] is not None:
            cap += f" Deepest label voxel centre: {info['label_depth_um']:.1f} µm."
        out.append(figs.block(fig, cap, f"front fit and depth profile of crack {cid}"))
        out.append("</section>")
    out.append("</section>")
    return "".join(out)


def _registration_section(inp: Inputs, figs: _Figures) -> str:
    out = ['<section id="registration"><h2>Registration over the scan</h2>']
    res = _stage_result(inp.run, "register")
    reg = inp.registration
    if reg is None:
        out.append(_note(f"No registration plot: {_esc(inp.registration_note)}."))
    else:
        min_q = ((inp.run or {}).get("config") or {}).get("registration", {}).get("min_quality")
        fig = registration_figure(reg, min_q)
        n = reg["frame"].size
        n_flag = int((reg["flagged"] > 0.5).sum())
        n_int = int((reg["interpolated"] > 0.5).sum())
        out.append(
            figs.block(
                fig,
                f"Frame origins found by registration over the {n} frames: drift of the reference row r0 "
                f"and entrance-face column c0 from the first frame (top), and the registration quality "
                f"score (bottom). {n_flag} frame(s) flagged, {n_int} origin(s) interpolated from neighbours "
                "(hollow circles).",
                "registration origin drift and quality",
                "registration-plot",
            )
        )
        q = reg["quality"][np.isfinite(reg["quality"])]
        rows = [
            ("frames", str(n)),
            (
                "quality score: median / minimum",
                f"{np.median(q):.3f} / {q.min():.3f}" if q.size else "&ndash;",
            ),
            ("r0 range", f"{np.nanmin(reg['r0_px']):.2f} to {np.nanmax(reg['r0_px']):.2f} px"),
            ("c0 range", f"{np.nanmin(reg['c0_px']):.2f} to {np.nanmax(reg['c0_px']):.2f} px"),
        ]
        flagged = [int(f) for f in reg["frame"][reg["flagged"] > 0.5]]
        rows.append(
            (
                "flagged frames",
                ", ".join(map(str, flagged[:40])) + (" ..." if len(flagged) > 40 else "") or "none",
            )
        )
        out.append(_kv(rows))
    warnings = res.get("warnings") or []
    if warnings:
        out.append(_bullets("Warnings from registration:", warnings))
    out.append("</section>")
    return "".join(out)


def _bullets(title: str, items: list[str]) -> str:
    """A bold title and an HTML list of escaped items."""
    return f"<p><b>{_esc(title)}</b></p><ul>" + "".join(f"<li>{_esc(i)}</li>" for i in items) + "</ul>"


def _flatten(d: Any, prefix: str = "") -> list[tuple[str, Any]]:
    if isinstance(d, dict):
        out: list[tuple[str, Any]] = []
        for k, v in d.items():
            out += _flatten(v, f"{prefix}{k}.")
        return out
    return [(prefix.rstrip("."), d)]


def _short(v: Any, n: int = 160) -> str:
    if isinstance(v, float):
        text = f"{v:.6g}"
    elif isinstance(v, list) and len(v) > 12:
        text = f"[{len(v)} values]"
    else:
        text = str(v)
    return text if len(text) <= n else text[: n - 1] + "…"


def _sourced(v: dict) -> str:
    """``{"value_GPa": 150, "source": ...}`` -> "150 GPa &mdash; source" (units from the key)."""
    units = {"GPa": "GPa", "per_K": "/K", "MPa": "MPa", "C": "°C", "MPa_sqrt_m": "MPa·√m"}
    parts = []
    for k, x in v.items():
        if k == "value" or k.startswith("value_"):
            u = k.removeprefix("value").removeprefix("_")
            parts.append(f"{_short(x)} {units.get(u, u)}".strip())
    rest = [
        f"{_short(x)}"
        for k, x in v.items()
        if not (k == "value" or k.startswith("value_")) and x not in (None, "")
    ]
    return _esc(" — ".join(x for x in (", ".join(parts), "; ".join(rest)) if x))


def _model_text(name: Any, short: bool = False) -> str:
    table = _MODEL_SHORT if short else _MODEL_TEXT
    return _esc(table.get(str(name), str(name).replace("_", " ")))


def _critical_dT(v: Any) -> str:
    """Critical edge-to-centre difference, °C; beyond ±1000 °C it is out of any process's reach."""
    if isinstance(v, int | float) and math.isfinite(v) and abs(v) > 1000:
        return "&gt; 1000" if v > 0 else "&lt; &minus;1000"
    return _num(v, 0)


def _input_rows(inputs: dict) -> list[tuple[str, str]]:
    """The assessment inputs a reader needs first: load source, models, material data."""
    rows: list[tuple[str, str]] = []
    for key, label in (
        ("source", "load source"),
        ("path", "file"),
        ("thermal_model", "thermal model"),
        ("stress_model", "stress model"),
    ):
        if inputs.get(key) is not None:
            rows.append((label, _esc(inputs[key])))
    mat = inputs.get("material") or {}
    for key, label in (("E", "Young's modulus"), ("alpha", "thermal expansion")):
        v = mat.get(key)
        if isinstance(v, dict):
            rows.append((label, _sourced(v)))
    kic = mat.get("K_IC_MPa_sqrt_m")
    if isinstance(kic, dict):
        for fam, v in kic.items():
            if isinstance(v, dict):
                rows.append(
                    (
                        f"K_IC {fam} (MPa·√m)",
                        f"{_num(v.get('value'), 2)} &mdash; {_esc(v.get('source', ''))}"
                        + (f" ({_esc(v['status'])})" if v.get("status") else ""),
                    )
                )
            else:
                rows.append((f"K_IC {fam} (MPa·√m)", _num(v, 2)))
    return rows


def _process_rows(w: dict) -> list[tuple[str, str]]:
    rows: list[tuple[str, str]] = []
    if w.get("dT_edge_center_min_C") is not None:
        rows.append(
            (
                "edge − centre temperature, min / max (°C)",
                f"{_num(w['dT_edge_center_min_C'])} at {_num(w.get('dT_edge_center_min_time_s'))} s / "
                f"{_num(w.get('dT_edge_center_max_C'))} at {_num(w.get('dT_edge_center_max_time_s'))} s",
            )
        )
    if w.get("sigma_theta_edge_max_MPa") is not None:
        rows.append(
            (
                "hoop stress at the rim, min / max (MPa)",
                f"{_num(w.get('sigma_theta_edge_min_MPa'), 2)} at {_num(w.get('sigma_theta_edge_min_time_s'))} s / "
                f"{_num(w['sigma_theta_edge_max_MPa'], 2)} at {_num(w.get('sigma_theta_edge_max_time_s'))} s",
            )
        )
    slip = w.get("slip")
    if isinstance(slip, dict) and slip.get("risk"):
        txt = _esc(_SLIP_TEXT.get(str(slip["risk"]), str(slip["risk"]).replace("_", " ")))
        if slip.get("tau_max_MPa") is not None:
            txt += (
                f": largest resolved shear {_num(slip['tau_max_MPa'], 2)} MPa on {_esc(slip.get('system', ''))}"
                f" at {_num(slip.get('time_s'))} s"
                + (f", {_num(slip.get('T_C'), 0)} °C" if slip.get("T_C") is not None else "")
                + (
                    f" (critical {_num(slip.get('tau_c_MPa'), 2)} MPa)"
                    if slip.get("tau_c_MPa") is not None
                    else ""
                )
            )
        rows.append(("thermal slip check, {111}<110> systems", txt))
    notes = w.get("notes")
    if notes:
        rows.append(("notes", _notes_text(notes)))
    return rows


def _assessment_section(inp: Inputs, figs: _Figures) -> str:
    out = ['<section id="assessment"><h2>Thermal-process assessment</h2>']
    a = inp.assessment
    if a is None:
        out.append(
            _note(
                f"No assessment: {_esc(inp.assessment_note)}. Run "
                "<code>crackstack assess defects.json --recipe recipe.yaml</code>, or give "
                "<code>--recipe</code> to <code>crackstack run</code>, to get K_I, margins and "
                "verdicts."
            )
        )
        out.append("</section>")
        return "".join(out)
    out.append(_verdict_summary(inp))
    inputs = a.get("inputs")
    if isinstance(inputs, dict) and inputs:
        out.append("<h3>Inputs</h3>" + _kv(_input_rows(inputs)))
        flat = [(k, v) for k, v in _flatten(inputs) if k]
        out.append(
            "<details><summary>All assessment inputs ("
            + str(len(flat))
            + " values)</summary>"
            + _kv([(k, _esc(_short(v))) for k, v in flat])
            + "</details>"
        )
    w = a.get("wafer")
    if isinstance(w, dict):
        rows = _process_rows(w)
        if rows:
            out.append("<h3>Process summary</h3>" + _kv(rows))
    per = [c for c in a.get("cracks", []) if isinstance(c, dict)]
    if per:
        mixed = any((c.get("K_II_max_MPa_sqrt_m") or 0) > 0 for c in per)
        headers = [
            "crack",
            "K solution",
            "plane of K_IC",
            "K_I,max (MPa·√m)",
            "K_IC (MPa·√m)",
            "margin K_IC/K_I,max",
        ]
        if mixed:
            headers += ["K_eq,max (MPa·√m)", "margin K_IC/K_eq,max"]
        headers += [
            "worst time (s)",
            "T at worst (°C)",
            "σ at worst (MPa)",
            "critical ΔT (°C)",
            "verdict",
        ]
        rows = []
        for c in per:
            r = [
                f'<a href="#crack-{_esc(c.get("id"))}">{_esc(c.get("id"))}</a>',
                _model_text(c.get("model", ""), short=True),
                _esc(c.get("K_IC_plane", "")),
                _num(c.get("K_I_max_MPa_sqrt_m"), 3),
                _num(c.get("K_IC_MPa_sqrt_m"), 3),
                _margin(c.get("margin")),
            ]
            if mixed:
                r += [_num(c.get("K_eq_max_MPa_sqrt_m"), 3), _margin(c.get("margin_eq"))]
            r += [
                _num(c.get("worst_time_s"), 1),
                _num(c.get("T_at_worst_C"), 0),
                _num(c.get("sigma_at_worst_MPa"), 2),
                _critical_dT(c.get("critical_dT_C")),
                _verdict_html(c.get("verdict")),
            ]
            rows.append(r)
        out.append("<h3>Per crack</h3>")
        out.append(_table(headers, rows, "wide"))
        out.append(
            _note(
                "K solution: the stress-intensity solution used (full name and reference under "
                "each crack). Critical ΔT: the edge-minus-centre temperature difference, with the "
                "same profile shape, at which the crack would reach K_IC (negative: edge colder). "
                "The verdict uses the smaller margin."
            )
        )
        noted = [(c.get("id"), c.get("notes")) for c in per if c.get("notes")]
        if noted:
            out.append(
                '<h3>Notes on the assessment</h3><ul class="small">'
                + "".join(
                    f'<li><a href="#crack-{_esc(i)}">crack {_esc(i)}</a>: {_notes_text(n)}</li>'
                    for i, n in noted
                )
                + "</ul>"
            )
    ids = [int(c["id"]) for c in inp.defects["cracks"]]
    by_id = {int(c["id"]): c for c in per if "id" in c}
    ids.sort(
        key=lambda i: (
            _governing_margin(by_id.get(i, {})) is None,
            _governing_margin(by_id.get(i, {})) or 0.0,
        )
    )
    with_hist = [i for i in ids if isinstance(by_id.get(i, {}).get("history"), dict)]
    fig = assessment_figure(a, ids)
    subset = ""
    if len(with_hist) > MAX_HISTORY_CRACKS:
        shown = ", ".join(map(str, with_hist[:MAX_HISTORY_CRACKS]))
        subset = (
            f" Shown: the {MAX_HISTORY_CRACKS} of {len(with_hist)} cracks with the smallest "
            f"margins (cracks {shown})."
        )
    if fig is None:
        out.append(_note("assessment.json holds no timeline or per-crack history to plot."))
    else:
        out.append(
            figs.block(
                fig,
                "Over the thermal process: temperature at the wafer centre and edge (top); stress normal "
                "to each crack's plane at the crack (hoop stress for radial cracks; tension positive) "
                "(middle); stress intensity K_I of each crack (triangle: K_I,max) against the fracture "
                "toughness K_IC (dashed, labelled with the cracks it applies to; dotted: K_eq where shear "
                "adds to it) (bottom; logarithmic when all K_I stay below a tenth of K_IC). A crack grows "
                "where its K_I reaches its K_IC." + subset,
                "temperature, stress and stress intensity over time",
                "assessment-plot",
            )
        )
    own = cautions()
    theirs = a.get("cautions") or []
    theirs = [theirs] if isinstance(theirs, str) else [str(c) for c in theirs if c]
    extra = [c for c in theirs if c not in own]
    if extra:
        out.append(_bullets("Cautions from the assessment:", extra))
    out.append("</section>")
    return "".join(out)


def _record_section(inp: Inputs) -> str:
    out = ['<section id="record"><h2>Run record</h2>']
    run = inp.run
    if not run:
        out.append(_note(f"No run record: {_esc(inp.run_note or 'run.json is empty')}."))
    else:
        stages = run.get("stages") or {}
        if stages:
            rows = [
                [
                    _esc(s),
                    _esc(e.get("status", "")),
                    _num(e.get("elapsed_s"), 1),
                    _esc(e.get("finished", "")),
                    str(e.get("skipped_runs", 0)),
                ]
                for s, e in stages.items()
                if isinstance(e, dict)
            ]
            out.append(
                _table(
                    ["stage", "status", "time (s)", "finished (UTC)", "times skipped as complete"],
                    rows,
                )
            )
        sw = run.get("software") or {}
        if sw:
            out.append(
                _kv([("software", ", ".join(f"{_esc(k)} {_esc(v)}" for k, v in sw.items()))])
            )
        if run.get("acquisition_file"):
            out.append(_kv([("acquisition file", _esc(run["acquisition_file"]))]))
    out.append("</section>")
    return "".join(out)


_CSS = """
:root { --ink: #1c1f23; --muted: #5a6069; --rule: #c9ced6; --head: #eef1f5; --accent: #24476b; }
* { box-sizing: border-box; }
body { font-family: "DejaVu Sans", "Helvetica Neue", Arial, sans-serif; color: var(--ink);
       line-height: 1.45; max-width: 1120px; margin: 1.5em auto 4em; padding: 0 1.5em; font-size: 15px; }
h1 { font-size: 1.65em; margin: 0 0 .2em; color: var(--accent); }
h2 { font-size: 1.3em; margin: 2em 0 .6em; padding-bottom: .2em; border-bottom: 2px solid var(--accent);
     color: var(--accent); }
h3 { font-size: 1.08em; margin: 1.4em 0 .4em; }
.sub { color: var(--muted); margin: 0 0 1em; }
nav.toc { border: 1px solid var(--rule); background: #fafbfc; padding: .6em 1.2em; margin: 1em 0; }
nav.toc ol { margin: .3em 0; padding-left: 1.4em; }
nav.toc ol ol { columns: 4; font-size: .92em; }
a { color: #1f5fa8; }
table { border-collapse: collapse; margin: .5em 0 1em; font-size: .9em; }
th, td { border: 1px solid var(--rule); padding: .25em .55em; text-align: left; vertical-align: top; }
thead th { background: var(--head); }
table.kv th { background: var(--head); font-weight: normal; width: 17em; }
table.wide { width: 100%; font-size: .84em; }
table.wide th { white-space: normal; }
.nw { white-space: nowrap; }
.tablewrap { overflow-x: auto; }
figure { margin: 1em 0 1.8em; break-inside: avoid; page-break-inside: avoid; }
figure img { display: block; max-width: 100%; height: auto; border: 1px solid var(--rule); }
figcaption { font-size: .88em; color: #333; margin-top: .35em; max-width: 62em; }
.note { color: var(--muted); font-style: italic; }
ul.small { font-size: .86em; }
.caution { border-left: 6px solid #a65b00; background: #fff7ec; padding: .5em 1em; margin: 1em 0; }
.caution p { margin: .3em 0; }
.verdict { font-weight: bold; }
.v-grows { color: #a40000; }
.v-does_not_grow { color: #1d6b2a; }
.v-outside_validity { color: #8a5a00; }
.ok { color: #1d6b2a; }
.warn { color: #a40000; font-weight: bold; }
.grid2 { display: flex; gap: 2em; flex-wrap: wrap; align-items: flex-start; }
section.crack { break-inside: avoid-page; }
code { background: #f1f3f5; padding: 0 .25em; }
details { margin: .3em 0 1em; }
details summary { cursor: pointer; color: var(--muted); }
@media print {
  body { max-width: none; margin: 0; font-size: 10.5pt; }
  nav.toc { break-after: page; }
  h2 { break-after: avoid; }
  section.crack { break-before: auto; }
  a { color: inherit; text-decoration: none; }
  table.wide { font-size: 8pt; }
}
"""


def _things_to_check(inp: Inputs) -> list[str]:
    """Warnings a reader should see before the numbers: registration, G calibration, reviews."""
    out: list[str] = []
    res = _stage_result(inp.run, "register")
    for w in res.get("warnings") or []:
        out.append(f'registration: {_esc(w)} (<a href="#registration">plot</a>)')
    run = inp.run or {}
    tol = float(
        ((run.get("config") or {}).get("registration") or {}).get("g_tolerance", G_TOLERANCE)
    )
    verdict, rel = g_calibration(res.get("G_computed"), res.get("G_measured"), tol)
    if rel is not None and abs(rel) > tol:
        out.append(f'depth magnification: {_esc(verdict)} (<a href="#scan">scan and geometry</a>)')
    n_unrev = sum(
        1 for c in inp.defects["cracks"] if c.get("review", {}).get("status") == "unreviewed"
    )
    if n_unrev:
        out.append(
            f"{n_unrev} of {len(inp.defects['cracks'])} cracks not yet reviewed "
            "(<code>crackstack view</code> to accept or reject them)"
        )
    return out


def build_report_html(inp: Inputs, vv: VolumeView | None, vv_note: str) -> str:
    """The whole report as one HTML string."""
    figs = _Figures()
    d = inp.defects
    title = f"Crack report: {inp.root.resolve().name}"
    made = datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC")
    toc_cracks = "".join(
        f'<li><a href="#crack-{c["id"]}">crack {c["id"]}</a></li>' for c in d["cracks"]
    )
    toc = (
        '<nav class="toc"><b>Contents</b><ol>'
        '<li><a href="#summary">The run at a glance</a></li>'
        '<li><a href="#cautions">Cautions</a></li>'
        '<li><a href="#scan">Scan and geometry</a></li>'
        '<li><a href="#defects">Defects found</a></li>'
        '<li><a href="#projections">Volume projections</a></li>'
        f'<li><a href="#cracks">Crack by crack</a>{"<ol>" + toc_cracks + "</ol>" if toc_cracks else ""}</li>'
        '<li><a href="#registration">Registration over the scan</a></li>'
        '<li><a href="#assessment">Thermal-process assessment</a></li>'
        '<li><a href="#record">Run record</a></li>'
        "</ol></nav>"
    )
    summary = [
        '<section id="summary"><h2>The run at a glance</h2><div class="grid2"><div>',
        "<h3>Wafer</h3>",
        _kv(_wafer_rows(d)),
        "</div><div>",
        "<h3>Defects</h3>",
        _counts_table(d),
        "</div></div>",
        "<h3>Verdicts</h3>",
        _verdict_summary(inp),
    ]
    if d["cracks"]:
        per = _assessed(inp)
        rows = [
            [
                f'<a href="#crack-{c["id"]}">{c["id"]}</a>',
                _esc(c["kind"].replace("_", " ")),
                _num(c["depth_um"]),
                _num(c["length_um"]),
                _num(c["plane"]["inclination_deg"]),
                _hkl(c["plane"]["nearest_hkl"]),
                _margin(per.get(int(c["id"]), {}).get("margin")),
                _verdict_html(per.get(int(c["id"]), {}).get("verdict")),
            ]
            for c in d["cracks"]
        ]
        summary.append(
            _table(
                [
                    "crack",
                    "kind",
                    "depth a (µm)",
                    "length 2c (µm)",
                    "inclination (°)",
                    "plane",
                    "margin K_IC/K_I,max",
                    "verdict",
                ],
                rows,
            )
        )
    checks = _things_to_check(inp)
    if checks:
        summary.append(
            "<h3>Things to check</h3><ul>" + "".join(f"<li>{c}</li>" for c in checks) + "</ul>"
        )
    summary.append("</section>")
    caution = (
        '<section id="cautions" class="caution"><h2>Cautions</h2>'
        + "".join(f"<p>{_esc(c)}</p>" for c in cautions())
        + "</section>"
    )
    scan = '<section id="scan"><h2>Scan and geometry</h2>' + _kv(_scan_rows(inp, vv)) + "</section>"
    body = "".join(
        [
            f"<header><h1>{_esc(title)}</h1>",
            f'<p class="sub">Made {made} by crackstack {_esc(__version__)} from the run folder '
            f"<code>{_esc(inp.root.resolve())}</code>.</p></header>",
            toc,
            "".join(summary),
            caution,
            scan,
            _defects_section(inp),
            _projection_section(inp, vv, vv_note, figs),
            _crack_sections(inp, vv, figs),
            _registration_section(inp, figs),
            _assessment_section(inp, figs),
            _record_section(inp),
        ]
    )
    # wide tables scroll on narrow screens instead of overflowing the page
    body = _wrap_wide_tables(body)
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{_esc(title)}</title><style>{_CSS}</style></head><body>{body}</body></html>\n"
    )


def _wrap_wide_tables(body: str) -> str:
    """Put each wide table in a scrolling ``div`` so it never overflows a narrow window."""
    out, pos = [], 0
    opener = '<table class="wide">'
    while True:
        i = body.find(opener, pos)
        if i < 0:
            out.append(body[pos:])
            return "".join(out)
        j = body.find("</table>", i) + len("</table>")
        out.append(body[pos:i] + '<div class="tablewrap">' + body[i:j] + "</div>")
        pos = j


def write_report(run_root: Path) -> Path:
    """Write ``run_root/report.html`` (atomically) and return its path.

    Parameters
    ----------
    run_root : Path
        A run folder. ``defects.json`` is required; ``run.json``, ``registration.csv``,
        ``volume.ome.zarr`` and ``assessment.json`` are used when present, and the report says
        which were absent.

    Raises
    ------
    InputError
        When ``run_root`` is not a folder or ``defects.json`` is missing, not JSON, or fails the
        schema (the message names the file).
    """
    root = Path(run_root)
    inp = read_inputs(root)
    vv, vv_note = load_volume_view(root / rf.VOLUME)
    text = build_report_html(inp, vv, vv_note)
    path = rf.write_text_atomic(root / rf.REPORT_HTML, text)
    log.info("report: wrote %s (%.1f MB)", path, len(text) / 1e6)
    return path


__all__: list[str] = [
    "FALLBACK_CAUTIONS",
    "PlaneView",
    "binned_profile",
    "cautions",
    "depth_coordinates",
    "ellipse_outline",
    "front_distance_um",
    "g_calibration",
    "pick_level",
    "plane_view",
    "read_registration_table",
    "write_report",
]

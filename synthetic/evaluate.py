"""End-to-end accuracy of the pipeline on randomised synthetic scans (segment and measure targets).

Each scan is a random scenario (:func:`random_scenario`) rendered by the forward model, run
through the stages ``register .. measure`` with :func:`pipeline.run.run_pipeline` (default run
configuration unless one is given) and scored against its ``ground_truth.json`` with
:func:`synthetic.score`. :func:`summarise_scan` turns one score into per-crack rows (with the
tolerance that applies to each crack) and attributed false detections; :func:`aggregate`
pools scans per photon level and overall; :func:`markdown_table` prints the result.

Definitions used in the table (also in ``docs/accuracy.md``):

- **1 voxel along a direction** u: the voxel's extent along u, ``|u_x| dx + |u_y| dy + |u_z| dz``
  (``voxel_um`` of the run's export). Depth is measured along the inward normal of the boundary
  the crack starts from (z for surface and through cracks, the inward radius for edge cracks);
  length along the mouth (surface trace for surface and through cracks, ``n x radius`` for edge
  cracks, i.e. z for a vertical crack).
- **Deep enough**: true depth >= ``MIN_DEPTH_VOXELS`` voxels along its depth direction; crack
  recall counts only these (all generated cracks are, by construction).
- **Tolerance**: ``max(1 voxel, 3 % of the true value)`` for depth and length; 2 deg for
  inclination and azimuth. "within" is the fraction of matched cracks whose ``|error|`` is
  inside it.
- **Through cracks** are left out of the depth rows (error and coverage): their depth is the
  wafer thickness by definition, reported exactly with sigma 0.
- **Coverage**: fraction of matched cracks with ``|error| <= reported one-sigma``. For Gaussian
  errors with honest sigmas it is erf(1/sqrt 2) = 68.27 %; we call a coverage consistent with
  that when it lies within two binomial standard errors of 68.27 %.
- **False cracks**: found cracks the scorer left unpaired, attributed in this order to
  ``defect`` (within ``NEAR_UM`` of a true crack's region, a loop or a slip band: fragments,
  duplicates and misclassified loops or bands), ``edge`` (within ``NEAR_UM`` of the wafer edge),
  ``surface`` (reaching within two voxels of z = 0 or z = t) or ``fringes`` (in the interior,
  where the perfect-crystal fringes and noise are the only structure).
- **Slip bands** are not scored by :func:`synthetic.score`; a found band with a ``center_um``
  counts for a true one within half its extent and width plus ``NEAR_UM`` of its centre.
- **Registration**: ``registration="truth"`` replaces the register stage by the exact frame
  origins, which separates segment and measure errors from registration errors.

Run ``python -m synthetic.evaluate --n 21 --out DIR`` (scans spread round-robin over the levels).
"""

from __future__ import annotations

import argparse
import importlib
import logging
import math
import shutil
import sys
import time
import traceback
from collections.abc import Callable, Sequence
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np

from pipeline.runfolder import read_json, write_json_atomic, write_text_atomic
from synthetic.defects import expand
from synthetic.forward import ACQUISITION_YAML, GROUND_TRUTH_JSON, render_series
from synthetic.scenario import Scenario, scenario_from_mapping
from synthetic.score import score

log = logging.getLogger(__name__)

#: Photon levels (expected counts of the perfect-crystal band per pixel).
LEVELS: dict[str, float] = {"high": 5000.0, "typical": 1500.0, "low": 400.0}
#: Stages run for every scan (no assess, no report).
STAGES = ("register", "reconstruct", "segment", "measure")
#: Cracks at least this many voxels deep (along their depth direction) count for the recall.
MIN_DEPTH_VOXELS = 3.0
#: Relative part of the depth / length tolerance (issue target: max(1 voxel, 3 %)).
REL_TOLERANCE = 0.03
#: Inclination and azimuth tolerance, deg.
ANGLE_TOLERANCE_DEG = 2.0
#: Distance under which an unpaired found crack is attributed to a nearby feature, um.
NEAR_UM = 30.0
#: Fraction of |error| <= sigma for Gaussian errors with honest sigmas: erf(1/sqrt(2)).
ONE_SIGMA_FRACTION = math.erf(1.0 / math.sqrt(2.0))
#: Targets of the segment and measure issues.
TARGETS = {
    "crack_recall": 0.95,
    "crack_precision": 0.95,
    "loop_recall": 0.90,
    "false_cracks_per_scan": 1.0,
    "within_fraction": 0.95,
    "plane_family_right": 0.95,
}
FALSE_CAUSES = ("defect", "edge", "surface", "fringes")

# --- random scenarios ---------------------------------------------------------------------------

#: Scan geometry shared by all random scenarios: Si 220 at 17.479 keV, symmetric Laue, a 775 um
#: (001) wafer; 1.5 um pixels put the section band (t G / p = 191 px) into 256 columns.
PIXEL_UM = 1.5
ROWS, COLS = 128, 256
STEP_UM = 4.0
THICKNESS_UM = 775.0
DIAMETER_MM = 300.0
#: Gap kept between a defect's box (halo included) and the imaged region's border or another
#: defect's box, um.
GAP_UM = 10.0
_SI111 = ((1, 1, 1), (-1, 1, 1), (1, -1, 1), (1, 1, -1))
_SI110_VERTICAL = ((1, 1, 0), (1, -1, 0))
_DIRS110 = ((1, 1, 0), (1, -1, 0), (1, 0, 1), (1, 0, -1), (0, 1, 1), (0, 1, -1))


def _loguniform(rng: np.random.Generator, lo: float, hi: float) -> float:
    return float(math.exp(rng.uniform(math.log(lo), math.log(hi))))


def _base_mapping(rng: np.random.Generator, seed: int, photons_per_px: float) -> dict:
    n_frames = int(rng.integers(80, 121))
    dropped: list[int] = []
    corrupt: list[dict] = []
    if rng.random() < 0.3:
        dropped = [int(rng.integers(5, n_frames - 5))]
    if rng.random() < 0.15:
        k = int(rng.integers(5, n_frames - 5))
        if k not in dropped:
            corrupt = [{"frame": k, "kind": "zeros"}]
    return {
        "name": f"random scenario {seed}",
        "wafer": {
            "diameter_mm": DIAMETER_MM,
            "thickness_um": THICKNESS_UM,
            "crystal": {"z_uvw": [0, 0, 1], "x_uvw": [1, 1, 0]},
            "center_xy_mm": [0.0, 0.0],  # placed by _place_wafer
        },
        "acquisition": {
            "beam": {
                "energy_keV": 17.479,
                "reflection": [2, 2, 0],
                "geometry": "transmission",
                "slit_width_um": float(np.round(rng.uniform(10.0, 15.0), 1)),
            },
            "detector": {"pixel_um": [PIXEL_UM, PIXEL_UM], "tilt_deg": 0.0},
            "scan": {"start_um": 0.0, "step_um": STEP_UM, "n_frames": n_frames},
            "frame": {"rows": ROWS, "cols": COLS, "margin_px": 32.0, "origin_row_px": 0.0},
            "write_center": True,
        },
        "contrast": {
            "fringe_visibility": float(np.round(rng.uniform(0.1, 0.3), 3)),
            "pendellosung_um": 36.3,  # Si 220 at 17.479 keV (as in the demo scenario)
            "surface_line_amplitude": float(np.round(rng.uniform(1.5, 2.5), 2)),
            "surface_line_um": 5.0,
        },
        "instrument": {
            "photons_per_px": float(photons_per_px),
            "read_noise": 2.5,
            "blur_px": 0.7,
            "flat_amplitude": 0.05,
            "dark_offset": 100.0,
            "monitor_variation": 0.02,
            "hot_pixels": int(rng.integers(5, 31)),
            "drift_step_px": [
                float(np.round(rng.uniform(0.01, 0.05), 3)),
                float(np.round(rng.uniform(0.02, 0.08), 3)),
            ],
            "dropped_frames": dropped,
            "corrupt_frames": corrupt,
            "seed": int(seed),
        },
        "defects": [],
    }


class _Region:
    """The imaged region of a scenario: which (x, y, z) every frame range lights, and the edge."""

    def __init__(self, base: dict, tan_psi0: float, edge: tuple[np.ndarray, float] | None):
        scan = base["acquisition"]["scan"]
        self.x0 = scan["start_um"]
        self.xn = scan["start_um"] + scan["step_um"] * (scan["n_frames"] - 1)
        self.y_hi = ROWS * PIXEL_UM
        self.t = THICKNESS_UM
        self.tan = tan_psi0
        self.edge = edge  # (centre xy um, radius um) when the edge crosses the region

    def edge_x(self, y: float) -> float:
        """x of the wafer edge at ``y`` (inf without an edge in the region)."""
        if self.edge is None:
            return math.inf
        c, r = self.edge
        return float(c[0] + math.sqrt(r * r - (y - c[1]) ** 2))

    def box(self, prims, *, edge_crack: bool) -> np.ndarray | None:
        """Axis-aligned box (lo, hi) of a defect's primitives clipped to the wafer, or None when
        it leaves the imaged region or (for other defects than edge cracks) comes near the edge."""
        verts = np.vstack([p.vertices() for p in prims])
        lo, hi = verts.min(axis=0), verts.max(axis=0)
        lo[2], hi[2] = max(lo[2], 0.0), min(hi[2], self.t)
        g = GAP_UM
        if lo[1] < g or hi[1] > self.y_hi - g:
            return None
        x_edge = min(self.edge_x(lo[1]), self.edge_x(hi[1]))
        if edge_crack:
            hi[0] = min(hi[0], max(self.edge_x(lo[1]), self.edge_x(hi[1])))
        elif hi[0] > x_edge - g:
            return None
        # the lit region in (x, z) is the parallelogram x - z tan(psi0) in [x0, xn]
        for x in (lo[0], hi[0]):
            for z in (lo[2], hi[2]):
                s = x - z * self.tan
                if s < self.x0 + g or s > self.xn - g:
                    return None
        return np.array([lo, hi])


def _overlaps(box: np.ndarray, boxes: list[np.ndarray]) -> bool:
    for b in boxes:
        if np.all(box[0] < b[1] + GAP_UM) and np.all(b[0] < box[1] + GAP_UM):
            return True
    return False


def _place_wafer(rng: np.random.Generator, base: dict, with_edge: bool):
    """Set the wafer centre: the edge crosses the region near its far x end (edge nearly along y)
    or the region lies 10-90 mm inside the wafer."""
    scan = base["acquisition"]["scan"]
    xn = scan["start_um"] + scan["step_um"] * (scan["n_frames"] - 1)
    span = xn - scan["start_um"]
    radius = DIAMETER_MM * 500.0
    y_mid = ROWS * PIXEL_UM / 2
    if with_edge:
        # as in the demo: the scan runs out across the edge; at most ~10 % of the frames lie
        # wholly beyond it (the ribbon moves outward with depth by t tan(psi0) = 145 um)
        x_edge = xn + rng.uniform(-0.1 * span, 35.0)
        phi = math.radians(rng.uniform(-5.0, 5.0))  # outward normal of the edge from +x
        centre = np.array([x_edge, y_mid]) - radius * np.array([math.cos(phi), math.sin(phi)])
        edge = (centre, radius)
    else:
        r_um = rng.uniform(60.0, 140.0) * 1000.0
        alpha = rng.uniform(0.0, 2.0 * math.pi)
        centre = np.array([span / 2, y_mid]) - r_um * np.array([math.cos(alpha), math.sin(alpha)])
        edge = None
    base["wafer"]["center_xy_mm"] = [float(v) / 1000.0 for v in centre]
    return edge


def _random_crack(rng: np.random.Generator, kind: str, reg: _Region) -> dict:
    t = reg.t
    strength = float(np.round(rng.uniform(0.8, 1.3), 2))
    y = float(rng.uniform(0.0, reg.y_hi))
    if kind == "edge":
        front = "semi_elliptical" if rng.random() < 0.5 else "quarter_elliptical"
        a = _loguniform(rng, 16.0, 100.0)
        if front == "semi_elliptical":
            c = _loguniform(rng, 25.0, 200.0)
            z = float(rng.uniform(c + 20.0, t - c - 20.0))
        else:
            c = _loguniform(rng, 25.0, 250.0)
            z = 0.0
        spec = {
            "type": "crack",
            "name": f"edge crack ({front.replace('_', '-')})",
            "plane": {"hkl": [1, -1, 0]},  # its trace runs normal to an edge along y
            "start": "edge",
            "front": front,
            "a_um": a,
            "c_um": c,
            "position_um": [reg.edge_x(y), y, z],
            "strength": strength,
        }
        if front == "quarter_elliptical":
            spec["corner"] = "top" if rng.random() < 0.5 else "bottom"
        return spec
    x = float(rng.uniform(reg.x0, reg.xn + t * reg.tan))
    if kind == "through":
        hkl = _SI110_VERTICAL[int(rng.integers(2))]
        return {
            "type": "crack",
            "name": f"through crack on ({''.join(str(v) for v in hkl)})",
            "plane": {"hkl": list(hkl)},
            "start": "through",
            "c_um": _loguniform(rng, 15.0, 70.0),
            "position_um": [x, y, t / 2],
            "strength": strength,
        }
    start = "surface_top" if rng.random() < 0.5 else "surface_bottom"
    if rng.random() < 0.5:
        hkl, a = _SI110_VERTICAL[int(rng.integers(2))], _loguniform(rng, 16.0, 90.0)
    else:
        hkl, a = _SI111[int(rng.integers(4))], _loguniform(rng, 20.0, 110.0)
    return {
        "type": "crack",
        "name": f"{start.replace('_', ' ')} crack on ({' '.join(str(v) for v in hkl)})",
        "plane": {"hkl": list(hkl)},
        "start": start,
        "a_um": a,
        "c_um": _loguniform(rng, 15.0, 75.0),
        "position_um": [x, y, 0.0],
        "strength": strength,
    }


def _random_loop(rng: np.random.Generator, reg: _Region) -> dict:
    r = _loguniform(rng, 10.0, 30.0)
    return {
        "type": "loop",
        "name": "dislocation loop",
        "plane": list(_SI111[int(rng.integers(4))]),
        "center_um": [
            float(rng.uniform(reg.x0, reg.xn + reg.t * reg.tan)),
            float(rng.uniform(0.0, reg.y_hi)),
            float(rng.uniform(r + 40.0, reg.t - r - 40.0)),
        ],
        "radius_um": r,
        "shape": "circle" if rng.random() < 0.6 else "hexagon",
        "strength": float(np.round(rng.uniform(1.0, 1.5), 2)),
    }


def _random_slip_band(rng: np.random.Generator, reg: _Region) -> dict:
    plane = _SI111[int(rng.integers(4))]
    dirs = [d for d in _DIRS110 if int(np.dot(d, plane)) == 0]
    return {
        "type": "slip_band",
        "name": "slip band",
        "plane": list(plane),
        "direction": list(dirs[int(rng.integers(len(dirs)))]),
        "center_um": [
            float(rng.uniform(reg.x0, reg.xn + reg.t * reg.tan)),
            float(rng.uniform(0.0, reg.y_hi)),
            float(rng.uniform(100.0, reg.t - 100.0)),
        ],
        "count": int(rng.integers(3, 7)),
        "spacing_um": float(np.round(rng.uniform(6.0, 10.0), 1)),
        "length_um": float(np.round(rng.uniform(40.0, 90.0), 1)),
        "strength": float(np.round(rng.uniform(1.5, 2.0), 2)),
    }


def _draw(rng: np.random.Generator, what: str, reg: _Region) -> dict:
    if what == "loop":
        return _random_loop(rng, reg)
    if what == "slip_band":
        return _random_slip_band(rng, reg)
    return _random_crack(rng, what, reg)


def _try_place(
    rng: np.random.Generator, base: dict, reg: _Region, boxes: list, what: str, tries: int = 80
) -> dict | None:
    """Draw a defect (``what``: a crack kind, "loop" or "slip_band") until it fits in the imaged
    region without touching the others; None after ``tries`` draws."""
    from pipeline.errors import InputError

    for _ in range(tries):
        spec = _draw(rng, what, reg)
        trial = dict(base, defects=[spec])
        try:
            prims = expand(scenario_from_mapping(trial, "random scenario")).primitives
        except InputError:
            continue
        box = reg.box(prims, edge_crack=what == "edge")
        if box is None or _overlaps(box, boxes):
            continue
        boxes.append(box)
        return spec
    return None


def random_scenario(seed: int, photons_per_px: float) -> Scenario:
    """A random scan in the style of the demo, small enough for a quick full run.

    80-120 frames of 128 x 256 px (1.5 um pixels, 4 um step): Si 220 at 17.479 keV in
    symmetric Laue through a 775 um, 300 mm (001) wafer, slit 10-15 um. In the region: 1-4
    cracks drawn from edge cracks (vertical (1-10), semi-elliptical at mid-thickness or
    quarter-elliptical at the top or bottom corner; only when the wafer edge crosses the region,
    in 40 % of the scans), surface cracks at the top or bottom surface (vertical {110} or
    inclined {111}) and through cracks (vertical {110}); depths 16-110 um (>= 3.9 voxels),
    log-uniform; 0-3 dislocation loops on {111} (radius 10-30 um, circles or hexagons); a slip
    band in 35 % of the scans. Instrument: Poisson and read noise, blur, flat-field pattern,
    monitor variation, hot pixels, drift of the origin (random walk of 0.01-0.05 row and
    0.02-0.08 column px rms per frame), sometimes a dropped or an all-zero frame.

    Parameters
    ----------
    seed : int
        Defines everything but the photon level (same seed, same defects and drift).
    photons_per_px : float
        Expected counts of the perfect-crystal band per pixel.

    Returns
    -------
    Scenario
    """
    if not photons_per_px > 0:
        raise ValueError(f"photons_per_px must be > 0 (got {photons_per_px})")
    for attempt in range(20):
        rng = np.random.default_rng([int(seed), attempt])
        base = _base_mapping(rng, seed, photons_per_px)
        with_edge = rng.random() < 0.4
        edge = _place_wafer(rng, base, with_edge)
        tan_psi0 = scenario_from_mapping(base, "random scenario").geometry().tan_psi0
        reg = _Region(base, tan_psi0, edge)
        kinds = ["edge", "surface", "through"] if with_edge else ["surface", "through"]
        weights = np.array([0.4, 0.4, 0.2] if with_edge else [0.75, 0.25])
        boxes: list[np.ndarray] = []
        defects = []
        wanted = [kinds[int(rng.choice(len(kinds), p=weights))] for _ in range(rng.integers(1, 5))]
        cracks = [_try_place(rng, base, reg, boxes, k) for k in wanted]
        if not any(cracks):
            continue
        others = ["loop"] * int(rng.integers(0, 4)) + ["slip_band"] * int(rng.random() < 0.35)
        placed = cracks + [_try_place(rng, base, reg, boxes, k) for k in others]
        defects = [d for d in placed if d is not None]
        base["defects"] = defects
        n_c = sum(d["type"] == "crack" for d in defects)
        n_l = sum(d["type"] == "loop" for d in defects)
        base["description"] = (
            f"Invented random scan (seed {seed}): {n_c} crack{'s' * (n_c != 1)}, "
            f"{n_l} dislocation loop{'s' * (n_l != 1)}"
            + (", a slip band" if any(d["type"] == "slip_band" for d in defects) else "")
            + (", the wafer edge in the region" if with_edge else "")
            + "."
        )
        return scenario_from_mapping(base, f"random scenario {seed}")
    raise RuntimeError(f"random scenario {seed}: no crack could be placed in 20 attempts")


# --- one scan -------------------------------------------------------------------------------------


def _unit(v) -> np.ndarray:
    v = np.asarray(v, float)
    return v / np.linalg.norm(v)


def voxel_along_um(direction, voxel_um: Sequence[float]) -> float:
    """Extent of a voxel ``(dz, dy, dx)`` along a direction ``(x, y, z)``, um."""
    u = np.abs(_unit(direction))
    dz, dy, dx = (float(v) for v in voxel_um)
    return float(u[0] * dx + u[1] * dy + u[2] * dz)


def _crack_directions(crack: dict, wafer: dict) -> tuple[np.ndarray, np.ndarray]:
    """(depth direction, length direction) of a true crack, wafer frame (see module docs)."""
    n = _unit(crack["plane"]["normal"])
    ez = np.array([0.0, 0.0, 1.0])
    if crack["kind"] == "edge":
        c = np.asarray(wafer["center_xy_mm"], float) * 1000.0
        p = np.asarray(crack["centroid_um"], float)
        inward = np.array([c[0] - p[0], c[1] - p[1], 0.0])
        inward = _unit(inward)
        along = np.cross(n, inward)
        if np.linalg.norm(along) < 1e-9:  # crack parallel to the edge: along z
            along = ez
        return inward, _unit(along)
    trace = np.cross(ez, n)
    if np.linalg.norm(trace) < 1e-9:
        trace = np.array([1.0, 0.0, 0.0])
    return ez, _unit(trace)


def _crack_region(crack: dict, wafer: dict) -> np.ndarray:
    """Points spanning a true crack: its front and the front's feet on the boundary the crack
    starts from (the mouth side, which the front points leave out), wafer frame (um)."""
    front = np.asarray(crack["front"]["points_um"], float).reshape(-1, 3)
    pts = [np.asarray(crack["centroid_um"], float)[None, :], front]
    kind = crack["kind"]
    if kind in ("surface_top", "surface_bottom"):
        feet = front.copy()
        feet[:, 2] = 0.0 if kind == "surface_top" else float(wafer["thickness_um"])
        pts.append(feet)
    elif kind == "edge" and wafer.get("center_xy_mm") is not None:
        c = np.asarray(wafer["center_xy_mm"], float) * 1000.0
        d = front[:, :2] - c
        r = np.linalg.norm(d, axis=1, keepdims=True)
        feet = front.copy()
        feet[:, :2] = c + d / np.maximum(r, 1e-9) * float(wafer["diameter_mm"]) * 500.0
        pts.append(feet)
    return np.vstack(pts)


def _near_crack(p: np.ndarray, crack: dict, wafer: dict, near_um: float) -> bool:
    """Whether ``p`` lies within ``near_um`` of a true crack: near its plane and inside the box
    of :func:`_crack_region` grown by ``near_um``."""
    c = np.asarray(crack["centroid_um"], float)
    n = _unit(crack["plane"]["normal"])
    if abs(float((p - c) @ n)) > near_um:
        return False
    pts = _crack_region(crack, wafer)
    return bool(np.all(p >= pts.min(axis=0) - near_um) and np.all(p <= pts.max(axis=0) + near_um))


def _false_cause(found: dict, truth: dict, voxel_um, near_um: float) -> str:
    p = np.asarray(found["centroid_um"], float)
    for c in truth["cracks"]:
        if _near_crack(p, c, truth["wafer"], near_um):
            return "defect"
    for lp in truth["dislocation_loops"]:
        if (
            np.linalg.norm(p - np.asarray(lp["center_um"], float))
            <= lp["diameter_um"] / 2 + near_um
        ):
            return "defect"
    for sb in truth["slip_bands"]:
        reach = 0.5 * (sb["extent_um"] + sb.get("width_um", 0.0)) + near_um
        if np.linalg.norm(p - np.asarray(sb["center_um"], float)) <= reach:
            return "defect"
    w = truth["wafer"]
    if w.get("center_xy_mm") is not None:
        c = np.asarray(w["center_xy_mm"], float) * 1000.0
        if w["diameter_mm"] * 500.0 - math.hypot(p[0] - c[0], p[1] - c[1]) <= near_um:
            return "edge"
    t = float(w["thickness_um"])
    z0, z1 = found["thickness_span_um"]
    if min(z0, t - z1) <= 2.0 * float(voxel_um[0]):
        return "surface"
    return "fringes"


def summarise_scan(
    defects: dict, truth: dict, scores: dict, *, near_um: float = NEAR_UM
) -> dict[str, Any]:
    """Per-crack rows and attributed false detections of one scored scan.

    Parameters
    ----------
    defects : dict
        The run's export (``defects.json``); ``acquisition.voxel_um`` gives the voxel.
    truth : dict
        The scan's ``ground_truth.json``.
    scores : dict
        :func:`synthetic.score` of the two (or a hand-made dict of the same shape: ``cracks``
        and ``loops`` with ``tp, fp, matches, false_ids``).
    near_um : float
        Distance for attributing unpaired found cracks to nearby features, um.

    Returns
    -------
    dict
        ``cracks``: one row per true crack (``deep``, ``found``, tolerances and, when matched,
        signed errors, reported sigmas, ``plane_family_right``, ``kind_right``);
        ``false_cracks``: ``{found_id, cause}`` per unpaired found crack; ``n_found_cracks``;
        ``loops``: ``{n_true, tp, fp, matches}`` (diameter error, normal angle, family per
        pair); ``slip_bands``: ``{n_true, n_found, true_found, found_away}``.
    """
    voxel = [float(v) for v in defects["acquisition"]["voxel_um"]]
    found_by_id = {d["id"]: d for d in defects["cracks"]}
    matches = {m["truth_id"]: m for m in scores["cracks"]["matches"]}
    rows = []
    for c in truth["cracks"]:
        d_dir, l_dir = _crack_directions(c, truth["wafer"])
        vd, vl = voxel_along_um(d_dir, voxel), voxel_along_um(l_dir, voxel)
        row: dict[str, Any] = {
            "truth_id": c["id"],
            "kind": c["kind"],
            "family": c["plane"].get("family"),
            "depth_um": float(c["depth_um"]),
            "length_um": float(c["length_um"]),
            "depth_voxel_um": vd,
            "length_voxel_um": vl,
            "deep": float(c["depth_um"]) >= MIN_DEPTH_VOXELS * vd,
            "depth_tol_um": max(vd, REL_TOLERANCE * float(c["depth_um"])),
            "length_tol_um": max(vl, REL_TOLERANCE * float(c["length_um"])),
            "found": c["id"] in matches,
        }
        m = matches.get(c["id"])
        if m is not None:
            f = found_by_id.get(m["found_id"], {})
            unc = f.get("uncertainty", {})
            row.update(
                {
                    "found_id": m["found_id"],
                    "found_kind": f.get("kind"),
                    "kind_right": bool(m["kind_right"]),
                    "plane_family_right": bool(m["plane_family_right"]),
                    "depth_error_um": float(m["depth_error_um"]),
                    "length_error_um": float(m["length_error_um"]),
                    "inclination_error_deg": float(m["inclination_error_deg"]),
                    "azimuth_error_deg": float(m["azimuth_error_deg"]),
                    "sigma_depth_um": unc.get("depth_um"),
                    "sigma_length_um": unc.get("length_um"),
                    "sigma_inclination_deg": unc.get("inclination_deg"),
                }
            )
        rows.append(row)
    false = []
    for fid in scores["cracks"]["false_ids"]:
        f = found_by_id[fid]
        false.append(
            {
                "found_id": fid,
                "kind": f.get("kind"),
                "centroid_um": [float(v) for v in f["centroid_um"]],
                "cause": _false_cause(f, truth, voxel, near_um),
            }
        )
    return {
        "voxel_um": voxel,
        "cracks": rows,
        "false_cracks": false,
        "n_found_cracks": len(defects["cracks"]),
        "loops": {
            "n_true": len(truth["dislocation_loops"]),
            "tp": int(scores["loops"]["tp"]),
            "fp": int(scores["loops"]["fp"]),
            "matches": [
                {
                    "diameter_error_um": float(m["diameter_error_um"]),
                    "normal_angle_deg": float(m["normal_angle_deg"]),
                    "plane_family_right": bool(m["plane_family_right"]),
                }
                for m in scores["loops"].get("matches", [])
            ],
        },
        "slip_bands": _pair_bands(truth["slip_bands"], defects["slip_bands"], near_um),
    }


def _pair_bands(true_bands: list[dict], found_bands: list[dict], near_um: float) -> dict:
    """Slip bands are not scored by :func:`synthetic.score` (SPEC 7 gives them no position);
    a found band with a ``center_um`` counts as finding a true one when it lies within half the
    true band's extent and width plus ``near_um`` of its centre."""
    hit_true, hit_found = set(), set()
    for i, t in enumerate(true_bands):
        reach = 0.5 * (t["extent_um"] + t.get("width_um", 0.0)) + near_um
        for j, f in enumerate(found_bands):
            if "center_um" in f and (
                np.linalg.norm(np.subtract(f["center_um"], t["center_um"])) <= reach
            ):
                hit_true.add(i)
                hit_found.add(j)
    return {
        "n_true": len(true_bands),
        "n_found": len(found_bands),
        "true_found": len(hit_true),
        "found_away": len(found_bands) - len(hit_found),
    }


def _failed_stage(run_dir: Path) -> str | None:
    try:
        rec = read_json(run_dir / "run.json", "run record")
    except Exception:  # noqa: BLE001 - no record yet: the failure came before any stage
        return None
    for name, entry in rec.get("stages", {}).items():
        if entry.get("status") in ("failed", "running"):
            return name
    return None


def truth_registration(truth: dict) -> dict[str, np.ndarray]:
    """A registration table (``registration.csv`` columns) from a ground truth's exact frame
    origins: quality 1, corrupt frames flagged. For runs that leave registration errors out."""
    r0 = np.asarray(truth["origins"]["r0_px"], float)
    c0 = np.asarray(truth["origins"]["c0_px"], float)
    n = len(r0)
    flagged = np.zeros(n, int)
    flagged[np.asarray(truth.get("frames_corrupt", []), int)] = 1
    return {
        "frame": np.arange(n),
        "position_um": np.asarray(truth["positions_um"], float),
        "r0_px": r0,
        "c0_px": c0,
        "row_shift_px": r0 - r0[0],
        "col_shift_px": c0 - c0[0],
        "quality": np.ones(n),
        "flagged": flagged,
        "interpolated": np.zeros(n, int),
    }


def run_scan(
    scenario: Scenario,
    scan_dir: Path,
    *,
    config_path: str | Path | None = None,
    keep_frames: bool = True,
    registration: str = "pipeline",
) -> dict[str, Any]:
    """Render one scenario, run register..measure on it and score it.

    ``registration="truth"`` writes ``registration.csv`` from the ground truth's exact origins
    (:func:`truth_registration`) and runs reconstruct..measure only, which separates the
    segment and measure errors from registration errors.

    Returns a record with ``status`` ("ok" or "failed" with ``stage`` and ``error``),
    ``timings_s`` and, when ok, ``summary`` (:func:`summarise_scan`) and ``scores``
    (the scorer's detection counts).
    """
    from pipeline.register import write_registration_csv
    from pipeline.run import run_pipeline

    if registration not in ("pipeline", "truth"):
        raise ValueError(f"registration must be 'pipeline' or 'truth' (got {registration!r})")

    scan_dir = Path(scan_dir)
    if scan_dir.exists():
        shutil.rmtree(scan_dir)
    series, run = scan_dir / "series", scan_dir / "run"
    rec: dict[str, Any] = {"status": "failed", "stage": "render", "timings_s": {}}
    t0 = time.perf_counter()
    try:
        render_series(scenario, series)
        rec["timings_s"]["render"] = round(time.perf_counter() - t0, 2)
        rec["stage"] = "pipeline"
        t1 = time.perf_counter()
        stages = STAGES
        if registration == "truth":
            run.mkdir(parents=True)
            truth = read_json(series / GROUND_TRUTH_JSON, "ground truth")
            write_registration_csv(run / "registration.csv", truth_registration(truth))
            stages = STAGES[1:]
        record = run_pipeline(series / ACQUISITION_YAML, run, config_path, stages=stages)
        rec["timings_s"]["pipeline"] = round(time.perf_counter() - t1, 2)
        for name, entry in record["stages"].items():
            rec["timings_s"][name] = entry.get("elapsed_s")
        rec["stage"] = "score"
        truth = read_json(series / GROUND_TRUTH_JSON, "ground truth")
        defects = read_json(run / "defects.json", "defect export")
        scores = score(defects, truth)
        rec["summary"] = summarise_scan(defects, truth, scores)
        rec["scores"] = {
            kind: {k: scores[kind][k] for k in ("tp", "fp", "fn", "recall", "precision")}
            for kind in ("cracks", "loops")
        }
        rec["status"] = "ok"
        rec.pop("stage")
    except Exception as exc:  # noqa: BLE001 - a failing scan is recorded, the others go on
        if rec["stage"] == "pipeline":
            rec["stage"] = _failed_stage(run) or "pipeline"
        rec["error"] = f"{type(exc).__name__}: {exc}"
        rec["traceback"] = traceback.format_exc(limit=6)
        log.warning("scan %s failed in %s: %s", scan_dir.name, rec["stage"], rec["error"])
    rec["timings_s"]["total"] = round(time.perf_counter() - t0, 2)
    if not keep_frames and series.exists():
        for p in series.glob("frame_*.tif"):
            p.unlink()
    return rec


# --- aggregation --------------------------------------------------------------------------------


def _fraction(num: int, den: int) -> dict[str, Any]:
    return {"n": int(num), "of": int(den), "value": (num / den) if den else None}


def _error_stats(errors: list[float], tols: list[float] | None) -> dict[str, Any]:
    if not errors:
        return {
            "n": 0,
            "within": None,
            "median_abs": None,
            "p90_abs": None,
            "max_abs": None,
            "mean": None,
        }
    e = np.asarray(errors, float)
    a = np.abs(e)
    out = {
        "n": len(e),
        "median_abs": float(np.median(a)),
        "p90_abs": float(np.percentile(a, 90)),
        "max_abs": float(a.max()),
        "mean": float(e.mean()),
    }
    out["within"] = float(np.mean(a <= np.asarray(tols, float))) if tols is not None else None
    return out


def coverage(errors: Sequence[float], sigmas: Sequence[float | None]) -> dict[str, Any]:
    """Fraction of ``|error| <= sigma`` (a missing sigma counts as 0) and whether it lies within
    two binomial standard errors of the Gaussian one-sigma fraction (68.27 %)."""
    n = len(errors)
    if n == 0:
        return {
            "n": 0,
            "value": None,
            "expected": ONE_SIGMA_FRACTION,
            "consistent": None,
            "median_sigma": None,
        }
    s = np.array([0.0 if v is None else float(v) for v in sigmas])
    hit = np.abs(np.asarray(errors, float)) <= s
    value = float(hit.mean())
    se = math.sqrt(ONE_SIGMA_FRACTION * (1 - ONE_SIGMA_FRACTION) / n)
    return {
        "n": n,
        "value": value,
        "expected": ONE_SIGMA_FRACTION,
        "consistent": abs(value - ONE_SIGMA_FRACTION) <= 2 * se,
        "median_sigma": float(np.median(s)),
    }


def _pool(scans: list[dict]) -> dict[str, Any]:
    ok = [s for s in scans if s.get("status") == "ok"]
    rows = [r for s in ok for r in s["summary"]["cracks"]]
    deep = [r for r in rows if r["deep"]]
    matched = [r for r in rows if r["found"]]
    # a through crack's depth is the thickness by definition (exact, sigma 0): left out of the
    # depth statistics so that it does not flatter them
    with_depth = [r for r in matched if r["kind"] != "through"]
    n_found = sum(s["summary"]["n_found_cracks"] for s in ok)
    tp_all = len(matched)
    false = [f for s in ok for f in s["summary"]["false_cracks"]]
    per_scan = [len(s["summary"]["false_cracks"]) for s in ok]
    per_scan_bg = [sum(f["cause"] != "defect" for f in s["summary"]["false_cracks"]) for s in ok]
    loops_true = sum(s["summary"]["loops"]["n_true"] for s in ok)
    loops_tp = sum(s["summary"]["loops"]["tp"] for s in ok)
    loops_fp = sum(s["summary"]["loops"]["fp"] for s in ok)
    bands = {
        k: sum(s["summary"]["slip_bands"].get(k, 0) for s in ok)
        for k in ("n_true", "n_found", "true_found", "found_away")
    }
    loop_matches = [m for s in ok for m in s["summary"]["loops"].get("matches", [])]
    by_kind: dict[str, dict] = {}
    for r in deep:
        k = by_kind.setdefault(r["kind"], {"n": 0, "found": 0})
        k["n"] += 1
        k["found"] += int(r["found"])
    out: dict[str, Any] = {
        "scans": len(scans),
        "scans_ok": len(ok),
        "failed": [
            {"index": s.get("index"), "stage": s.get("stage"), "error": s.get("error")}
            for s in scans
            if s.get("status") != "ok"
        ],
        "true_cracks": len(rows),
        "true_cracks_deep": len(deep),
        "found_cracks": n_found,
        "crack_recall": _fraction(sum(r["found"] for r in deep), len(deep)),
        "crack_recall_by_kind": {
            k: _fraction(v["found"], v["n"]) for k, v in sorted(by_kind.items())
        },
        "crack_precision": _fraction(tp_all, n_found),
        "loop_recall": _fraction(loops_tp, loops_true),
        "loop_precision": _fraction(loops_tp, loops_tp + loops_fp),
        "slip_bands": bands,
        "loop_diameter": _error_stats([m["diameter_error_um"] for m in loop_matches], None),
        "loop_normal_angle": _error_stats([m["normal_angle_deg"] for m in loop_matches], None),
        "loop_plane_family_right": _fraction(
            sum(m["plane_family_right"] for m in loop_matches), len(loop_matches)
        ),
        "false_cracks": {
            "total": len(false),
            "per_scan_mean": float(np.mean(per_scan)) if per_scan else None,
            "per_scan_max": int(max(per_scan)) if per_scan else None,
            "background_per_scan_mean": float(np.mean(per_scan_bg)) if per_scan_bg else None,
            "background_per_scan_max": int(max(per_scan_bg)) if per_scan_bg else None,
            "by_cause": {c: sum(f["cause"] == c for f in false) for c in FALSE_CAUSES},
        },
        "depth": _error_stats(
            [r["depth_error_um"] for r in with_depth], [r["depth_tol_um"] for r in with_depth]
        ),
        "length": _error_stats(
            [r["length_error_um"] for r in matched], [r["length_tol_um"] for r in matched]
        ),
        "inclination": _error_stats(
            [r["inclination_error_deg"] for r in matched],
            [ANGLE_TOLERANCE_DEG] * len(matched),
        ),
        "azimuth": _error_stats(
            [r["azimuth_error_deg"] for r in matched], [ANGLE_TOLERANCE_DEG] * len(matched)
        ),
        "plane_family_right": _fraction(sum(r["plane_family_right"] for r in matched), tp_all),
        "kind_right": _fraction(sum(r["kind_right"] for r in matched), tp_all),
        "coverage": {
            "depth": coverage(
                [r["depth_error_um"] for r in with_depth],
                [r["sigma_depth_um"] for r in with_depth],
            ),
            "length": coverage(
                [r["length_error_um"] for r in matched], [r["sigma_length_um"] for r in matched]
            ),
            "inclination": coverage(
                [r["inclination_error_deg"] for r in matched],
                [r["sigma_inclination_deg"] for r in matched],
            ),
        },
    }
    out["pass"] = _passes(out)
    return out


def _passes(p: dict) -> dict[str, bool | None]:
    def ge(frac: dict, target: float) -> bool | None:
        return None if frac["value"] is None else frac["value"] >= target

    def within(stats: dict) -> bool | None:
        return None if stats["within"] is None else stats["within"] >= TARGETS["within_fraction"]

    fc = p["false_cracks"]
    return {
        "crack_recall": ge(p["crack_recall"], TARGETS["crack_recall"]),
        "crack_precision": ge(p["crack_precision"], TARGETS["crack_precision"]),
        "loop_recall": ge(p["loop_recall"], TARGETS["loop_recall"]),
        "false_cracks_per_scan": (
            None
            if fc["background_per_scan_max"] is None
            else fc["background_per_scan_max"] <= TARGETS["false_cracks_per_scan"]
        ),
        "depth": within(p["depth"]),
        "length": within(p["length"]),
        "inclination": within(p["inclination"]),
        "azimuth": within(p["azimuth"]),
        "plane_family_right": ge(p["plane_family_right"], TARGETS["plane_family_right"]),
        **{f"coverage_{k}": v["consistent"] for k, v in p["coverage"].items()},
    }


def aggregate(scans: list[dict], levels: dict[str, float] | None = None) -> dict[str, Any]:
    """Pool scan records per photon level and overall.

    Parameters
    ----------
    scans : list of dict
        Records of :func:`run_scan` with ``level`` (name) added.
    levels : dict, optional
        Level name -> photons per pixel, in table order (default: the order met in ``scans``).

    Returns
    -------
    dict
        ``{"levels": {name: photons}, "per_level": {name: pooled}, "overall": pooled}``; a
        pooled entry has counts, recall / precision fractions (``{n, of, value}``), false-crack
        counts per scan and by cause, error statistics (``n, within, median_abs, p90_abs,
        max_abs, mean``) for depth, length, inclination and azimuth, plane-family and kind
        fractions, one-sigma coverage, and ``pass`` per target.
    """
    if levels is None:
        levels = {}
        for s in scans:
            levels.setdefault(s["level"], s.get("photons_per_px"))
    per = {name: _pool([s for s in scans if s["level"] == name]) for name in levels}
    return {"levels": dict(levels), "per_level": per, "overall": _pool(scans)}


# --- table ----------------------------------------------------------------------------------------


def _pct(frac: dict) -> str:
    if frac["value"] is None:
        return "-"
    return f"{100 * frac['value']:.0f} % ({frac['n']}/{frac['of']})"


def _num(v: float | None, fmt: str = "{:.1f}") -> str:
    return "-" if v is None else fmt.format(v)


def _within(stats: dict) -> str:
    if stats["within"] is None:
        return "-"
    return f"{100 * stats['within']:.0f} % (n {stats['n']})"


def _dist(stats: dict) -> str:
    if stats["n"] == 0:
        return "-"
    return (
        f"{stats['median_abs']:.1f} / {stats['p90_abs']:.1f} / {stats['max_abs']:.1f}"
        f" ({stats['mean']:+.1f})"
    )


def _cov(c: dict) -> str:
    if c["value"] is None:
        return "-"
    return f"{100 * c['value']:.0f} % (n {c['n']}, median sigma {c['median_sigma']:.2g})"


def _mark(v: bool | None) -> str:
    return {True: "yes", False: "**no**", None: "-"}[v]


#: Table rows: (label, target text, cell function, pass key or None).
_ROWS: list[tuple[str, str, Callable[[dict], str], str | None]] = [
    ("scans (ok / run)", "", lambda p: f"{p['scans_ok']} / {p['scans']}", None),
    ("true cracks (>= 3 voxels deep)", "", lambda p: f"{p['true_cracks_deep']}", None),
    (
        "crack recall (>= 3 voxels deep)",
        ">= 95 %",
        lambda p: _pct(p["crack_recall"]),
        "crack_recall",
    ),
    ("crack precision", ">= 95 %", lambda p: _pct(p["crack_precision"]), "crack_precision"),
    ("dislocation-loop recall", ">= 90 %", lambda p: _pct(p["loop_recall"]), "loop_recall"),
    ("dislocation-loop precision", "", lambda p: _pct(p["loop_precision"]), None),
    (
        "loop diameter \\|error\\| median / p90 / max (mean), um",
        "",
        lambda p: _dist(p["loop_diameter"]),
        None,
    ),
    (
        "loop plane: normal angle median / p90 / max, deg; family right",
        "",
        lambda p: (
            "-"
            if p["loop_normal_angle"]["n"] == 0
            else f"{p['loop_normal_angle']['median_abs']:.1f} / "
            f"{p['loop_normal_angle']['p90_abs']:.1f} / {p['loop_normal_angle']['max_abs']:.1f}; "
            + _pct(p["loop_plane_family_right"])
        ),
        None,
    ),
    (
        "slip bands: true ones found / true; found away from any true band",
        "",
        lambda p: (
            f"{p['slip_bands']['true_found']} / {p['slip_bands']['n_true']}; "
            f"{p['slip_bands']['found_away']}"
        ),
        None,
    ),
    (
        "false cracks per scan, all (mean / max)",
        "",
        lambda p: (
            f"{_num(p['false_cracks']['per_scan_mean'], '{:.2f}')} / "
            f"{_num(p['false_cracks']['per_scan_max'], '{}')}"
        ),
        None,
    ),
    (
        "false cracks per scan from fringes, surfaces, edge (mean / max)",
        "<= 1",
        lambda p: (
            f"{_num(p['false_cracks']['background_per_scan_mean'], '{:.2f}')} / "
            f"{_num(p['false_cracks']['background_per_scan_max'], '{}')}"
        ),
        "false_cracks_per_scan",
    ),
    (
        "false cracks by cause: defect / edge / surface / fringes",
        "",
        lambda p: " / ".join(str(p["false_cracks"]["by_cause"][c]) for c in FALSE_CAUSES),
        None,
    ),
    (
        "depth error within max(1 voxel, 3 %), through cracks excluded",
        ">= 95 %",
        lambda p: _within(p["depth"]),
        "depth",
    ),
    ("depth \\|error\\| median / p90 / max (mean), um", "", lambda p: _dist(p["depth"]), None),
    ("length error within max(1 voxel, 3 %)", ">= 95 %", lambda p: _within(p["length"]), "length"),
    ("length \\|error\\| median / p90 / max (mean), um", "", lambda p: _dist(p["length"]), None),
    (
        "inclination error within 2 deg",
        ">= 95 %",
        lambda p: _within(p["inclination"]),
        "inclination",
    ),
    (
        "inclination \\|error\\| median / p90 / max (mean), deg",
        "",
        lambda p: _dist(p["inclination"]),
        None,
    ),
    ("azimuth error within 2 deg", ">= 95 %", lambda p: _within(p["azimuth"]), "azimuth"),
    ("azimuth \\|error\\| median / p90 / max (mean), deg", "", lambda p: _dist(p["azimuth"]), None),
    (
        "nearest plane family right",
        ">= 95 %",
        lambda p: _pct(p["plane_family_right"]),
        "plane_family_right",
    ),
    ("crack kind right", "", lambda p: _pct(p["kind_right"]), None),
    (
        "one-sigma coverage, depth (through cracks excluded)",
        "~68 %",
        lambda p: _cov(p["coverage"]["depth"]),
        "coverage_depth",
    ),
    (
        "one-sigma coverage, length",
        "~68 %",
        lambda p: _cov(p["coverage"]["length"]),
        "coverage_length",
    ),
    (
        "one-sigma coverage, inclination",
        "~68 %",
        lambda p: _cov(p["coverage"]["inclination"]),
        "coverage_inclination",
    ),
]


def markdown_table(agg: dict) -> str:
    """The aggregate as a markdown table: one row per metric, one column per photon level, the
    pooled column, and whether the pooled value meets the target."""
    names = list(agg["per_level"])
    heads = [f"{n} ({agg['levels'][n]:g} ph/px)" if agg["levels"].get(n) else n for n in names]
    lines = [
        "| metric | target | " + " | ".join(heads) + " | all | meets target |",
        "|---" * (len(names) + 4) + "|",
    ]
    for label, target, cell, key in _ROWS:
        cells = [cell(agg["per_level"][n]) for n in names] + [cell(agg["overall"])]
        mark = _mark(agg["overall"]["pass"][key]) if key else ""
        lines.append(f"| {label} | {target} | " + " | ".join(cells) + f" | {mark} |")
    return "\n".join(lines) + "\n"


def recall_by_kind_table(agg: dict) -> str:
    """Crack recall split by crack kind (pooled over levels and per level)."""
    names = list(agg["per_level"])
    kinds = sorted(agg["overall"]["crack_recall_by_kind"])
    lines = [
        "| crack kind | " + " | ".join(names) + " | all |",
        "|---" * (len(names) + 2) + "|",
    ]
    for k in kinds:
        cells = []
        for p in [agg["per_level"][n] for n in names] + [agg["overall"]]:
            frac = p["crack_recall_by_kind"].get(k)
            cells.append(_pct(frac) if frac else "-")
        lines.append(f"| {k} | " + " | ".join(cells) + " |")
    return "\n".join(lines) + "\n"


# --- the whole evaluation -----------------------------------------------------------------------


def evaluate(
    n_scenarios: int,
    levels: dict[str, float],
    out_dir: str | Path,
    *,
    seed0: int = 0,
    config_path: str | Path | None = None,
    make_scenario: Callable[[int, float], Scenario] = random_scenario,
    keep_frames: bool = True,
    resume: bool = False,
    registration: str = "pipeline",
) -> dict[str, Any]:
    """Render, run and score ``n_scenarios`` random scans and write the pooled table.

    Scan ``i`` uses seed ``seed0 + i`` and the photon level ``list(levels)[i % len(levels)]``
    (round-robin, so the levels get distinct scenarios). Scans run one after the other; each
    lives in ``out_dir/scans/<i>_<level>/`` (``series/`` and ``run/``) with its record in
    ``out_dir/scans/<i>_<level>.json``. A scan that fails is recorded (stage and error) and left
    out of the accuracy numbers; the table counts it.

    Parameters
    ----------
    n_scenarios : int
        Number of scans (>= 1).
    levels : dict
        Level name -> photons per pixel of the perfect-crystal band, e.g. :data:`LEVELS`.
    out_dir : path
        Folder for the scans, ``accuracy.json`` (records and aggregate) and ``accuracy.md``.
    seed0 : int
        Seed of the first scan.
    config_path : path, optional
        Run configuration for :func:`pipeline.run.run_pipeline` (default: the defaults).
    make_scenario : callable
        ``(seed, photons_per_px) -> Scenario``; :func:`random_scenario` by default.
    keep_frames : bool
        False deletes each scan's frames after its run (the run folders and truths stay).
    registration : {"pipeline", "truth"}
        "truth" replaces the register stage by the exact frame origins (see :func:`run_scan`).
    resume : bool
        Reuse scan records already in ``out_dir`` made with the same seed and photon level
        (for an interrupted evaluation; the records do not know which code made them).

    Returns
    -------
    dict
        ``{"created", "seed0", "levels", "scans": [records], "aggregate": aggregate(...),
        "table": markdown}``.
    """
    if n_scenarios < 1:
        raise ValueError(f"n_scenarios must be >= 1 (got {n_scenarios})")
    if not levels or not all(v > 0 for v in levels.values()):
        raise ValueError(f"levels must map names to photons per pixel > 0 (got {levels})")
    out = Path(out_dir)
    scans_dir = out / "scans"
    scans_dir.mkdir(parents=True, exist_ok=True)
    names = list(levels)
    records = []
    # load the stage modules now, so that the digests name the code this process runs (a file
    # edited later is not reloaded)
    for name in _CODE:
        importlib.import_module(f"pipeline.{name}")
    code_start = code_digests()
    for i in range(n_scenarios):
        name = names[i % len(names)]
        photons = float(levels[name])
        seed = seed0 + i
        tag = f"{i:03d}_{name}"
        rec_path = scans_dir / f"{tag}.json"
        if resume and rec_path.exists():
            old = read_json(rec_path, "scan record")
            same = (old.get("seed"), old.get("photons_per_px"), old.get("registration"))
            if same == (seed, photons, registration):
                log.info("scan %s: record found, reused", tag)
                records.append(old)
                continue
        scn = make_scenario(seed, photons)
        log.info(
            "scan %d/%d (%s, %g ph/px, seed %d): %s",
            i + 1,
            n_scenarios,
            name,
            photons,
            seed,
            scn.description,
        )
        rec = run_scan(
            scn,
            scans_dir / tag,
            config_path=config_path,
            keep_frames=keep_frames,
            registration=registration,
        )
        rec.update(
            {
                "index": i,
                "seed": seed,
                "level": name,
                "photons_per_px": photons,
                "registration": registration,
                "scenario": scn.description,
            }
        )
        write_json_atomic(rec_path, rec)
        if rec["status"] == "ok":
            s = rec["scores"]
            log.info(
                "scan %s: cracks tp %d fp %d fn %d, loops tp %d fp %d fn %d, %.0f s",
                tag,
                s["cracks"]["tp"],
                s["cracks"]["fp"],
                s["cracks"]["fn"],
                s["loops"]["tp"],
                s["loops"]["fp"],
                s["loops"]["fn"],
                rec["timings_s"]["total"],
            )
        records.append(rec)
    code_end = code_digests()
    changed = sorted(k for k in code_end if code_start.get(k) != code_end[k])
    if changed:
        log.warning(
            "stage files edited during the evaluation (not reloaded): %s", ", ".join(changed)
        )
    code = {"at_start": code_start, "changed_during_run": changed}
    return _write_outputs(out, records, levels, seed0, registration, code)


#: Modules whose code the numbers depend on (their digests are recorded with the results).
_CODE = ("correct", "register", "reconstruct", "hessian", "segment", "measure", "crystal")


def code_digests() -> dict[str, str]:
    """SHA-256 (first 12 hex digits) of the stage modules' source files as they are now."""
    import hashlib

    import pipeline

    root = Path(pipeline.__file__).parent
    out = {}
    for name in _CODE:
        path = root / f"{name}.py"
        if path.is_file():
            out[name] = hashlib.sha256(path.read_bytes()).hexdigest()[:12]
    return out


def _write_outputs(
    out: Path,
    records: list[dict],
    levels: dict[str, float],
    seed0: int,
    registration: str,
    code: dict | None = None,
) -> dict[str, Any]:
    agg = aggregate(records, levels)
    table = markdown_table(agg)
    doc = {
        "created": datetime.now(UTC).isoformat(timespec="seconds"),
        "code": code or {},
        "seed0": seed0,
        "registration": registration,
        "levels": dict(levels),
        "scans": records,
        "aggregate": agg,
        "table": table,
    }
    write_json_atomic(out / "accuracy.json", doc)
    write_text_atomic(out / "accuracy.md", _report_text(doc))
    return doc


def rescore(out_dir: str | Path) -> dict[str, Any]:
    """Score the finished scans of an evaluation folder again (after a change to the scoring or
    to these definitions) from their ``series/ground_truth.json`` and ``run/defects.json``, and
    rewrite ``accuracy.json`` and ``accuracy.md``; nothing is run again."""
    out = Path(out_dir)
    old = read_json(out / "accuracy.json", "evaluation record")
    records = []
    for rec in old["scans"]:
        if rec.get("status") == "ok":
            scan = out / "scans" / f"{rec['index']:03d}_{rec['level']}"
            truth = read_json(scan / "series" / GROUND_TRUTH_JSON, "ground truth")
            defects = read_json(scan / "run" / "defects.json", "defect export")
            rec = dict(rec, summary=summarise_scan(defects, truth, score(defects, truth)))
        records.append(rec)
    return _write_outputs(
        out,
        records,
        old["levels"],
        old["seed0"],
        old.get("registration", "pipeline"),
        old.get("code"),
    )


def rerun(out_dir: str | Path, from_stage: str, config_path: str | Path | None = None) -> dict[str, Any]:
    """Run the stages from ``from_stage`` to measure again on the scans of an evaluation folder,
    reusing their rendered series and the earlier stages' outputs, then score them again.

    This is how a change to segment or measure is evaluated on the same volumes without
    rendering and reconstructing again. The code digests of the record are updated.
    """
    from pipeline.run import run_pipeline

    if from_stage not in STAGES[1:]:
        raise ValueError(f"from_stage must be one of {STAGES[1:]} (got {from_stage!r})")
    stages = STAGES[STAGES.index(from_stage):]
    outputs = {"reconstruct": ["volume.ome.zarr"], "segment": ["components.json"],
               "measure": ["defects.json", "defects.csv"]}
    out = Path(out_dir)
    old = read_json(out / "accuracy.json", "evaluation record")
    records = []
    for rec in old["scans"]:
        scan = out / "scans" / f"{rec['index']:03d}_{rec['level']}"
        run = scan / "run"
        before = STAGES[STAGES.index(from_stage) - 1]
        if (run / outputs.get(before, ["registration.csv"])[0]).exists():
            for stage in stages:
                for name in outputs[stage]:
                    path = run / name
                    if path.is_dir():
                        shutil.rmtree(path)
                    elif path.exists():
                        path.unlink()
            t0 = time.perf_counter()
            try:
                record = run_pipeline(scan / "series" / ACQUISITION_YAML, run, config_path, stages=stages)
            except Exception as exc:  # noqa: BLE001 - a failing scan is recorded, the others go on
                rec = dict(rec, status="failed", stage=_failed_stage(run) or "pipeline",
                           error=f"{type(exc).__name__}: {exc}", traceback=traceback.format_exc(limit=6))
                log.warning("scan %s failed in %s: %s", scan.name, rec["stage"], rec["error"])
                records.append(rec)
                continue
            timings = dict(rec.get("timings_s", {}))
            for name in stages:
                timings[name] = record["stages"][name].get("elapsed_s")
            timings["rerun"] = round(time.perf_counter() - t0, 2)
            rec = {k: v for k, v in rec.items() if k not in ("stage", "error", "traceback")}
            rec.update(status="ok", timings_s=timings)
            log.info("scan %s: %s..measure again in %.1f s", scan.name, from_stage, timings["rerun"])
        records.append(rec)
    write_json_atomic(out / "accuracy.json", dict(old, scans=records, code=code_digests()))
    return rescore(out)


def _report_text(doc: dict) -> str:
    levels = ", ".join(f"{k} {v:g}" for k, v in doc["levels"].items())
    agg = doc["aggregate"]
    parts = [
        "# Accuracy on random synthetic scans\n",
        f"{len(doc['scans'])} scans, seeds {doc['seed0']}..{doc['seed0'] + len(doc['scans']) - 1}, "
        f"photons per pixel: {levels}; registration: {doc['registration']}; "
        f"created {doc['created']}.\n",
        "Stage code (SHA-256, 12 digits) at the start: "
        + ", ".join(f"{k} {v}" for k, v in doc["code"].get("at_start", {}).items())
        + (
            f"; files edited during the run (not reloaded, the run used the versions above): "
            f"{', '.join(doc['code']['changed_during_run'])}"
            if doc["code"].get("changed_during_run")
            else ""
        )
        + ".\n",
        doc["table"],
        "\nCrack recall by kind (cracks >= 3 voxels deep):\n",
        recall_by_kind_table(agg),
    ]
    failed = agg["overall"]["failed"]
    if failed:
        parts.append("\nFailed scans:\n")
        parts += [f"- scan {f['index']}: {f['stage']}: {f['error']}\n" for f in failed]
    return "\n".join(parts)


def _parse_levels(text: str) -> dict[str, float]:
    out = {}
    for item in text.split(","):
        name, _, value = item.partition("=")
        try:
            out[name.strip()] = float(value)
        except ValueError:
            raise argparse.ArgumentTypeError(
                f"--levels: {item!r} is not name=photons (e.g. high=5000,typical=1500,low=400)"
            ) from None
    return out


def main(argv: Sequence[str] | None = None) -> int:
    """``python -m synthetic.evaluate``: run the evaluation and print the table."""
    ap = argparse.ArgumentParser(
        prog="python -m synthetic.evaluate",
        description="End-to-end accuracy of register..measure on random synthetic scans.",
    )
    ap.add_argument("--n", type=int, default=21, help="number of scans (default 21)")
    ap.add_argument("--out", type=Path, required=True, help="output folder")
    ap.add_argument("--seed0", type=int, default=0, help="seed of the first scan")
    ap.add_argument(
        "--levels",
        type=_parse_levels,
        default=dict(LEVELS),
        help="photon levels, name=photons,... (default high=5000,typical=1500,low=400)",
    )
    ap.add_argument("--config", type=Path, default=None, help="run configuration YAML")
    ap.add_argument("--drop-frames", action="store_true", help="delete frames after each run")
    ap.add_argument("--resume", action="store_true", help="reuse finished scan records")
    ap.add_argument(
        "--rescore", action="store_true", help="only score the scans already in --out again"
    )
    ap.add_argument(
        "--rerun-from",
        choices=STAGES[1:],
        default=None,
        help="run this stage..measure again on the scans in --out (no rendering), then score",
    )
    ap.add_argument(
        "--registration",
        choices=("pipeline", "truth"),
        default="pipeline",
        help="truth: exact frame origins instead of the register stage (isolates segment/measure)",
    )
    args = ap.parse_args(argv)
    logging.basicConfig(level=logging.WARNING, format="%(asctime)s %(name)s: %(message)s")
    log.setLevel(logging.INFO)
    from pipeline.compute import set_quiet

    set_quiet(True)
    if args.rescore or args.rerun_from:
        doc = rerun(args.out, args.rerun_from, args.config) if args.rerun_from else rescore(args.out)
        sys.stdout.write(doc["table"])
        sys.stdout.write("\n" + recall_by_kind_table(doc["aggregate"]))
        return 0
    doc = evaluate(
        args.n,
        args.levels,
        args.out,
        seed0=args.seed0,
        config_path=args.config,
        keep_frames=not args.drop_frames,
        resume=args.resume,
        registration=args.registration,
    )
    sys.stdout.write(doc["table"])
    sys.stdout.write("\n" + recall_by_kind_table(doc["aggregate"]))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

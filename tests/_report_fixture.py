"""A small hand-made run folder for the report tests (invented round-trip data, no physics claims).

Wafer: 100 mm diameter, 88 um thick (a thin invented sample so the volume stays tiny), (001)
surface with [110] along +x. Its centre sits at (-49.78, 0.08) mm, so the edge circle crosses
the imaged region at x = 220 um, y = 80 um.

Volume (z, y, x) = (26, 40, 64) voxels of 4 um, origin (-4, 0, 0) um: ~1 inside the wafer, ~0
outside (above/below the faces and beyond the edge). Label ids:

1. surface_top crack, plane x = 60 um (normal +x), semi-ellipse in (y, z): centre y = 80,
   c = 48 um along y, a = 40 um deep.
2. edge crack, plane y = 80 um (normal +y), radial along x from the edge (x = 220) 48 um inward,
   semi-ellipse on the edge face centred at z = 44 with c = 32 um along z.
3. surface_top crack on an inclined {111} plane, trace along x at y = 130 um, 54.74 deg to the
   surface: normal (0, -sin 54.74, cos 54.74); c = 40 um along x centred at x = 110, in-plane
   semi-axis a = 24.49 um (20 um deep normal to the surface).
4. dislocation loop (ring, diameter 24 um) at (120, 40, 50) um.
5. slip band along x at y = 8 um, z = 4 um.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import zarr
from _defects_doc import defects_doc as _defects_doc

from pipeline import omezarr
from pipeline import runfolder as rf
from pipeline.config import Acquisition, RunConfig
from pipeline.geometry import Geometry

SHAPE = (26, 40, 64)
VOXEL_UM = (4.0, 4.0, 4.0)
ORIGIN_UM = (-4.0, 0.0, 0.0)
THICKNESS_UM = 88.0
DIAMETER_MM = 100.0
CENTER_XY_MM = (-49.78, 0.08)
INCL3_DEG = math.degrees(math.acos(1 / math.sqrt(3)))  # {111} on (001): 54.7356 deg

CRACK1 = {"x": 60.0, "yc": 80.0, "c": 48.0, "a": 40.0}
CRACK2 = {"y": 80.0, "x_edge": 220.0, "zc": 44.0, "c": 32.0, "a": 48.0}
CRACK3 = {"y0": 130.0, "xc": 110.0, "c": 40.0, "a_normal": 20.0}


def _n3() -> np.ndarray:
    s = math.radians(INCL3_DEG)
    return np.array([0.0, -math.sin(s), math.cos(s)])


def _w3() -> np.ndarray:
    """In-plane unit vector of crack 3 perpendicular to its trace, pointing into the wafer."""
    return np.cross(_n3(), [1.0, 0.0, 0.0])


def a3_plane_um() -> float:
    return CRACK3["a_normal"] / math.sin(math.radians(INCL3_DEG))


def _acquisition() -> Acquisition:
    return Acquisition.model_validate(
        {
            "sample": {
                "thickness_um": THICKNESS_UM,
                "diameter_mm": DIAMETER_MM,
                "center_xy_mm": list(CENTER_XY_MM),
            },
            "beam": {"energy_keV": 17.479, "reflection": [2, 2, 0], "slit_width_um": 15},
            "detector": {"pixel_um": [2.5, 2.5]},
            "scan": {"start_um": 0.0, "step_um": 4.0},
        }
    )


def _plane(normal, incl, az, hkl, family) -> dict:
    return {
        "normal": [float(v) for v in normal],
        "inclination_deg": float(incl),
        "azimuth_deg": float(az),
        "nearest_hkl": list(hkl),
        "family": family,
        "misfit_deg": 0.6,
        "fit_rms_um": 0.9,
    }


def _position(centroid) -> dict:
    cx, cy = np.asarray(CENTER_XY_MM) * 1000.0
    r = math.hypot(centroid[0] - cx, centroid[1] - cy)
    return {
        "r_mm": r / 1000.0,
        "angle_deg": math.degrees(math.atan2(centroid[1] - cy, centroid[0] - cx)) % 360,
        "distance_to_edge_um": DIAMETER_MM * 500.0 - r,
    }


def _crack(cid, kind, centroid, depth, length, span, a, c, shape, pts, plane) -> dict:
    return {
        "id": cid,
        "kind": kind,
        "centroid_um": [float(v) for v in centroid],
        "position": _position(centroid),
        "depth_um": float(depth),
        "length_um": float(length),
        "thickness_span_um": [float(v) for v in span],
        "front": {
            "a_um": float(a),
            "c_um": float(c),
            "aspect": float(a / c),
            "shape": shape,
            "points_um": [[float(v) for v in p] for p in pts],
            "fit_rms_um": 0.7,
        },
        "plane": plane,
        "uncertainty": {
            "depth_um": 2.0,
            "length_um": 3.0,
            "inclination_deg": 1.2,
            "method": "bootstrap",
        },
        "review": {"status": "unreviewed", "note": ""},
    }


def defects_doc() -> dict:
    """The defects.json of the fixture (schema-valid)."""
    phi = np.linspace(0.0, np.pi, 15)
    c1, c2, c3 = CRACK1, CRACK2, CRACK3
    pts1 = np.stack(
        [np.full_like(phi, c1["x"]), c1["yc"] + c1["c"] * np.cos(phi), c1["a"] * np.sin(phi)], 1
    )
    pts2 = np.stack(
        [
            c2["x_edge"] - c2["a"] * np.sin(phi),
            np.full_like(phi, c2["y"]),
            c2["zc"] + c2["c"] * np.cos(phi),
        ],
        1,
    )
    a3 = a3_plane_um()
    s = a3 * np.sin(phi)
    pts3 = np.stack([c3["xc"] + c3["c"] * np.cos(phi), np.zeros_like(phi), np.zeros_like(phi)], 1)
    pts3 = pts3 + np.array([0.0, c3["y0"], 0.0]) + s[:, None] * _w3()[None, :]
    # centroid of a half-ellipse area: 4 a / (3 pi) from the straight side
    k = 4 / (3 * math.pi)
    cen3 = np.array([c3["xc"], c3["y0"], 0.0]) + k * a3 * _w3()
    cracks = [
        _crack(
            1,
            "surface_top",
            (c1["x"], c1["yc"], k * c1["a"]),
            c1["a"],
            2 * c1["c"],
            (0.0, c1["a"]),
            c1["a"],
            c1["c"],
            "semi_elliptical",
            pts1,
            _plane((1, 0, 0), 90, 90, (1, 1, 0), "{110}"),
        ),
        _crack(
            2,
            "edge",
            (c2["x_edge"] - k * c2["a"], c2["y"], c2["zc"]),
            c2["a"],
            2 * c2["c"],
            (c2["zc"] - c2["c"], c2["zc"] + c2["c"]),
            c2["a"],
            c2["c"],
            "semi_elliptical",
            pts2,
            _plane((0, 1, 0), 90, 0, (1, -1, 0), "{110}"),
        ),
        _crack(
            3,
            "surface_top",
            cen3,
            c3["a_normal"],
            2 * c3["c"],
            (0.0, c3["a_normal"]),
            a3,
            c3["c"],
            "semi_elliptical",
            pts3,
            _plane(_n3(), INCL3_DEG, 0, (1, -1, 1), "{111}"),
        ),
    ]
    return _defects_doc(
        diameter_mm=DIAMETER_MM,
        thickness_um=THICKNESS_UM,
        center_xy_mm=list(CENTER_XY_MM),
        voxel_um=list(VOXEL_UM),
        cracks=cracks,
        loops=[
            {
                "id": 4,
                "center_um": [120.0, 40.0, 50.0],
                "diameter_um": 24.0,
                "plane": _plane((0.577, 0.577, 0.577), INCL3_DEG, 135, (1, 1, 1), "{111}"),
                "meets_surface": False,
            }
        ],
        slip_bands=[{"id": 5, "direction": [1.0, 0.0, 0.0], "extent_um": 100.0, "count": 3}],
    )


def _labels() -> np.ndarray:
    z = ORIGIN_UM[0] + VOXEL_UM[0] * np.arange(SHAPE[0])
    y = ORIGIN_UM[1] + VOXEL_UM[1] * np.arange(SHAPE[1])
    x = ORIGIN_UM[2] + VOXEL_UM[2] * np.arange(SHAPE[2])
    Z, Y, X = np.meshgrid(z, y, x, indexing="ij")
    lab = np.zeros(SHAPE, np.uint32)
    inside = (Z >= 0) & (Z <= THICKNESS_UM)
    c1, c2, c3 = CRACK1, CRACK2, CRACK3
    m1 = (
        inside
        & (np.abs(X - c1["x"]) < 2.1)
        & (((Y - c1["yc"]) / c1["c"]) ** 2 + (Z / c1["a"]) ** 2 <= 1)
    )
    lab[m1] = 1
    m2 = (
        inside
        & (np.abs(Y - c2["y"]) < 2.1)
        & (X <= c2["x_edge"])
        & (((c2["x_edge"] - X) / c2["a"]) ** 2 + ((Z - c2["zc"]) / c2["c"]) ** 2 <= 1)
    )
    lab[m2] = 2
    # crack 3: distance to the inclined plane below half a voxel, inside the in-plane ellipse
    n, w = _n3(), _w3()
    d = np.stack([X, Y - c3["y0"], Z], -1)
    off = d @ n
    s = d @ w
    m3 = (
        inside
        & (np.abs(off) < 2.1)
        & (s >= 0)
        & (((X - c3["xc"]) / c3["c"]) ** 2 + (s / a3_plane_um()) ** 2 <= 1)
    )
    lab[m3] = 3
    r = np.hypot(X - 120.0, Z - 50.0)
    lab[(np.abs(Y - 40.0) < 2.1) & (np.abs(r - 12.0) < 2.5)] = 4
    lab[(np.abs(Y - 8.0) < 2.1) & (np.abs(Z - 4.0) < 2.1) & (X > 140) & (X < 240)] = 5
    return lab


def _volume(root: Path) -> None:
    vol = root / rf.VOLUME
    img = omezarr.create_image(
        vol,
        SHAPE,
        voxel_um=VOXEL_UM,
        origin_um=ORIGIN_UM,
        chunks=(16, 32, 32),
        levels=3,
        extra={
            "thickness_um": THICKNESS_UM,
            "geometry": "transmission",
            "x_range_um": [0.0, 252.0],
            "y_range_um": [0.0, 156.0],
        },
    )
    z = ORIGIN_UM[0] + VOXEL_UM[0] * np.arange(SHAPE[0])
    y = ORIGIN_UM[1] + VOXEL_UM[1] * np.arange(SHAPE[1])
    x = ORIGIN_UM[2] + VOXEL_UM[2] * np.arange(SHAPE[2])
    Z, Y, X = np.meshgrid(z, y, x, indexing="ij")
    cx, cy = np.asarray(CENTER_XY_MM) * 1000.0
    in_wafer = (Z >= 0) & (Z <= THICKNESS_UM) & (np.hypot(X - cx, Y - cy) <= DIAMETER_MM * 500.0)
    rng = np.random.default_rng(11)
    data = np.where(in_wafer, 1.0, 0.0) + 0.03 * rng.standard_normal(SHAPE)
    lab = _labels()
    data = data + np.where(lab > 0, np.where(lab <= 3, 2.0, 1.0), 0.0)
    img["0"][:] = data.astype(np.float32)
    omezarr.build_pyramid(vol, method="mean")
    omezarr.create_labels(
        vol,
        properties={
            i: {"class": c}
            for i, c in (
                (1, "crack"),
                (2, "crack"),
                (3, "crack"),
                (4, "dislocation_loop"),
                (5, "slip_band"),
            )
        },
    )
    zarr.open_array(str(vol / "labels" / "defects" / "0"), mode="r+")[:] = lab
    omezarr.build_pyramid(vol / "labels" / "defects", method="max")


def _registration(root: Path, n_frames: int = 64, flagged: int = 17) -> None:
    k = np.arange(n_frames)
    r0 = 12.0 + 0.3 * np.sin(k / 10)
    c0 = 30.0 + 0.01 * k
    q = 0.9 - 0.05 * np.cos(k / 7)
    q[flagged] = 0.12
    rows = []
    for i in k:
        rows.append(
            [
                int(i),
                4.0 * i,
                round(r0[i], 4),
                round(c0[i], 4),
                0.0 if i == 0 else round(r0[i] - r0[i - 1], 4),
                0.0 if i == 0 else round(c0[i] - c0[i - 1], 4),
                round(q[i], 4),
                int(i == flagged),
                int(i == flagged),
            ]
        )
    rf.write_csv_atomic(
        root / rf.REGISTRATION_CSV,
        [
            "frame",
            "position_um",
            "r0_px",
            "c0_px",
            "row_shift_px",
            "col_shift_px",
            "quality",
            "flagged",
            "interpolated",
        ],
        rows,
    )


def _run_json(root: Path, g_error: float) -> None:
    from pipeline.run import software_versions

    acq = _acquisition()
    geom = Geometry.from_acquisition(acq)
    done = {
        "status": "done",
        "fingerprint": "0" * 16,
        "started": "2024-01-01T00:00:00+00:00",
        "finished": "2024-01-01T00:00:05+00:00",
        "elapsed_s": 5.0,
        "last_elapsed_s": 5.0,
    }
    rf.write_json_atomic(
        root / rf.RUN_JSON,
        {
            "software": software_versions(),
            "acquisition": acq.model_dump(mode="json"),
            "config": RunConfig().model_dump(mode="json"),
            "recipe": "0123456789abcdef",
            "acquisition_file": "/data/invented/acquisition.yaml",
            "frames_fingerprint": "fedcba9876543210",
            "geometry": {
                k: getattr(geom, k)
                for k in (
                    "geometry",
                    "energy_keV",
                    "theta_B_deg",
                    "psi0_deg",
                    "psi_h_deg",
                    "tilt_deg",
                    "G",
                    "G_computed",
                    "L",
                )
            },
            "stages": {
                "register": {
                    **done,
                    "result": {
                        "G_computed": geom.G_computed,
                        "G_measured": geom.G_computed * (1 + g_error),
                        "band_width_px": geom.band_width_px * (1 + g_error),
                        "warnings": ["frame 17: quality 0.12 below 0.2; origin interpolated"],
                        "flagged_frames": [17],
                    },
                },
                "reconstruct": {
                    **done,
                    "result": {"voxel_um": list(VOXEL_UM), "shape": list(SHAPE), "levels": 3},
                },
                "segment": {
                    **done,
                    "result": {"components": {"crack": 3, "dislocation_loop": 1, "slip_band": 1}},
                },
                "measure": {
                    **done,
                    "result": {"cracks": 3, "dislocation_loops": 1, "slip_bands": 1},
                },
                "assess": {**done, "result": {"wafer_verdict": "grows"}},
            },
        },
    )


def _assessment(root: Path, doc: dict) -> dict:
    """Invented process: ramp to 1000 C in 30 s, hold 30 s, cool to 300 C by 120 s; the edge leads
    on heating and cooling. Stress and K are simple scalings of the edge-centre difference. The
    keys follow what pipeline.assess writes (SPEC 8 plus timeline, history, wafer summary)."""
    t = np.linspace(0.0, 120.0, 241)
    T_c = np.interp(t, [0, 30, 60, 120], [25, 1000, 1000, 300])
    dT = np.interp(t, [0, 15, 30, 45, 60, 75, 120], [0, 25, 0, 0, 0, -180, -40])
    T_e = T_c + dT
    # rim hoop stress sigma = alpha E (Tmean - T_edge) with alpha E ~ 0.39 MPa/K (order of magnitude)
    sig_edge = -0.39 * dT * 0.5
    out = []
    cases = (
        (doc["cracks"][0], 0.25, 0.90, "{110}"),
        (doc["cracks"][1], 1.0, 0.90, "{110}"),
        (doc["cracks"][2], 0.25, 0.82, "{111}"),
    )
    for c, scale, kic, fam in cases:
        sig = sig_edge * scale
        K = 1.12 * np.maximum(sig, 0) * np.sqrt(np.pi * c["depth_um"] * 1e-6) * 4.0
        # the inclined crack also sees shear: an invented mode-II share for its K_eq curve
        K_eq = K * (1.2 if c["plane"]["inclination_deg"] < 85 else 1.0)
        i = int(np.argmax(K))
        kmax, keq = float(K[i]), float(K_eq.max())
        out.append(
            {
                "id": c["id"],
                "kind": c["kind"],
                "model": "edge_tada" if c["kind"] == "edge" else "surface_newman_raju",
                "K_I_max_MPa_sqrt_m": kmax,
                "K_IC_MPa_sqrt_m": kic,
                "K_IC_plane": fam,
                "margin": kic / kmax,
                "K_II_max_MPa_sqrt_m": 0.66 * kmax if keq > kmax else 0.0,
                "K_eq_max_MPa_sqrt_m": keq,
                "margin_eq": kic / keq,
                "worst_time_s": float(t[i]),
                "sigma_at_worst_MPa": float(sig[i]),
                "T_at_worst_C": float(T_c[i]),
                "critical_dT_C": float(-180 * min(kic / kmax, kic / keq)),
                "verdict": "grows" if max(kmax, keq) >= kic else "does_not_grow",
                "notes": ["invented test values"],
                "history": {
                    "time_s": t.tolist(),
                    "sigma_MPa": sig.tolist(),
                    "K_I_MPa_sqrt_m": K.tolist(),
                    "K_eq_MPa_sqrt_m": K_eq.tolist(),
                },
            }
        )
    kic_in = {
        "{110}": {"value": 0.90, "source": "invented"},
        "{111}": {"value": 0.82, "source": "invented"},
    }
    a = {
        "schema_version": 1,
        "software": {"name": "crackstack", "version": "0.1.0"},
        "inputs": {
            "source": "recipe",
            "path": "/data/invented/invented_anneal.yaml",
            "material": {
                "E": {"value_GPa": 150.0, "source": "invented"},
                "alpha": {"value_per_K": 2.6e-6, "source": "invented"},
                "K_IC_MPa_sqrt_m": kic_in,
            },
            "stress_model": "invented scaling of the edge-centre difference",
        },
        "cautions": "invented assessment for tests",
        "wafer_verdict": "grows" if any(c["verdict"] == "grows" for c in out) else "does_not_grow",
        "wafer": {
            "n_cracks": 3,
            "n_assessed": 3,
            "n_grow": sum(c["verdict"] == "grows" for c in out),
            "dT_edge_center_min_C": float(dT.min()),
            "dT_edge_center_min_time_s": float(t[np.argmin(dT)]),
            "dT_edge_center_max_C": float(dT.max()),
            "dT_edge_center_max_time_s": float(t[np.argmax(dT)]),
            "sigma_theta_edge_max_MPa": float(sig_edge.max()),
            "sigma_theta_edge_max_time_s": float(t[np.argmax(sig_edge)]),
            "sigma_theta_edge_min_MPa": float(sig_edge.min()),
            "sigma_theta_edge_min_time_s": float(t[np.argmin(sig_edge)]),
            "slip": {
                "tau_max_MPa": 3.1,
                "system": "(111)[01-1]",
                "time_s": 75.0,
                "T_C": 780.0,
                "tau_c_MPa": 5.0,
                "risk": "below_tau_c",
            },
            "notes": [],
        },
        "cracks": out,
        "skipped_cracks": [],
        "timeline": {
            "time_s": t.tolist(),
            "T_center_C": T_c.tolist(),
            "T_edge_C": T_e.tolist(),
            "sigma_theta_edge_MPa": sig_edge.tolist(),
        },
    }
    rf.write_json_atomic(root / rf.ASSESSMENT_JSON, a)
    return a


def build_report_run(
    root: str | Path,
    *,
    assessment: bool = True,
    registration: bool = True,
    volume: bool = True,
    g_error: float = 0.012,
) -> Path:
    """Write the fixture run folder at ``root``; returns its path.

    ``g_error`` sets the measured G relative to the computed one (0.012 = 1.2 % high).
    """
    root = Path(root)
    root.mkdir(parents=True, exist_ok=True)
    doc = defects_doc()
    rf.write_defects(root / rf.DEFECTS_JSON, doc)
    if volume:
        _volume(root)
    if registration:
        _registration(root)
    _run_json(root, g_error)
    if assessment:
        _assessment(root, doc)
    return root

"""A small invented run folder for viewer and review tests (round-trip data only, no physics).

Volume (z, y, x) = (26, 64, 96) voxels of (5, 4, 4) um, origin (-10, 2, 2) um: the wafer band
(z 0..100 um) is ~1, outside ~0. Two cracks and one dislocation loop are written into
``labels/defects`` with ids 1, 2 (cracks) and 3 (loop), and a matching, schema-valid
``defects.json`` and ``assessment.json``.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from _defects_doc import defects_doc as _defects_doc

from pipeline import omezarr, runfolder

SHAPE = (26, 64, 96)
VOXEL_UM = (5.0, 4.0, 4.0)
ORIGIN_UM = (-10.0, 2.0, 2.0)
THICKNESS_UM = 100.0


def _plane(n: int = 3) -> dict:
    return {
        "normal": [1.0, 0.0, 0.0],
        "inclination_deg": 90.0,
        "azimuth_deg": 90.0,
        "nearest_hkl": [1, 1, 0],
        "family": "{110}",
        "misfit_deg": 0.4,
        "fit_rms_um": 0.8,
    }


def _crack(cid: int, kind: str, centroid, depth, length, span, front_pts) -> dict:
    return {
        "id": cid,
        "kind": kind,
        "centroid_um": list(map(float, centroid)),
        "position": {"r_mm": 148.2, "angle_deg": 12.5, "distance_to_edge_um": 1800.0},
        "depth_um": depth,
        "length_um": length,
        "thickness_span_um": list(span),
        "front": {
            "a_um": depth,
            "c_um": length / 2,
            "aspect": depth / (length / 2),
            "shape": "semi_elliptical",
            "points_um": front_pts,
            "fit_rms_um": 1.3,
        },
        "plane": _plane(),
        "uncertainty": {
            "depth_um": 2.5,
            "length_um": 4.0,
            "inclination_deg": 1.5,
            "method": "bootstrap",
        },
        "review": {"status": "unreviewed", "note": ""},
    }


def _ellipse_front(
    x_um: float, yc_um: float, c_um: float, a_um: float, z0_um: float, sign: int
) -> list:
    t = np.linspace(0, np.pi, 9)
    return [[x_um, yc_um + c_um * np.cos(a), z0_um + sign * a_um * np.sin(a)] for a in t]


def build_run(root: str | Path, *, assessment: bool = True, chunks=(8, 32, 32)) -> Path:
    """Write the test run folder at ``root`` and return its path."""
    root = Path(root)
    root.mkdir(parents=True, exist_ok=True)
    vol_path = root / runfolder.VOLUME
    img = omezarr.create_image(
        vol_path,
        SHAPE,
        voxel_um=VOXEL_UM,
        origin_um=ORIGIN_UM,
        chunks=chunks,
        levels=3,
        extra={"thickness_um": THICKNESS_UM, "geometry": "transmission"},
    )
    z_um = ORIGIN_UM[0] + VOXEL_UM[0] * np.arange(SHAPE[0])
    rng = np.random.default_rng(7)
    data = np.where(((z_um >= 0) & (z_um <= THICKNESS_UM))[:, None, None], 1.0, 0.02)
    data = (data + 0.03 * rng.standard_normal(SHAPE)).astype(np.float32)

    lab = np.zeros(SHAPE, np.uint32)
    zi = np.arange(SHAPE[0])[:, None]
    yi = np.arange(SHAPE[1])[None, :]
    # crack 1: plane x = 102 um (index 25), from the top surface (z index 2) down to 40 um,
    # semi-elliptical in (y, z), centred at y = 130 um (index 32) with half-length 60 um
    zz = (z_um[:, None] - 0.0) / 40.0
    yy = (2.0 + 4.0 * yi - 130.0) / 60.0
    m1 = (zz >= 0) & (zz**2 + yy**2 <= 1.0)
    lab[:, :, 25][m1] = 1
    lab[:, :, 26][m1] = 1
    # crack 2: plane x = 282 um (index 70), from the bottom surface up 35 um, y 110..210 um
    zz2 = (THICKNESS_UM - z_um[:, None]) / 35.0
    yy2 = (2.0 + 4.0 * yi - 160.0) / 50.0
    m2 = (zz2 >= 0) & (zz2**2 + yy2**2 <= 1.0)
    lab[:, :, 70][m2] = 2
    # loop 3: small blob at (x, y, z) = (202, 62, 50) um
    lab[11:13, 14:17, 49:52] = 3
    del zi
    data[lab > 0] += 2.0

    img["0"][:] = data
    omezarr.build_pyramid(vol_path, method="mean")
    omezarr.create_labels(
        vol_path,
        colors={1: (255, 60, 0, 255), 2: (255, 200, 0, 255), 3: (0, 160, 255, 255)},
        properties={1: {"class": "crack"}, 2: {"class": "crack"}, 3: {"class": "dislocation_loop"}},
    )
    grp_path = vol_path / "labels" / "defects"
    import zarr

    zarr.open_array(str(grp_path / "0"), mode="r+")[:] = lab
    omezarr.build_pyramid(grp_path, method="max")

    cracks = [
        _crack(
            1,
            "surface_top",
            (103.0, 130.0, 17.0),
            40.0,
            120.0,
            (0.0, 40.0),
            _ellipse_front(103.0, 130.0, 60.0, 40.0, 0.0, +1),
        ),
        _crack(
            2,
            "surface_bottom",
            (282.0, 160.0, 85.0),
            35.0,
            100.0,
            (65.0, 100.0),
            _ellipse_front(282.0, 160.0, 50.0, 35.0, THICKNESS_UM, -1),
        ),
    ]
    doc = _defects_doc(
        diameter_mm=300.0,
        thickness_um=THICKNESS_UM,
        # centre chosen so the edge (r = 150 mm) crosses the imaged region at x ~ 300 um
        center_xy_mm=[-149.7, 0.13],
        voxel_um=list(VOXEL_UM),
        cracks=cracks,
        loops=[
            {
                "id": 3,
                "center_um": [202.0, 62.0, 50.0],
                "diameter_um": 12.0,
                "plane": _plane(),
                "meets_surface": False,
            }
        ],
        slip_bands=[],
    )
    runfolder.write_defects(root / runfolder.DEFECTS_JSON, doc)
    if assessment:
        runfolder.write_json_atomic(
            root / runfolder.ASSESSMENT_JSON,
            {
                "schema_version": 1,
                "inputs": {"recipe": "invented"},
                "cautions": [],
                "wafer_verdict": "grows",
                "cracks": [
                    {
                        "id": 1,
                        "model": "semi_elliptical_surface",
                        "K_I_max_MPa_sqrt_m": 1.12,
                        "K_IC_MPa_sqrt_m": 0.82,
                        "margin": 0.73,
                        "worst_time_s": 41.5,
                        "sigma_at_worst_MPa": 61.0,
                        "critical_dT_C": 48.0,
                        "verdict": "grows",
                        "notes": [],
                    },
                    {
                        "id": 2,
                        "model": "semi_elliptical_surface",
                        "K_I_max_MPa_sqrt_m": 0.41,
                        "K_IC_MPa_sqrt_m": 0.82,
                        "margin": 2.0,
                        "worst_time_s": 40.0,
                        "sigma_at_worst_MPa": 30.0,
                        "critical_dT_C": 160.0,
                        "verdict": "does_not_grow",
                        "notes": [],
                    },
                ],
            },
        )
    return root

"""The frame of an invented ``defects.json`` (SPEC section 7) shared by the test run folders."""

from __future__ import annotations

from typing import Any

#: Acquisition block of the invented runs: Si 220 at 17.479 keV in Laue transmission.
ACQUISITION = {"energy_keV": 17.479, "reflection": [2, 2, 0], "geometry": "transmission"}


def defects_doc(
    *,
    diameter_mm: float,
    thickness_um: float,
    center_xy_mm: list[float],
    voxel_um: list[float],
    cracks: list[dict],
    loops: list[dict],
    slip_bands: list[dict],
) -> dict[str, Any]:
    """A schema-valid defect export of a (001) wafer with crystal x = [110]."""
    return {
        "schema_version": 1,
        "software": {"name": "crackstack", "version": "0.1.0"},
        "wafer": {
            "diameter_mm": diameter_mm,
            "thickness_um": thickness_um,
            "crystal": {"z_uvw": [0, 0, 1], "x_uvw": [1, 1, 0]},
            "center_xy_mm": list(center_xy_mm),
            "center_source": "acquisition",
        },
        "acquisition": dict(ACQUISITION, voxel_um=list(voxel_um)),
        "cracks": cracks,
        "dislocation_loops": loops,
        "slip_bands": slip_bands,
    }

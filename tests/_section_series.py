"""Synthetic section-topograph series with known drift for the register / reconstruct tests.

Rendered with :func:`synthetic.render_series` (the project's forward model with exact ground
truth), once per session and case: the registration tests and the reconstruction tests share
them. Invented data (round-trip tests only).

Every case has features along the slit in every frame: a slip band whose lines run along the
scan axis x (a fixed row in every frame: what row registration needs, PHYSICS.md 1.7), a
dislocation loop, and point defects for the localisation test (clear of the other features). Line cores are 3 um wide so
that 2.5 um pixels sample them (the forward model samples pixel centres: a 1 um core or the
wafer edge would alias and carry no sub-pixel position).
"""

from __future__ import annotations

import atexit
import functools
import json
import shutil
import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from pipeline.compute import set_quiet
from pipeline.config import CorrectConfig, RegisterConfig, load_acquisition
from pipeline.correct import correct_series
from pipeline.geometry import Geometry
from pipeline.ingest import open_series
from pipeline.register import register_frames
from synthetic import Scenario, render_series

TRANSMISSION = {"energy_keV": 17.479, "reflection": [2, 2, 0], "slit_width_um": 12.0}
#: Si 224 at Cu K-alpha1 on (001): incidence 79.277 deg (grazing exit) or 8.748 deg (grazing
#: incidence) from the surface (PHYSICS.md check value 5, xrayutilities HXRD.Q2Ang).
REFLECTION_GE = {"energy_keV": 8.048, "reflection": [2, 2, 4], "slit_width_um": 12.0,
                 "geometry": "reflection", "incidence_deg": 90 - 79.277}
REFLECTION_GI = {**REFLECTION_GE, "incidence_deg": 90 - 8.748}

CASES = {
    # name: (beam, detector tilt deg, frame columns, depths of the features um)
    "transmission": (TRANSMISSION, 0.0, 200, (100.0, 150.0, 200.0)),
    "tilted-detector": (TRANSMISSION, 25.0, 200, (100.0, 150.0, 200.0)),
    "reflection-grazing-exit": (REFLECTION_GE, 0.0, 140, (3.0, 5.0, 8.0)),
    "reflection-grazing-incidence": (REFLECTION_GI, 0.0, 220, (3.0, 5.0, 8.0)),
}
N_FRAMES, ROWS, STEP_UM = 40, 96, 4.0
POINTS_XY = ((40.0, 25.0), (100.0, 180.0), (140.0, 220.0))  # clear of the loop and the band

_ROOT = Path(tempfile.mkdtemp(prefix="crackstack-series-"))
atexit.register(shutil.rmtree, _ROOT, True)


def scenario(case: str, n_frames: int = N_FRAMES, **instrument) -> Scenario:
    beam, tilt, cols, depths = CASES[case]
    feature_z = depths[1]
    return Scenario.model_validate({
        "name": f"registration test ({case})",
        "wafer": {"thickness_um": 300.0},
        "acquisition": {
            "beam": beam,
            "detector": {"pixel_um": [2.5, 2.5], "tilt_deg": tilt},
            "scan": {"step_um": STEP_UM, "n_frames": n_frames},
            "frame": {"rows": ROWS, "cols": cols, "margin_px": 30.0},
        },
        "contrast": {
            "pendellosung_um": 36.3,  # Si 220, 17.479 keV (PHYSICS.md check value 9)
            "attenuation_length_um": 68.6,  # Si at 8.048 keV (PHYSICS.md 1.6, xrayutilities)
            "line": {"amplitude": 1.5, "sigma_um": 3.0, "halo": 0.3, "halo_um": 5.0},
        },
        "instrument": {"drift_step_px": [0.3, 0.3], "seed": 3, "hot_pixels": 10, **instrument},
        "defects": [
            {"type": "slip_band", "plane": [1, -1, 1], "direction": [1, 1, 0],
             "center_um": [80.0, 120.0, feature_z], "count": 4, "spacing_um": 12.0, "length_um": 500.0},
            {"type": "loop", "plane": [1, 1, 1], "center_um": [80.0, 100.0, feature_z],
             "radius_um": 30.0 if case.startswith("trans") or case.startswith("tilt") else 4.0},
            # strong points: the forward model integrates along each pixel's ray over the slit,
            # so a 1.5 um point of strength 1 adds only ~0.1 band levels to a frame
            *({"type": "point", "position_um": [x, y, z], "size_um": 1.5, "strength": 15.0}
              for (x, y), z in zip(POINTS_XY, depths, strict=True)),
        ],
    })


@dataclass
class Registered:
    folder: Path
    truth: dict
    geom: Geometry
    series: object
    corrected: object
    result: object


@functools.cache
def registered(case: str) -> Registered:
    """Render, open, correct and register one case (cached for the session)."""
    set_quiet(True)
    folder = render_series(scenario(case), _ROOT / case)
    truth = json.loads((folder / "ground_truth.json").read_text())
    acq, base = load_acquisition(folder / "acquisition.yaml")
    geom = Geometry.from_acquisition(acq)
    series = open_series(acq, base)
    corrected = correct_series(series, CorrectConfig())
    result = register_frames(corrected, geom, series.positions_um, RegisterConfig())
    return Registered(folder, truth, geom, series, corrected, result)


def render(case: str, folder: Path, n_frames: int = N_FRAMES, **instrument) -> tuple[Path, dict]:
    """Render a variant of a case into ``folder``; returns the acquisition file and truth."""
    set_quiet(True)
    out = render_series(scenario(case, n_frames, **instrument), folder)
    return out / "acquisition.yaml", json.loads((out / "ground_truth.json").read_text())


def rms(a) -> float:
    return float(np.sqrt(np.mean(np.square(a))))

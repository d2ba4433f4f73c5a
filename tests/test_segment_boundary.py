"""Segmentation at the wafer's boundaries and of merged slip lines, on forward-model series.

Two small scenarios are rendered by ``synthetic.render_series`` (the project's forward model:
exact SPEC 5 projection, slit integration along the diffracted ray, fringes, surface lines, the
wafer edge, Poisson and read noise, hot pixels), reconstructed with the true frame origins and
segmented with the default configuration (round-trip data: the scenes are invented, the
geometry is the project's own):

- interior: an inclined {111} crack from the entrance surface, only 30 um deep and 50 um long
  (as small as a dislocation loop, which the old shape rules took it for), a dislocation loop
  on {111} inside the wafer, and a slip band of four parallel lines 8 um apart (which the slit
  blur merges into one ribbon);
- edge: a crack on (1-10) from the wafer edge, 25 um deep radially (a 20 um erosion of the
  wafer mask at the edge left only 5 um of it).

Geometry as in ``synthetic.evaluate`` (Si 220 at 17.479 keV, symmetric Laue, 1.5 um pixels,
4 um steps), on a 300 um wafer and 56 frames to keep each render to a few seconds.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from pipeline import runfolder as rf
from pipeline.compute import set_quiet
from pipeline.config import RunConfig, SegmentConfig, load_acquisition

THICKNESS = 300.0
N_FRAMES = 56
STEP = 4.0
RADIUS_UM = 150_000.0


def _scenario(defects: list[dict], *, edge_x_um: float | None, seed: int):
    from synthetic import Scenario

    if edge_x_um is None:
        centre = [-80.0, 0.0]  # the region lies 80 mm inside the wafer
    else:
        centre = [(edge_x_um - RADIUS_UM) / 1000.0, 96.0 / 1000.0]  # edge along y at x_edge
    return Scenario.model_validate({
        "wafer": {"diameter_mm": 300.0, "thickness_um": THICKNESS, "center_xy_mm": centre,
                  "crystal": {"z_uvw": [0, 0, 1], "x_uvw": [1, 1, 0]}},
        "acquisition": {
            "beam": {"energy_keV": 17.479, "reflection": [2, 2, 0], "geometry": "transmission",
                     "slit_width_um": 12.0},
            "detector": {"pixel_um": [1.5, 1.5]},
            "scan": {"start_um": 0.0, "step_um": STEP, "n_frames": N_FRAMES},
            "frame": {"rows": 128, "cols": 128, "margin_px": 32.0, "origin_row_px": 0.0},
            "write_center": True,
        },
        "contrast": {"pendellosung_um": 36.3},  # Si 220, 17.479 keV (PHYSICS.md check value 9)
        "instrument": {"photons_per_px": 1500.0, "hot_pixels": 6, "drift_step_px": [0.0, 0.0],
                       "seed": seed},
        "defects": defects,
    })


def _segment(scn, folder: Path) -> tuple[dict, dict]:
    """Render, reconstruct with the true origins, segment: (components.json doc, ground truth)."""
    from pipeline.correct import correct_series
    from pipeline.geometry import Geometry
    from pipeline.ingest import open_series
    from pipeline.reconstruct import reconstruct_volume
    from pipeline.register import read_registration_csv, write_registration_csv
    from pipeline.segment import segment_volume
    from synthetic import render_series
    from synthetic.evaluate import truth_registration

    set_quiet(True)
    series = render_series(scn, folder / "series")
    truth = json.loads((series / "ground_truth.json").read_text())
    acq, base = load_acquisition(series / "acquisition.yaml")
    run = folder / "run"
    run.mkdir(parents=True)
    write_registration_csv(run / rf.REGISTRATION_CSV, truth_registration(truth))
    frames = open_series(acq, base)
    reconstruct_volume(correct_series(frames, RunConfig().correct), Geometry.from_acquisition(acq),
                       frames.positions_um, read_registration_csv(run / rf.REGISTRATION_CSV),
                       RunConfig().reconstruct, run / rf.VOLUME)
    return segment_volume(run / rf.VOLUME, SegmentConfig()), truth


def _near(components: list[dict], point_um, within_um: float) -> list[dict]:
    p = np.asarray(point_um, float)
    return [c for c in components if np.linalg.norm(np.asarray(c["centroid_um"]) - p) <= within_um]


@pytest.fixture(scope="module")
def interior(tmp_path_factory):
    defects = [
        {"type": "crack", "plane": {"hkl": [1, -1, 1]}, "start": "surface_top", "a_um": 30.0,
         "c_um": 25.0, "position_um": [70.0, 60.0, 0.0]},
        {"type": "loop", "plane": [1, 1, 1], "center_um": [150.0, 140.0, 150.0], "radius_um": 20.0},
        {"type": "slip_band", "plane": [1, -1, 1], "direction": [1, 1, 0],
         "center_um": [120.0, 70.0, 200.0], "count": 4, "spacing_um": 8.0, "length_um": 70.0,
         "strength": 1.7},
    ]
    return _segment(_scenario(defects, edge_x_um=None, seed=5), tmp_path_factory.mktemp("interior"))


@pytest.fixture(scope="module")
def edge(tmp_path_factory):
    x_edge = STEP * (N_FRAMES - 1) - 10.0
    defects = [{"type": "crack", "plane": {"hkl": [1, -1, 0]}, "start": "edge", "a_um": 25.0,
                "c_um": 60.0, "position_um": [x_edge, 96.0, 150.0]}]
    return _segment(_scenario(defects, edge_x_um=x_edge, seed=6), tmp_path_factory.mktemp("edge"))


def test_shallow_inclined_111_surface_crack_is_a_crack_not_a_loop(interior):
    doc, truth = interior
    crack = truth["cracks"][0]
    found = _near(doc["components"], crack["centroid_um"], 30.0)
    assert [c["class"] for c in found] == ["crack"], found
    assert found[0]["meets_surface"] is True
    # The loop inside the wafer stays a loop.
    lp = truth["dislocation_loops"][0]
    assert [c["class"] for c in _near(doc["components"], lp["center_um"], 30.0)] == ["dislocation_loop"]


def test_parallel_slip_lines_are_one_slip_band(interior):
    doc, truth = interior
    band = truth["slip_bands"][0]
    found = _near(doc["components"], band["center_um"], 0.5 * band["extent_um"] + 15.0)
    assert [c["class"] for c in found] == ["slip_band"], found
    # Its direction is the lines' <110> (crystal [110] = wafer x here), not the slit's ray.
    assert abs(found[0]["direction"][0]) > 0.9, found[0]["direction"]
    # Nothing else in the scene is a slip band, and the only crack is the surface crack.
    assert sum(c["class"] == "slip_band" for c in doc["components"]) == 1
    assert sum(c["class"] == "crack" for c in doc["components"]) == 1


def test_edge_crack_25_um_deep_is_found_and_the_edge_is_not(edge):
    doc, truth = edge
    crack = truth["cracks"][0]
    cracks = [c for c in doc["components"] if c["class"] == "crack"]
    assert len(cracks) == 1, doc["components"]
    assert np.linalg.norm(np.subtract(cracks[0]["centroid_um"], crack["centroid_um"])) < 30.0
    assert cracks[0]["meets_edge"] is True
    assert abs(cracks[0]["normal"][1]) > 0.95  # the (1-10) plane: normal along y, not the edge's x
    # The edge face (a sheet with the edge normal) is rejected, not reported.
    assert all(c["class"] != "slip_band" for c in doc["components"])


def test_lateral_normal_projector_matches_numpy_eigenvectors():
    # The edge gate's projector n n^T on the sheet normal (pipeline.hessian.sheet_normal_lateral)
    # against the eigenvector of the largest-magnitude eigenvalue from numpy.linalg.eigh (LAPACK).
    from pipeline.hessian import eigvalsh3, sheet_normal_lateral

    rng = np.random.default_rng(7)
    a = rng.standard_normal((500, 3, 3))
    m = (a + np.swapaxes(a, 1, 2)) / 2
    h = tuple(m[:, i, j].astype(np.float32) for i, j in ((0, 0), (0, 1), (0, 2), (1, 1), (1, 2), (2, 2)))
    pyy, pyx, pxx = sheet_normal_lateral(h, *eigvalsh3(*h))
    w, v = np.linalg.eigh(m)
    n = v[np.arange(500), :, np.argmax(np.abs(w), axis=1)]
    # Nearly degenerate largest pairs make any eigenvector ill-defined; compare the others.
    srt = np.sort(np.abs(w), axis=1)
    ok = (srt[:, 2] - srt[:, 1]) > 0.05 * srt[:, 2]
    np.testing.assert_allclose(pyy[ok], (n[:, 1] ** 2)[ok], atol=2e-3)
    np.testing.assert_allclose(pyx[ok], (n[:, 1] * n[:, 2])[ok], atol=2e-3)
    np.testing.assert_allclose(pxx[ok], (n[:, 2] ** 2)[ok], atol=2e-3)

"""The single pass of the filter bank (responses kept between statistics and labelling) and the
cropped edge-normal smoothing give the same results as the two-pass, whole-block forms they
replace (round-trip checks on invented volumes of tests/test_segment.py)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage as ndi
from test_segment import CRACK, SLIP, VOXEL, wafer

from pipeline import compute
from pipeline import segment as sg
from pipeline.config import SegmentConfig


@pytest.fixture(autouse=True)
def _quiet():
    compute.set_quiet(True)


def test_one_pass_equals_windowed_statistics(monkeypatch):
    # Three sample windows along y (192 voxels > 3 x 40) and blocks across all axes: the kept
    # responses' statistics must use the windows' voxels only, whatever the chunking.
    monkeypatch.setattr(sg, "SAMPLE_WINDOW", 40)
    vol, _ = wafer([CRACK, SLIP], photons=300, seed=4)
    assert len(sg._windows(vol.shape)) == 3
    one = sg.segment_array(vol, voxel_um=VOXEL)
    chunked = sg.segment_array(vol, voxel_um=VOXEL, chunks=(12, 40, 26))
    monkeypatch.setattr(sg, "KEEP_RESPONSES_MAX_VOXELS", 0)  # the windowed two-pass path
    two = sg.segment_array(vol, voxel_um=VOXEL)
    assert len(one.components) >= 2
    for res in (chunked, two):
        assert res.noise_sigma == one.noise_sigma
        assert res.thresholds == one.thresholds
        assert res.components == one.components
        np.testing.assert_array_equal(sg.labels_from_result(res), sg.labels_from_result(one))


def test_cropped_edge_normal_equals_whole_block():
    p = sg._params(SegmentConfig(), VOXEL)
    yy, xx = np.mgrid[0:150, 0:120]
    mask = np.broadcast_to(((yy + 60.0) ** 2 + (xx - 40.0) ** 2 < 170.0**2)[None], (6, 150, 120)).copy()
    mask[:2, :, :8] = False  # a notch in two slices
    zone, ey, ex, beyond = sg._edge_zone(mask, p)
    assert zone.any() and not zone.all()
    # The same normal from the smoothing of the whole block.
    sy, sx = sg._edge_smooth_vox(p.edge_zone_um, p.voxel_um)
    g = ndi.gaussian_filter(mask.astype(np.float32), (0, sy, sx), mode="nearest", truncate=sg.TRUNCATE_EDGE)
    gy = np.gradient(g, axis=1) / np.float32(p.voxel_um[1])
    gx = np.gradient(g, axis=2) / np.float32(p.voxel_um[2])
    norm = np.hypot(gy, gx)
    ok = (zone | beyond) & (norm > 0)
    np.testing.assert_array_equal(ey, np.where(ok, gy / np.where(ok, norm, 1), 0).astype(np.float32))
    np.testing.assert_array_equal(ex, np.where(ok, gx / np.where(ok, norm, 1), 0).astype(np.float32))

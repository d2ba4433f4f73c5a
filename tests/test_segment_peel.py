"""Loops split off a boundary crack whose response they touch (segment._peel_loops).

Invented components (round-trip of the splitting rule, no physics): a vertical crack sheet
from the entrance surface and a ring (a dislocation loop) below it, joined by a faint bridge,
as the blurred response of a contact indent joins them. The ring must come off as a loop and
the sheet stay one crack; a crack with two maxima and no loop must stay whole.
"""

from __future__ import annotations

import numpy as np

from pipeline import segment as sg
from pipeline.config import SegmentConfig

VOXEL = (2.0, 2.0, 2.0)
SHAPE = (60, 60, 60)


def _plate(peaks_y: tuple[int, ...]) -> tuple[np.ndarray, np.ndarray]:
    """Vertical sheet x = 30 +- 1, y 5..54, z 0..15, response bumps (100 at the peaks)."""
    zz, yy, xx = np.meshgrid(np.arange(16), np.arange(5, 55), np.arange(29, 32), indexing="ij")
    coords = np.stack([zz.ravel(), yy.ravel(), xx.ravel()], axis=1)
    z = np.full(coords.shape[0], 8.0)
    for py in peaks_y:
        z = np.maximum(z, 100.0 * np.exp(-((coords[:, 1] - py) ** 2 + (coords[:, 0] - 6) ** 2) / 50.0))
    return coords, z


def _ring() -> np.ndarray:
    """Ring of radius 8 voxels around (z, y, x) = (32, 30, 30) in a z plane, tube ~1.5 voxels."""
    zz, yy, xx = np.meshgrid(np.arange(29, 36), np.arange(18, 43), np.arange(18, 43), indexing="ij")
    r = np.hypot(yy - 30, xx - 30)
    tube = (r - 8.0) ** 2 + (zz - 32) ** 2 <= 1.5 ** 2
    return np.stack([zz[tube], yy[tube], xx[tube]], axis=1)


def _component(coords: np.ndarray, z: np.ndarray) -> dict:
    return {"coords": coords.astype(np.int32), "z": z.astype(np.float32),
            "line": np.zeros(coords.shape[0], bool), "edge": np.zeros((coords.shape[0], 3), np.float32)}


def _split(comp: dict):
    p = sg._params(SegmentConfig(), VOXEL)
    rows = (np.zeros(SHAPE[1], np.int64), np.full(SHAPE[1], SHAPE[0] - 1, np.int64))
    d = sg._describe(comp, p.voxel_um, p.high)
    sg._place(comp, d, rows, p)
    assert sg._classify(comp, d, p)[0] == sg.CRACK and d["meets_surface"]
    return sg._peel_loops(comp, d, rows, p), p


def test_ring_joined_to_a_surface_crack_is_split_off_as_a_loop():
    pc, pz = _plate((30,))
    ring = _ring()
    # Faint bridge (response 5, above the low threshold 3.5) from the sheet's foot to the ring.
    bridge = np.array([[z, 30, 30] for z in range(16, 29)] + [[29, 30, 31], [30, 30, 31]])
    coords = np.concatenate([pc, bridge, ring])
    z = np.concatenate([pz, np.full(len(bridge), 5.0), np.full(len(ring), 40.0)])
    _, first = np.unique(coords, axis=0, return_index=True)
    first.sort()
    comp = _component(coords[first], z[first])
    (rest, d_rest, loops), p = _split(comp)
    assert len(loops) == 1
    loop_part, d_loop = loops[0]
    # The loop holds the ring (all but the voxels shared with the bridge's end) and no sheet voxel.
    ring_set = {tuple(v) for v in ring}
    got = {tuple(v) for v in loop_part["coords"]}
    assert len(got & ring_set) >= 0.9 * len(ring_set)
    assert not got & {tuple(v) for v in pc}
    assert not d_loop["meets_surface"]
    # The sheet stays one crack with every one of its voxels.
    assert sg._classify(rest, d_rest, p)[0] == sg.CRACK
    assert {tuple(v) for v in pc} <= {tuple(v) for v in rest["coords"]}
    assert rest["coords"].shape[0] + loop_part["coords"].shape[0] == comp["coords"].shape[0]


def test_crack_with_two_maxima_and_no_loop_stays_whole():
    pc, pz = _plate((15, 45))
    comp = _component(pc, pz)
    (rest, _, loops), _ = _split(comp)
    assert loops == []
    assert rest is comp

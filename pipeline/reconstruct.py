"""Reconstruct: resample a registered series into the wafer frame as an OME-Zarr volume.

Every voxel ``(x, y, z)`` is lit by the frames whose ribbon passes near it. In the sheared
frame coordinate ``x' = x - z tan(psi0)`` (the stage position whose ribbon centre goes through
the voxel) the value is interpolated linearly between the two usable frames that bracket
``x'``; each of them is sampled where the exact projection of SPEC section 5 puts the voxel,
at its own offset ``D = x' - X_k`` from the ribbon centre::

    r = r0_k + y / p_row
    c = c0_k + (z G + D L) / p_col

(bilinear interpolation in the frame). Taking the ``D L`` term into account removes the blur
of the ribbon-centre approximation along the diffracted beam (``w / sin 2 theta_B``, SPEC
section 5): a point is reconstructed where it is, not smeared over the slit.

Frames flagged by registration (no usable band, inconsistent shifts) are not used: voxels
between two usable frames farther apart than ``MAX_GAP_STEPS`` scan steps (a run of blank
frames off the wafer, say) stay 0, like voxels outside the scanned region.

Grid. Axes (z, y, x), voxel (dz, dy, dx) from ``reconstruct.voxel_um`` or the natural sampling
(one detector column in depth, one row along y, one scan step along x). z = 0 (the entrance
surface) and y = 0 are voxel centres; z runs from a margin above the entrance surface (the
surfaces' slit blur ``w |L| / (2 G cos psi0)`` plus ``MARGIN_VOXELS``) to the exit surface (transmission)
or the probed depth (reflection) plus the margin; y covers the rows every usable
frame sees; x covers every voxel some frame lights.

Out-of-core and resumable. The output is written in x slabs one chunk wide. The slabs are
grouped into runs of consecutive slabs, one task per run and about one run per worker (more
for long scans, :data:`RUN_SLABS`); a run reads only the frames it needs, a batch at a time and
only the band's columns (the corrected series is chunked by columns, so the other columns are
never computed), keeps the frames its next slab shares with the current one (the shear
``thickness * tan(psi0)`` makes neighbouring slabs overlap), so every frame is read once per
run, and accumulates each slab in memory (``nz * ny * chunk_x`` float32): memory does not grow
with the scan length. A slab writes its chunks, one per call and each complete, and then its
block-mean part of every coarser pyramid level, computed from the slab in memory (level k has x
chunks ``chunk_x / 2**k``, so each slab owns whole chunks at every level; when ``chunk_x`` is
not divisible by ``2**(levels - 1)`` the levels are built from level 0 at the end instead).
After a slab is written a marker file is written (last), so an interrupted run started again
skips complete slabs (zarr 3 does not store chunks equal to the fill value, so the chunk files
alone cannot tell). The computation is deterministic (a voxel's value does not depend on which
task computed its frames), so a resumed volume is byte-identical to an uninterrupted one.
Markers and the parameter fingerprint live in the hidden folder ``.<volume name>.progress``
beside the volume.
"""

from __future__ import annotations

import hashlib
import json
import logging
import math
import os
import shutil
import threading
import time
from dataclasses import asdict
from pathlib import Path
from typing import Any

import dask
import dask.array as da
import dask.core
import numpy as np
import zarr
from dask.optimization import cull
from scipy import sparse

from pipeline import omezarr
from pipeline import runfolder as rf
from pipeline.compute import compute_here, n_workers, run_tasks
from pipeline.config import ReconstructConfig
from pipeline.errors import InputError
from pipeline.geometry import Geometry, natural_voxel_um

log = logging.getLogger(__name__)

#: Voxels of margin outside the wafer surfaces in z, beyond the slit blur of the surfaces.
MARGIN_VOXELS = 3
#: Largest gap between usable frames (in median scan steps) that is interpolated across.
MAX_GAP_STEPS = 2.5
#: Frames computed together inside a slab task (memory: PREFETCH band crops).
PREFETCH = 16
#: Most slabs in one task (long scans get more tasks than workers, for progress and balance).
RUN_SLABS = 16
#: Frames sampled to estimate the probed depth in reflection geometry.
DEPTH_SAMPLES = 9
_FORMAT = 2  # bump when the algorithm's output changes (invalidates partial volumes)


# ---------------------------------------------------------------------------------------------
# frame access from inside a slab task


class _FrameSource:
    """Frames of a Dask array, band columns only, computed a batch at a time for the slabs of
    one task.

    Held by a slab task as a plain object (not a Dask dependency), so the task reads frames
    sequentially and holds one batch at a time instead of the scheduler materialising all of
    them. It holds the task graph of the task's frames only (:meth:`for_tasks` culls the
    series' graph per task on the client), and each batch runs the part of it that makes the batch with Dask's simplest
    in-thread executor, ``dask.core.get`` (no nested thread pools: every core's work stays in
    its own task). Slicing the Dask array per batch instead cost ~5 ms of Python per
    2048 x 1024 frame, as much as reading and correcting the frame, and held the GIL the other
    worker needed; ``dask.local.get_sync`` on the culled graph ~1.6 ms, ``dask.core.get``
    ~0.9 ms.

    Frames the next slab of the task also needs (the shear makes neighbouring slabs overlap by
    ``thickness * tan(psi0)`` of scan) are kept until it has used them, so a task reads each of
    its frames once.
    """

    def __init__(self, graph: dict, keys: list, starts: np.ndarray, col_chunks: tuple[int, ...], token: str):
        self._graph = graph  # the task graph of this source's frames only
        self._keys = keys  # [frame block][row block][column block]
        self._starts = starts  # series index of each frame block's first frame, and the end
        self._col_chunks = col_chunks
        self._token = token
        self._kept: dict[int, list[np.ndarray]] = {}
        self._retain: set[int] = set()
        self._buffers: dict[str, np.ndarray] = {}
        # frames shared with the neighbouring task: the next task computes them first (at its
        # start) and leaves them in ``handoff``; this task, which needs them at its end, reads
        # them from there when they are already written (computes them itself otherwise)
        self.handoff: Path | None = None
        self.publish: set[int] = set()
        self.collect: set[int] = set()

    @classmethod
    def for_tasks(cls, frames: da.Array, c_lo: int, c_hi: int, ranges: list[tuple[int, int]]) -> list[_FrameSource]:
        """One source per frame range ``[k_lo, k_hi)`` of ``frames`` (band columns
        ``c_lo:c_hi``), each holding the task graph of its own frames only.

        Materialising the series' graph once and culling it per range keeps what a task
        pickles proportional to its frames: with the whole series' graph in every task
        (~2 KB per frame), a 2000-frame series on 64 workers would ship ~4 MB to each of 128
        tasks and serialise them one after the other on the client."""
        band = frames[:, :, c_lo:c_hi]
        graph = dict(band.__dask_graph__())
        keys = band.__dask_keys__()
        starts = np.cumsum((0,) + tuple(int(c) for c in band.chunks[0]))
        out = []
        for k_lo, k_hi in ranges:
            b_lo = int(np.searchsorted(starts, k_lo, side="right")) - 1
            b_hi = int(np.searchsorted(starts, k_hi - 1, side="right"))
            part = keys[b_lo:b_hi]
            sub, _ = cull(graph, [key for block in part for row in block for key in row])
            out.append(cls(sub, part, starts[b_lo : b_hi + 1], tuple(int(c) for c in band.chunks[2]),
                           f"{band.name}-{k_lo}-{k_hi}"))
        return out

    def __dask_tokenize__(self):
        return (self._token,)

    def __getstate__(self) -> dict:
        return {**self.__dict__, "_kept": {}, "_buffers": {}}  # rebuilt where the task runs

    def buffer(self, name: str, shape: tuple[int, ...]) -> np.ndarray:
        """A float32 work array reused by the task's slabs (uninitialised). Allocating the
        ~130 MB slab arrays afresh per slab grew the heap with the number of slabs (glibc
        raises its mmap threshold after large frees), so peak memory grew with the scan."""
        n = math.prod(shape)
        buf = self._buffers.get(name)
        if buf is None or buf.size < n:
            self._buffers[name] = buf = np.empty(n, np.float32)
        return buf[:n].reshape(shape)

    def select(self, frame_ids: np.ndarray, next_ids: np.ndarray | None) -> None:
        """Start a slab reading ``frame_ids``; keep those also in ``next_ids``."""
        here = {int(k) for k in frame_ids}
        self._kept = {k: v for k, v in self._kept.items() if k in here}
        self._retain = set() if next_ids is None else {int(k) for k in next_ids}

    def release(self) -> None:
        """Drop the kept frames and work arrays (the task is done)."""
        self._kept = {}
        self._buffers = {}

    def load(self, ks: list[int]) -> dict[int, list[np.ndarray]]:
        """Frames ``ks`` (original indices), each as its column blocks (rows, block columns)
        float32 in column order. The blocks are the source's own chunks (no copy into one band
        image: with the band aligned to the chunks, that copy cost as much as the row
        interpolation)."""
        todo = [int(k) for k in ks if int(k) not in self._kept]
        got = {}
        for k in [k for k in todo if k in self.collect]:
            got_k = self._collect(k)
            if got_k is not None:
                got[k] = got_k
        todo = [k for k in todo if k not in got]
        got.update(self._compute(todo) if todo else {})
        for k in todo:
            if k in self.publish:
                self._publish(k, got[k])
        out = {}
        for k in (int(k) for k in ks):
            out[k] = self._kept.pop(k) if k in self._kept else got[k]
            if k in self._retain:
                self._kept[k] = out[k]
        return out

    def _handoff_file(self, k: int) -> Path:
        return self.handoff / f"frame_{k:06d}.npy"

    def _publish(self, k: int, blocks: list[np.ndarray]) -> None:
        path = self._handoff_file(k)
        path.parent.mkdir(parents=True, exist_ok=True)
        tmp = path.with_suffix(f".{os.getpid()}.{threading.get_ident()}.partial")
        with open(tmp, "wb") as fh:
            np.save(fh, np.concatenate(blocks, axis=1) if len(blocks) > 1 else blocks[0])
        os.replace(tmp, path)  # complete or absent: a reader never sees half a frame

    def _collect(self, k: int) -> list[np.ndarray] | None:
        path = self._handoff_file(k)
        try:
            band = np.load(path)
        except (FileNotFoundError, ValueError, OSError):
            return None
        path.unlink(missing_ok=True)
        edges = np.cumsum(self._col_chunks)[:-1]
        return np.split(band, edges, axis=1)

    def _compute(self, ks: list[int]) -> dict[int, list[np.ndarray]]:
        blocks = sorted({int(np.searchsorted(self._starts, k, side="right")) - 1 for k in ks})
        want = [key for b in blocks for row in self._keys[b] for key in row]
        graph, _ = cull(self._graph, want)
        values = dict(zip(want, dask.core.get(graph, want), strict=True))
        wanted = set(ks)
        out: dict[int, list[np.ndarray]] = {}
        for b in blocks:
            grid = [[values[key] for key in row] for row in self._keys[b]]  # [row block][column block]
            columns = [col[0] if len(col) == 1 else np.concatenate(col, axis=1) for col in zip(*grid, strict=True)]
            for i in range(columns[0].shape[0]):
                k = int(self._starts[b]) + i
                if k in wanted:
                    out[k] = [np.asarray(c[i], np.float32) for c in columns]
        return out


# ---------------------------------------------------------------------------------------------
# the slab kernel


def _row_weights(r0: float, y_um: np.ndarray, p_row_um: float, n_rows: int) -> sparse.csr_array:
    """Linear interpolation along the rows of one frame as a sparse (ny, n_rows) matrix:
    ``r = r0 + y / p_row``; rows outside the detector give 0, the last row is clamped."""
    r = r0 + y_um / p_row_um
    i0 = np.floor(r).astype(np.int64)
    a = r - i0
    ok = (i0 >= 0) & (i0 <= n_rows - 1)
    yy = np.arange(y_um.size)
    return sparse.csr_array(
        (np.concatenate([(1 - a) * ok, a * ok]).astype(np.float32),
         (np.concatenate([yy, yy]), np.concatenate([np.clip(i0, 0, n_rows - 1), np.clip(i0 + 1, 0, n_rows - 1)]))),
        shape=(y_um.size, n_rows),
    )


def _resample_slab(
    source: _FrameSource,
    *,
    frame_ids: np.ndarray,
    X_um: np.ndarray,
    r0: np.ndarray,
    c0: np.ndarray,
    z_um: np.ndarray,
    y_um: np.ndarray,
    x_um: np.ndarray,
    tan_psi0: float,
    G: float,
    L: float,
    p_row_um: float,
    p_col_um: float,
    c_lo: int,
    n_band_cols: int,
    n_rows: int,
    max_gap_um: float,
) -> tuple[np.ndarray, np.ndarray]:
    """Volume slab from the usable frames ``frame_ids`` (in increasing stage position ``X_um``,
    with origins ``r0, c0``).

    Returns
    -------
    values : ndarray (nz * nx, ny) float32
        One row (a line along y) per voxel column (z, x), in the order of ``row_of``.
    row_of : ndarray (nz, nx) int
        Row of ``values`` holding voxel column (z, x).

    Every voxel column is a weighted sum of 4 band columns (2 frames x 2 neighbouring columns)
    of the row-interpolated frames, so a batch of frames is one sparse-times-dense product:
    ``values[rows] += W @ F`` with ``F`` the batch's row-interpolated band columns stacked
    (``n_frames * n_band_cols``, ny) and ``W`` the interpolation weights (4 per voxel column
    and frame pair). The voxel columns are ordered by the first frame they use, so the rows a
    batch of consecutive frames contributes to are one contiguous block. scipy's sparse
    product runs in compiled code but holds the GIL (two threads doing it: 0.8-1.2x the rate
    of one, where NumPy's ``exp`` gave 1.5-2.0x at the same time); it is kept because it is
    short: ~1.8 ms per batch of 16 frames (3000 x 1536 by 1536 x 510), against ~35 ms for the
    same sum by NumPy gathers in slots (which also did not scale), and the same sum with NumPy
    gathers and scatter-adds per frame took ~3x longer (5.4 vs ~1.8 ms per 2048 x 1024 frame,
    2-core development machine).
    """
    nz, ny, nx = z_um.size, y_um.size, x_um.size
    xp = x_um[None, :] - z_um[:, None] * tan_psi0  # sheared coordinate (nz, nx)
    nu = X_um.size
    f = np.interp(xp, X_um, np.arange(nu, dtype=float))
    k0 = np.clip(np.floor(f).astype(np.int64), 0, max(nu - 2, 0))
    k1 = np.minimum(k0 + 1, nu - 1)
    span = X_um[k1] - X_um[k0]
    with np.errstate(invalid="ignore", divide="ignore"):
        t = np.where(span > 0, (xp - X_um[k0]) / span, 0.0)
    eps = 1e-9 * max(1.0, float(np.abs(X_um).max()))
    valid = (xp >= X_um[0] - eps) & (xp <= X_um[-1] + eps) & (span <= max_gap_um + eps)
    # frame taps: voxel column v = z * nx + x, frame u, weight (linear between the 2 frames)
    v_all = np.arange(nz * nx).reshape(nz, nx)
    second = valid & (k1 != k0)
    tv = np.concatenate([v_all[valid], v_all[second]])
    tu = np.concatenate([k0[valid], k1[second]])
    tw = np.concatenate([(1.0 - t)[valid], t[second]])
    # column in each frame: c = c0 + (z G + D L) / p_col, D = x' - X_k (linear interpolation;
    # outside the band's columns -> 0, the last column is clamped)
    D = xp.ravel()[tv] - X_um[tu]
    c = c0[tu] + (z_um[tv // nx] * G + D * L) / p_col_um - c_lo
    j0 = np.floor(c).astype(np.int64)
    b = c - j0
    okc = (j0 >= 0) & (j0 <= n_band_cols - 1)
    order = np.argsort(k0.ravel(), kind="stable")
    row_of = np.empty(nz * nx, np.int64)
    row_of[order] = np.arange(nz * nx)
    rows = np.tile(row_of[tv], 2)
    frame = np.tile(tu, 2)
    col = np.concatenate([np.clip(j0, 0, n_band_cols - 1), np.clip(j0 + 1, 0, n_band_cols - 1)])
    wt = (np.concatenate([tw * (1 - b), tw * b]) * np.tile(okc, 2)).astype(np.float32)
    by_frame = np.argsort(frame, kind="stable")
    rows, frame, col, wt = rows[by_frame], frame[by_frame], col[by_frame], wt[by_frame]
    used = np.unique(frame)
    values = source.buffer("values", (nz * nx, ny))
    values.fill(0.0)
    stack = source.buffer("stack", (min(PREFETCH, used.size) * n_band_cols, ny))
    for s0 in range(0, used.size, PREFETCH):
        batch = used[s0 : s0 + PREFETCH]
        frames = source.load([int(frame_ids[u]) for u in batch])
        for i, u in enumerate(batch):
            rw = _row_weights(r0[u], y_um, p_row_um, n_rows)
            at = i * n_band_cols
            for piece in frames.pop(int(frame_ids[u])):
                stack[at : at + piece.shape[1]] = (rw @ piece).T
                at += piece.shape[1]
        lo, hi = np.searchsorted(frame, batch[0], side="left"), np.searchsorted(frame, batch[-1], side="right")
        r = rows[lo:hi]
        r_lo, r_hi = int(r.min()), int(r.max()) + 1
        W = sparse.csr_array(
            (wt[lo:hi], (r - r_lo, np.searchsorted(batch, frame[lo:hi]) * n_band_cols + col[lo:hi])),
            shape=(r_hi - r_lo, batch.size * n_band_cols),
        )
        values[r_lo:r_hi] += W @ stack[: batch.size * n_band_cols]
    return values, row_of.reshape(nz, nx)


def _write_chunks(array: zarr.Array, start: tuple[int, int, int], block: np.ndarray) -> None:
    """Write ``block`` at ``start`` one chunk per call: each chunk is compressed in this task's
    own time (zarr compresses the chunks of one call on its own thread pool, which made a
    1-worker run use both cores), and every chunk written is complete (no read-back)."""
    steps = array.chunks
    for idx in np.ndindex(*(math.ceil(n / c) for n, c in zip(block.shape, steps, strict=True))):
        inner = tuple(slice(i * c, min(n, (i + 1) * c)) for i, c, n in zip(idx, steps, block.shape, strict=True))
        outer = tuple(slice(s + sl.start, s + sl.stop) for s, sl in zip(start, inner, strict=True))
        array[outer] = block[inner]


def _factors(shape_above: tuple[int, ...], shape: tuple[int, ...]) -> tuple[int, ...]:
    """Block-reduction factor per axis between two pyramid levels (2, or 1 on a length-1 axis)."""
    return tuple(2 if a >= 2 * n else 1 for a, n in zip(shape_above, shape, strict=True))


def _run_slab(
    index: int,
    source: _FrameSource,
    arrays: list[zarr.Array],
    x_slice: tuple[int, int],
    marker: Path,
    kwargs: dict[str, Any],
) -> dict:
    """Resample slab ``index`` and write it: level 0, and (when ``arrays`` has them) its
    block-mean part of every coarser level, computed in memory from the slab."""
    t0 = time.perf_counter()
    values, row_of = _resample_slab(source, **kwargs)
    t1 = time.perf_counter()
    nz, nx = row_of.shape
    ny = values.shape[1]
    a, b = x_slice
    level0 = arrays[0]
    cz = level0.chunks[0]
    pyramid = len(arrays) > 1
    if pyramid:
        s1 = arrays[1].shape
        f1 = _factors(level0.shape, s1)
        a1, b1 = a // f1[2], min(s1[2], b // f1[2])
        part = np.empty((s1[0], s1[1], b1 - a1), np.float32)
        carry = None
    block = source.buffer("block", (min(cz, nz), ny, nx))
    # One chunk row in z at a time, in (z, y, x) order (only that row is held twice).
    for z0 in range(0, nz, cz):
        z1 = min(nz, z0 + cz)
        rowblock = block[: z1 - z0]
        for z in range(z0, z1):
            rowblock[z - z0] = values[row_of[z]].T
        _write_chunks(level0, (z0, 0, a), rowblock)
        if pyramid:
            # level-1 planes whose z blocks end in this chunk row (a block may start in the last)
            for i in range(z0 // f1[0], s1[0]):
                first, last = i * f1[0], i * f1[0] + f1[0] - 1
                if last >= z1:
                    break
                planes = rowblock[first - z0 : last + 1 - z0] if first >= z0 else np.stack([carry, rowblock[0]])
                part[i] = omezarr.reduce_blocks(planes, f1, (1, s1[1], b1 - a1))[0]
            carry = rowblock[-1].copy() if (z1 % f1[0]) and z1 < nz else None
    del values, block
    if pyramid:
        _write_chunks(arrays[1], (0, 0, a1), part)
        lo = a1
        for k in range(2, len(arrays)):
            sk = arrays[k].shape
            fk = _factors(arrays[k - 1].shape, sk)
            lo_k = lo // fk[2]
            width = min(sk[2], (lo + part.shape[2]) // fk[2]) - lo_k
            part = omezarr.reduce_blocks(part, fk, (sk[0], sk[1], width))
            _write_chunks(arrays[k], (0, 0, lo_k), part)
            lo = lo_k
    # The marker is written last: a slab without one is recomputed on resume.
    rf.write_json_atomic(marker, {"slab": index, "x_voxels": list(x_slice), "frames": int(kwargs["frame_ids"].size)})
    return {"slab": index, "seconds": time.perf_counter() - t0, "resample_s": t1 - t0}


def _run_slabs(source: _FrameSource, arrays: list[zarr.Array], slabs: list[dict[str, Any]]) -> list[dict]:
    """One task: slabs ``slabs`` (consecutive in x, each ``index, x_slice, marker, kwargs``) in
    order, sharing the frames where they overlap."""
    done = []
    for j, slab in enumerate(slabs):
        following = slabs[j + 1]["kwargs"]["frame_ids"] if j + 1 < len(slabs) else None
        source.select(slab["kwargs"]["frame_ids"], following)
        done.append(_run_slab(slab["index"], source, arrays, slab["x_slice"], slab["marker"], slab["kwargs"]))
    source.release()
    return done


def _split_runs(todo: list[int], widths: list[int], n_runs: int) -> list[list[int]]:
    """Split the slabs ``todo`` (increasing) into at most ``n_runs`` runs of consecutive slabs
    with about the same total width (the work of a slab is about proportional to its width)."""
    n_runs = max(1, min(n_runs, len(todo)))
    cum = np.cumsum([widths[i] for i in todo])
    cuts = sorted({int(np.argmin(np.abs(cum - cum[-1] * r / n_runs))) + 1 for r in range(1, n_runs)})
    edges = [0] + [c for c in cuts if 0 < c < len(todo)] + [len(todo)]
    return [todo[a:b] for a, b in zip(edges, edges[1:], strict=False) if b > a]


# ---------------------------------------------------------------------------------------------
# grid


def _probe_depth_um(corrected: da.Array, usable: np.ndarray, c0: np.ndarray, geom: Geometry) -> float:
    """Depth reached by the band in reflection: where the mean column profile (aligned at the
    entrance column) has fallen to 2 % of its peak above the background, times 1.25."""
    idx = np.nonzero(usable)[0]
    pick = idx[np.unique(np.linspace(0, idx.size - 1, min(idx.size, DEPTH_SAMPLES)).round().astype(int))]
    cols = corrected.shape[2]
    u = np.arange(-cols, cols, dtype=float)
    acc = np.zeros(u.size)
    cnt = np.zeros(u.size)
    for k in pick:
        prof = np.nanmean(np.asarray(compute_here(corrected[k]), np.float64), axis=0)
        v = np.interp(u + c0[k], np.arange(cols), prof, left=np.nan, right=np.nan)
        ok = np.isfinite(v)
        acc[ok] += v[ok]
        cnt[ok] += 1
    with np.errstate(invalid="ignore"):
        mean = acc / cnt
    inside = np.isfinite(mean) & (u >= 0)
    before = np.isfinite(mean) & (u < -3 * max(1.0, abs(geom.slit_width_um * geom.L / geom.p_col_um)))
    bg = float(np.median(mean[before])) if before.any() else float(np.nanmin(mean))
    peak = float(np.nanmax(mean[inside]))
    prof_in = mean[inside]
    end = np.nonzero(prof_in > bg + 0.02 * (peak - bg))[0]
    u_end = float(u[inside][end[-1]]) if end.size else 10.0
    return min(geom.thickness_um, 1.25 * u_end * geom.p_col_um / geom.G)


def _fingerprint(parts: dict) -> str:
    return hashlib.sha256(json.dumps(parts, sort_keys=True, default=str).encode()).hexdigest()


def _table_of(registration) -> dict[str, np.ndarray]:
    table = getattr(registration, "table", registration)
    for key in ("r0_px", "c0_px", "flagged"):
        if key not in table:
            raise InputError(f"registration table: column {key} missing (expected registration.csv columns)")
    return table


# ---------------------------------------------------------------------------------------------
# public


def reconstruct_volume(
    corrected: da.Array,
    geom: Geometry,
    positions_um: np.ndarray,
    registration,
    cfg: ReconstructConfig,
    out_path: str | Path,
    *,
    extra_meta: dict | None = None,
    depth_range_um: tuple[float, float] | None = None,
) -> dict:
    """Resample the corrected series into ``volume.ome.zarr`` (all levels), resumably.

    Parameters
    ----------
    corrected : dask.array.Array
        (n, rows, cols) float32 corrected frames (:func:`pipeline.correct.correct_series`).
    geom : Geometry
    positions_um : ndarray (n,)
        Stage positions X_k, um (strictly monotonic).
    registration : dict of ndarray or RegistrationResult
        The registration table (:func:`pipeline.register.read_registration_csv`): ``r0_px``,
        ``c0_px`` and ``flagged`` per frame.
    cfg : ReconstructConfig
        ``voxel_um`` (None = natural sampling), ``chunk_voxels`` (z, y, x), ``levels``.
    out_path : Path
        The volume to write (``<run>/volume.ome.zarr``).
    extra_meta : dict, optional
        Added to ``attributes["crackstack"]``.
    depth_range_um : (z_min, z_max), optional
        Depth range to reconstruct; default the wafer thickness (transmission) or the depth
        the band reaches (reflection, estimated from the frames).

    Returns
    -------
    dict
        ``volume`` (path), ``shape``, ``voxel_um``, ``origin_um``, ``chunks``, ``levels``,
        ``blocks_total``, ``blocks_written``, ``blocks_skipped`` (x slabs), ``frames_used``,
        ``frames_excluded``, ``G_used``, ``elapsed_s`` {slabs, pyramid} (``pyramid`` is 0 when
        the slabs wrote the coarser levels themselves). A volume already
        complete with the same inputs is left untouched (``blocks_written`` 0).

    Raises
    ------
    InputError
        When the registration table does not match the series, fewer than 2 frames are
        usable, positions are not strictly monotonic, or the voxel size is not positive.
    """
    out_path = Path(out_path)
    n, n_rows, n_cols = (int(s) for s in corrected.shape)
    pos = np.asarray(positions_um, float)
    table = _table_of(registration)
    if pos.shape != (n,):
        raise InputError(f"scan positions: {pos.size} values for {n} frames; give one per frame")
    if len(table["r0_px"]) != n:
        raise InputError(
            f"registration table has {len(table['r0_px'])} frames but the series has {n}; "
            "run the register stage again for this series"
        )
    d = np.diff(pos)
    if not (np.all(d > 0) or np.all(d < 0)):
        raise InputError("scan positions must be strictly monotonic (check scan.positions_um)")
    r0_all = np.asarray(table["r0_px"], float)
    c0_all = np.asarray(table["c0_px"], float)
    usable = (np.asarray(table["flagged"]) == 0) & np.isfinite(r0_all) & np.isfinite(c0_all)
    if usable.sum() < 2:
        raise InputError(f"registration: only {int(usable.sum())} usable frames of {n}; need at least 2")
    step = float(np.median(np.abs(d)))
    voxel = tuple(float(v) for v in (cfg.voxel_um or natural_voxel_um(geom, step)))
    if not all(v > 0 and math.isfinite(v) for v in voxel):
        raise InputError(f"reconstruct.voxel_um: must be three positive numbers [dz, dy, dx] (got {list(voxel)})")
    dz, dy, dx = voxel
    tan = geom.tan_psi0

    # --- depth range and grid
    if depth_range_um is not None:
        z_min, z_max = (float(v) for v in depth_range_um)
        if not z_max > z_min:
            raise InputError(f"depth range: z_max must exceed z_min (got {depth_range_um})")
    elif geom.geometry == "transmission":
        z_min, z_max = 0.0, geom.thickness_um
    else:
        z_min, z_max = 0.0, _probe_depth_um(corrected, usable, c0_all, geom)
    # Every detector column integrates the ribbon across the slit (w / cos psi0 wide in x), so a
    # surface stays blurred by +-w |L| / (2 G cos psi0) in depth (SPEC 5: the exact projection localises sparse features, it does
    # not deconvolve the band): the margin includes that blur.
    blur_um = geom.slit_width_um / math.cos(math.radians(geom.psi0_deg)) * abs(geom.L) / (2 * geom.G)
    margin = MARGIN_VOXELS + math.ceil(blur_um / dz)
    kz0 = math.floor(z_min / dz) - margin
    kz1 = math.ceil(z_max / dz) + margin
    z_um = np.arange(kz0, kz1 + 1) * dz
    # y: the rows every usable frame sees (so no voxel mixes data with "outside the detector")
    ya = float(np.max(-r0_all[usable])) * geom.p_row_um
    yb = float(np.min(n_rows - 1 - r0_all[usable])) * geom.p_row_um
    if yb <= ya:
        ya = float(np.min(-r0_all[usable])) * geom.p_row_um
        yb = float(np.max(n_rows - 1 - r0_all[usable])) * geom.p_row_um
    y_um = np.arange(math.ceil(ya / dy - 1e-9), math.floor(yb / dy + 1e-9) + 1) * dy
    order = np.argsort(pos[usable])
    ids = np.nonzero(usable)[0][order]
    X = pos[ids]
    r0, c0 = r0_all[ids], c0_all[ids]
    shear = (z_um[0] * tan, z_um[-1] * tan)
    x_lo, x_hi = X[0] + min(shear), X[-1] + max(shear)
    anchor = float(pos[0])
    x_first = anchor + math.floor((x_lo - anchor) / dx + 1e-9) * dx
    nx = int(math.floor((x_hi - x_first) / dx + 1e-9)) + 1
    x_um = x_first + np.arange(nx) * dx
    shape = (z_um.size, y_um.size, nx)
    origin = (float(z_um[0]), float(y_um[0]), float(x_um[0]))
    chunks = tuple(int(min(c, s)) for c, s in zip(cfg.chunk_voxels, shape, strict=True))
    n_slabs = math.ceil(nx / chunks[2])
    # Each slab writes its block-mean part of every level from memory (no level is read back)
    # when its part is a whole column of chunks at every level: x chunks halve per level.
    # Otherwise (a chunk width not divisible by 2**(levels-1)) the levels are built from level
    # 0 once all slabs are written.
    in_slab_pyramid = n_slabs == 1 or chunks[2] % 2 ** (cfg.levels - 1) == 0
    level_chunks = (
        omezarr.slab_level_chunks(shape, chunks, cfg.levels) if in_slab_pyramid and n_slabs > 1 else None
    )
    max_gap = MAX_GAP_STEPS * step
    # band columns every frame needs (|D| <= one gap on either side)
    offs = [(z * geom.G + D * geom.L) / geom.p_col_um for z in (z_um[0], z_um[-1]) for D in (-max_gap, max_gap)]
    c_lo = max(0, int(math.floor(c0.min() + min(offs))) - 2)
    c_hi = min(n_cols, int(math.ceil(c0.max() + max(offs))) + 3)
    # Widened to the column chunks of the corrected frames (those are computed whole anyway):
    # a slab then gets the chunks as they are, without slicing and copying them into one band,
    # unless that would more than add half the band again (very wide chunks).
    bounds = np.cumsum((0,) + tuple(int(c) for c in corrected.chunks[2]))
    a_lo, a_hi = int(bounds[bounds <= c_lo][-1]), int(bounds[bounds >= c_hi][0])
    if a_hi - a_lo <= 1.5 * (c_hi - c_lo):
        c_lo, c_hi = a_lo, a_hi

    meta = {
        "thickness_um": geom.thickness_um,
        "geometry": geom.geometry,
        "x_range_um": [float(x_um[0]), float(x_um[-1])],
        "y_range_um": [float(y_um[0]), float(y_um[-1])],
        "z_range_um": [float(z_um[0]), float(z_um[-1])],
        "scan_range_um": [float(X[0]), float(X[-1])],
        "shear_tan_psi0": tan,
        "G_used": geom.G,
        "G_computed": geom.G_computed,
        "geometry_params": asdict(geom),
        "frames_used": int(ids.size),
        "frames_excluded": [int(i) for i in np.nonzero(~usable)[0]],
        "intensity": "corrected; perfect-crystal band ~1, outside the wafer and unlit voxels 0",
        **(extra_meta or {}),
    }
    fp = _fingerprint({
        "format": _FORMAT, "shape": shape, "voxel": voxel, "origin": origin, "chunks": chunks,
        "levels": cfg.levels, "level_chunks": level_chunks, "geometry": asdict(geom), "positions": pos.round(6).tolist(),
        "r0": r0_all.round(6).tolist(), "c0": c0_all.round(6).tolist(), "usable": usable.tolist(),
        # Not the Dask name of `corrected`: ingest's token differs between processes for the
        # same files (seen with dark/flat/monitor files), and a resume must survive a restart.
        # Which files and settings made the frames is the run's business (run.json fingerprints
        # the input files); here the registration, geometry and grid pin the output.
        "corrected": [corrected.shape, str(corrected.dtype)], "meta": meta,
    })
    progress = out_path.parent / f".{out_path.name}.progress"
    complete = progress / "complete.json"
    if complete.is_file() and (out_path / "zarr.json").is_file():
        done = rf.read_json(complete)
        if done.get("fingerprint") == fp:
            log.info("reconstruct: %s is complete, left untouched", out_path)
            return {**done["info"], "blocks_written": 0, "blocks_skipped": n_slabs}
    fp_file = progress / "fingerprint.json"
    resume = (
        fp_file.is_file() and (out_path / "zarr.json").is_file()
        and rf.read_json(fp_file).get("fingerprint") == fp
    )
    if resume:
        for stray in out_path.rglob("*.partial"):
            stray.unlink(missing_ok=True)
        root = zarr.open_group(str(out_path), mode="r+")
    else:
        if progress.exists():
            shutil.rmtree(progress)
        root = omezarr.create_image(
            out_path, shape, voxel_um=voxel, origin_um=origin, chunks=chunks, dtype="float32",
            levels=cfg.levels, name="volume", extra=meta, level_chunks=level_chunks,
        )
        rf.write_json_atomic(fp_file, {"fingerprint": fp})
    arrays = [root[str(k)] for k in range(cfg.levels)] if in_slab_pyramid else [root["0"]]

    # --- slab tasks: one run of consecutive slabs per worker (more for long scans), so that
    # every core has one long task and the frames two neighbouring slabs share are read once
    # per run instead of once per slab (~15 % of the frames at 128-voxel slabs of a 775 um
    # wafer; more for thinner slabs)
    todo, skipped = [], 0
    for i in range(n_slabs):
        if (progress / f"slab_{i:05d}.done").is_file():
            skipped += 1
        else:
            todo.append(i)
    widths = [min(nx, (i + 1) * chunks[2]) - i * chunks[2] for i in range(n_slabs)]
    workers = n_workers()
    n_runs = workers * math.ceil(math.ceil(len(todo) / RUN_SLABS) / workers) if todo else 0
    tasks, plans = [], []
    handoff = progress / "handoff"
    for run in _split_runs(todo, widths, n_runs) if todo else []:
        slabs = []
        for i in run:
            a, b = i * chunks[2], min(nx, (i + 1) * chunks[2])
            xs = x_um[a:b]
            xp_min = xs[0] - max(shear)
            xp_max = xs[-1] - min(shear)
            u_lo = max(0, int(np.searchsorted(X, xp_min, side="right")) - 1)
            u_hi = min(X.size, int(np.searchsorted(X, xp_max, side="left")) + 1)
            if u_hi - u_lo < 2:
                u_lo, u_hi = max(0, u_lo - 1), min(X.size, u_hi + 1)
            sel = slice(u_lo, u_hi)
            kwargs = dict(
                frame_ids=ids[sel], X_um=X[sel], r0=r0[sel], c0=c0[sel], z_um=z_um, y_um=y_um, x_um=xs,
                tan_psi0=tan, G=geom.G, L=geom.L, p_row_um=geom.p_row_um, p_col_um=geom.p_col_um,
                c_lo=c_lo, n_band_cols=c_hi - c_lo, n_rows=n_rows, max_gap_um=max_gap,
            )
            slabs.append({"index": i, "x_slice": (a, b), "marker": progress / f"slab_{i:05d}.done", "kwargs": kwargs})
        plans.append((run, slabs))
    # one source per task (it holds the task's state), with the graph of the task's frames only
    ranges = [(int(min(s["kwargs"]["frame_ids"].min() for s in slabs)),
               int(max(s["kwargs"]["frame_ids"].max() for s in slabs)) + 1) for _, slabs in plans]
    sources = _FrameSource.for_tasks(corrected, c_lo, c_hi, ranges) if plans else []
    plans = [(run, src, slabs) for (run, slabs), src in zip(plans, sources, strict=True)]
    for (run_a, src_a, slabs_a), (run_b, src_b, slabs_b) in zip(plans, plans[1:], strict=False):
        if run_b[0] == run_a[-1] + 1:  # neighbours in x: they share the frames of the shear
            shared = {int(k) for k in slabs_a[-1]["kwargs"]["frame_ids"]} & {
                int(k) for k in slabs_b[0]["kwargs"]["frame_ids"]}
            src_a.handoff = src_b.handoff = handoff
            src_a.collect, src_b.publish = shared, shared
    for run, source, slabs in plans:
        tasks.append(
            dask.delayed(_run_slabs, pure=True)(
                source, arrays, slabs, dask_key_name=f"reconstruct-slab-{run[0]}-to-{run[-1]}-{fp[:16]}"
            )
        )
    log.info(
        "reconstruct: volume %s voxels of %s um, %d slabs (%d done before), frames %d usable of %d",
        "x".join(map(str, shape)), "x".join(f"{v:.3g}" for v in voxel), n_slabs, skipped, ids.size, n,
    )
    t0 = time.perf_counter()
    if tasks:
        run_tasks(tasks, "reconstruct")  # markers are written per slab inside the tasks
    t1 = time.perf_counter()
    shutil.rmtree(handoff, ignore_errors=True)  # frames a task computed itself after all
    if not in_slab_pyramid:
        omezarr.build_pyramid(out_path, method="mean")
    t2 = time.perf_counter()
    info = {
        "volume": str(out_path),
        "shape": list(shape),
        "voxel_um": list(voxel),
        "origin_um": list(origin),
        "chunks": list(chunks),
        "levels": int(cfg.levels),
        "blocks_total": n_slabs,
        "blocks_written": len(todo),
        "blocks_skipped": skipped,
        "frames_used": int(ids.size),
        "frames_excluded": meta["frames_excluded"],
        "G_used": geom.G,
        "elapsed_s": {"slabs": round(t1 - t0, 3), "pyramid": round(t2 - t1, 3)},
    }
    rf.write_json_atomic(complete, {"fingerprint": fp, "info": info})
    return info

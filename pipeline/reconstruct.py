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

Out-of-core and resumable. The output is written in x slabs one chunk wide: a slab task reads
only the frames it needs, one at a time and only the band's columns (the corrected series is
chunked by columns, so the other columns are never computed), accumulates the slab in memory
(``nz * ny * chunk_x`` float32) and writes its chunks; memory does not grow with the scan
length. After a slab is written a marker file is written (last), so an interrupted run started
again skips complete slabs (zarr 3 does not store chunks equal to the fill value, so the chunk
files alone cannot tell). The computation is deterministic, so a resumed volume is
byte-identical to an uninterrupted one. Markers and the parameter fingerprint live in the hidden
folder ``.<volume name>.progress`` beside the volume.
"""

from __future__ import annotations

import hashlib
import json
import logging
import math
import shutil
import time
from dataclasses import asdict
from pathlib import Path
from typing import Any

import dask
import dask.array as da
import numpy as np
import zarr

from pipeline import omezarr
from pipeline import runfolder as rf
from pipeline.compute import run_tasks
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
#: Frames sampled to estimate the probed depth in reflection geometry.
DEPTH_SAMPLES = 9
_FORMAT = 1  # bump when the algorithm's output changes (invalidates partial volumes)


# ---------------------------------------------------------------------------------------------
# frame access from inside a slab task


class _FrameSource:
    """Frames ``[k_lo, k_hi)`` of a Dask array, band columns only, computed one at a time.

    Held by a slab task as a plain object (not a Dask dependency), so the task reads frames
    sequentially and holds one at a time instead of the scheduler materialising all of them.
    """

    def __init__(self, frames: da.Array, k_lo: int, k_hi: int, c_lo: int, c_hi: int):
        # A plain slice: dask culls it to the batch at each call. (Optimising it once per slab
        # with dask.optimize made every later call twice as slow: 16 vs 8 ms per frame of
        # 2048 x 1024, against 4 ms for reading and correcting the frame itself.)
        self.frames = frames[k_lo:k_hi, :, c_lo:c_hi]
        self.k_lo = k_lo
        self._cache: dict[int, np.ndarray] = {}

    def __dask_tokenize__(self):
        return (self.frames.name, self.k_lo)

    def get(self, k: int, upcoming: list[int] | tuple = ()) -> np.ndarray:
        """Frame ``k`` (original index), (rows, band columns) float32.

        ``upcoming`` (frames the caller will ask for next) are computed in the same call, up to
        ``PREFETCH`` frames: one graph evaluation per batch instead of per frame (the per-call
        overhead of dask was ~30 ms, as much as reading a 2048 x 2048 frame).
        """
        if k not in self._cache:
            self._cache.clear()
            batch = [k] + [j for j in upcoming if j != k][: PREFETCH - 1]
            # One slice per run of consecutive frames (a slab's frames are consecutive except
            # around excluded ones, which are never read), all in one call of the synchronous
            # scheduler inside the task: no nested thread pools.
            idx = sorted(j - self.k_lo for j in batch)
            runs, start = [], idx[0]
            for a, b in zip(idx, idx[1:] + [None], strict=True):
                if b != a + 1:
                    runs.append((start, a + 1))
                    start = b
            blocks = dask.compute(*[self.frames[a:b] for a, b in runs], scheduler="sync")
            self._cache = {}
            for (a, b), block in zip(runs, blocks, strict=True):
                for i in range(a, b):
                    self._cache[i + self.k_lo] = np.asarray(block[i - a], np.float32)
        return self._cache.pop(k)


# ---------------------------------------------------------------------------------------------
# the slab kernel


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
    max_gap_um: float,
) -> np.ndarray:
    """Volume slab, axes (z, x, y) float32, from the usable frames ``frame_ids`` (in increasing
    stage position ``X_um``, with origins ``r0, c0``)."""
    nz, ny, nx = z_um.size, y_um.size, x_um.size
    out = np.zeros((nz, nx, ny), np.float32)  # (z, x, y): the inner loop writes rows of y
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
    used = [u for u in range(nu) if (valid & ((k0 == u) | ((k1 == u) & (k1 != k0)))).any()]
    for pos_in_list, u in enumerate(used):
        sel0 = valid & (k0 == u)
        sel1 = valid & (k1 == u) & (k1 != k0)
        z0i, x0i = np.nonzero(sel0)
        z1i, x1i = np.nonzero(sel1)
        zz = np.concatenate([z0i, z1i])
        ii = np.concatenate([x0i, x1i])
        w = np.concatenate([(1.0 - t)[sel0], t[sel1]]).astype(np.float32)
        img = source.get(int(frame_ids[u]), [int(frame_ids[v]) for v in used[pos_in_list + 1 :]])
        # rows: r = r0 + y / p_row (linear interpolation; outside the detector -> 0)
        r = r0[u] + y_um / p_row_um
        i0 = np.floor(r).astype(np.int64)
        a = (r - i0).astype(np.float32)
        okr = (i0 >= 0) & (i0 <= img.shape[0] - 1)
        i0c = np.clip(i0, 0, img.shape[0] - 1)
        i1c = np.clip(i0 + 1, 0, img.shape[0] - 1)
        Ft = ((1 - a)[None, :] * img[i0c].T + a[None, :] * img[i1c].T) * okr[None, :]  # (cols, ny)
        # columns: c = c0 + (z G + D L) / p_col, D = x' - X_k
        D = xp[zz, ii] - X_um[u]
        c = c0[u] + (z_um[zz] * G + D * L) / p_col_um - c_lo
        j0 = np.floor(c).astype(np.int64)
        b = (c - j0).astype(np.float32)
        okc = (j0 >= 0) & (j0 <= Ft.shape[0] - 1)
        j0c = np.clip(j0, 0, Ft.shape[0] - 1)
        j1c = np.clip(j0 + 1, 0, Ft.shape[0] - 1)
        vals = (1 - b)[:, None] * Ft[j0c] + b[:, None] * Ft[j1c]
        out[zz, ii, :] += (w * okc)[:, None] * vals
    return out


def _run_slab(
    index: int,
    source: _FrameSource,
    array: zarr.Array,
    x_slice: tuple[int, int],
    marker: Path,
    kwargs: dict[str, Any],
) -> dict:
    t0 = time.perf_counter()
    slab = _resample_slab(source, **kwargs)  # (z, x, y)
    # Written one chunk row in z at a time: zarr encodes the chunks of one call concurrently,
    # and only that row needs a (z, y, x) copy, not the whole slab.
    cz = array.chunks[0]
    for z0 in range(0, slab.shape[0], cz):
        block = np.ascontiguousarray(slab[z0 : z0 + cz].transpose(0, 2, 1))
        array[z0 : z0 + cz, :, x_slice[0] : x_slice[1]] = block
        del block
    # The marker is written last: a slab without one is recomputed on resume.
    rf.write_json_atomic(marker, {"slab": index, "x_voxels": list(x_slice), "frames": int(kwargs["frame_ids"].size)})
    return {"slab": index, "seconds": time.perf_counter() - t0}


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
        prof = np.nanmean(np.asarray(corrected[k].compute(), np.float64), axis=0)
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
        ``frames_excluded``, ``G_used``, ``elapsed_s`` {slabs, pyramid}. A volume already
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
    max_gap = MAX_GAP_STEPS * step
    # band columns every frame needs (|D| <= one gap on either side)
    offs = [(z * geom.G + D * geom.L) / geom.p_col_um for z in (z_um[0], z_um[-1]) for D in (-max_gap, max_gap)]
    c_lo = max(0, int(math.floor(c0.min() + min(offs))) - 2)
    c_hi = min(n_cols, int(math.ceil(c0.max() + max(offs))) + 3)

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
        "levels": cfg.levels, "geometry": asdict(geom), "positions": pos.round(6).tolist(),
        "r0": r0_all.round(6).tolist(), "c0": c0_all.round(6).tolist(), "usable": usable.tolist(),
        # Not the Dask name of `corrected`: ingest's token differs between processes for the
        # same files (seen with dark/flat/monitor files), and a resume must survive a restart.
        # Which files and settings made the frames is the run's business (run.json fingerprints
        # the input files); here the registration, geometry and grid pin the output.
        "corrected": [corrected.shape, str(corrected.dtype)], "meta": meta,
    })
    progress = out_path.parent / f".{out_path.name}.progress"
    complete = progress / "complete.json"
    n_slabs = math.ceil(nx / chunks[2])
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
            levels=cfg.levels, name="volume", extra=meta,
        )
        rf.write_json_atomic(fp_file, {"fingerprint": fp})
    level0 = root["0"]

    # --- slab tasks
    tasks = []
    skipped = 0
    for i in range(n_slabs):
        marker = progress / f"slab_{i:05d}.done"
        if marker.is_file():
            skipped += 1
            continue
        a, b = i * chunks[2], min(nx, (i + 1) * chunks[2])
        xs = x_um[a:b]
        xp_min = xs[0] - max(shear)
        xp_max = xs[-1] - min(shear)
        u_lo = max(0, int(np.searchsorted(X, xp_min, side="right")) - 1)
        u_hi = min(X.size, int(np.searchsorted(X, xp_max, side="left")) + 1)
        if u_hi - u_lo < 2:
            u_lo, u_hi = max(0, u_lo - 1), min(X.size, u_hi + 1)
        sel = slice(u_lo, u_hi)
        fids = ids[sel]
        source = _FrameSource(corrected, int(fids.min()), int(fids.max()) + 1, c_lo, c_hi)
        kwargs = dict(
            frame_ids=fids, X_um=X[sel], r0=r0[sel], c0=c0[sel], z_um=z_um, y_um=y_um, x_um=xs,
            tan_psi0=tan, G=geom.G, L=geom.L, p_row_um=geom.p_row_um, p_col_um=geom.p_col_um,
            c_lo=c_lo, max_gap_um=max_gap,
        )
        tasks.append(
            dask.delayed(_run_slab, pure=True)(
                i, source, level0, (a, b), marker, kwargs, dask_key_name=f"reconstruct-slab-{i}-{fp[:16]}"
            )
        )
    log.info(
        "reconstruct: volume %s voxels of %s um, %d slabs (%d done before), frames %d usable of %d",
        "x".join(map(str, shape)), "x".join(f"{v:.3g}" for v in voxel), n_slabs, skipped, ids.size, n,
    )
    t0 = time.perf_counter()
    if tasks:
        run_tasks(tasks, "reconstruct")
    t1 = time.perf_counter()
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
        "blocks_written": len(tasks),
        "blocks_skipped": skipped,
        "frames_used": int(ids.size),
        "frames_excluded": meta["frames_excluded"],
        "G_used": geom.G,
        "elapsed_s": {"slabs": round(t1 - t0, 3), "pyramid": round(t2 - t1, 3)},
    }
    rf.write_json_atomic(complete, {"fingerprint": fp, "info": info})
    return info

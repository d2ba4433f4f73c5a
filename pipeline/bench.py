"""``crackstack bench``: speed and memory figures against their targets, measured in one run.

Each *case* is a function ``case(ctx) -> list[dict]`` registered with :func:`register_case`;
every row it returns is one figure ``{name, value, target, unit, passed}`` (``target`` is a
string such as ``"<= 2.0"``). :func:`main` runs every case, prints one line per figure and
writes them as JSON. ``--quick`` uses small sizes (under a minute in all); the full run uses a
series of about 4 GB and takes a few minutes.

Later stages add their own cases with ``@register_case`` in their modules and list the module in
:data:`CASE_MODULES`.

The data are invented section-topograph series made by :func:`render_section_series` (a band
with the exact projection of SPEC section 5, a slit envelope along the rows, point defects and
noise): they only need realistic sizes and content for timing.
"""

from __future__ import annotations

import json
import logging
import math
import os
import shutil
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from scipy import ndimage as ndi
from scipy.special import erf

from pipeline.geometry import Geometry

log = logging.getLogger(__name__)

Row = dict[str, Any]
CaseFn = Callable[["BenchContext"], list[Row]]
_CASES: list[tuple[str, CaseFn]] = []
#: Modules imported by :func:`main` so that their ``@register_case`` functions are known.
CASE_MODULES: list[str] = ["pipeline.bench", "pipeline.bench_cluster", "viewer_plugins._bench"]


# ---------------------------------------------------------------------------------------------
# invented section-topograph frames (for the bench and round-trip tests)


@dataclass(frozen=True)
class PointDefect:
    """A point-like scatterer at wafer coordinates (um) with a peak contrast (band = 1)."""

    x_um: float
    y_um: float
    z_um: float
    amplitude: float = 2.0
    sigma_px: float = 1.2


@dataclass(frozen=True)
class SeriesModel:
    """What :func:`render_section_series` draws (counts at band level 1 = ``counts``)."""

    rows: int
    cols: int
    counts: float = 1000.0
    background: float = 20.0
    psf_px: float = 0.7
    envelope_um: tuple[float, float] | None = None  # slit ends, y um; None = rows 8 %..92 % at r0 = 0
    absorption_um: float | None = None  # reflection: 1/e depth of the band intensity
    points: tuple[PointDefect, ...] = field(default=())


def slit_weight(D_um: np.ndarray, width_um: float, edge_um: float = 0.5) -> np.ndarray:
    """Slit profile across x: a box of ``width_um`` with Gaussian edges of ``edge_um`` (1 at the
    centre). The ribbon of width w (perpendicular to the beam) spans ``w / cos(psi0)`` in x."""
    s = math.sqrt(2.0) * edge_um
    D = np.asarray(D_um, float)
    return 0.5 * (erf((D + width_um / 2) / s) - erf((D - width_um / 2) / s))


def _slit_x_um(geom: Geometry) -> float:
    return geom.slit_width_um / math.cos(math.radians(geom.psi0_deg))


def band_profile(geom: Geometry, model: SeriesModel, c0: float) -> np.ndarray:
    """Perfect-crystal column profile (cols,), plateau 1 in transmission, by integrating the
    exact projection ``c = c0 + (z G + D L) / p_col`` over depth and the slit."""
    G, L, p = geom.G, geom.L, geom.p_col_um
    z_max = geom.thickness_um
    if model.absorption_um is not None:
        z_max = min(z_max, 8 * model.absorption_um)
    dz = 0.1 * p / G
    zs = np.arange(0.5 * dz, z_max, dz)
    width = _slit_x_um(geom)
    Dmax = width / 2 + 2.0
    dD = min(0.1 * p / max(abs(L), 1e-3), Dmax / 10)
    Ds = np.arange(-Dmax, Dmax + 1e-9, dD)
    wz = np.ones_like(zs) if model.absorption_um is None else np.exp(-zs / model.absorption_um)
    wD = slit_weight(Ds, width) * dD / width
    u = c0 + (zs[:, None] * G + Ds[None, :] * L) / p
    w = (wz[:, None] * wD[None, :]) * (G * dz / p)
    i0 = np.floor(u).astype(np.int64)
    f = u - i0
    out = np.zeros(model.cols + 2)
    ok = (i0 >= 0) & (i0 < model.cols)
    out += np.bincount(i0[ok] + 1, weights=(w * (1 - f))[ok], minlength=model.cols + 2)[: model.cols + 2]
    ok1 = (i0 + 1 >= 0) & (i0 + 1 < model.cols)
    out += np.bincount(i0[ok1] + 2, weights=(w * f)[ok1], minlength=model.cols + 2)[: model.cols + 2]
    prof = out[1 : model.cols + 1]
    return ndi.gaussian_filter1d(prof, model.psf_px, mode="constant") if model.psf_px > 0 else prof


def row_envelope(geom: Geometry, model: SeriesModel, r0: float) -> np.ndarray:
    """Beam intensity along the rows (rows,): the slit's ends and a weak modulation along y."""
    y = (np.arange(model.rows) - r0) * geom.p_row_um
    if model.envelope_um is None:
        ya, yb = 0.08 * model.rows * geom.p_row_um, 0.92 * model.rows * geom.p_row_um
    else:
        ya, yb = model.envelope_um
    edge = math.sqrt(2.0) * 3.0 * geom.p_row_um
    env = 0.5 * (erf((y - ya) / edge) - erf((y - yb) / edge))
    return env * (1 + 0.06 * np.sin(2 * np.pi * y / 173.0) + 0.04 * np.sin(2 * np.pi * y / 41.0 + 1.0))


def render_frame(
    geom: Geometry, model: SeriesModel, X_um: float, r0: float, c0: float, rng: np.random.Generator | None
) -> np.ndarray:
    """One frame (rows, cols) float64 in counts (noise-free when ``rng`` is None)."""
    img = np.outer(row_envelope(geom, model, r0), band_profile(geom, model, c0))
    for pt in model.points:
        row, col, D = geom.project(pt.x_um, pt.y_um, pt.z_um, X_um, r0, c0)
        wt = float(slit_weight(D, _slit_x_um(geom)))
        if wt < 1e-3:
            continue
        rad = int(math.ceil(4 * pt.sigma_px))
        r_lo, r_hi = max(0, int(row) - rad), min(model.rows, int(row) + rad + 2)
        c_lo, c_hi = max(0, int(col) - rad), min(model.cols, int(col) + rad + 2)
        if r_lo >= r_hi or c_lo >= c_hi:
            continue
        rr = np.arange(r_lo, r_hi)[:, None] - float(row)
        cc = np.arange(c_lo, c_hi)[None, :] - float(col)
        img[r_lo:r_hi, c_lo:c_hi] += pt.amplitude * wt * np.exp(-(rr**2 + cc**2) / (2 * pt.sigma_px**2))
    img = model.background + model.counts * img
    if rng is not None:
        img = rng.poisson(img).astype(float)
    return img


def render_section_series(
    geom: Geometry,
    model: SeriesModel,
    positions_um: np.ndarray,
    r0: np.ndarray,
    c0: np.ndarray,
    *,
    seed: int | None = 0,
) -> Iterator[np.ndarray]:
    """Frames (rows, cols) uint16, one per stage position, with origins ``r0, c0`` (pixels).

    Yields frames one at a time so long series never sit in memory.
    """
    rng = None if seed is None else np.random.default_rng(seed)
    for X, r, c in zip(positions_um, r0, c0, strict=True):
        yield np.clip(render_frame(geom, model, float(X), float(r), float(c), rng), 0, 65535).astype(np.uint16)


def write_series(
    folder: Path,
    geom_acq: dict,
    model: SeriesModel,
    positions_um: np.ndarray,
    r0: np.ndarray,
    c0: np.ndarray,
    *,
    seed: int = 0,
    fast_noise: bool = True,
) -> Path:
    """Write frames ``frame_00000.tif ...`` and ``acquisition.yaml`` into ``folder``.

    ``fast_noise`` replaces Poisson sampling by Gaussian noise of the same variance drawn from a
    few pre-computed fields (Poisson sampling of a 2048 x 2048 frame takes ~0.1 s; the bench
    needs realistic sizes, not exact statistics). Returns the acquisition file.
    """
    import tifffile
    import yaml

    from pipeline.config import Acquisition

    folder.mkdir(parents=True, exist_ok=True)
    acq = Acquisition.model_validate({**geom_acq, "scan": {"positions_um": [float(p) for p in positions_um]}})
    geom = Geometry.from_acquisition(acq)
    rng = np.random.default_rng(seed)
    fields = [rng.standard_normal((model.rows, model.cols), dtype=np.float32) for _ in range(3)] if fast_noise else []
    for k, (X, r, c) in enumerate(zip(positions_um, r0, c0, strict=True)):
        img = render_frame(geom, model, float(X), float(r), float(c), None if fast_noise else rng)
        if fast_noise:
            noise = np.roll(fields[k % 3], (17 * k) % model.rows, axis=0)
            img = img + np.sqrt(img) * noise
        tifffile.imwrite(folder / f"frame_{k:05d}.tif", np.clip(img, 0, 65535).astype(np.uint16))
    path = folder / "acquisition.yaml"
    path.write_text(yaml.safe_dump(acq.model_dump(mode="json"), sort_keys=False))
    return path


# ---------------------------------------------------------------------------------------------
# the framework


@dataclass
class BenchContext:
    """What every case gets: the size class, a scratch folder and a cache shared by cases."""

    quick: bool
    workdir: Path
    cache: dict[str, Any] = field(default_factory=dict)


def register_case(fn: CaseFn | None = None, *, name: str | None = None):
    """Decorator: add a bench case (``case(ctx) -> list of rows``). Usable bare or with
    ``name=``; cases run in registration order."""

    def deco(f: CaseFn) -> CaseFn:
        key = name or f.__name__
        if all(k != key for k, _ in _CASES):
            _CASES.append((key, f))
        return f

    return deco(fn) if fn is not None else deco


def figure(name: str, value: float | None, target: str, unit: str) -> Row:
    """One bench row; ``target`` is ``"<= v"`` or ``">= v"``; passed is evaluated here.
    ``target="info"`` marks a figure shown for comparison only: it passes when it was measured."""
    op, _, ref = target.partition(" ")
    ok = value is not None and math.isfinite(value)
    if ok and op == "<=":
        ok = value <= float(ref)
    elif ok and op == ">=":
        ok = value >= float(ref)
    return {"name": name, "value": None if value is None else float(value), "target": target,
            "unit": unit, "passed": bool(ok)}


def format_row(row: Row) -> str:
    v = row["value"]
    shown = "n/a" if v is None else (f"{v:.3f}" if abs(v) < 1000 else f"{v:.0f}")
    verdict = ("info" if row["passed"] else "FAIL") if row["target"] == "info" else ("pass" if row["passed"] else "FAIL")
    return f"{row['name']:<44} {shown:>10} {row['unit']:<6} target {row['target']:<8} {verdict}"


def main(
    quick: bool,
    json_path: Path | None,
    *,
    workdir: Path | None = None,
    cases: Sequence[tuple[str, CaseFn]] | None = None,
    out=None,
) -> int:
    """Run the bench cases, print one line per figure, write the figures as JSON.

    Returns
    -------
    int
        0 when every figure meets its target, 1 otherwise (a case that raises counts as a
        failed figure named after the case).
    """
    import importlib
    import platform

    out = out or sys.stdout
    for mod in CASE_MODULES:
        try:
            importlib.import_module(mod)
        except ImportError as exc:  # e.g. the viewer extra is not installed
            log.warning("bench cases of %s not available: %s", mod, exc)
    todo = list(_CASES if cases is None else cases)
    tmp = Path(tempfile.mkdtemp(prefix="crackstack-bench-", dir=workdir))
    ctx = BenchContext(quick=quick, workdir=tmp)
    rows: list[Row] = []
    t0 = time.perf_counter()
    try:
        for name, fn in todo:
            try:
                new = fn(ctx)
            except Exception as exc:  # a broken case is a failed figure, the others still run
                log.exception("bench case %s failed", name)
                new = [{**figure(name, None, "-", ""), "error": f"{type(exc).__name__}: {exc}"}]
            for row in new:
                out.write(format_row(row) + "\n")
                out.flush()
            rows += new
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    doc = {
        "quick": quick,
        "elapsed_s": round(time.perf_counter() - t0, 2),
        "machine": {"cpus": os.cpu_count(), "python": platform.python_version(), "platform": platform.platform()},
        "figures": rows,
    }
    if json_path is not None:
        from pipeline.runfolder import write_json_atomic

        write_json_atomic(json_path, doc)
    return 0 if rows and all(r["passed"] for r in rows) else 1


# ---------------------------------------------------------------------------------------------
# case: reconstruct speed against the I/O floor, peak memory, memory vs scan length

#: (frames of the long series, rows, cols); the short series is a quarter of it. 1024 frames of
#: 2048 x 1024 are 4.3 GB of uint16; the short series (256 frames) already spans more than two
#: output slabs, so both run two full slabs at a time and only the scan length differs.
FULL_SIZE = (1024, 2048, 1024)
QUICK_SIZE = (48, 256, 512)
BENCH_ACQ = {
    "sample": {"thickness_um": 775.0},
    "beam": {"energy_keV": 17.479, "reflection": [2, 2, 0], "slit_width_um": 12.0},
    "detector": {"pixel_um": [2.5, 2.5]},
}
BENCH_STEP_UM = 10.0


def _make_bench_series(folder: Path, n: int, rows: int, cols: int) -> tuple[Path, Path]:
    """The long series and, beside it, a short one (its first quarter, linked), each with a
    registration table of the true origins. Returns both acquisition files."""
    from pipeline.register import write_registration_csv

    pos = BENCH_STEP_UM * np.arange(n)
    k = np.arange(n)
    r0 = 0.4 * np.sin(k / 37.0)
    c0 = 40.0 + 0.5 * np.sin(k / 23.0)
    pts = tuple(
        PointDefect(float(x), float(y), float(z))
        for x, y, z in zip(np.linspace(100, pos[-1] - 100, 12), np.linspace(50, 0.8 * rows * 2.5, 12),
                           np.linspace(60, 700, 12), strict=True)
    )
    model = SeriesModel(rows=rows, cols=cols, points=pts)
    long_dir, short_dir = folder / "long", folder / "short"
    long_acq = write_series(long_dir, BENCH_ACQ, model, pos, r0, c0)
    n_short = max(2, n // 4)
    short_dir.mkdir(parents=True)
    for i in range(n_short):
        os.symlink(long_dir / f"frame_{i:05d}.tif", short_dir / f"frame_{i:05d}.tif")
    import yaml

    acq = yaml.safe_load(long_acq.read_text())
    acq["scan"] = {"positions_um": [float(p) for p in pos[:n_short]]}
    short_acq = short_dir / "acquisition.yaml"
    short_acq.write_text(yaml.safe_dump(acq, sort_keys=False))
    for d, m in ((long_dir, n), (short_dir, n_short)):
        table = {
            "frame": np.arange(m), "position_um": pos[:m], "r0_px": r0[:m], "c0_px": c0[:m],
            "row_shift_px": r0[:m] - r0[0], "col_shift_px": c0[:m] - c0[0], "quality": np.ones(m),
            "flagged": np.zeros(m, int), "interpolated": np.zeros(m, int),
        }
        write_registration_csv(d / "registration.csv", table)
    return long_acq, short_acq


def _child_reconstruct(acq_path: Path, out: Path, result: Path) -> None:
    """Subprocess body: reconstruct one series, report wall time and peak RSS as JSON."""
    import resource

    from pipeline.compute import set_quiet, use_scheduler
    from pipeline.config import ComputeConfig, CorrectConfig, ReconstructConfig, load_acquisition
    from pipeline.correct import correct_series
    from pipeline.ingest import open_series
    from pipeline.reconstruct import reconstruct_volume
    from pipeline.register import read_registration_csv

    set_quiet(True)
    acq, base = load_acquisition(acq_path)
    geom = Geometry.from_acquisition(acq)
    series = open_series(acq, base)
    reg = read_registration_csv(acq_path.parent / "registration.csv")
    with use_scheduler(ComputeConfig()):
        corrected = correct_series(series, CorrectConfig())
        t0 = time.perf_counter()
        info = reconstruct_volume(corrected, geom, series.positions_um, reg, ReconstructConfig(), out)
        elapsed = time.perf_counter() - t0
    peak_kb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss  # KiB on Linux
    result.write_text(json.dumps({"seconds": elapsed, "peak_rss_bytes": peak_kb * 1024, "info": info}))


def _run_child(acq_path: Path, out: Path) -> dict:
    res = out.parent / (out.name + ".json")
    cmd = [sys.executable, "-m", "pipeline.bench", "--child-reconstruct", str(acq_path), str(out), str(res)]
    proc = subprocess.run(cmd, capture_output=True, text=True)
    if proc.returncode != 0:
        raise RuntimeError(f"reconstruct subprocess failed ({proc.returncode}): {proc.stderr[-2000:]}")
    return json.loads(res.read_text())


def io_floor_seconds(acq_path: Path, volume: Path) -> dict[str, float]:
    """Time to read every frame once, and to write a volume of the same shape, chunks and
    codec as ``volume`` level 0 (its own data, loaded beforehand), with the default scheduler
    (threads, 2 workers: the same as reconstruct)."""
    import dask
    import zarr

    from pipeline import omezarr
    from pipeline.config import load_acquisition
    from pipeline.ingest import open_series

    acq, base = load_acquisition(acq_path)
    series = open_series(acq, base)
    with dask.config.set({"scheduler": "threads", "num_workers": 2}):
        t0 = time.perf_counter()
        series.frames.sum(axis=(1, 2)).compute()
        t_read = time.perf_counter() - t0
        src = zarr.open_array(str(volume / "0"), mode="r")
        data = src[...]
        dst = zarr.create_array(
            str(volume.parent / "floor.zarr"), shape=src.shape, chunks=src.chunks, dtype=src.dtype,
            fill_value=0, compressors=omezarr.COMPRESSOR, overwrite=True,
        )

        def put(region):
            dst[region] = data[region]

        grid = [math.ceil(s / c) for s, c in zip(src.shape, src.chunks, strict=True)]
        regions = [
            tuple(slice(i * c, (i + 1) * c) for i, c in zip(index, src.chunks, strict=True))
            for index in np.ndindex(*grid)
        ]
        t0 = time.perf_counter()
        dask.compute(*[dask.delayed(put)(r) for r in regions])
        t_write = time.perf_counter() - t0
    shutil.rmtree(volume.parent / "floor.zarr", ignore_errors=True)
    return {"read_s": t_read, "write_s": t_write}


@register_case(name="reconstruct")
def bench_reconstruct(ctx: BenchContext) -> list[Row]:
    """Reconstruct time over the I/O floor, peak RSS of the ~4 GB series, RSS long/short."""
    n, rows, cols = QUICK_SIZE if ctx.quick else FULL_SIZE
    data = ctx.workdir / "reconstruct"
    long_acq, short_acq = _make_bench_series(data, n, rows, cols)
    size_gb = n * rows * cols * 2 / 1e9
    short = _run_child(short_acq, data / "short.ome.zarr")
    shutil.rmtree(data / "short.ome.zarr", ignore_errors=True)
    long = _run_child(long_acq, data / "long.ome.zarr")
    floor = io_floor_seconds(long_acq, data / "long.ome.zarr")
    t_floor = floor["read_s"] + floor["write_s"]
    log.info("bench reconstruct: %s, floor %s", long, floor)
    return [
        figure(f"reconstruct time / I/O floor ({size_gb:.2f} GB series)", long["seconds"] / t_floor, "<= 2.0", "x"),
        figure(f"reconstruct peak RSS ({size_gb:.2f} GB series)", long["peak_rss_bytes"] / 2**30, "<= 1.5", "GiB"),
        figure("reconstruct RSS ratio, 4x longer / 1x series", long["peak_rss_bytes"] / short["peak_rss_bytes"], "<= 1.2", "x"),
    ]


if __name__ == "__main__":  # subprocess entry of the bench (not a user command)
    if len(sys.argv) == 5 and sys.argv[1] == "--child-reconstruct":
        _child_reconstruct(Path(sys.argv[2]), Path(sys.argv[3]), Path(sys.argv[4]))
    else:
        sys.exit("usage: python -m pipeline.bench --child-reconstruct ACQ OUT RESULT")


@register_case(name="segment_sheet_filter")
def _case_segment(ctx: BenchContext) -> list[Row]:
    """Our chunked sheet filter vs scikit-image's Hessian on the whole array (pipeline.segment)."""
    from pipeline.segment import bench_cases

    return bench_cases(ctx.quick)

"""Ingest: open a section-topograph series lazily and validate it up front.

Three sources are accepted (``frames`` section of the acquisition file, SPEC section 4):

- a glob of TIFF files (``frames.pattern``, e.g. ``"frame_*.tif"``), taken in natural sort
  order (``frame_2`` before ``frame_10``); a pattern that names a folder means every
  ``*.tif`` / ``*.tiff`` in it; several multi-page files are concatenated page by page;
- one multi-page TIFF (``frames.pattern`` naming a single file);
- an HDF5 dataset of shape (frames, rows, cols) (``frames.hdf5: {file, dataset}``).

Validation reads headers only: TIFF tags (image size, data type, strip offsets and byte counts)
and HDF5 dataset metadata. Pixel data of the frames are read only when the returned Dask array
is computed, one task per frame, so a series of 1,000 frames of 2048 x 2048 (8 GB of uint16)
never has to fit in memory. Dark and flat images are read at open time (they are few) and
reduced to their mean.

Frame numbering (file series only). The frame number of a file is the last group of digits in
its name that changes across the series (so ``scan3_frame_0007_E17.tif`` is frame 7).

- Duplicate numbers (``frame_7.tif`` and ``frame_007.tif``) are an **error**: the order of the
  two frames, and so the stage position of each, would be a guess.
- Gaps (``frame_7`` then ``frame_9``) are a **warning**: detectors drop frames during long
  scans and the remaining frames are still good data. With ``scan.step_um`` each frame's stage
  position is taken from its number, ``X = start_um + step_um * (n - n_first) / stride``
  (``stride`` = the common spacing of the numbers, usually 1), so a dropped frame leaves a
  gap in the positions instead of shifting every later frame by one step. With
  ``scan.positions_um`` the list is taken as one value per file found.
"""

from __future__ import annotations

import csv
import glob
import logging
import math
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import dask.array as da
import h5py
import numpy as np
import tifffile
from dask.base import tokenize

from pipeline.config import Acquisition, Orientation, load_acquisition
from pipeline.errors import InputError
from pipeline.geometry import Geometry, natural_voxel_um

log = logging.getLogger(__name__)

TIFF_SUFFIXES = (".tif", ".tiff")
_HDF5_SPEC = re.compile(r"^(?P<file>.+\.(?:h5|hdf5|hdf|nxs|nx5)):(?P<dataset>/.*)$", re.IGNORECASE)
_ACCEPTED = "accepted: a glob of TIFF frames, one multi-page TIFF, or frames.hdf5: {file, dataset}"
_ACCEPTED_CAL = "accepted: a TIFF file, a glob of TIFF files, or file.h5:/dataset"


@dataclass(frozen=True)
class FrameSeries:
    """A lazily opened frame series with its calibration images.

    Attributes
    ----------
    frames : dask.array.Array
        (n, rows, cols) in the files' native dtype, detector orientation applied (transpose,
        then flips) so rows run along +y and columns with depth; chunks (1, rows, cols).
    positions_um : ndarray
        (n,) stage position X_k of every frame, um.
    dark, flat : ndarray or None
        (rows, cols) float32 mean of the dark / flat (open-beam) image(s), orientation applied.
    monitor : ndarray or None
        (n,) float64 beam-monitor value per frame (finite, > 0).
    sources : list of str
        Per frame ``"file"``, ``"file[page]"`` or ``"file:/dataset[k]"``, for messages.
    kind : str
        ``"tiff_files"``, ``"multipage_tiff"`` or ``"hdf5"``.
    warnings : tuple of str
        Problems that do not stop processing (gaps in the frame numbers, ...).
    """

    frames: da.Array
    positions_um: np.ndarray
    dark: np.ndarray | None
    flat: np.ndarray | None
    monitor: np.ndarray | None
    sources: list[str]
    kind: str = "tiff_files"
    warnings: tuple[str, ...] = field(default=())

    @property
    def n_frames(self) -> int:
        return int(self.frames.shape[0])

    @property
    def frame_shape(self) -> tuple[int, int]:
        """(rows, cols) after orientation."""
        return int(self.frames.shape[1]), int(self.frames.shape[2])


# ---------------------------------------------------------------------------------------------
# small pure helpers


def natural_key(name: str) -> tuple[list[Any], str]:
    """Sort key that orders digit groups by value: ``frame_2`` before ``frame_10``."""
    parts = re.split(r"(\d+)", name)
    # re.split with a capture group alternates text (even index) and digits (odd index), so
    # every position compares like with like.
    return [int(p) if i % 2 else p.lower() for i, p in enumerate(parts)], name


def orient_image(image: np.ndarray, orientation: Orientation) -> np.ndarray:
    """Apply the detector orientation to the last two axes: transpose first, then flips.

    ``flip_rows`` reverses the order of the rows (up-down), ``flip_columns`` the order of the
    columns (left-right). Returns a view where possible.
    """
    out = np.swapaxes(image, -1, -2) if orientation.transpose else image
    if orientation.flip_rows:
        out = out[..., ::-1, :]
    if orientation.flip_columns:
        out = out[..., ::-1]
    return out


def _oriented_shape(shape: tuple[int, int], orientation: Orientation) -> tuple[int, int]:
    return (shape[1], shape[0]) if orientation.transpose else (shape[0], shape[1])


def _fmt_shape(shape: tuple[int, ...]) -> str:
    return "x".join(str(int(s)) for s in shape)


def _rel(path: Path | str, base_dir: Path) -> str:
    """Path as the user wrote it: relative to the acquisition folder when inside it."""
    try:
        return str(Path(path).resolve().relative_to(base_dir.resolve()))
    except ValueError:
        return str(path)


def _frame_numbers(paths: list[Path]) -> list[int] | None:
    """Frame number of every file: the last digit group whose value changes across the
    series (the last group when none changes). None when the names carry no common numbering."""
    groups = [re.findall(r"\d+", p.stem) for p in paths]
    if not groups or not groups[0] or any(len(g) != len(groups[0]) for g in groups):
        return None
    columns = [[int(v) for v in col] for col in zip(*groups, strict=True)]
    varying = [i for i, col in enumerate(columns) if len(set(col)) > 1]
    return columns[varying[-1] if varying else -1]


# ---------------------------------------------------------------------------------------------
# TIFF headers


@dataclass(frozen=True)
class _TiffInfo:
    n_pages: int
    shape: tuple[int, int]
    dtype: np.dtype
    #: file offset of each page's IFD, or None when the pages are not one IFD each
    ifd_offsets: tuple[int, ...] | None = None


def _tiff_info(path: Path, label: str) -> _TiffInfo:
    """Read one TIFF file's header and check it holds single-channel 2D pages whose data lie
    inside the file. ``label`` names the file (and frame index) in messages."""
    size = path.stat().st_size
    if size == 0:
        raise InputError(
            f"{label}: empty file (0 bytes); every frame must be a complete TIFF image"
        )
    try:
        with tifffile.TiffFile(path) as tif:
            series = tif.series
            if not series:
                raise InputError(f"{label}: TIFF without images; expected 2D single-channel pages")
            if len(series) > 1:
                first, other = series[0], series[1]
                at = other.pages[0].index if other.pages and other.pages[0] is not None else "?"
                raise InputError(
                    f"{label}: holds pages of different shape or type (page {at}: "
                    f"{_fmt_shape(other.shape)} {other.dtype} after {_fmt_shape(first.shape)} "
                    f"{first.dtype}); all pages of a series must match"
                )
            s = series[0]
            if "S" in s.axes:
                raise InputError(
                    f"{label}: colour image (axes {s.axes}, shape {_fmt_shape(s.shape)}); "
                    "frames must be single-channel (grey) images"
                )
            if len(s.shape) == 2:
                n_pages, shape = 1, (int(s.shape[0]), int(s.shape[1]))
            elif len(s.shape) == 3:
                n_pages, shape = int(s.shape[0]), (int(s.shape[1]), int(s.shape[2]))
            else:
                raise InputError(
                    f"{label}: holds a {len(s.shape)}D image (shape {_fmt_shape(s.shape)}, axes "
                    f"{s.axes}); expected one 2D image per page"
                )
            dtype = np.dtype(s.dtype).newbyteorder("=")
            if dtype.kind not in "uif":
                raise InputError(
                    f"{label}: data type {dtype} not supported; expected integers or floats"
                )
            # Truncation: every strip/tile (and a contiguous block) must end inside the file.
            # This reads tags only; it catches interrupted copies before any processing.
            for j, page in enumerate(s.pages):
                if page is None:
                    continue
                ends = [o + c for o, c in zip(page.dataoffsets, page.databytecounts, strict=False)]
                if ends and max(ends) > size:
                    raise InputError(
                        f"{label}: truncated (page {j} needs {max(ends)} bytes, the file has "
                        f"{size}); re-copy the file or remove it from the series"
                    )
            offsets = tuple(getattr(p, "offset", None) for p in s.pages)
            if len(offsets) != n_pages or None in offsets or len(set(offsets)) != n_pages:
                offsets = None
            if s.dataoffset is not None and s.dataoffset + s.nbytes > size:
                raise InputError(
                    f"{label}: truncated ({s.dataoffset + s.nbytes} bytes of image data "
                    f"expected, the file has {size}); re-copy the file or remove it"
                )
    except InputError:
        raise
    except Exception as exc:  # noqa: BLE001 - any parser failure here means "not a usable TIFF"
        raise InputError(
            f"{label}: not a readable TIFF file ({exc}); expected a TIFF image"
        ) from None
    return _TiffInfo(n_pages, shape, dtype, offsets)


# ---------------------------------------------------------------------------------------------
# per-frame readers (picklable: they hold paths only, so they travel to distributed workers)


@dataclass(frozen=True)
class _TiffFrameReader:
    refs: tuple[tuple[str, int, int | None], ...]  # (path, page, IFD offset) per frame
    dtype: str
    orientation: Orientation

    def __call__(self, block_id: tuple[int, ...] | None = None) -> np.ndarray:
        path, page, offset = self.refs[block_id[0]]
        with tifffile.TiffFile(path) as tif:
            if offset is not None:
                # Jump straight to the page's IFD (offset recorded at validation): finding page
                # k otherwise walks k IFDs, which made 1,000-page files 35x slower to read.
                tif.filehandle.seek(offset)
                image = tifffile.TiffPage(tif, index=page).asarray()
            else:
                image = tif.asarray(series=0, key=page)
        return orient_image(np.asarray(image, dtype=self.dtype), self.orientation)[None]


@dataclass(frozen=True)
class _Hdf5FrameReader:
    path: str
    dataset: str
    dtype: str
    orientation: Orientation

    def __call__(self, block_id: tuple[int, ...] | None = None) -> np.ndarray:
        k = block_id[0]
        with h5py.File(self.path, "r") as f:
            image = f[self.dataset][k]
        return orient_image(np.asarray(image, dtype=self.dtype), self.orientation)[None]


def _lazy_stack(reader: Any, n: int, shape: tuple[int, int], dtype: np.dtype, key: Any) -> da.Array:
    """One task per frame, a single graph layer, chunks (1, rows, cols)."""
    return da.map_blocks(
        reader,
        chunks=((1,) * n, (shape[0],), (shape[1],)),
        dtype=dtype,
        meta=np.empty((0, 0, 0), dtype=dtype),
        name=f"ingest-frames-{tokenize(key)}",
    )


# ---------------------------------------------------------------------------------------------
# finding files


def _has_magic(pattern: str) -> bool:
    return re.search(r"[*?[]", pattern) is not None


def _glob_files(pattern: str, base_dir: Path, key: str, accepted: str = _ACCEPTED) -> list[Path]:
    """Files for a pattern relative to ``base_dir`` (a glob, a folder, or one file), in natural
    order. Missing folders and empty matches raise :class:`InputError` naming ``key``."""
    full = Path(pattern) if Path(pattern).is_absolute() else base_dir / pattern
    if full.is_dir():
        files = [p for p in full.iterdir() if p.is_file() and p.suffix.lower() in TIFF_SUFFIXES]
        where = f"folder {_rel(full, base_dir)}"
    elif _has_magic(pattern):
        parent = full.parent
        while _has_magic(str(parent)):
            parent = parent.parent
        if not parent.is_dir():
            raise InputError(
                f"{key}: folder {_rel(parent, base_dir)} not found (pattern '{pattern}' is "
                f"relative to {base_dir}); {accepted}"
            )
        files = [Path(p) for p in glob.glob(str(full)) if os.path.isfile(p)]
        where = f"{_rel(parent, base_dir) if parent != base_dir else base_dir}"
    else:
        if not full.parent.is_dir():
            raise InputError(
                f"{key}: folder {_rel(full.parent, base_dir)} not found (for '{pattern}')"
            )
        if not full.is_file():
            raise InputError(f"{key}: file '{pattern}' not found in {full.parent}; {accepted}")
        return [full]
    if not files:
        present = sorted(p.name for p in (full if full.is_dir() else parent).iterdir())
        hint = (
            f" (it holds: {', '.join(present[:3])}{', ...' if len(present) > 3 else ''})"
            if present
            else " (it is empty)"
        )
        raise InputError(f"{key}: no file matches '{pattern}' in {where}{hint}; {accepted}")
    return sorted(files, key=lambda p: natural_key(_rel(p, base_dir)))


def _resolve(path: str, base_dir: Path) -> Path:
    return Path(path) if Path(path).is_absolute() else base_dir / path


# ---------------------------------------------------------------------------------------------
# sources


def _open_tiff_series(
    acq: Acquisition, base_dir: Path, exclude: set[Path]
) -> tuple[da.Array, list[str], str, list[int] | None, list[str]]:
    pattern = acq.frames.pattern or "frame_*.tif"
    files = _glob_files(pattern, base_dir, "frames.pattern")
    warnings: list[str] = []
    kept = [f for f in files if f.resolve() not in exclude]
    if len(kept) < len(files):
        skipped = [_rel(f, base_dir) for f in files if f.resolve() in exclude]
        warnings.append(
            f"frames.pattern also matches the dark/flat image(s) {', '.join(skipped)}; "
            "they were left out of the frame series"
        )
        files = kept
        if not files:
            raise InputError(
                f"frames.pattern: '{pattern}' matches only dark/flat images; {_ACCEPTED}"
            )

    refs: list[tuple[str, int, int | None]] = []
    sources: list[str] = []
    first: tuple[str, _TiffInfo] | None = None
    multipage = False
    for f in files:
        name = _rel(f, base_dir)
        info = _tiff_info(f, f"{name} (frame {len(refs)})" if len(files) > 1 else name)
        if first is None:
            first = (name, info)
        else:
            ref_name, ref = first
            if info.shape != ref.shape:
                raise InputError(
                    f"{name} (frame {len(refs)}): shape {_fmt_shape(info.shape)} differs from "
                    f"{ref_name} ({_fmt_shape(ref.shape)}); all frames must have one shape"
                )
            if info.dtype != ref.dtype:
                raise InputError(
                    f"{name} (frame {len(refs)}): data type {info.dtype} differs from {ref_name} "
                    f"({ref.dtype}); all frames must have one data type"
                )
        multipage |= info.n_pages > 1
        for page in range(info.n_pages):
            offset = info.ifd_offsets[page] if info.ifd_offsets else None
            refs.append((str(f), page, offset))
            sources.append(f"{name}[{page}]" if info.n_pages > 1 else name)
    assert first is not None
    info = first[1]

    numbers = None
    if not multipage and len(files) > 1:
        numbers = _frame_numbers(files)
        if numbers is not None:
            warnings += _check_numbering(numbers, sources)
    kind = "multipage_tiff" if multipage and len(files) == 1 else "tiff_files"
    orientation = acq.detector.orientation
    reader = _TiffFrameReader(tuple(refs), info.dtype.str, orientation)
    # model_dump: a pydantic model's dask token differs between processes; a dict's does not.
    key = (refs, [(os.path.getsize(p), os.path.getmtime(p)) for p in files], orientation.model_dump())
    frames = _lazy_stack(
        reader, len(refs), _oriented_shape(info.shape, orientation), info.dtype, key
    )
    return frames, sources, kind, numbers, warnings


def _check_numbering(numbers: list[int], sources: list[str]) -> list[str]:
    """Duplicate frame numbers raise; gaps return a warning (see the module docstring)."""
    seen: dict[int, int] = {}
    for i, n in enumerate(numbers):
        if n in seen:
            raise InputError(
                f"frames: frame number {n} appears twice ({sources[seen[n]]} and {sources[i]}); "
                "each frame number must be unique, remove or rename one"
            )
        seen[n] = i
    order = sorted(numbers)
    steps = np.diff(order)
    stride = math.gcd(*(int(s) for s in steps)) if steps.size else 1
    gaps = [(a, b) for a, b in zip(order[:-1], order[1:], strict=True) if b - a > stride]
    if not gaps:
        return []
    missing = sum((b - a) // stride - 1 for a, b in gaps)
    shown = ", ".join(f"{a} -> {b}" for a, b in gaps[:3]) + (", ..." if len(gaps) > 3 else "")
    return [
        f"frames: {missing} frame number(s) missing (jumps {shown}); continuing with the "
        f"{len(numbers)} frames found, stage positions follow the frame numbers"
    ]


def _open_hdf5(acq: Acquisition, base_dir: Path) -> tuple[da.Array, list[str]]:
    spec = acq.frames.hdf5
    path = _resolve(spec.file, base_dir)
    dataset = spec.dataset if spec.dataset.startswith("/") else "/" + spec.dataset
    shape, dtype = _hdf5_dataset_info(
        path, dataset, base_dir, "frames.hdf5", (3,), "3D (frames, rows, cols)", subkeys=True
    )
    orientation = acq.detector.orientation
    name = _rel(path, base_dir)
    reader = _Hdf5FrameReader(str(path), dataset, dtype.str, orientation)
    key = (str(path), dataset, os.path.getsize(path), os.path.getmtime(path), orientation.model_dump())
    frames = _lazy_stack(reader, shape[0], _oriented_shape(shape[1:], orientation), dtype, key)
    return frames, [f"{name}:{dataset}[{k}]" for k in range(shape[0])]


def _hdf5_dataset_info(
    path: Path,
    dataset: str,
    base_dir: Path,
    key: str,
    want_ndim: tuple[int, ...],
    layout: str,
    *,
    subkeys: bool = False,
) -> tuple[tuple[int, ...], np.dtype]:
    """Shape and dtype of an HDF5 dataset (metadata only), with readable errors.

    ``layout`` describes the accepted axes for messages; with ``subkeys`` the messages name
    ``key.file`` / ``key.dataset`` (the ``frames.hdf5`` mapping), else ``key`` alone.
    """
    name = _rel(path, base_dir)
    file_key, ds_key = (f"{key}.file", f"{key}.dataset") if subkeys else (key, key)
    if not path.is_file():
        raise InputError(f"{file_key}: {name} not found (paths are relative to {base_dir})")
    if not h5py.is_hdf5(path):
        raise InputError(f"{file_key}: {name} is not an HDF5 file")
    with h5py.File(path, "r") as f:
        if dataset not in f:
            found: list[str] = []
            f.visititems(
                lambda n, obj: (
                    found.append("/" + n)
                    if isinstance(obj, h5py.Dataset) and obj.ndim in want_ndim
                    else None
                )
            )
            dims = "/".join(f"{d}D" for d in want_ndim)
            hint = f"; {dims} datasets there: {', '.join(found[:3])}" if found else ""
            raise InputError(f"{ds_key}: '{dataset}' not found in {name}{hint}")
        obj = f[dataset]
        if not isinstance(obj, h5py.Dataset):
            raise InputError(f"{ds_key}: '{dataset}' in {name} is a group, not a dataset")
        if obj.ndim not in want_ndim:
            raise InputError(
                f"{ds_key}: '{dataset}' in {name} has shape {_fmt_shape(obj.shape) or '()'}; "
                f"expected {layout}"
            )
        dtype = np.dtype(obj.dtype).newbyteorder("=")
        if dtype.kind not in "uif":
            raise InputError(
                f"{ds_key}: '{dataset}' in {name} has type {dtype}; expected integers or floats"
            )
        if 0 in obj.shape:
            raise InputError(f"{ds_key}: '{dataset}' in {name} is empty (shape {obj.shape})")
        return tuple(int(s) for s in obj.shape), dtype


# ---------------------------------------------------------------------------------------------
# dark, flat, monitor


def _calibration_files(spec: str | None, base_dir: Path, key: str) -> list[Path]:
    if spec is None or _HDF5_SPEC.match(spec):
        return []
    return _glob_files(spec, base_dir, key, _ACCEPTED_CAL)


def _mean_image(
    spec: str, files: list[Path], base_dir: Path, key: str, raw_shape: tuple[int, int]
) -> np.ndarray:
    """Mean of the dark or flat image(s) in raw detector orientation, float32 (rows, cols)."""
    m = _HDF5_SPEC.match(spec)
    if m:
        path = _resolve(m["file"], base_dir)
        shape, _ = _hdf5_dataset_info(
            path, m["dataset"], base_dir, key, (2, 3), "2D (rows, cols) or 3D (images, rows, cols)"
        )
        image_shape, label = shape[-2:], f"{_rel(path, base_dir)}:{m['dataset']}"
        _check_calibration_shape(key, label, image_shape, raw_shape)
        with h5py.File(path, "r") as f:
            data = f[m["dataset"]]
            n = 1 if data.ndim == 2 else data.shape[0]
            total = np.zeros(image_shape, np.float64)
            for k in range(n):
                total += data[()] if data.ndim == 2 else data[k]
        return (total / n).astype(np.float32)
    total = np.zeros(raw_shape, np.float64)
    count = 0
    for f in files:
        name = _rel(f, base_dir)
        info = _tiff_info(f, f"{key}: {name}")
        _check_calibration_shape(key, name, info.shape, raw_shape)
        for page in range(info.n_pages):
            total += tifffile.imread(f, key=page)
            count += 1
    return (total / count).astype(np.float32)


def _check_calibration_shape(
    key: str, label: str, shape: tuple[int, ...], raw_shape: tuple[int, int]
) -> None:
    if tuple(shape) != tuple(raw_shape):
        raise InputError(
            f"{key}: {label} has shape {_fmt_shape(shape)} but the frames are "
            f"{_fmt_shape(raw_shape)} (as stored); dark and flat images must match the frames"
        )


def _read_monitor(spec: str | list[float] | None, base_dir: Path, n: int) -> np.ndarray | None:
    """Per-frame monitor values: a list, a CSV with one value per line (optional header
    line; with several columns, the one headed ``monitor``), or ``file.h5:/dataset`` (1D)."""
    if spec is None:
        return None
    where: list[str]
    h5 = _HDF5_SPEC.match(spec) if isinstance(spec, str) else None
    if h5:
        path = _resolve(h5["file"], base_dir)
        _hdf5_dataset_info(
            path, h5["dataset"], base_dir, "frames.monitor", (1,), "1D (one value per frame)"
        )
        with h5py.File(path, "r") as f:
            values = f[h5["dataset"]][()].tolist()
        name = f"{_rel(path, base_dir)}:{h5['dataset']}"
        where = [f"{name}[{i}]" for i in range(len(values))]
    elif isinstance(spec, str):
        path = _resolve(spec, base_dir)
        name = _rel(path, base_dir)
        if not path.is_file():
            raise InputError(f"frames.monitor: {name} not found (a CSV with one value per frame)")
        values, where = _parse_monitor_csv(path, name)
    else:
        values = [float(v) for v in spec]
        where = [f"frames.monitor[{i}]" for i in range(len(values))]
        name = "frames.monitor"
    m = np.asarray(values, np.float64)
    if m.size != n:
        raise InputError(
            f"frames.monitor: {name} has {m.size} values but {n} frames were found; "
            "give one monitor value per frame"
        )
    bad = ~np.isfinite(m) | (m <= 0)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise InputError(
            f"frames.monitor: value {m[i]} for frame {i} ({where[i]}); monitor values must be "
            f"finite and > 0 ({int(bad.sum())} bad value(s) in all)"
        )
    return m


def _parse_monitor_csv(path: Path, name: str) -> tuple[list[float], list[str]]:
    try:
        text = path.read_text()
    except UnicodeDecodeError:
        raise InputError(f"frames.monitor: {name} is not a text CSV file") from None
    rows = [
        (ln, [c.strip() for c in row])
        for ln, row in enumerate(csv.reader(text.splitlines()), start=1)
        if row and any(c.strip() for c in row) and not row[0].lstrip().startswith("#")
    ]
    if not rows:
        raise InputError(f"frames.monitor: {name} holds no values; give one value per frame")

    def _is_number(s: str) -> bool:
        try:
            float(s)
        except ValueError:
            return False
        return True

    column = 0
    header = None if all(_is_number(c) for c in rows[0][1]) else rows.pop(0)[1]
    width = len(rows[0][1]) if rows else 1
    if width > 1:
        names = [h.lower() for h in header] if header else []
        if "monitor" not in names:
            raise InputError(
                f"frames.monitor: {name} has {width} columns; give one value per line or head "
                "the column to use 'monitor'"
            )
        column = names.index("monitor")
    values, where = [], []
    for ln, row in rows:
        cell = row[column] if column < len(row) else ""
        try:
            values.append(float(cell))
        except ValueError:
            raise InputError(
                f"frames.monitor: {name} line {ln}: '{cell}' is not a number"
            ) from None
        where.append(f"{name} line {ln}")
    return values, where


# ---------------------------------------------------------------------------------------------
# public entry points


def _positions(acq: Acquisition, n: int, numbers: list[int] | None) -> np.ndarray:
    scan = acq.scan
    if scan.positions_um is not None or numbers is None:
        return scan.positions(n)
    num = np.asarray(numbers, np.int64)
    if n < 2 or not np.all(np.diff(num) > 0):
        return scan.positions(n)
    stride = math.gcd(*(int(s) for s in np.diff(num)))
    return scan.start_um + scan.step_um * (num - num[0]) / stride


def open_series(acq: Acquisition, base_dir: Path) -> FrameSeries:
    """Open the frame series of an acquisition lazily and validate it (headers only).

    Parameters
    ----------
    acq : Acquisition
        The validated acquisition file.
    base_dir : Path
        Folder that holds ``acquisition.yaml``; relative paths start there.

    Returns
    -------
    FrameSeries
        Frames as a Dask array (no pixel data read yet), stage positions, dark/flat means,
        monitor values and per-frame source names.

    Raises
    ------
    InputError
        Missing folder or file, no frames matching, mixed shapes or data types, truncated or
        empty TIFF files, duplicate frame numbers, positions or monitor count different from
        the frame count, NaN / inf / non-positive monitor values, HDF5 file or dataset missing,
        dark or flat shape different from the frames. Gaps in the frame numbers are warnings.
    """
    base_dir = Path(base_dir)
    fr = acq.frames
    dark_files = _calibration_files(fr.dark, base_dir, "frames.dark")
    flat_files = _calibration_files(fr.flat, base_dir, "frames.flat")
    warnings: list[str] = []
    numbers = None
    if fr.hdf5 is not None:
        frames, sources = _open_hdf5(acq, base_dir)
        kind = "hdf5"
    else:
        exclude = {p.resolve() for p in dark_files + flat_files}
        frames, sources, kind, numbers, tiff_warnings = _open_tiff_series(acq, base_dir, exclude)
        warnings += tiff_warnings
    n = int(frames.shape[0])
    orientation = acq.detector.orientation
    raw_shape = _oriented_shape(frames.shape[1:], orientation)  # transpose is its own inverse
    positions = _positions(acq, n, numbers)
    monitor = _read_monitor(fr.monitor, base_dir, n)
    dark = flat = None
    if fr.dark is not None:
        dark = orient_image(
            _mean_image(fr.dark, dark_files, base_dir, "frames.dark", raw_shape), orientation
        )
        dark = np.ascontiguousarray(dark)
    if fr.flat is not None:
        flat = orient_image(
            _mean_image(fr.flat, flat_files, base_dir, "frames.flat", raw_shape), orientation
        )
        flat = np.ascontiguousarray(flat)
    for w in warnings:
        log.warning(w)
    log.info("opened %d frames of %s %s (%s)", n, _fmt_shape(frames.shape[1:]), frames.dtype, kind)
    return FrameSeries(
        frames=frames,
        positions_um=positions,
        dark=dark,
        flat=flat,
        monitor=monitor,
        sources=sources,
        kind=kind,
        warnings=tuple(warnings),
    )


def describe_acquisition(acq_path: str | Path) -> dict[str, Any]:
    """Validate an acquisition without processing it, for ``crackstack check``.

    Loads the acquisition file, builds the geometry and opens the frame series (all of
    :func:`open_series`'s validation runs; no pixel data of the frames are read).

    Returns
    -------
    dict
        Plain JSON-able values: ``frames``, ``shape`` [rows, cols] (after orientation),
        ``dtype``, ``source``, ``positions_um`` [first, last], ``step_um``, ``geometry``,
        ``reflection``, ``energy_keV``, ``theta_B_deg``, ``psi0_deg``, ``psi_h_deg``, ``G``,
        ``G_computed``, ``band_width_um``, ``band_width_px``, ``voxel_um`` [dz, dy, dx] of the
        natural sampling, ``dark`` / ``flat`` / ``monitor`` (bool) and ``warnings`` (list).

    Raises
    ------
    InputError
        Anything :func:`~pipeline.config.load_acquisition`, :meth:`Geometry.from_acquisition`
        or :func:`open_series` rejects.
    """
    acq, base_dir = load_acquisition(acq_path)
    geom = Geometry.from_acquisition(acq)
    series = open_series(acq, base_dir)
    pos = series.positions_um
    if acq.scan.step_um is not None:
        step = float(acq.scan.step_um)
    else:
        step = float(np.median(np.abs(np.diff(pos))))
    voxel = natural_voxel_um(geom, step)
    warnings = list(series.warnings)
    if acq.detector.depth_magnification is not None:
        rel = geom.G / geom.G_computed - 1
        if abs(rel) > 0.03:
            warnings.append(
                f"detector.depth_magnification {geom.G:.4f} differs from the computed "
                f"{geom.G_computed:.4f} by {rel:+.1%} (more than 3 %); check the calibration"
            )
    rows, cols = series.frame_shape
    if geom.geometry == "transmission" and geom.band_width_px > cols:
        warnings.append(
            f"the section band is {geom.band_width_px:.0f} px wide but the frames have {cols} "
            "columns; check detector.pixel_um, detector.orientation and the thickness"
        )
    return {
        "acquisition": str(acq_path),
        "source": series.kind,
        "first_frame": series.sources[0],
        "frames": series.n_frames,
        "shape": [rows, cols],
        "dtype": str(series.frames.dtype),
        "positions_um": [float(pos[0]), float(pos[-1])],
        "step_um": step,
        "geometry": geom.geometry,
        "reflection": list(acq.beam.reflection),
        "energy_keV": float(geom.energy_keV),
        "theta_B_deg": float(geom.theta_B_deg),
        "psi0_deg": float(geom.psi0_deg),
        "psi_h_deg": float(geom.psi_h_deg),
        "G": float(geom.G),
        "G_computed": float(geom.G_computed),
        "band_width_um": float(geom.thickness_um * geom.G),
        "band_width_px": float(geom.band_width_px),
        "voxel_um": [float(v) for v in voxel],
        "dark": series.dark is not None,
        "flat": series.flat is not None,
        "monitor": series.monitor is not None,
        "warnings": warnings,
    }

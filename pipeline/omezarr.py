"""OME-Zarr 0.5 (NGFF) multiscale volumes and label images, written with plain zarr-python 3.

We write the metadata ourselves (reference writers disagree; ECOSYSTEM notes) and tests validate
it with ``ome-zarr-models``. Axes are (z, y, x) in ``micrometer``. Level k is a 2x2x2 block
reduction of level k-1 (mean for the image, max for labels so 1-voxel-thin cracks stay visible),
so its scale is ``s0 * 2**k`` and its translation ``origin + s0 * (2**k - 1) / 2`` (voxel centres
stay aligned).

Besides the NGFF keys the root group carries ``attributes["crackstack"]``: ``voxel_um``
[dz, dy, dx], ``origin_um`` [z0, y0, x0] (wafer-frame coordinate of voxel (0, 0, 0)'s centre),
and whatever the writing stage adds (thickness, geometry summary).
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import dask.array as da
import numpy as np
import zarr
from zarr.codecs import BloscCodec

from pipeline.errors import InputError

AXES = [
    {"name": "z", "type": "space", "unit": "micrometer"},
    {"name": "y", "type": "space", "unit": "micrometer"},
    {"name": "x", "type": "space", "unit": "micrometer"},
]
DIMS = ("z", "y", "x")
COMPRESSOR = BloscCodec(cname="zstd", clevel=3, shuffle="bitshuffle")


def _r(v: float) -> float:
    return float(round(float(v), 9))


def level_shapes(shape: tuple[int, int, int], levels: int) -> list[tuple[int, ...]]:
    """Array shape of every pyramid level (floor halving, at least 1)."""
    out = [tuple(int(s) for s in shape)]
    for _ in range(1, levels):
        out.append(tuple(max(1, s // 2) for s in out[-1]))
    return out


def multiscales_metadata(
    name: str, voxel_um: tuple[float, float, float], origin_um: tuple[float, float, float],
    levels: int, method: str,
) -> dict:
    """The ``multiscales`` entry of an OME-Zarr 0.5 image or label image."""
    s0 = np.asarray(voxel_um, float)
    o = np.asarray(origin_um, float)
    datasets = []
    for k in range(levels):
        ct: list[dict[str, Any]] = [{"type": "scale", "scale": [_r(v) for v in s0 * 2**k]}]
        ct.append({"type": "translation", "translation": [_r(v) for v in o + s0 * (2**k - 1) / 2]})
        datasets.append({"path": str(k), "coordinateTransformations": ct})
    return {
        "name": name,
        "axes": AXES,
        "datasets": datasets,
        "type": method,
        "metadata": {"method": method},
    }


def slab_level_chunks(
    shape: tuple[int, int, int], chunks: tuple[int, int, int], levels: int
) -> list[tuple[int, int, int]]:
    """Chunks of every level for a volume written in x slabs one level-0 chunk wide, each slab
    writing its own block-reduced part of every level (no level is read back).

    Level k has x chunk ``cx / 2**k``, so the part of a slab at every level is a whole column of
    chunks and no two slabs write the same chunk, and y chunk ``cy * 2**k`` (capped at the
    level's shape), so a chunk holds about as many voxels at every level (the coarse levels do
    not turn into many small files). Requires ``cx`` divisible by ``2**(levels - 1)``.
    """
    cz, cy, cx = (int(c) for c in chunks)
    if cx % 2 ** (levels - 1):
        raise ValueError(f"x chunk {cx} is not divisible by 2**{levels - 1}")
    out = []
    for k, shp in enumerate(level_shapes(shape, levels)):
        out.append((min(cz, shp[0]), min(cy * 2**k, shp[1]), min(cx // 2**k, shp[2])))
    return out


def _create_levels(group: zarr.Group, shape, chunks, dtype, levels: int, level_chunks=None) -> None:
    for k, shp in enumerate(level_shapes(shape, levels)):
        ch = tuple(min(c, s) for c, s in zip(chunks if level_chunks is None else level_chunks[k], shp, strict=True))
        group.create_array(
            str(k), shape=shp, chunks=ch, dtype=dtype, fill_value=0,
            dimension_names=DIMS, compressors=COMPRESSOR, overwrite=True,
        )


def create_image(
    path: str | Path,
    shape: tuple[int, int, int],
    *,
    voxel_um: tuple[float, float, float],
    origin_um: tuple[float, float, float],
    chunks: tuple[int, int, int] = (64, 128, 128),
    dtype: str = "float32",
    levels: int = 3,
    name: str = "volume",
    extra: dict | None = None,
    level_chunks: list[tuple[int, int, int]] | None = None,
) -> zarr.Group:
    """Create an empty multiscale image (all levels) with its metadata; returns the group.

    ``level_chunks`` (one (z, y, x) chunk per level, e.g. :func:`slab_level_chunks`) replaces
    the same ``chunks`` at every level."""
    if level_chunks is not None and len(level_chunks) != levels:
        raise ValueError(f"level_chunks: {len(level_chunks)} entries for {levels} levels")
    root = zarr.open_group(str(path), mode="w", zarr_format=3)
    _create_levels(root, shape, chunks, dtype, levels, level_chunks)
    attrs = {"version": "0.5", "multiscales": [multiscales_metadata(name, voxel_um, origin_um, levels, "local_mean")]}
    root.attrs["ome"] = attrs
    root.attrs["crackstack"] = {
        "voxel_um": [_r(v) for v in voxel_um], "origin_um": [_r(v) for v in origin_um], **(extra or {})
    }
    return root


def create_labels(
    image_path: str | Path,
    *,
    name: str = "defects",
    dtype: str = "uint32",
    colors: dict[int, tuple[int, int, int, int]] | None = None,
    properties: dict[int, dict] | None = None,
) -> zarr.Group:
    """Create an empty label image ``labels/<name>`` matching the image's levels and chunks."""
    root = zarr.open_group(str(image_path), mode="r+")
    meta = read_meta(image_path)
    levels = len(meta["levels"])
    img0 = root["0"]
    labels = root.require_group("labels")
    labels.attrs["ome"] = {"version": "0.5", "labels": [name]}
    grp = labels.create_group(name, overwrite=True)
    _create_levels(grp, img0.shape, img0.chunks, dtype, levels)
    image_label: dict[str, Any] = {"source": {"image": "../../"}}
    if colors:
        image_label["colors"] = [{"label-value": int(k), "rgba": list(map(int, v))} for k, v in colors.items()]
    if properties:
        image_label["properties"] = [{"label-value": int(k), **v} for k, v in properties.items()]
    grp.attrs["ome"] = {
        "version": "0.5",
        "multiscales": [multiscales_metadata(name, meta["voxel_um"], meta["origin_um"], levels, "max")],
        "image-label": image_label,
    }
    return grp


def set_label_metadata(
    image_path: str | Path, name: str = "defects", *,
    colors: dict[int, tuple[int, int, int, int]] | None = None,
    properties: dict[int, dict] | None = None,
) -> None:
    """Replace the ``image-label`` colours/properties of an existing label image."""
    grp = zarr.open_group(str(Path(image_path) / "labels" / name), mode="r+")
    ome = dict(grp.attrs["ome"])
    il = dict(ome.get("image-label", {}))
    if colors is not None:
        il["colors"] = [{"label-value": int(k), "rgba": list(map(int, v))} for k, v in colors.items()]
    if properties is not None:
        il["properties"] = [{"label-value": int(k), **v} for k, v in properties.items()]
    ome["image-label"] = il
    grp.attrs["ome"] = ome


def reduce_blocks(
    block: np.ndarray, factors: tuple[int, ...], out_shape: tuple[int, ...], *, method: str = "mean"
) -> np.ndarray:
    """Block reduction of an in-memory array, the same as one :func:`build_pyramid` step:
    ``out[i] = mean`` (or max) of ``block[i * f : (i + 1) * f]`` per axis with factors ``f``
    (2, or 1 along an axis of length 1); ``block`` is trimmed to ``out_shape * factors``.

    Pairs are combined one axis at a time by slicing (z first, where the halves are
    contiguous): ``np.mean`` over the axes of a 6-D reshape took ~6x longer (it walks the
    reduced axes with large strides).
    """
    if any(f not in (1, 2) for f in factors):
        raise ValueError(f"block factors must be 1 or 2 (got {factors})")
    out = block[tuple(slice(0, n * f) for n, f in zip(out_shape, factors, strict=True))]
    op = np.maximum if method == "max" else np.add
    for axis, f in enumerate(factors):
        if f == 2:
            even = tuple(slice(0, None, 2) if i == axis else slice(None) for i in range(out.ndim))
            odd = tuple(slice(1, None, 2) if i == axis else slice(None) for i in range(out.ndim))
            out = op(out[even], out[odd])
    n = math.prod(factors)
    if n == 1:
        return out.copy()
    if method != "max":
        out *= out.dtype.type(1.0 / n)
    return out


def build_pyramid(group_path: str | Path, *, method: str = "mean") -> None:
    """Fill levels 1.. of an image or label group from level 0 by 2x2x2 block reduction.

    ``method="mean"`` for intensities, ``"max"`` for labels. Each level is computed from the one
    above, so the cost is about 1/7 of the level-0 size in reads.
    """
    grp = zarr.open_group(str(group_path), mode="r+")
    # All levels in one store call, each reduced from the one above in the graph (not read back
    # from disk): one scheduler round trip per pyramid instead of per level, which under a
    # distributed client cost ~0.1 s each on the small bench run.
    above = da.from_zarr(grp["0"])
    sources, targets = [], []
    k = 1
    while str(k) in grp:
        dst = grp[str(k)]
        trimmed = above[tuple(slice(0, 2 * s) if s * 2 <= n else slice(0, n) for s, n in zip(dst.shape, above.shape, strict=True))]
        axes = {i: (2 if trimmed.shape[i] >= 2 * dst.shape[i] else 1) for i in range(3)}
        if method == "max":
            red = da.coarsen(np.max, trimmed, axes, trim_excess=True)
        else:
            red = da.coarsen(np.mean, trimmed.astype("float32"), axes, trim_excess=True)
        # Chunks aligned with the zarr chunks, so no two tasks write the same chunk.
        red = red.astype(dst.dtype).rechunk(dst.chunks)
        sources.append(red)
        targets.append(dst)
        above = red
        k += 1
    if sources:
        da.store(sources, targets, lock=False)


def read_meta(path: str | Path) -> dict:
    """Metadata of an image or label group: ``voxel_um``, ``origin_um``, ``levels`` (paths,
    scales, translations) and the ``crackstack`` attributes of the root image."""
    p = Path(path)
    if not (p / "zarr.json").is_file():
        raise InputError(f"{p}: not an OME-Zarr group (no zarr.json)")
    try:
        grp = zarr.open_group(str(p), mode="r")
        ome = grp.attrs["ome"]
        ms = ome["multiscales"][0]
    except (KeyError, IndexError, TypeError, ValueError) as exc:
        raise InputError(f"{p}: no OME-Zarr multiscales metadata ({exc})") from None
    levels = []
    for ds in ms["datasets"]:
        ct = {t["type"]: t.get(t["type"]) for t in ds["coordinateTransformations"]}
        levels.append({"path": ds["path"], "scale": ct["scale"], "translation": ct.get("translation", [0, 0, 0])})
    extra = dict(grp.attrs.get("crackstack", {}))
    return {
        "voxel_um": tuple(levels[0]["scale"]),
        "origin_um": tuple(levels[0]["translation"]),
        "levels": levels,
        "ome": dict(ome),
        "crackstack": extra,
    }


def open_image(path: str | Path, level: int = 0) -> tuple[da.Array, dict]:
    """Open one level of an image as a lazy Dask array (chunks = zarr chunks) with its metadata."""
    meta = read_meta(path)
    arr = zarr.open_array(str(Path(path) / meta["levels"][level]["path"]), mode="r")
    return da.from_zarr(arr), meta


def open_labels(image_path: str | Path, name: str = "defects", level: int = 0) -> tuple[da.Array, dict]:
    """Open a label image of a volume as a lazy Dask array with its metadata."""
    p = Path(image_path) / "labels" / name
    if not p.exists():
        raise InputError(f"{image_path}: no label image labels/{name} (has segment run?)")
    return open_image(p, level)


def voxel_to_wafer(index_zyx: np.ndarray, meta: dict) -> np.ndarray:
    """Voxel indices (..., 3) in (z, y, x) order -> wafer coordinates (..., 3) as [x, y, z] um."""
    zyx = np.asarray(index_zyx, float) * np.asarray(meta["voxel_um"]) + np.asarray(meta["origin_um"])
    return zyx[..., ::-1]


def wafer_to_voxel(xyz_um: np.ndarray, meta: dict) -> np.ndarray:
    """Wafer coordinates [x, y, z] um (..., 3) -> fractional voxel indices (..., 3) as (z, y, x)."""
    zyx = np.asarray(xyz_um, float)[..., ::-1]
    return (zyx - np.asarray(meta["origin_um"])) / np.asarray(meta["voxel_um"])

"""napari reader: a crackstack run folder (or its ``volume.ome.zarr``) as layers.

Thin adapter: :func:`pipeline.review.load_run_for_view` and the other ``pipeline`` functions
read and compute; this module only turns their results into napari LayerData tuples. Every layer
is in wafer micrometres, (z, y, x), with units on all layers (napari ignores units unless every
layer has them).
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from typing import Any

import numpy as np

from pipeline import omezarr, review, runfolder

log = logging.getLogger(__name__)

UNITS = ("micrometer", "micrometer", "micrometer")
AXIS_LABELS = ("z", "y", "x")
RUN_KEY = "crackstack_run"  # layer.metadata key naming the run folder a layer came from
CONTRAST_LIMITS = (0.0, 2.0)  # band ~1.0

LayerData = tuple[Any, dict, str]


def get_reader(path: str | list[str]) -> Callable[[Any], list[LayerData]] | None:
    """Return :func:`read_run` when ``path`` is a run folder or a crackstack volume, else None."""
    if isinstance(path, list):
        if len(path) != 1:
            return None
        path = path[0]
    if not review.is_run_folder(path):
        return None
    return read_run


def read_run(path: str | list[str]) -> list[LayerData]:
    """All layers of one run folder.

    Raises
    ------
    pipeline.errors.InputError
        (a ValueError) for a missing or corrupt run folder, with the file and what is wrong.
    """
    if isinstance(path, list):
        path = path[0]
    view = review.load_run_for_view(path)
    return run_layers(view)


def _common(view: dict, name: str, **kw: Any) -> dict:
    return {"name": name, "units": UNITS, "axis_labels": AXIS_LABELS,
            "metadata": {RUN_KEY: str(view["root"])}, **kw}


def run_layers(view: dict) -> list[LayerData]:
    """LayerData tuples for a run already loaded by :func:`pipeline.review.load_run_for_view`."""
    meta = view["meta"]
    vol = view["volume_path"]
    lvl0 = meta["levels"][0]
    grid = {"scale": tuple(lvl0["scale"]), "translate": tuple(lvl0["translation"])}
    layers: list[LayerData] = []

    # Dask (not bare zarr) levels: napari keeps sliced Dask chunks in its cache, so re-slicing
    # while layers are added is nearly free (bare zarr arrays made the first view of a 4 GB run
    # about 1.7x slower, measured)
    volume = [omezarr.open_image(vol, k)[0] for k in range(len(meta["levels"]))]
    # the volume is normalised so the perfect-crystal band is ~1 (SPEC run folder contract): a
    # fixed window shows the band mid-grey and defect contrast above it, and spares napari a
    # data-range pass over the coarsest level (diluted there by block means anyway)
    layers.append((volume, _common(view, "volume", multiscale=True, colormap="gray",
                                   contrast_limits=CONTRAST_LIMITS, rendering="attenuated_mip",
                                   blending="additive", **grid), "image"))

    if view["has_labels"]:
        labels = [omezarr.open_labels(vol, "defects", k)[0] for k in range(len(meta["levels"]))]
        lmeta = omezarr.read_meta(vol / runfolder.LABELS)
        colors: dict[Any, Any] = dict(review.label_colors(lmeta))
        kw: dict[str, Any] = {"multiscale": True, "opacity": 0.7, **grid}
        if colors:
            colors[None] = (0.0, 0.0, 0.0, 0.0)  # ids without a colour stay invisible
            kw["colormap"] = colors
        layers.append((labels, _common(view, "defects", **kw), "labels"))

    # vector layers share the volume's grid (see pipeline.review.world_to_grid); napari sizes
    # and widths are then in voxels
    def grid_of(zyx_um):
        return review.world_to_grid(zyx_um, meta)

    vox_xy_um = float(meta["voxel_um"][2])
    pts, ids = review.front_points_zyx(view)
    if len(pts):
        layers.append((grid_of(pts), _common(view, "crack fronts", features={"defect_id": ids},
                                             size=2.0, face_color="lime", border_width=0, **grid),
                       "points"))

    centres, diam, loop_ids = review.loop_points_zyx(view)
    if len(centres):
        layers.append((grid_of(centres), _common(view, "dislocation loops",
                                                 features={"defect_id": loop_ids},
                                                 size=np.maximum(diam / vox_xy_um, 2.0),
                                                 symbol="ring", face_color="deepskyblue", **grid),
                       "points"))

    surface = review.crack_surface(view) if view["has_labels"] else None
    if surface is not None:
        verts_um, faces, rgba = surface
        layers.append(((grid_of(verts_um), faces),
                       _common(view, "crack surfaces", vertex_colors=rgba, opacity=0.6,
                               shading="smooth", **grid), "surface"))

    guides = review.orientation_guides(view)
    shapes = [grid_of(s) for s in guides["surfaces"] + guides["edge"]]
    if shapes:  # an empty Shapes layer would be 2D and break the 3D world of the others
        types = ["polygon"] * len(guides["surfaces"]) + ["path"] * len(guides["edge"])
        colours = ["#33c3ff"] * len(guides["surfaces"]) + ["#ff4da6"] * len(guides["edge"])
        layers.append((shapes, _common(view, "wafer outline", shape_type=types, edge_color=colours,
                                       face_color="transparent", edge_width=0.5, **grid), "shapes"))
    return layers

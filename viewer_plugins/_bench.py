"""`crackstack bench` case: time from opening a large run to its first view in napari.

Target from issue 8: a run whose volume is about 4 GB shows its first view in under 5 s on a
2-core laptop-class machine. The run is invented (a smooth band pattern, so it compresses and
writes quickly) with labels and an empty defect list; the first view is napari's default 2D
slice. ``--quick`` uses a 64 MB volume.
"""

from __future__ import annotations

import dask.array as da
import numpy as np

from pipeline import omezarr
from pipeline import runfolder as rf
from pipeline.bench import BenchContext, figure, register_case


def _band_block(block_info=None) -> np.ndarray:
    loc = block_info[None]["array-location"]
    z = np.arange(*loc[0], dtype=np.float32)[:, None, None]
    y = np.arange(*loc[1], dtype=np.float32)[None, :, None]
    x = np.arange(*loc[2], dtype=np.float32)[None, None, :]
    return (1.0 + 0.2 * np.cos(z / 5.0) + 0.01 * np.sin(x / 50.0) + 0.0 * y).astype(np.float32)


def build_large_run(root, shape: tuple[int, int, int]) -> None:
    """Write an invented run folder with a float32 volume of ``shape`` (z, y, x)."""
    vol = root / rf.VOLUME
    omezarr.create_image(vol, shape, voxel_um=(2.0, 1.0, 4.0), origin_um=(0.0, 0.0, 0.0),
                         chunks=(64, 128, 128), extra={"thickness_um": shape[0] * 2.0})
    chunks = (64, 512, 512)
    data = da.map_blocks(_band_block, dtype=np.float32, chunks=tuple(
        tuple(min(c, s - i) for i in range(0, s, c)) for c, s in zip(chunks, shape, strict=True)))
    import zarr

    da.store(data, zarr.open_array(str(vol / "0"), mode="r+"), lock=False)
    omezarr.build_pyramid(vol)
    omezarr.create_labels(vol)
    omezarr.build_pyramid(vol / "labels" / "defects", method="max")
    rf.write_defects(root / rf.DEFECTS_JSON, {
        "schema_version": 1, "software": {"name": "crackstack", "version": "bench"},
        "wafer": {"diameter_mm": 300.0, "thickness_um": shape[0] * 2.0,
                  "crystal": {"z_uvw": [0, 0, 1], "x_uvw": [1, 1, 0]}, "center_xy_mm": None},
        "acquisition": {"energy_keV": 17.479, "reflection": [2, 2, 0], "geometry": "transmission",
                        "voxel_um": [2.0, 1.0, 4.0]},
        "cracks": [], "dislocation_loops": [], "slip_bands": [],
    })


@register_case(name="viewer_first_view")
def case_first_view(ctx: BenchContext) -> list[dict]:
    from viewer_plugins import bench_open_seconds

    shape = (64, 512, 512) if ctx.quick else (256, 2048, 2048)
    root = ctx.workdir / "viewer_run"
    root.mkdir()
    build_large_run(root, shape)
    gb = np.prod(shape) * 4 / 1e9
    seconds = bench_open_seconds(root, ndisplay=2)
    return [figure(f"viewer: first view of a {gb:.2g} GB run", seconds, "<= 5.0", "s")]

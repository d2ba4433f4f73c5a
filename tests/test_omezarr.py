"""OME-Zarr 0.5 metadata written by pipeline.omezarr, checked by independent readers.

References: the OME-NGFF 0.5 specification (https://ngff.openmicroscopy.org/0.5/), validated with
the ome-zarr-models package; read back with ome-zarr-py's reader (an independent client).
"""

import numpy as np
import pytest
import zarr

from pipeline import omezarr


@pytest.fixture
def volume(tmp_path):
    path = tmp_path / "v.ome.zarr"
    shape = (21, 30, 44)
    rng = np.random.default_rng(0)
    data = rng.random(shape, dtype=np.float32)
    g = omezarr.create_image(
        path, shape, voxel_um=(6.8, 2.5, 10.0), origin_um=(-3.4, 0.0, 100.0), chunks=(8, 16, 16)
    )
    g["0"][:] = data
    omezarr.build_pyramid(path)
    omezarr.create_labels(path, colors={1: (255, 0, 0, 255)}, properties={1: {"class": "crack"}})
    lab = zarr.open_array(str(path / "labels/defects/0"), mode="r+")
    lab[5, 10:12, 20:21] = 1  # a 1-voxel-thin feature must survive block-max downsampling
    omezarr.build_pyramid(path / "labels/defects", method="max")
    return path, data


def test_validates_with_ome_zarr_models(volume):
    ome_zarr_models = pytest.importorskip("ome_zarr_models")
    from ome_zarr_models.v05 import Image, ImageLabel

    path, _ = volume
    assert isinstance(ome_zarr_models.open_ome_zarr(str(path)), Image)
    ImageLabel.from_zarr(zarr.open_group(str(path / "labels/defects"), mode="r"))


def test_opens_with_ome_zarr_py_reader(volume):
    pytest.importorskip("ome_zarr")
    from ome_zarr.io import parse_url
    from ome_zarr.reader import Reader

    path, data = volume
    nodes = list(Reader(parse_url(str(path)))())
    image = nodes[0]
    assert len(image.data) == 3
    np.testing.assert_array_equal(np.asarray(image.data[0]), data)
    scales = [t[0]["scale"] for t in image.metadata["coordinateTransformations"]]
    assert scales[1] == pytest.approx([13.6, 5.0, 20.0])


def test_pyramid_translation_keeps_voxel_centres(volume):
    # NGFF convention for 2x block reduction: level k centre offset = s0 * (2**k - 1) / 2.
    path, data = volume
    meta = omezarr.read_meta(path)
    for k, lvl in enumerate(meta["levels"]):
        s0 = np.array([6.8, 2.5, 10.0])
        np.testing.assert_allclose(lvl["scale"], s0 * 2**k)
        np.testing.assert_allclose(
            lvl["translation"], np.array([-3.4, 0, 100]) + s0 * (2**k - 1) / 2
        )
    lvl1, _ = omezarr.open_image(path, 1)
    np.testing.assert_allclose(lvl1[1, 2, 3].compute(), data[2:4, 4:6, 6:8].mean(), rtol=1e-6)


def test_labels_block_max_keeps_thin_features(volume):
    path, _ = volume
    for k in range(3):
        lab, _ = omezarr.open_labels(path, level=k)
        assert int(lab.max().compute()) == 1


def test_voxel_wafer_round_trip(volume):
    path, _ = volume
    meta = omezarr.read_meta(path)
    idx = np.array([[1.0, 2.0, 3.0], [20.5, 0.0, 43.0]])
    np.testing.assert_allclose(omezarr.wafer_to_voxel(omezarr.voxel_to_wafer(idx, meta), meta), idx)
    np.testing.assert_allclose(omezarr.voxel_to_wafer(np.zeros(3), meta), [100.0, 0.0, -3.4])


@pytest.mark.parametrize("shape", [(9, 14, 11), (1, 6, 7)])
def test_reduce_blocks_matches_scikit_image(shape):
    """The in-memory pyramid step (used by reconstruct's slabs) against scikit-image's
    ``measure.block_reduce`` (mean for intensities, max for labels) on the trimmed block; an
    axis of length 1 is not reduced (factor 1), as in build_pyramid."""
    from skimage.measure import block_reduce

    rng = np.random.default_rng(3)
    data = rng.random(shape, dtype=np.float32)
    labels = rng.integers(0, 5, shape).astype(np.uint32)
    out_shape = tuple(max(1, s // 2) for s in shape)
    factors = tuple(2 if s >= 2 else 1 for s in shape)
    trim = tuple(slice(0, n * f) for n, f in zip(out_shape, factors, strict=True))
    mean = omezarr.reduce_blocks(data, factors, out_shape)
    assert mean.dtype == np.float32 and mean.shape == out_shape
    np.testing.assert_allclose(mean, block_reduce(data[trim], factors, np.mean), rtol=1e-6)
    np.testing.assert_array_equal(omezarr.reduce_blocks(labels, factors, out_shape, method="max"),
                                  block_reduce(labels[trim], factors, np.max))


def test_slab_level_chunks_keep_slabs_apart():
    """Level k's x chunk is the level-0 one / 2**k (a slab owns whole chunks at every level);
    a chunk width the levels cannot halve is refused."""
    chunks = omezarr.slab_level_chunks((128, 2046, 1040), (64, 128, 128), 3)
    assert chunks == [(64, 128, 128), (64, 256, 64), (32, 511, 32)]
    with pytest.raises(ValueError, match="not divisible"):
        omezarr.slab_level_chunks((10, 10, 10), (4, 4, 6), 3)

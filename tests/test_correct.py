"""Tests of pipeline.correct: the detector model is inverted, outliers are found exactly as a
full median-filter test (scipy.ndimage.median_filter as the reference) would find them, chunking
does not change the result, inputs are not modified, bad inputs are named."""

from __future__ import annotations

from types import SimpleNamespace

import dask.array as da
import numpy as np
import pytest
from scipy import ndimage as ndi

from pipeline.config import CorrectConfig
from pipeline.correct import (
    SIGMA_FLOOR,
    band_level_of_image,
    column_noise_sigma,
    correct_series,
    remove_outliers,
)
from pipeline.errors import InputError

N, R, C = 5, 96, 150


def _band(level: float = 1.0) -> np.ndarray:
    """A smooth band along the columns, uniform along the rows (a section-topograph frame)."""
    c = np.arange(C)
    prof = 0.5 * (np.tanh((c - 40) / 2.0) - np.tanh((c - 100) / 2.0))
    return level * np.broadcast_to(prof, (R, C)).astype(np.float32)


def _series(frames, dark=None, flat=None, monitor=None):
    return SimpleNamespace(
        frames=da.from_array(frames, chunks=(1,) + frames.shape[1:]), dark=dark, flat=flat, monitor=monitor
    )


def test_inverts_dark_flat_monitor():
    """(I - B) / gain * median(m) / m_k recovers the signal when I = B + gain * S * m_k / median(m)."""
    rng = np.random.default_rng(0)
    signal = np.stack([_band(1.0 + 0.1 * k) for k in range(N)])
    dark = rng.uniform(90, 110, (R, C)).astype(np.float32)
    gain = rng.uniform(0.8, 1.2, (R, C)).astype(np.float32)
    flat = dark + 5000 * gain
    monitor = np.array([1.0, 1.1, 0.9, 1.05, 0.95])
    raw = dark + 1000 * gain * signal * (monitor / np.median(monitor))[:, None, None]
    out = correct_series(_series(raw.astype(np.float32), dark, flat, monitor), CorrectConfig(), band_level=1000.0)
    # the flat is normalised by its median response, so the counts keep the median gain
    expected = signal * np.median(gain)
    assert out.dtype == np.float32 and out.shape == raw.shape
    np.testing.assert_allclose(out.compute(), expected, atol=2e-4)


def test_band_level_normalises_to_one():
    """Without an explicit level, the perfect-crystal band comes out ~1 (run-folder contract)."""
    frames = np.stack([_band(1234.0) for _ in range(N)]).astype(np.uint16)
    out = correct_series(_series(frames), CorrectConfig()).compute()
    assert abs(np.median(out[:, :, 60:80]) - 1.0) < 1e-3
    assert band_level_of_image(np.zeros((R, C))) is None


def test_outliers_match_full_median_test():
    """Candidates + exact median give the same pixels and values as scipy's median filter."""
    rng = np.random.default_rng(1)
    img = (_band(1000.0) + rng.normal(0, 5, (R, C))).astype(np.float32)
    rr, cc = rng.integers(1, R - 1, 40), rng.integers(1, C - 1, 40)
    img[rr, cc] += rng.uniform(100, 3000, 40)  # zingers / hot pixels
    sigma = np.maximum(column_noise_sigma(img), SIGMA_FLOOR)
    out, n = remove_outliers(img, sigma=sigma, threshold_sigma=6.0, window=3)
    med = ndi.median_filter(img, size=3, mode="nearest")
    expect = img - med > 6.0 * sigma[None, :]
    np.testing.assert_array_equal(out != img, expect)
    np.testing.assert_array_equal(out[expect], med[expect])
    assert n == expect.sum() and expect[rr, cc].all()
    # window 5 follows the same rule
    out5, _ = remove_outliers(img, sigma=sigma, threshold_sigma=6.0, window=5)
    med5 = ndi.median_filter(img, size=5, mode="nearest")
    np.testing.assert_array_equal(out5 != img, img - med5 > 6.0 * sigma[None, :])


def test_dark_features_and_clean_noise_untouched():
    """Only bright outliers are replaced: a dark 1-px line and plain noise survive."""
    rng = np.random.default_rng(2)
    img = (_band(1000.0) + rng.normal(0, 5, (R, C))).astype(np.float32)
    img[:, 70] -= 400
    sigma = column_noise_sigma(img)
    out, n = remove_outliers(img, sigma=sigma, threshold_sigma=6.0, window=3)
    np.testing.assert_array_equal(out[:, 70], img[:, 70])
    assert n <= 2  # a 6-sigma excursion of Gaussian noise: ~1e-9 per pixel


def test_noise_sigma_is_consistent():
    """1.4826 * MAD is a consistent estimator of a normal sigma (Rousseeuw & Croux 1993)."""
    rng = np.random.default_rng(3)
    img = rng.normal(50.0, 3.0, (1024, 300)).astype(np.float32)
    sig = column_noise_sigma(img)  # 512 row pairs per column: s.d. ~1.17/sqrt(512) = 5 %
    assert abs(sig.mean() / 3.0 - 1) < 0.01 and np.abs(sig / 3.0 - 1).max() < 0.25


def test_dead_flat_pixels_replaced():
    frames = np.stack([_band(1000.0) for _ in range(N)])
    flat = np.full((R, C), 2000.0, np.float32)
    flat[50, 70] = 0.0
    out = correct_series(_series(frames, flat=flat), CorrectConfig(), band_level=1000.0).compute()
    assert np.isfinite(out).all()
    np.testing.assert_allclose(out[:, 50, 70], out[:, 50, 71], rtol=1e-4)


def test_chunking_does_not_change_result():
    rng = np.random.default_rng(4)
    frames = rng.poisson(_band(800.0) + 20, (N, R, C)).astype(np.uint16)
    frames[1, 10, 45] = 60000
    a = correct_series(_series(frames), CorrectConfig(), col_chunk=37).compute()
    b = correct_series(_series(frames), CorrectConfig(), col_chunk=1000).compute()
    np.testing.assert_array_equal(a, b)


def test_lazy_and_inputs_not_modified():
    rng = np.random.default_rng(5)
    frames = rng.poisson(_band(800.0) + 20, (N, R, C)).astype(np.uint16)
    dark = np.full((R, C), 20.0, np.float32)
    keep = frames.copy(), dark.copy()
    reads = []

    def reader(block, block_info=None):
        reads.append(block_info[0]["chunk-location"][0])
        return block

    series = SimpleNamespace(
        frames=da.from_array(frames, chunks=(1, R, C)).map_blocks(reader, dtype=frames.dtype),
        dark=dark, flat=None, monitor=None,
    )
    out = correct_series(series, CorrectConfig(), band_level=800.0)
    assert reads == [] and isinstance(out, da.Array)
    out[2, :, 40:60].compute()
    assert sorted(set(reads)) == [2]
    out.compute()
    np.testing.assert_array_equal(frames, keep[0])
    np.testing.assert_array_equal(dark, keep[1])


@pytest.mark.parametrize(
    "kwargs, cfg, message",
    [
        ({}, CorrectConfig(hot_pixel_window=4), "correct.hot_pixel_window: must be odd"),
        ({"monitor": np.array([1.0, 0.0, 1.0, 1.0, 1.0])}, CorrectConfig(), "value 0.0 at frame 1"),
        ({"monitor": np.ones(3)}, CorrectConfig(), "3 values for 5 frames"),
        ({"dark": np.zeros((R, C + 1), np.float32)}, CorrectConfig(), "frames.dark: image shape"),
        ({"flat": np.zeros((R, C), np.float32)}, CorrectConfig(), "frames.flat: the flat image has no pixel"),
    ],
)
def test_bad_inputs(kwargs, cfg, message):
    frames = np.stack([_band(1000.0) for _ in range(N)])
    with pytest.raises(InputError, match=message):
        correct_series(_series(frames, **kwargs), cfg)

"""Tests of pipeline.register: band edges and the surface-edge model, 1-D shifts, the robust
global solve, drift recovery on synthetic series with known drift (transmission, tilted
detector, reflection), flagging of unusable frames, the G calibration and the CSV table."""

from __future__ import annotations

import json
import math
import re
import sys
from pathlib import Path
from types import SimpleNamespace

import dask.array as da
import numpy as np
import pytest
import scipy.sparse as sp
from scipy import ndimage as ndi
from scipy import stats
from scipy.sparse import linalg as sparse_linalg

from pipeline.compute import set_quiet
from pipeline.config import CorrectConfig, RegisterConfig, load_acquisition
from pipeline.correct import correct_series
from pipeline.errors import InputError
from pipeline.geometry import Geometry
from pipeline.ingest import open_series
from pipeline.register import (
    COLUMNS,
    band_edges,
    fit_surface_edge,
    read_registration_csv,
    register_frames,
    robust_solve,
    shift_1d,
    surface_edge_model,
    write_registration_csv,
)
from synthetic import Scenario, render_series
from synthetic.evaluate import random_scenario

sys.path.insert(0, str(Path(__file__).parent))
import _section_series as ss  # noqa: E402

# --- 1-D kernels ---------------------------------------------------------------------------


@pytest.mark.parametrize("phase", [0.0, 0.23, 0.5, 0.77])
def test_band_edges_of_trapezoid(phase):
    """A box band blurred by the slit (a symmetric kernel) has its half-maximum crossings at the
    surfaces (symmetry), found to sub-pixel precision by linear interpolation."""
    c0, width, blur = 40.0 + phase, 60.0, 5.0
    fine = np.arange(0, 150, 0.01)
    box = ((fine >= c0) & (fine < c0 + width)).astype(float)
    k = np.ones(int(blur / 0.01)) / int(blur / 0.01)
    prof = np.convolve(box, k, mode="same").reshape(150, 100).mean(axis=1)  # pixel integration
    prof = 0.02 + prof
    e = band_edges(prof - 0.0, transmission=True, expected_width_px=width)
    assert abs(e.entrance_col - (c0 - 0.5)) < 0.02  # pixel i covers [i, i+1): centre at i + 0.5
    assert abs(e.exit_col - (c0 + width - 0.5)) < 0.02


def test_surface_edge_model_matches_exponnorm():
    """Without a surface line or pixel ramp, the model is a step times exp(-u/decay) convolved
    with a Gaussian and the slit box: the exponentially modified Gaussian of
    scipy.stats.exponnorm (Grushka 1972) integrated over the box."""
    c0, amp, lam, sig, bg, b = 50.3, 2.0, 6.0, 1.1, 0.05, 3.0
    c = np.arange(30, 90, dtype=float)
    got = surface_edge_model(c, c0, amp, 0.0, 1.0, sig, bg, slit_px=b, decay_px=lam, pixel_px=0.0)
    cdf = stats.exponnorm(lam / sig, loc=c0, scale=sig).cdf
    ref = bg + amp * lam / b * (cdf(c + b / 2) - cdf(c - b / 2))
    np.testing.assert_allclose(got, ref, atol=3e-3 * amp)
    # and a brute-force convolution on a fine grid
    d = 0.005
    u = np.arange(-40, 80, d)
    f = ndi.uniform_filter1d(ndi.gaussian_filter1d(np.where(u >= 0, np.exp(-u / lam), 0.0), sig / d),
                             int(round(b / d)))
    np.testing.assert_allclose(got, bg + amp * np.interp(c - c0, u, f), atol=3e-3 * amp)


@pytest.mark.parametrize("reflection", [False, True])
def test_surface_edge_fit_removes_line_bias(reflection):
    """A bright surface line moves the half-maximum crossing outward; the model fit does not."""
    c0, slit = 40.37, 4.8
    c = np.arange(160, dtype=float)
    prof = surface_edge_model(c, c0, 1.0, 1.2, 0.8, 0.9, 0.01, slit_px=slit,
                              decay_px=6.0 if reflection else None)
    if not reflection:  # the exit surface (mirrored) at column 120
        prof = np.where(c < 80, prof, surface_edge_model(159 - c, 39.0, 1.0, 1.2, 0.8, 0.9, 0.01, slit_px=slit))
    e = band_edges(prof, transmission=not reflection, expected_width_px=80.0)
    assert e.entrance_col < c0 - 0.3  # biased outward by the line
    got, params = fit_surface_edge(prof, e.entrance_col, slit_px=slit, reflection=reflection, half_band_px=20.0)
    assert abs(got - c0) < 0.05 and params["rms"] < 1e-3


def test_shift_1d_recovers_fourier_shift():
    """A profile shifted by +3.25 px (scipy.ndimage.fourier_shift) is found at +3.25 +- 0.01 px
    (1-D analogue of PHYSICS.md check value 31)."""
    rng = np.random.default_rng(0)
    sig = ndi.gaussian_filter1d(rng.normal(size=256), 3.0)
    moved = np.fft.ifft(ndi.fourier_shift(np.fft.fft(sig), 3.25)).real
    d, q = shift_1d(sig, moved, 100)
    assert abs(d - 3.25) < 0.01 and q > 0.95


def test_robust_solve_ignores_a_gross_outlier():
    """Pairwise + absolute equations with one wrong pair (+10 px): the Huber solve stays within
    0.05 px of the truth, plain least squares does not."""
    rng = np.random.default_rng(1)
    n = 30
    x = np.cumsum(rng.normal(0, 0.5, n))
    pairs = [(k, j, x[j] - x[k], 1.0) for k in range(n) for j in (k + 1, k + 2) if j < n]
    pairs[20] = (pairs[20][0], pairs[20][1], pairs[20][2] + 10.0, 1.0)
    absolute = [(k, x[k] + rng.normal(0, 0.02), 1.0) for k in range(n)]
    sol, per_frame, count = robust_solve(n, pairs, absolute)
    assert np.abs(sol - x).max() < 0.05
    assert count.min() >= 3 and per_frame[pairs[20][0]] < 1.0
    # the same system by plain least squares
    A = sp.lil_matrix((len(pairs) + n, n))
    for e, (k, j, _, _) in enumerate(pairs):
        A[e, j], A[e, k] = 1, -1
    for e, (k, _, _) in enumerate(absolute):
        A[len(pairs) + e, k] = 1
    b = np.array([p[2] for p in pairs] + [a[1] for a in absolute])
    plain = sparse_linalg.lsqr(A.tocsr(), b)[0]
    assert np.abs(plain - x).max() > 0.5


# --- whole series (synthetic.render_series, known drift) ---------------------------------------


@pytest.mark.parametrize("case", list(ss.CASES))
def test_drift_recovered(case):
    """Known random-walk drift (0.3 px rms per frame in rows and columns) is recovered to
    <= 0.25 px rms in both (issue 4); the absolute entrance column within 0.5 px."""
    reg = ss.registered(case)
    t, truth = reg.result.table, reg.truth
    r_err = t["r0_px"] - np.asarray(truth["origins"]["r0_px"])
    c_err = t["c0_px"] - np.asarray(truth["origins"]["c0_px"])
    assert ss.rms(r_err - r_err.mean()) <= 0.25
    assert ss.rms(c_err - c_err.mean()) <= 0.25
    assert abs(c_err.mean()) <= 0.5 and abs(r_err.mean()) <= 0.5
    assert reg.result.flagged == [] and not t["flagged"].any()
    assert list(t) == list(COLUMNS)
    if reg.geom.geometry == "transmission":
        assert abs(reg.result.G_measured / reg.geom.G_computed - 1) < 0.01
        assert reg.result.warnings == []
    else:
        assert reg.result.G_measured is None


def test_unusable_frames_flagged_and_interpolated(tmp_path):
    """Frames written as zeros or garbage are flagged (never trusted) and their origins
    interpolated; a dropped frame (no file) leaves a gap in the positions, not a flag."""
    acq_path, truth = ss.render(
        "transmission", tmp_path / "s", n_frames=24, dropped_frames=[20],
        corrupt_frames=[{"frame": 7, "kind": "zeros"}, {"frame": 15, "kind": "garbage"}],
    )
    acq, base = load_acquisition(acq_path)
    series = open_series(acq, base)
    res = register_frames(correct_series(series, CorrectConfig()), Geometry.from_acquisition(acq),
                          series.positions_um, RegisterConfig())
    t = res.table
    assert res.flagged == truth["frames_corrupt"] == [7, 15]
    assert t["interpolated"][[7, 15]].tolist() == [1, 1] and t["quality"][[7, 15]].max() < 0.2
    for k in (7, 15):
        assert t["c0_px"][k] == pytest.approx((t["c0_px"][k - 1] + t["c0_px"][k + 1]) / 2)
    good = t["flagged"] == 0
    c_err = (t["c0_px"] - np.asarray(truth["origins"]["c0_px"]))[good]
    assert ss.rms(c_err - c_err.mean()) <= 0.25
    assert any("2 of 23 frames flagged" in w for w in res.warnings)


def test_g_mismatch_warns():
    """The transmission series registered as a 280 um wafer (it is 300 um): the measured band
    is 7 % wider than the computed one, beyond registration.g_tolerance (3 %)."""
    reg = ss.registered("transmission")
    acq, _ = load_acquisition(reg.folder / "acquisition.yaml")
    thin = acq.model_copy(update={"sample": acq.sample.model_copy(update={"thickness_um": 280.0})})
    res = register_frames(reg.corrected[:12], Geometry.from_acquisition(thin), reg.series.positions_um[:12],
                          RegisterConfig())
    assert res.G_measured / res.G_computed == pytest.approx(300 / 280, rel=0.01)
    # the message reports the measured deviation (+7.1 % true; +6.9 % measured on these 12 frames)
    found = [re.search(r"differs from the computed G = [0-9.]+ by \+(\d+\.\d) %", w) for w in res.warnings]
    pct = [float(m.group(1)) for m in found if m]
    assert len(pct) == 1 and pct[0] == pytest.approx(100 * (res.G_measured / res.G_computed - 1), abs=0.06)
    assert abs(pct[0] - 100 * (300 / 280 - 1)) < 0.5


def _corrected(frames: np.ndarray):
    series = SimpleNamespace(frames=da.from_array(frames, chunks=(1,) + frames.shape[1:]),
                             dark=None, flat=None, monitor=None)
    return correct_series(series, CorrectConfig(), band_level=1.0)


def test_no_band_is_an_input_error():
    geom = ss.registered("transmission").geom
    frames = np.zeros((4, 32, 64), np.uint16)
    with pytest.raises(InputError, match="no section band found"):
        register_frames(_corrected(frames), geom, 5.0 * np.arange(4), RegisterConfig())
    with pytest.raises(InputError, match="3 values for 4 frames"):
        register_frames(_corrected(frames), geom, np.arange(3.0), RegisterConfig())


def test_csv_roundtrip(tmp_path):
    n = 6
    rng = np.random.default_rng(2)
    table = {c: rng.normal(size=n) for c in COLUMNS}
    table.update(frame=np.arange(n), flagged=np.array([0, 1, 0, 0, 0, 0]), interpolated=np.array([0, 1, 0, 0, 0, 0]))
    path = write_registration_csv(tmp_path / "registration.csv", table)
    back = read_registration_csv(path)
    assert path.read_text().splitlines()[0] == ",".join(COLUMNS)
    for c in COLUMNS:
        np.testing.assert_allclose(back[c], table[c], atol=1e-6)
    assert back["flagged"].dtype.kind == "i"


@pytest.mark.parametrize(
    "text, message",
    [
        ("frame,r0_px\n0,1\n", "missing columns"),
        (",".join(COLUMNS) + "\n0,0,1,2,3,4,x,0,0\n", "line 2: not a row of numbers"),
        (",".join(COLUMNS) + "\n1,0,1,2,3,4,1,0,0\n", "column frame must run 0, 1, 2"),
    ],
)
def test_bad_csv(tmp_path, text, message):
    p = tmp_path / "registration.csv"
    p.write_text(text)
    with pytest.raises(InputError, match=message):
        read_registration_csv(p)
    with pytest.raises(InputError, match="registration table not found"):
        read_registration_csv(tmp_path / "missing.csv")


# --- wafer edge and a strong crack (forward model) ----------------------------------------------


def _edge_crack_scenario():
    """The transmission case with the wafer edge crossing the frames obliquely (30 deg from the
    scan axis: rows beyond it are dark, and the dark region's border slides by ~2.8 rows a
    frame) and a strong vertical through crack whose plane is normal to the scan axis (it
    crosses the ribbon in ~14 frames, its image moving ~5 columns a frame)."""
    base = ss.scenario("transmission").model_dump(mode="json")
    # wafer centre 150 mm from the point (80, 140) um, along the edge's inward normal
    nx, ny = -0.5, math.sqrt(3) / 2
    base["wafer"]["center_xy_mm"] = [0.080 - 150.0 * nx, 0.140 - 150.0 * ny]
    base["defects"].append({"type": "crack", "plane": {"normal": [1.0, 0.0, 0.0]}, "start": "through",
                            "c_um": 40.0, "position_um": [60.0, 70.0, 150.0], "strength": 3.0})
    return Scenario.model_validate(base)


@pytest.fixture(scope="module")
def edge_crack(tmp_path_factory):
    set_quiet(True)
    folder = render_series(_edge_crack_scenario(), tmp_path_factory.mktemp("edge") / "series")
    truth = json.loads((folder / "ground_truth.json").read_text())
    acq, base = load_acquisition(folder / "acquisition.yaml")
    series = open_series(acq, base)
    corrected = correct_series(series, CorrectConfig())
    res = register_frames(corrected, Geometry.from_acquisition(acq), series.positions_um, RegisterConfig())
    return SimpleNamespace(frames=np.asarray(corrected.compute()), truth=truth, res=res)


#: Frames of the edge-crack series whose band shows the crack (checked on the images below;
#: frame 16 shows its faint halo).
CRACK_FRAMES = slice(1, 17)


def test_edge_and_crack_frames_kept(edge_crack):
    """No frame is dropped for containing a crack or a stretch of wafer edge; after the frames
    that show the crack (the wafer edge in all of them) the known drift (0.3 px rms per frame)
    is recovered to <= 0.25 px rms in rows and columns (issue 4): the rows beyond the edge are
    masked. (Across the crack frames errors accumulate: see the xfail test below.)"""
    frames, truth, res = edge_crack.frames, edge_crack.truth, edge_crack.res
    # the scene does what the test needs: dark rows in every frame, the crack in several
    band = frames[:, :, 30:70].mean(axis=2)
    assert (band < 0.2).sum(axis=1).min() >= 5
    bright = np.percentile(frames[:, 5:50, 30:75], 99.5, axis=(1, 2)) > 2.5  # surface lines: ~1.6
    assert bright[1:16].all() and not bright[0] and not bright[17:].any()
    t = res.table
    assert res.flagged == [] and not t["flagged"].any()
    rest = np.zeros(len(t["frame"]), bool)
    rest[CRACK_FRAMES.stop :] = True
    r_err = (t["r0_px"] - np.asarray(truth["origins"]["r0_px"]))[rest]
    c_err = (t["c0_px"] - np.asarray(truth["origins"]["c0_px"]))[rest]
    assert ss.rms(r_err - r_err.mean()) <= 0.25
    assert ss.rms(c_err - c_err.mean()) <= 0.25
    assert abs(c_err.mean()) <= 0.5


@pytest.mark.xfail(strict=True, reason="known limitation: a strong crack line across most rows of the "
                   "band is taken for the entrance surface (column origin off by up to 32 px) and biases "
                   "the row shifts (1.9 px accumulated over 16 frames)")
def test_crack_frames_origins(edge_crack):
    """The origins of the frames that show the strong crack within 0.5 px (rows: relative to
    the frames after it)."""
    t, truth = edge_crack.res.table, edge_crack.truth
    c_err = t["c0_px"] - np.asarray(truth["origins"]["c0_px"])
    r_err = t["r0_px"] - np.asarray(truth["origins"]["r0_px"])
    after = slice(CRACK_FRAMES.stop, None)
    assert np.abs(c_err[CRACK_FRAMES] - np.median(c_err[after])).max() <= 0.5
    assert np.abs(r_err[: CRACK_FRAMES.stop] - np.median(r_err[after])).max() <= 0.5


# --- a crack at the entrance surface over most rows (evaluation-style scan) -------------------


def test_entrance_crack_frames_take_their_column_from_the_exit(tmp_path):
    """A {111} surface crack 26 um deep at the entrance surface whose trace runs along the slit
    over 64 % of the rows (the scene of the harness's random scan 5, low photons, with the
    wafer edge moved 0.3 mm away so that every frame sees the exit surface): the crack changes
    the shape of the entrance region in the frames that light it (shape disagreement 100-270
    times the series' median), which biased their entrance-only column origins by up to 0.61 px
    (about 2.5 um in depth). Those frames' entrance equations are down-weighted and the exit
    region's carry them: every frame's column origin within 0.15 px of the truth (the series'
    own offset taken out; 0.07 px measured)."""
    m = random_scenario(5, 400.0).model_dump(mode="json")
    cx, cy = m["wafer"]["center_xy_mm"]
    r = math.hypot(cx, cy)
    m["wafer"]["center_xy_mm"] = [cx * (1 - 0.3 / r), cy * (1 - 0.3 / r)]
    m["defects"] = [d for d in m["defects"] if d["type"] == "crack" and d["start"] == "surface_top"]
    assert len(m["defects"]) == 1
    set_quiet(True)
    folder = render_series(Scenario.model_validate(m), tmp_path / "s")
    truth = json.loads((folder / "ground_truth.json").read_text())
    acq, base = load_acquisition(folder / "acquisition.yaml")
    series = open_series(acq, base)
    res = register_frames(correct_series(series, CorrectConfig()), Geometry.from_acquisition(acq),
                          series.positions_um, RegisterConfig())
    t = res.table
    assert res.flagged == [] and not t["interpolated"].any()
    err = t["c0_px"] - np.asarray(truth["origins"]["c0_px"])
    err = err - np.median(err)
    # the crack does disturb the entrance: the frames that light it match the template worst
    worst = np.argsort(t["quality"])[:5]
    assert np.all((worst >= 88) & (worst <= 99))
    assert np.abs(err).max() <= 0.15

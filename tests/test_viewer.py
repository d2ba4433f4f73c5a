"""The napari plugin on the invented run folder of ``tests/_runfixture.py``.

Needs napari, pytest-qt and an X server: pytest-xvfb starts Xvfb (run without ``-p no:xvfb``).
Kept to a few tests; the logic they drive is tested without a display in test_review.py.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

if sys.platform.startswith("linux") and not (os.environ.get("DISPLAY") or os.environ.get("WAYLAND_DISPLAY")):
    # without any display Qt aborts the whole pytest process; pytest-xvfb sets DISPLAY first
    pytest.skip("no X display: run without -p no:xvfb (pytest-xvfb) or under xvfb-run",
                allow_module_level=True)
napari = pytest.importorskip("napari")
pytest.importorskip("pytestqt")
from _runfixture import ORIGIN_UM, VOXEL_UM, build_run  # noqa: E402

from pipeline import review, runfolder  # noqa: E402
from pipeline.errors import InputError  # noqa: E402

pytestmark = pytest.mark.viewer
UM = "micrometer"


@pytest.fixture(autouse=True)
def _private_settings(tmp_path, monkeypatch):
    """napari reads and writes ~/.config/napari; keep each test's settings in its tmp folder
    (a stored reader preference would change what viewer.open does)."""
    from napari import settings as napari_settings
    from napari.settings._napari_settings import NapariSettings

    home = tmp_path / "home"
    home.mkdir()
    monkeypatch.setenv("HOME", str(home))
    monkeypatch.setenv("XDG_CONFIG_HOME", str(home / ".config"))
    monkeypatch.setattr(
        napari_settings, "_SETTINGS", NapariSettings(config_path=home / "settings.yaml")
    )


@pytest.fixture(scope="module")
def _template(tmp_path_factory):
    return build_run(tmp_path_factory.mktemp("viewer_template") / "run")


@pytest.fixture
def run(_template, tmp_path):
    dst = tmp_path / "run"
    shutil.copytree(_template, dst)
    return dst


def test_reader_layers_scale_and_units(make_napari_viewer, run, tmp_path):
    from viewer_plugins._reader import get_reader

    viewer = make_napari_viewer()
    viewer.open(str(run), plugin="crackstack")
    by_name = {layer.name: layer for layer in viewer.layers}
    kinds = {n: type(layer).__name__ for n, layer in by_name.items()}
    assert kinds == {
        "volume": "Image",
        "defects": "Labels",
        "crack fronts": "Points",
        "dislocation loops": "Points",
        "crack surfaces": "Surface",
        "wafer outline": "Shapes",
    }
    vol, lab = by_name["volume"], by_name["defects"]
    for layer in (vol, lab):
        assert layer.multiscale and len(layer.data) == 3
    assert all(type(level).__module__.startswith("dask") for level in vol.data)  # lazy
    for layer in viewer.layers:  # one grid in um for all; units on all, or napari drops them
        np.testing.assert_allclose(layer.scale, VOXEL_UM)
        np.testing.assert_allclose(layer.translate, ORIGIN_UM)
        assert tuple(str(u) for u in layer.units) == (UM, UM, UM)
    # world extent in um: the volume spans 26 x 64 x 96 voxels of (5, 4, 4) um
    np.testing.assert_allclose(
        vol.extent.world[1] - vol.extent.world[0], np.array([25, 63, 95]) * np.array(VOXEL_UM)
    )
    # crack fronts: the [x, y, z] file points in (z, y, x) world order
    fronts = by_name["crack fronts"]
    doc = runfolder.read_defects(run / runfolder.DEFECTS_JSON)
    expected = np.concatenate([np.asarray(c["front"]["points_um"])[:, ::-1] for c in doc["cracks"]])
    np.testing.assert_allclose([fronts.data_to_world(p) for p in fronts.data], expected, atol=1e-9)
    assert set(fronts.features["defect_id"]) == {1, 2}
    # reader declines what is not a run
    tif = tmp_path / "a.tif"
    tif.write_bytes(b"II*\x00")
    other = tmp_path / "photos"
    other.mkdir()
    assert get_reader(str(tif)) is None and get_reader(str(other)) is None
    assert get_reader(str(run / runfolder.VOLUME)) is not None


def test_table_selection_and_review_round_trip(make_napari_viewer, qtbot, run):
    from qtpy.QtCore import Qt

    import viewer_plugins

    viewer = make_napari_viewer()
    panel = viewer_plugins.open_in_viewer(viewer, run)
    table = panel.defect_table
    assert sorted(table.visible_ids()) == [1, 2, 3]
    # filters
    table.verdict_filter.setCurrentText("grows")
    assert table.visible_ids() == [1]
    table.verdict_filter.setCurrentText("all")
    table.kind_filter.setCurrentText("dislocation_loop")
    assert table.visible_ids() == [3]
    table.kind_filter.setCurrentText("all")
    # sort by depth (column 3), numerically: 35 (crack 2) < 40 (crack 1) < 50 (loop 3)
    table.table.sortItems(3, Qt.SortOrder.AscendingOrder)
    assert table.visible_ids() == [2, 1, 3]

    # selecting a row moves the camera to the crack and highlights its label; the run's
    # thinnest axis (z: 125 um against 252 um in y) is on the slider, y and x on screen
    assert viewer.dims.order == (0, 1, 2)
    assert table.select_id(2)
    np.testing.assert_allclose(viewer.scene.camera.center[1:], (160.0, 282.0))
    assert viewer.dims.point[0] == pytest.approx(85.0, abs=VOXEL_UM[0])
    viewer.dims.ndisplay = 3
    assert table.select_id(1)
    np.testing.assert_allclose(viewer.scene.camera.center, (17.0, 130.0, 103.0))
    viewer.dims.ndisplay = 2
    assert table.select_id(2)
    labels = viewer.layers["defects"]
    assert labels.selected_label == 2 and labels.show_selected_label
    # a click on a finding in the canvas selects its row (the click handler's lookup, at the
    # centre of loop 3; background selects nothing)
    loop = next(r for r in panel.view["rows"] if r["id"] == 3)
    x, y, z = loop["center_um"]
    viewer.dims.set_point(0, z)
    assert panel.pick_at((z, y, x), dims_displayed=(1, 2)) == 3
    assert table.selected_id() == 3 and labels.selected_label == 3
    assert panel.pick_at((z, y, x + 20.0), dims_displayed=(1, 2)) is None  # beside the loop
    assert panel.pick_at((z, y + 900.0, x), dims_displayed=(1, 2)) is None  # off the volume
    assert panel._on_canvas_click in labels.mouse_drag_callbacks
    assert table.select_id(2)
    card = panel.detail.toPlainText()
    for text in (
        "Crack 2",
        "35.0 ± 2.5 µm",
        "100.0 ± 4.0 µm",
        "does_not_grow",
        "2.00",
        "t = 40.0 s",
    ):
        assert text in card

    # a verdict through the buttons reaches defects.json and the log
    panel.controls.note.setText("strain contrast clear in three slices")
    panel.controls.reviewer.setText("qa")
    qtbot.mouseClick(panel.controls.reject_button, Qt.MouseButton.LeftButton)
    doc = runfolder.read_defects(run / runfolder.DEFECTS_JSON)
    rv = {c["id"]: c["review"] for c in doc["cracks"]}
    assert (
        rv[2]["status"] == "rejected" and rv[2]["note"] == "strain contrast clear in three slices"
    )
    assert rv[1]["status"] == "unreviewed"
    assert json.loads((run / runfolder.REVIEW_LOG).read_text().splitlines()[-1])["defect_id"] == 2
    # ... and survives a reload: a fresh panel on a fresh viewer shows it
    viewer2 = make_napari_viewer()
    panel2 = viewer_plugins.open_in_viewer(viewer2, run)
    row = next(r for r in panel2.view["rows"] if r["id"] == 2)
    assert row["review"] == "rejected"
    panel2.defect_table.review_filter.setCurrentText("rejected")
    assert panel2.defect_table.visible_ids() == [2]


def test_missing_or_corrupt_run_gives_a_message(make_napari_viewer, run, tmp_path):
    import viewer_plugins

    viewer = make_napari_viewer()
    with pytest.raises(InputError, match="run folder not found"):
        viewer_plugins.open_in_viewer(viewer, tmp_path / "no_such_run")
    with pytest.raises(InputError, match="run folder not found"):
        viewer_plugins.launch(tmp_path / "no_such_run")  # before any window opens
    (run / runfolder.DEFECTS_JSON).write_text('{"cracks": [')
    with pytest.raises(InputError, match=r"defects\.json.*not valid JSON"):
        viewer_plugins.open_in_viewer(viewer, run)
    # the plain napari path (File > Open with our plugin) raises the same ValueError text
    with pytest.raises(ValueError, match=r"defects\.json.*not valid JSON"):
        viewer.open(str(run), plugin="crackstack")
    assert len(viewer.layers) == 0
    # the panel reports instead of raising when a run breaks under it
    from viewer_plugins._widgets import ReviewPanel

    panel = ReviewPanel(viewer)
    panel.load_run(str(run))
    assert "not valid JSON" in panel.controls.message.text()
    panel.deleteLater()


def test_manifest_is_valid():
    npe2 = pytest.importorskip("npe2")
    pm = npe2.PluginManifest.from_distribution("crackstack")
    assert pm.name == "crackstack"
    assert {r.command for r in pm.contributions.readers} == {"crackstack.get_reader"}
    assert pm.contributions.widgets[0].display_name == "Defect review"
    exe = Path(sys.executable).with_name("npe2")
    cmd = [str(exe)] if exe.exists() else [sys.executable, "-m", "npe2"]
    out = subprocess.run(
        [*cmd, "validate", "crackstack"], capture_output=True, text=True, timeout=120
    )
    assert out.returncode == 0, out.stdout + out.stderr
    assert "valid" in out.stdout.lower()


def test_3d_render_screenshot(make_napari_viewer, run, tmp_path):
    from skimage.io import imsave

    import viewer_plugins

    viewer = make_napari_viewer(show=True)  # show=False renders black screenshots
    viewer_plugins.open_in_viewer(viewer, run, panel=False)
    viewer.dims.ndisplay = 3
    viewer.scene.camera.angles = (-20.0, 25.0, 115.0)
    viewer.fit_to_view()
    shot = viewer.screenshot(canvas_only=True, flash=False)
    out = tmp_path / "run_3d.png"
    imsave(out, shot)
    copy_to = os.environ.get("CRACKSTACK_VIEWER_SHOT")
    if copy_to:
        shutil.copy(out, copy_to)
    rgb = shot[..., :3].astype(float)
    assert out.stat().st_size > 1000 and rgb.std() > 0
    # the crack labels' colours show up (crack 1 orange-red (255, 60, 0), crack 2 yellow)
    reddish = (rgb[..., 0] > 150) & (rgb[..., 1] < 120) & (rgb[..., 2] < 80)
    yellowish = (rgb[..., 0] > 150) & (rgb[..., 1] > 130) & (rgb[..., 2] < 80)
    assert reddish.sum() > 50 and yellowish.sum() > 50


def test_bench_open_seconds(run):
    import viewer_plugins

    seconds = viewer_plugins.bench_open_seconds(run)
    assert isinstance(seconds, float) and seconds > 0


def test_sample_data_guard(monkeypatch, tmp_path):
    from viewer_plugins import _sample

    monkeypatch.setitem(sys.modules, "synthetic", None)  # import synthetic -> ImportError
    with pytest.raises(InputError, match="synthetic"):
        _sample.make_demo_run(tmp_path)


@pytest.mark.slow
@pytest.mark.skipif(not os.environ.get("CRACKSTACK_RUN_DEMO"),
                    reason="renders and runs the whole demo (minutes on 2 cores); set CRACKSTACK_RUN_DEMO=1")
def test_sample_data_demo_run_in_3d(make_napari_viewer, tmp_path):
    """napari's sample-data entry: render the demo scenario, run the pipeline, show it in 3D."""
    synthetic = pytest.importorskip("synthetic")
    if not hasattr(synthetic, "render_series"):
        pytest.skip("synthetic.render_series not available yet")
    pytest.importorskip("pipeline.run")
    from skimage.io import imsave

    from viewer_plugins import _sample

    layers = _sample.make_demo_run(tmp_path)
    assert [kw["name"] for _, kw, _ in layers][:2] == ["volume", "defects"]
    view = review.load_run_for_view(tmp_path / "run")
    assert view["defects"] is not None and len(view["defects"]["cracks"]) >= 1
    viewer = make_napari_viewer(show=True)
    for data, kwargs, layer_type in layers:
        getattr(viewer, f"add_{layer_type}")(data, **kwargs)
    viewer.dims.ndisplay = 3
    viewer.scene.camera.angles = (-20.0, 25.0, 115.0)
    viewer.fit_to_view()
    shot = viewer.screenshot(canvas_only=True, flash=False)
    imsave(tmp_path / "demo_3d.png", shot)
    copy_to = os.environ.get("CRACKSTACK_VIEWER_DEMO_SHOT")
    if copy_to:
        shutil.copy(tmp_path / "demo_3d.png", copy_to)
    assert shot[..., :3].std() > 0

"""napari plugin of crackstack: open a run folder, review its findings, write verdicts back.

Everything napari/Qt is imported inside functions, so ``import viewer_plugins`` works on a
cluster node without a display; the science and the run-folder writing live in ``pipeline``.
"""

from __future__ import annotations

import logging
import os
import subprocess
import sys
import time
from contextlib import contextmanager
from pathlib import Path
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    import napari

log = logging.getLogger(__name__)

PLUGIN = "crackstack"
PANEL = "Defect review"  # the widget's display_name in napari.yaml


def open_in_viewer(viewer: napari.Viewer, run_path: str | Path, *, panel: bool = True) -> Any:
    """Open a run in an existing viewer with our reader and dock the review panel.

    Returns
    -------
    ReviewPanel or None
        The docked panel (None when ``panel`` is False).

    Raises
    ------
    pipeline.errors.InputError
        Missing or corrupt run folder (checked before any layer is added).
    """
    from pipeline.review import load_run_for_view

    load_run_for_view(run_path)  # a clear message instead of napari's reader-error wrapping
    layers = viewer.open(str(run_path), plugin=PLUGIN)
    _slide_thinnest_axis(viewer, layers[0])
    by_name = {layer.name: layer for layer in layers}
    # the labels' controls (show selected label, contour) are the ones a reviewer needs
    viewer.layers.selection.active = by_name.get("defects", layers[0])
    if not panel:
        return None
    _, widget = viewer.window.add_plugin_dock_widget(PLUGIN, PANEL)
    return widget


def _slide_thinnest_axis(viewer: napari.Viewer, volume_layer: Any) -> None:
    """Put the volume's thinnest axis on the slider, so the 2D view shows its largest section
    (a plan view z for a wide scan, the x-z section for a narrow strip in y)."""
    lo, hi = volume_layer.extent.world
    thin = int(min(range(3), key=lambda d: hi[d] - lo[d]))
    viewer.dims.order = (thin, *(d for d in range(3) if d != thin))
    viewer.reset_view()


def launch(run_path: str | Path) -> None:
    """Start napari with a run open and the review panel docked (``crackstack view <run>``).

    Raises
    ------
    pipeline.errors.InputError
        Before any window opens, for a missing or corrupt run folder.
    """
    from pipeline.review import load_run_for_view

    view = load_run_for_view(run_path)
    try:
        import napari
    except ImportError as exc:  # `import viewer_plugins` itself needs no napari
        from pipeline.errors import InputError

        raise InputError(f"the viewer needs napari and a Qt binding: pip install 'crackstack[viewer]' ({exc})") from None

    viewer = napari.Viewer(title=f"crackstack — {view['root'].name}")
    open_in_viewer(viewer, run_path)
    napari.run()


@contextmanager
def _display_env():
    """Environment with an X display for a child process: the user's, or a private Xvfb that
    lives exactly as long as the ``with`` block (headless bench)."""
    env = dict(os.environ)
    if sys.platform != "linux" or env.get("DISPLAY") or env.get("WAYLAND_DISPLAY"):
        yield env
        return
    try:
        from pyvirtualdisplay import Display
    except ImportError:
        from pipeline.errors import InputError

        raise InputError("no DISPLAY: run the viewer bench under xvfb-run, or install Xvfb and "
                         "pyvirtualdisplay (apt install xvfb; pip install 'crackstack[test]')") from None
    display = Display(visible=False, size=(1280, 1024), color_depth=24, manage_global_env=False)
    display.start()
    try:
        env["DISPLAY"] = display.new_display_var
        yield env
    finally:
        display.stop()


def bench_open_seconds(run_path: str | Path, *, ndisplay: int = 2, timeout_s: float = 300.0) -> float:
    """Seconds from opening a run to its first rendered view.

    Counts our reader (metadata, defects, crack meshes), napari's layer creation (including the
    lazy read of the data on screen) and one draw of the canvas (forced by a canvas screenshot).
    Starting Python, importing napari, Qt and the plugin's modules, and opening the empty viewer
    window are not counted: they are paid once per session, not per run. Runs in a child process (a fresh viewer, no state of the caller's Qt)
    with the user's display or, when there is none, a private Xvfb.

    Parameters
    ----------
    run_path
        Run folder or its ``volume.ome.zarr``.
    ndisplay
        2 (napari's default first view: one depth slice) or 3 (volume rendering of the coarsest
        level).
    timeout_s
        Give up (RuntimeError) after this many seconds.
    """
    if ndisplay not in (2, 3):
        from pipeline.errors import InputError

        raise InputError(f"ndisplay={ndisplay!r} not accepted; use 2 or 3")
    from pipeline.review import resolve_run_root

    resolve_run_root(run_path)  # a missing folder is the caller's error, not a bench failure
    code = ("import sys, viewer_plugins; "
            "print('first_view_s', viewer_plugins._first_view_seconds(sys.argv[1], int(sys.argv[2])))")
    with _display_env() as env:
        proc = subprocess.run([sys.executable, "-c", code, str(run_path), str(ndisplay)], env=env,
                              capture_output=True, text=True, timeout=timeout_s)
    for line in proc.stdout.splitlines():
        if line.startswith("first_view_s "):
            seconds = float(line.split()[1])
            log.info("first view of %s in %.2f s (%dD)", run_path, seconds, ndisplay)
            return seconds
    raise RuntimeError(f"viewer bench failed (exit {proc.returncode}): {proc.stderr.strip()[-800:]}")


def _first_view_seconds(run_path: str, ndisplay: int) -> float:
    """In-process part of :func:`bench_open_seconds` (needs a display)."""
    import napari
    from qtpy.QtWidgets import QApplication

    import viewer_plugins._reader  # noqa: F401  (module imports are paid once per session)

    viewer = napari.Viewer(show=True)
    QApplication.processEvents()  # let the empty window appear before the clock starts
    t0 = time.perf_counter()
    viewer.open(run_path, plugin=PLUGIN)
    if ndisplay == 3:
        viewer.dims.ndisplay = 3
    viewer.screenshot(canvas_only=True, flash=False)
    elapsed = time.perf_counter() - t0
    viewer.close()
    return elapsed

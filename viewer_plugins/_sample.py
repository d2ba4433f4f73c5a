"""Sample data: the demo scenario, rendered by ``synthetic`` and run through the pipeline."""

from __future__ import annotations

import logging
import tempfile
from pathlib import Path

from pipeline.errors import InputError
from viewer_plugins._reader import LayerData, read_run

log = logging.getLogger(__name__)


def make_demo_run(out_dir: str | Path | None = None) -> list[LayerData]:
    """Render the demo scenario's section topographs, run the pipeline with the demo recipe on
    them and return the run's layers (the same steps as ``crackstack demo``).

    Parameters
    ----------
    out_dir
        Where the frames (``data/``) and the run folder (``run/``) go; a new temporary folder
        when None (napari's sample menu). Frames already there are reused.

    Raises
    ------
    InputError
        If the ``synthetic`` package or ``pipeline.run`` is not installed / not complete.
    """
    try:
        import synthetic
        from pipeline.demo import demo_recipe_path
        from pipeline.run import run_pipeline
    except ImportError as exc:
        raise InputError(
            f"demo run needs the `synthetic` package and pipeline.run ({exc}); "
            "reinstall crackstack (pip install -e .) or open an existing run folder instead"
        ) from None
    for name in ("render_series", "load_scenario", "demo_scenario_path"):
        if not hasattr(synthetic, name):
            raise InputError(f"demo run: synthetic.{name} is missing; this crackstack install is incomplete")
    base = Path(out_dir) if out_dir is not None else Path(tempfile.mkdtemp(prefix="crackstack-demo-"))
    data = base / "data"
    if not (data / "acquisition.yaml").is_file():
        log.info("rendering the demo scenario into %s", data)
        synthetic.render_series(synthetic.load_scenario(synthetic.demo_scenario_path()), data)
    if not (data / "acquisition.yaml").is_file():
        raise InputError(f"demo run: synthetic.render_series wrote no acquisition.yaml in {data}")
    run_dir = base / "run"
    try:
        recipe = demo_recipe_path()
    except FileNotFoundError:
        log.warning("demo recipe missing: the demo run is not assessed")
        recipe = None
    log.info("running the pipeline on %s -> %s", data, run_dir)
    run_pipeline(data / "acquisition.yaml", run_dir, recipe=recipe)
    return read_run(str(run_dir))

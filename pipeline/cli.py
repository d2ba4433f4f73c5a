"""The `crackstack` command line.

Exit codes (SPEC section 9): 0 success, 2 bad input or configuration (one or two lines naming
file, frame or key, no traceback), 1 internal error, 130 interrupted.
"""

from __future__ import annotations

import functools
import logging
import sys
import time
from pathlib import Path
from typing import Annotated

import typer

from pipeline.errors import EXIT_BAD_INPUT, EXIT_INTERNAL, EXIT_INTERRUPTED, InputError

app = typer.Typer(
    name="crackstack",
    help="Section-topograph series -> 3D volume -> measured cracks -> thermal-process break risk.",
    add_completion=False,
    pretty_exceptions_enable=False,
    no_args_is_help=True,
)
log = logging.getLogger("pipeline")
_VERBOSE = {"level": 0}


def _err(msg: str) -> None:
    typer.echo(msg, err=True)


def handled(fn):
    """Map InputError -> exit 2, KeyboardInterrupt -> 130, anything else -> exit 1."""

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        try:
            return fn(*args, **kwargs)
        except typer.Exit:
            raise
        except InputError as exc:
            _err(f"error: {exc}")
            raise typer.Exit(EXIT_BAD_INPUT) from None
        except KeyboardInterrupt:
            _err("interrupted; run the same command again to continue")
            raise typer.Exit(EXIT_INTERRUPTED) from None
        except Exception as exc:  # an internal error: say so, keep the detail in the log
            log.debug("internal error", exc_info=True)
            _err(f"internal error: {type(exc).__name__}: {exc} (rerun with -v for details)")
            if _VERBOSE["level"] > 0:
                import traceback

                traceback.print_exc()
            raise typer.Exit(EXIT_INTERNAL) from None

    return wrapper


@app.callback()
def _main(
    verbose: Annotated[int, typer.Option("-v", "--verbose", count=True, help="-v info, -vv debug")] = 0,
    quiet: Annotated[bool, typer.Option("-q", "--quiet", help="no progress output")] = False,
) -> None:
    from pipeline import compute

    _VERBOSE["level"] = verbose
    level = logging.WARNING - 10 * min(verbose, 2) if verbose else logging.WARNING
    if sys.stderr.isatty():
        from rich.logging import RichHandler

        handler: logging.Handler = RichHandler(show_path=False, rich_tracebacks=False)
    else:
        handler = logging.StreamHandler()
        handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s"))
    root = logging.getLogger("pipeline")
    root.handlers[:] = [handler]
    root.setLevel(min(level, logging.INFO) if not quiet else logging.WARNING)
    handler.setLevel(level if verbose else (logging.WARNING if quiet else logging.INFO))
    compute.set_quiet(quiet)


@app.command()
@handled
def check(acquisition: Annotated[Path, typer.Argument(help="acquisition.yaml")]) -> None:
    """Validate an acquisition without processing and print a short summary."""
    from pipeline.ingest import describe_acquisition

    # check prints the warnings itself, once, after the summary; keep ingest's log quiet here.
    ingest_log = logging.getLogger("pipeline.ingest")
    old_level = ingest_log.level
    ingest_log.setLevel(logging.ERROR)
    try:
        info = describe_acquisition(acquisition)
    finally:
        ingest_log.setLevel(old_level)
    width = max(len(k) for k in info)
    for key, value in info.items():
        if key == "warnings":
            continue
        if isinstance(value, float):
            value = f"{value:.4f}"
        elif isinstance(value, (list, tuple)):
            value = ", ".join(f"{v:.3f}" if isinstance(v, float) else str(v) for v in value)
        typer.echo(f"{key:<{width}}  {value}")
    for w in info.get("warnings", []):
        _err(f"warning: {w}")


@app.command()
@handled
def run(
    acquisition: Annotated[Path, typer.Argument(help="acquisition.yaml")],
    out: Annotated[Path, typer.Option("--out", "-o", help="run folder to write (or continue)")],
    config: Annotated[Path | None, typer.Option("--config", "-c", help="run configuration YAML")] = None,
    recipe: Annotated[Path | None, typer.Option("--recipe", help="thermal recipe YAML for assess")] = None,
) -> None:
    """Run the whole pipeline into a run folder; the same command again continues it."""
    from pipeline.run import run_pipeline

    t0 = time.perf_counter()
    record = run_pipeline(acquisition, out, config, recipe=recipe)
    _print_run_summary(out, record, time.perf_counter() - t0)


def _print_run_summary(out: Path, record: dict, elapsed_s: float) -> None:
    stages = record.get("stages", {})
    typer.echo(f"run folder: {out}  ({elapsed_s:.1f} s)")
    for name, st in stages.items():
        typer.echo(f"  {name:<12} {st.get('status')}  {st.get('last_elapsed_s', 0):.1f} s")


@app.command()
@handled
def synth(
    scenario: Annotated[Path, typer.Argument(help="scenario YAML")],
    out: Annotated[Path, typer.Argument(help="folder for frames, acquisition.yaml, ground_truth.json")],
) -> None:
    """Make a synthetic section-topograph series with known ground truth."""
    import synthetic

    typer.echo(synthetic.cli_synth(scenario, out))


@app.command()
@handled
def demo(
    out: Annotated[Path, typer.Argument(help="folder for the demo data and run")] = Path("crackstack-demo"),
) -> None:
    """Make the demo scenario, run the whole pipeline with the demo recipe, print the results."""
    from pipeline.demo import run_demo

    typer.echo(run_demo(out))


@app.command()
@handled
def assess(
    defects: Annotated[Path, typer.Argument(help="defects.json (ours or from another tool)")],
    out: Annotated[Path, typer.Option("--out", "-o", help="assessment.json to write")],
    recipe: Annotated[Path | None, typer.Option("--recipe", help="thermal recipe YAML")] = None,
    temperature_csv: Annotated[Path | None, typer.Option("--temperature-csv", help="time_s,r_mm,T_C")] = None,
    stress_csv: Annotated[
        Path | None, typer.Option("--stress-csv", help="time_s,r_mm,sigma_r_MPa,sigma_theta_MPa")
    ] = None,
) -> None:
    """Assess whether each crack grows during a thermal process (SPEC section 8)."""
    from pipeline import runfolder
    from pipeline.assess import CAUTIONS, assess_defects, format_rows, write_assessment

    given = [p for p in (recipe, temperature_csv, stress_csv) if p is not None]
    if len(given) != 1:
        raise InputError("give exactly one of --recipe, --temperature-csv or --stress-csv")
    doc = assess_defects(
        runfolder.read_defects(defects),
        recipe_path=recipe, temperature_csv=temperature_csv, stress_csv=stress_csv,
    )
    write_assessment(out, doc)
    typer.echo(format_table(format_rows(doc)))
    typer.echo(f"wafer verdict: {doc.get('wafer_verdict')}")
    typer.echo(f"written: {out}")
    typer.echo("")
    typer.echo(f"CAUTION: {CAUTIONS}")


def format_table(rows: list[dict]) -> str:
    """Plain fixed-width table of dict rows (same keys), for terminals and logs."""
    if not rows:
        return "(no cracks)"
    keys = list(rows[0])
    cells = [[_fmt(r.get(k)) for k in keys] for r in rows]
    widths = [max(len(k), *(len(c[i]) for c in cells)) for i, k in enumerate(keys)]
    lines = ["  ".join(k.ljust(w) for k, w in zip(keys, widths, strict=True))]
    lines.append("  ".join("-" * w for w in widths))
    lines += ["  ".join(c.ljust(w) for c, w in zip(row, widths, strict=True)) for row in cells]
    return "\n".join(lines)


def _fmt(v) -> str:
    if v is None:
        return "-"
    if isinstance(v, float):
        if abs(v) >= 1e4:
            return f"{v:.0f}"
        # values already rounded to one decimal (the demo table) print as they are: 123.4 must
        # not become "123"; others with three significant digits
        return f"{v:.1f}" if v == round(v, 1) else f"{v:.3g}"
    if isinstance(v, (list, tuple)):
        return "(" + " ".join(str(x) for x in v) + ")"
    return str(v)


@app.command()
@handled
def view(run_folder: Annotated[Path, typer.Argument(help="run folder (or its volume.ome.zarr)")]) -> None:
    """Open a run folder in napari for review."""
    try:
        import viewer_plugins
    except ImportError as exc:  # pragma: no cover - depends on the install
        raise InputError(f"the viewer needs the 'viewer' extra: pip install 'crackstack[viewer]' ({exc})") from None
    viewer_plugins.launch(run_folder)


@app.command()
@handled
def report(run_folder: Annotated[Path, typer.Argument(help="run folder")]) -> None:
    """Remake report.html from a run folder."""
    from pipeline.report import write_report

    typer.echo(f"written: {write_report(run_folder)}")


@app.command()
@handled
def bench(
    quick: Annotated[bool, typer.Option("--quick", help="small sizes, under a minute")] = False,
    json_file: Annotated[Path | None, typer.Option("--json", help="write the figures as JSON")] = None,
) -> None:
    """Measure speed and memory figures against their targets, in one run."""
    from pipeline.bench import main as bench_main

    raise typer.Exit(bench_main(quick=quick, json_path=json_file))


def main() -> None:
    """Console-script entry point."""
    app()


if __name__ == "__main__":
    main()

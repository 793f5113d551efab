"""The ``sweep`` command: compare many candidate designs of one trial, here or on a cluster."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from geoexp._paths import check_outputs, writing
from geoexp.cli._app import app, console
from geoexp.cli._inputs import readable_text


@app.command("sweep")
def sweep_command(
    sweep_spec: Annotated[
        Path, typer.Argument(help="Sweep spec (TOML): a base design, a [grid], [effects].")
    ],
    out: Annotated[
        Path, typer.Option("--out", "-o", help="Comparison table to write (CSV).")
    ] = Path("sweep.csv"),
    figure: Annotated[
        Path | None,
        typer.Option(help="Figure of power against the number treated (PNG, SVG or PDF)."),
    ] = None,
    workers: Annotated[
        int | None,
        typer.Option(
            help="Run on a local Dask cluster of this many worker processes (needs the extra "
            "'cluster').",
            min=1,
            max=256,
        ),
    ] = None,
    scheduler: Annotated[
        str | None,
        typer.Option(
            help="Run on the Dask cluster whose scheduler is at this address, e.g. tcp://host:8786."
        ),
    ] = None,
    progress: Annotated[bool, typer.Option(help="Show a progress bar.")] = True,
) -> None:
    """Evaluate every candidate design of a sweep and rank them in one table.

    For each combination of the grid (number treated, gap, bands, method):
    expected units per condition, positivity, power by simulation for the
    stated effects, minimum detectable effect and bias. Each candidate has its
    own seed, so its row is the same in any order and on any machine.
    """
    from geoexp.errors import InputError
    from geoexp.sweep import SweepSpec, run_sweep

    if workers is not None and scheduler is not None:
        raise InputError("give --workers (a local cluster) or --scheduler, not both")
    readable_text(sweep_spec, "the sweep spec")
    spec = SweepSpec.from_toml(sweep_spec)
    inputs = {
        "the sweep spec": sweep_spec,
        "the base design's units layer": spec.base.resolve(spec.base.units.path),
    }
    check_outputs({"--out": out, "--figure": figure}, inputs)
    result = run_sweep(spec, workers=workers, scheduler=scheduler, progress=progress)
    console.print(str(result), markup=False)
    with writing(out, "comparison table"):
        result.to_csv(out)
    console.print(f"Table written: {out} ({len(result.table)} candidates)")
    if figure is not None:
        import matplotlib

        matplotlib.use("Agg")
        with writing(figure, "figure"):
            ax = result.plot()
            ax.figure.savefig(figure, dpi=150, bbox_inches="tight")
        console.print(f"Figure written: {figure}")

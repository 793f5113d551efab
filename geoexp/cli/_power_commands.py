"""The ``power`` command: power of a design's tests by simulation, and design comparison."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Literal, TypedDict

import typer

from geoexp._paths import check_outputs
from geoexp._tables import text_table
from geoexp.cli._app import (
    OldDrawsOpt,
    QuietOpt,
    SpecArg,
    TestDrawsOpt,
    app,
    console,
    renamed_option,
)
from geoexp.cli._figures import POWER_NAME, save_power_picture
from geoexp.cli._inputs import load_spec, spec_inputs
from geoexp.cli._options import MAX_DRAWS, OutcomeChoice, non_negative, open_share
from geoexp.cli._progress_bars import progress_shown
from geoexp.errors import InputError
from geoexp.power import TARGET_POWER


def _effects(items: list[str] | None, what: str) -> dict[str, float]:
    out: dict[str, float] = {}
    for item in items or []:
        name, sep, value = item.partition("=")
        try:
            number = float(value)
        except ValueError:
            number = None
        if number is not None and not (number >= 0 and number < float("inf")):
            number = None
        if not sep or not name.strip() or number is None:
            raise typer.BadParameter(
                f"{what} must be CONDITION=NUMBER (a finite number >= 0), e.g. treated=0.8; got {item!r}"
            )
        out[name.strip()] = number
    return out


class _Simulation(TypedDict):
    """The simulation settings shared by the power run, its curve and the design comparison."""

    n_sims: int
    n_draws: int
    alpha: float
    outcome: Literal["change", "post"]
    rng: int | None


def _require_baseline(column: str | None, design, spec: Path) -> str:
    """Return --baseline-column, refusing a missing one and naming the layer's numeric columns."""
    frame = design.units.frame
    numeric = [str(c) for c in frame.columns if c != "geometry" and frame[c].dtype.kind in "iuf"]
    listed = ", ".join(numeric) if numeric else "none"
    if column is None:
        raise InputError(
            "power needs --baseline-column: the column of the units layer (named in "
            f"'{spec}') that holds past counts per unit, e.g. last year's incidents; its "
            f"numeric columns are: {listed}"
        )
    if column not in frame.columns:
        raise InputError(
            f"--baseline-column {column!r} is not a column of the units layer named in '{spec}'; "
            f"its numeric columns are: {listed}"
        )
    return column


@app.command("power")
def power_command(
    spec: SpecArg,
    rate_ratio: Annotated[
        list[str] | None,
        typer.Option(
            "--rate-ratio",
            help="CONDITION=RATIO multiplier on expected counts, e.g. treated=0.8 (repeat).",
        ),
    ] = None,
    baseline_column: Annotated[
        str | None,
        typer.Option(
            help="Column of the units layer with past counts per unit, e.g. last year's "
            "incidents (smoothed to (count + mean) / 2). Required."
        ),
    ] = None,
    dispersion: Annotated[
        float,
        typer.Option(
            help="Negative binomial dispersion alpha (Var = mu + alpha mu^2), >= 0.",
            callback=non_negative,
        ),
    ] = 0.5,
    simulated_trials: Annotated[
        int, typer.Option(help="Simulated trials to estimate power from.", min=1, max=MAX_DRAWS)
    ] = 200,
    test_draws: TestDrawsOpt = 500,
    alpha: Annotated[
        float,
        typer.Option(help="Significance level of the tests, between 0 and 1.", callback=open_share),
    ] = 0.05,
    outcome: Annotated[
        OutcomeChoice, typer.Option(help="'change' (post minus pre) or 'post'.")
    ] = OutcomeChoice.change,
    seed: Annotated[
        int | None,
        typer.Option(help="Seed of the simulation (default: from the spec's seed).", min=0),
    ] = None,
    alternative_spec: Annotated[
        list[Path] | None,
        typer.Option("--alternative-spec", help="Another design spec to compare (repeat)."),
    ] = None,
    sims: Annotated[
        int | None,
        typer.Option("--sims", hidden=True, min=1, max=MAX_DRAWS, show_default=False),
    ] = None,
    draws: OldDrawsOpt = None,
    quiet: QuietOpt = False,
    curve: Annotated[
        bool,
        typer.Option(
            "--curve",
            help="Also simulate power over effect sizes and numbers treated; print the "
            "smallest detectable rate ratio and the number treated needed for --target-power.",
        ),
    ] = False,
    curve_ratio: Annotated[
        list[float] | None,
        typer.Option(
            "--curve-ratio",
            help="Rate ratio on treated units for the curve (repeat; default 0.6 0.7 0.8 0.9).",
            min=0.01,
            max=10.0,
        ),
    ] = None,
    curve_treated: Annotated[
        list[int] | None,
        typer.Option(
            "--curve-treated",
            help="Number treated for the curve (repeat; default: half, the design's own, "
            "one and a half times it).",
            min=1,
        ),
    ] = None,
    target_power: Annotated[
        float,
        typer.Option(
            help="Power wanted, between 0 and 1; lower power is flagged as underpowered.",
            callback=open_share,
        ),
    ] = TARGET_POWER,
    figures: Annotated[
        Path | None,
        typer.Option(help="Folder for the power curve figure (power_curve.png; needs --curve)."),
    ] = None,
) -> None:
    """Power of a design's tests by simulation, for counts with planted rate ratios.

    Prints, for treated units and each spillover band, the share of simulated
    trials whose randomization test rejects, its Monte Carlo error and the
    mean estimate. With --alternative-spec, the designs' power side by side.
    """
    from geoexp.design import Design
    from geoexp.power import NegativeBinomialOutcome, compare_designs, simulate_power

    ratios = _effects(rate_ratio, "--rate-ratio")
    sims = renamed_option(simulated_trials, sims, "--sims", "--simulated-trials")
    draws = renamed_option(test_draws, draws, "--draws", "--test-draws")
    design = Design.from_spec(load_spec(spec))
    model = NegativeBinomialOutcome(
        baseline=_require_baseline(baseline_column, design, spec),
        dispersion=dispersion,
        rate_ratios=ratios,
    )
    common: _Simulation = {
        "n_sims": sims,
        "n_draws": draws,
        "alpha": alpha,
        "outcome": outcome.value,
        "rng": seed,
    }
    if figures is not None and not curve:
        raise typer.BadParameter("--figures needs --curve (the figure is the power curve)")
    if figures is not None:
        check_outputs({"--figures": figures / POWER_NAME}, spec_inputs(spec, load_spec(spec)))
    with progress_shown(quiet):
        result = simulate_power(design, model, **common)
    console.print(str(result), markup=False)
    _warn_underpowered(result, target_power)
    if curve:
        _print_curve(design, model, common, curve_ratio, curve_treated, target_power, figures)
    if alternative_spec:
        designs = {spec.stem: design}
        for path in alternative_spec:
            name = path.stem if path.stem not in designs else str(path)
            designs[name] = Design.from_spec(load_spec(path))
        with progress_shown(quiet):
            table = compare_designs(designs, model, **common)
        console.print("")
        console.print("Designs compared (power, Monte Carlo error, units per contrast):")
        shown = table.loc[:, (slice(None), ["power", "mc_error", "n_units"])]
        shown = shown.rename(index=lambda c: str(c).replace("spillover_", "spillover band "))
        console.print(text_table(shown), markup=False)


def _warn_underpowered(result, target: float) -> None:
    from geoexp.power import underpowered

    for c in result.contrasts:
        if c.planted_effect != 0 and underpowered(c.power, target):
            console.print(
                f"Warning: underpowered: {c.label} has power {c.power:.2f} (share of simulated "
                f"trials that reject), below {target:g}. Treat more units, lengthen the outcome "
                "period, or expect to miss an effect of this size.",
                markup=False,
            )


def _print_curve(design, model, common: _Simulation, ratios, treated, target, figures) -> None:
    from geoexp.power import power_curve

    planted = dict(model.rate_ratios).get("treated")
    grid = list(ratios or (0.6, 0.7, 0.8, 0.9))
    if planted is not None and planted != 1:
        grid.append(planted)  # the design's own point: the run printed above
    result = power_curve(
        design,
        model,
        rate_ratios=grid,
        n_treated=treated or None,
        n_sims=common["n_sims"],
        n_draws=common["n_draws"],
        alpha=common["alpha"],
        outcome=common["outcome"],
        seed=common["rng"],
    )
    console.print("")
    console.print(str(result), markup=False)
    mde = result.detectable_ratio(target)
    own = f"with {result.n_treated} treated units"
    if mde is None:
        console.print(
            f"Minimum detectable effect {own}: no rate ratio on the grid reaches power "
            f"{target:g} (try smaller ratios with --curve-ratio).",
            markup=False,
        )
    else:
        console.print(
            f"Minimum detectable effect {own}: rate ratio {mde:.3f} ({100 * (1 - mde):.1f}% "
            f"fewer incidents on treated units) at power {target:g} (interpolated on the grid).",
            markup=False,
        )
    if planted is not None and planted != 1:
        need = result.required_treated(planted, target)
        if need is None:
            most = int(result.table["n_treated"].max())
            console.print(
                f"Required number treated for rate ratio {planted:g}: more than {most} (no "
                f"number on the grid reaches power {target:g}; try --curve-treated).",
                markup=False,
            )
        else:
            console.print(
                f"Required number treated for rate ratio {planted:g}: about {need:.0f} units "
                f"for power {target:g} (interpolated on the grid).",
                markup=False,
            )
    if figures is not None:
        save_power_picture(result, figures)

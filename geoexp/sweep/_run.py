"""Run a sweep: evaluate every candidate, here or on a cluster, and rank them in one table."""

from __future__ import annotations

import time
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from geoexp._atomic import atomic_path
from geoexp.cautions import CAUTION
from geoexp.sweep._candidates import Candidate
from geoexp.sweep._cluster import Backend, make_backend
from geoexp.sweep._evaluate import (
    SweepLayer,
    chunk_sizes,
    evaluate_candidate,
    evaluate_part,
    power_columns,
)
from geoexp.sweep._spec import RankBy, SweepSpec

if TYPE_CHECKING:
    from rich.progress import Progress

_GRID_COLUMNS = ("treated", "gap_m", "bands_m", "method")


@dataclass(frozen=True, eq=False)
class SweepResult:
    """Every candidate of a sweep with what it offers, ranked as the planner asked.

    ``table`` has one row per candidate (index: its label), ranked (column
    ``rank``, 1 is best): the grid values, the candidate's seed and spec hash,
    and the columns of :func:`geoexp.sweep.evaluate_candidate`.
    """

    name: str
    table: pd.DataFrame
    rank_by: RankBy
    rank_contrast: str
    target_power: float
    alpha: float
    n_sims: int
    n_draws: int
    where: str

    def to_csv(self, path: str | Path) -> Path:
        """Write the table as CSV (atomically); return the path."""
        with atomic_path(path) as tmp:
            self.table.to_csv(tmp, index_label="candidate")
        return Path(path)

    def __str__(self) -> str:
        c = self.rank_contrast
        order = {
            "power": f"highest power for {c} first",
            "mde": f"smallest minimum detectable effect for {c} first",
            "cost": f"fewest treated units reaching power {self.target_power:g} for {c} first",
        }[self.rank_by]
        shown = ["rank", "expected_treated", f"units_{c}", f"power_{c}", f"mc_error_{c}"]
        shown += [f"mde_{c}", f"bias_{c}", f"coverage_{c}"]
        shown = [s for s in shown if s in self.table.columns]
        view = self.table[shown].rename(
            columns={
                "expected_treated": "treated (units)",
                f"units_{c}": "in estimand (units)",
                f"power_{c}": "power",
                f"mc_error_{c}": "MC error",
                f"mde_{c}": "MDE (incidents/unit)",
                f"bias_{c}": "bias (incidents/unit)",
                f"coverage_{c}": "interval coverage",
            }
        )
        lines = [
            f"Sweep {self.name}: {len(self.table)} candidate designs, {self.n_sims} simulated "
            f"trials x {self.n_draws} randomization draws each, alpha {self.alpha:g}; "
            f"ran on {self.where}.",
            f"Ranked by {self.rank_by} ({order}). Contrast: {c} vs pure control.",
            "",
            view.to_string(float_format=lambda v: f"{v:.3f}"),
            *(
                f"Not feasible: {label}: {note}"
                for label, note in self.table.loc[~self.table["feasible"], "notes"].items()
            ),
            "",
            f"MDE: the smallest true change (incidents per unit) detected with power "
            f"{self.target_power:g} (Bloom 1995 normal approximation); power's MC error is "
            "its Monte Carlo standard error.",
            f"Interval coverage: share of simulated trials whose {1 - self.alpha:.0%} interval "
            "by inverting the randomization test of a constant additive effect (the interval "
            f"the analysis prints beside the verdict) contains the planted effect, on "
            f"{self.n_draws} draws (Monte Carlo error in the CSV's coverage_mc_error_ columns).",
            CAUTION,
        ]
        return "\n".join(lines)

    def plot(self, contrast: str | None = None, ax=None):
        """Power against the number treated; see :func:`geoexp.sweep.plot_power`."""
        from geoexp.sweep._figure import plot_power

        return plot_power(self, contrast=contrast, ax=ax)


def _grid_value(values: dict[str, Any], key: str, spec) -> Any:
    if key in values:
        v = values[key]
        return "/".join(f"{x:g}" for x in v) if isinstance(v, tuple) else v
    a, e = spec.assignment, spec.exposure
    fallback = {
        "treated": a.treated,
        "gap_m": a.gap_m or 0.0,
        "bands_m": "/".join(f"{x:g}" for x in e.bands_m),
        "method": a.method,
    }
    return fallback[key]


def rank_table(
    table: pd.DataFrame, rank_by: RankBy, contrast: str, target_power: float
) -> pd.DataFrame:
    """The table sorted best first, with a ``rank`` column (1 is best); ties keep grid order.

    ``power``: highest power first, then fewer treated units; ``mde``: smallest
    minimum detectable effect first (in absolute value); ``cost``: the
    candidates reaching ``target_power`` first, fewest expected treated units
    among them, then the others by power.

    Parameters
    ----------
    table : pandas.DataFrame
        One row per candidate, in grid order.
    rank_by : {"power", "mde", "cost"}
        The ranking rule.
    contrast : str
        Contrast code whose columns are ranked.
    target_power : float
        Power a candidate must reach to rank first by ``cost``.

    Returns
    -------
    pandas.DataFrame
        A new table, sorted, with ``rank`` as its first column.
    """
    power = table.get(f"power_{contrast}", pd.Series(np.nan, index=table.index)).fillna(-1.0)
    treated = pd.to_numeric(table.get("expected_treated", table["treated"]), errors="coerce")
    keys = pd.DataFrame({"grid": np.arange(len(table))}, index=table.index)
    if rank_by == "power":
        keys["a"], keys["b"] = -power, treated
    elif rank_by == "mde":
        mde = table.get(f"mde_{contrast}", pd.Series(np.nan, index=table.index)).abs()
        keys["a"], keys["b"] = mde.fillna(np.inf), treated
    else:
        reach = power >= target_power
        keys["a"] = (~reach).astype(int)
        keys["b"] = np.where(reach, treated, -power)
    order = keys.sort_values(["a", "b", "grid"], kind="stable").index
    out = table.loc[order].copy()
    out.insert(0, "rank", np.arange(1, len(out) + 1))
    return out


def _task(item: tuple, layer: SweepLayer) -> dict[str, Any]:
    spec, simulation, effects, target_power = item
    return evaluate_candidate(spec, layer, simulation, effects, target_power)


def _part_task(item: tuple, layer: SweepLayer) -> dict[str, Any]:
    spec, simulation, effects, part = item
    start = time.perf_counter()
    out = evaluate_part(spec, layer, simulation, effects, part)
    out["seconds"] = time.perf_counter() - start
    return out


def _chunked_rows(
    results: dict[int, dict[str, Any]],
    owners: list[tuple[int, int | None]],
    specs: list,
    spec: SweepSpec,
) -> dict[int, dict[str, Any]]:
    """Each candidate's row from its probability task and its chunks (pooled in chunk order)."""
    rows: dict[int, dict[str, Any]] = {}
    for i, candidate_spec in enumerate(specs):
        mine = [(part, results[t]) for t, (owner, part) in enumerate(owners) if owner == i]
        head = next(r for part, r in mine if part is None)
        row: dict[str, Any] = {"spec_hash": candidate_spec.short_hash, "seed": candidate_spec.seed}
        row.update({k: v for k, v in head.items() if k != "seconds"})
        if head["feasible"]:
            chunks = sorted((part, r) for part, r in mine if part is not None)
            row.update(power_columns([r for _, r in chunks], spec.simulation, spec.target_power))
        row["seconds"] = sum(r["seconds"] for _, r in mine)
        rows[i] = row
    return rows


def run_sweep(
    spec: SweepSpec,
    *,
    workers: int | None = None,
    scheduler: str | None = None,
    backend: Backend | None = None,
    progress: bool = False,
    layer: SweepLayer | None = None,
) -> SweepResult:
    """Evaluate every candidate design of a sweep and rank them.

    Each candidate runs :func:`geoexp.sweep.evaluate_candidate` on its own
    design spec, seeded from the sweep's seed and its own grid values, so its
    row is the same whatever order the candidates run in and wherever they run.

    Parameters
    ----------
    spec
        The sweep.
    workers
        Run on a local Dask cluster of this many worker processes.
    scheduler
        Run on the Dask cluster whose scheduler listens at this address
        (``tcp://host:8786``); the workers must have geoexp and the layer's
        software installed, and the base design's units layer is read here
        and sent to them.
    backend
        A back end already started (see :func:`geoexp.sweep.make_backend`);
        left open.
    progress
        Show a progress bar (rich) on the terminal.
    layer
        The shared units, eligible units and graph, when already built.

    Returns
    -------
    SweepResult
    """
    candidates: list[Candidate] = spec.candidates()
    specs = [spec.design_spec(c) for c in candidates]
    if layer is None:
        layer = SweepLayer.for_specs(spec.base, specs)
    own = backend is None
    if backend is None:
        backend = make_backend(workers=workers, scheduler=scheduler)
    effects = dict(spec.effects)
    n_chunks = len(chunk_sizes(spec.simulation))
    if n_chunks == 1:
        task = _task
        items: list[tuple] = [(s, spec.simulation, effects, spec.target_power) for s in specs]
        owners: list[tuple[int, int | None]] = [(i, None) for i in range(len(specs))]
    else:
        # one task for each candidate's probabilities and one for each chunk of its trials
        task = _part_task
        owners = [(i, part) for i in range(len(specs)) for part in (None, *range(n_chunks))]
        items = [(specs[i], spec.simulation, effects, part) for i, part in owners]
    results: dict[int, dict[str, Any]] = {}
    try:
        where = backend.describe()
        with _progress_bar(progress, len(items), where) as advance:
            for t, result in backend.run(task, items, layer):
                results[t] = result
                i, part = owners[t]
                advance(candidates[i].label + ("" if part is None else f" (chunk {part + 1})"))
    finally:
        if own:
            backend.close()
    rows = results if n_chunks == 1 else _chunked_rows(results, owners, specs, spec)
    records = []
    for i, candidate in enumerate(candidates):
        values = dict(candidate.values)
        record = {k: _grid_value(values, k, specs[i]) for k in _GRID_COLUMNS}
        record.update(rows[i])
        records.append(record)
    table = pd.DataFrame(records, index=pd.Index([c.label for c in candidates], name="candidate"))
    table = rank_table(table, spec.rank_by, spec.rank_contrast, spec.target_power)
    return SweepResult(
        name=spec.name,
        table=table,
        rank_by=spec.rank_by,
        rank_contrast=spec.rank_contrast,
        target_power=spec.target_power,
        alpha=spec.simulation.alpha,
        n_sims=spec.simulation.sims,
        n_draws=spec.simulation.draws,
        where=where,
    )


class _progress_bar:
    """A rich progress bar over the candidates, or nothing."""

    def __init__(self, show: bool, total: int, where: str) -> None:
        self.show, self.total, self.where = show, total, where
        self._bar: Progress | None = None

    def __enter__(self):
        if not self.show:
            return lambda label: None
        from rich.console import Console
        from rich.progress import BarColumn, MofNCompleteColumn, Progress, TimeElapsedColumn

        bar = Progress(
            "[progress.description]{task.description}",
            BarColumn(),
            MofNCompleteColumn(),
            TimeElapsedColumn(),
            console=Console(stderr=True),
            transient=False,
        )
        self._bar = bar
        bar.start()
        bar.console.print(f"{self.total} task(s) on {self.where}")
        task = bar.add_task("started", total=self.total)

        def advance(label: str) -> None:
            bar.update(task, advance=1, description=f"done: {label}")

        return advance

    def __exit__(self, *exc) -> None:
        if self._bar is not None:
            self._bar.stop()

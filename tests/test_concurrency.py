"""Several processes writing one trial file: nothing drawn is lost, and a killed writer harms nothing.

Worker processes are started with "spawn" (a fresh interpreter), as separate
geoexp commands would be.
"""

from __future__ import annotations

import multiprocessing as mp
import os
import signal
import time

import numpy as np
import pandas as pd
import pyogrio
import pytest

from geoexp._atomic import temporary_paths
from geoexp.design import Design, DesignSpec
from geoexp.outcomes import OutcomeTable, load_outcomes, save_outcomes
from geoexp.sampleregion import synthetic_grid
from geoexp.trialfile import TrialFile, verify_trial, write_trial

N_UNITS = 120
PRE, POST = ("2025-01-01", "2025-12-31"), ("2026-01-01", "2026-12-31")


def _spec(folder, seed=1):
    grid = synthetic_grid(N_UNITS, spacing=100.0)
    grid["score"] = (np.arange(N_UNITS) * 5) % 13
    layer = folder / "units.gpkg"
    if not layer.exists():
        grid.to_file(layer, layer="units", driver="GPKG", engine="pyogrio")
    return DesignSpec.from_dict(
        {
            "name": "busy trial",
            "seed": seed,
            "draws": 100,
            "units": {"path": str(layer), "layer": "units", "id_column": "unit_id"},
            "eligible": {"top_column": "score", "top_k": 30},
            "assignment": {"method": "complete", "treated": 6},
            "exposure": {"bands_m": [150.0]},
        }
    )


def _table(trial, marker):
    tf = TrialFile.open(trial)
    ids = tf.units().index
    frame = pd.DataFrame({"pre": np.full(len(ids), marker), "post": np.arange(len(ids))}, ids)
    return OutcomeTable.from_counts(frame, None, units=tf, pre=PRE, post=POST, source="invented")


# ---- workers (module level, so that spawned processes can import them) ------------------


def _redraws(trial, folder, seeds, barrier):
    spec = _spec(folder)
    design = Design.from_spec(spec)
    designs = [Design.from_spec(spec.replace(seed=s), graph=design.graph) for s in seeds]
    drawn = [d.draw() for d in designs]
    barrier.wait()
    for seed, d, a in zip(seeds, designs, drawn, strict=True):
        write_trial(trial, d, a, replace=True, reason=f"redraw with seed {seed}", wait_s=300)
    return list(seeds)


def _count(trial, marker, barrier):
    table = _table(trial, marker)
    barrier.wait()
    save_outcomes(trial, table, wait_s=300)
    return marker


def _count_forever(trial, started):
    tables = [_table(trial, marker) for marker in (1, 2)]
    started.set()
    i = 0
    while True:
        save_outcomes(trial, tables[i % 2], wait_s=300)
        i += 1


@pytest.fixture(scope="module")
def workers():
    ctx = mp.get_context("spawn")
    with ctx.Manager() as manager, ctx.Pool(4) as pool:
        yield ctx, manager, pool


@pytest.fixture
def trial(tmp_path):
    spec = _spec(tmp_path)
    design = Design.from_spec(spec)
    path = tmp_path / "trial.gpkg"
    write_trial(path, design, design.draw())
    return path


def test_parallel_redraws_lose_no_assignment(trial, workers):
    _, manager, pool = workers
    barrier = manager.Barrier(4)
    seed_sets = [(10 + 2 * k, 11 + 2 * k) for k in range(4)]
    jobs = [pool.apply_async(_redraws, (trial, trial.parent, s, barrier)) for s in seed_sets]
    for job in jobs:
        job.get(timeout=600)

    tf = TrialFile.open(trial)
    n_drawn = 1 + 4 * 2
    assert tf.draw_number == n_drawn
    old = pyogrio.read_dataframe(trial, layer="superseded_assignments")
    per_draw = old.groupby("draw_number").size()
    # every draw number 1..N-1 superseded exactly once (one row per unit), N current
    assert list(per_draw.index) == list(range(1, n_drawn))
    assert (per_draw == N_UNITS).all()
    seeds = old.groupby("draw_number")["seed"].first().astype(int).tolist() + [int(tf.meta["seed"])]
    assert sorted(seeds) == sorted([1, *[s for pair in seed_sets for s in pair]])
    # each superseded assignment is the one its seed draws
    spec = _spec(trial.parent)
    graph = Design.from_spec(spec).graph
    for draw, rows in old.groupby("draw_number"):
        seed = int(rows["seed"].iloc[0])
        again = Design.from_spec(spec.replace(seed=seed), graph=graph).draw()
        treated = set(rows.loc[rows["treated"].astype(bool), "unit_id"])
        assert treated == set(again.ids[again.treated]), draw
    assert verify_trial(trial).ok


def test_a_count_racing_a_redraw_keeps_both(trial, workers):
    _, manager, pool = workers
    for round_, marker in enumerate((7, 8, 9)):
        before = TrialFile.open(trial).draw_number
        barrier = manager.Barrier(2)
        seed = 100 + round_
        count = pool.apply_async(_count, (trial, marker, barrier))
        redraw = pool.apply_async(_redraws, (trial, trial.parent, (seed,), barrier))
        count.get(timeout=600)
        redraw.get(timeout=600)

        tf = TrialFile.open(trial)
        # the redraw survives
        assert tf.draw_number == before + 1 and tf.meta["seed"] == str(seed)
        # the count survives: current for the new draw, or kept with the draw it was stored in
        if "outcomes" in tf.layers:
            assert tf.meta["outcomes_draw_number"] == str(before + 1)
            assert (load_outcomes(trial).counts["pre"] == marker).all()
        else:
            old = pyogrio.read_dataframe(trial, layer="superseded_outcomes")
            mine = old[old["pre"] == marker]
            assert len(mine) == N_UNITS and set(mine["draw_number"]) == {before}
        assert verify_trial(trial).ok


def test_a_writer_killed_at_any_moment_harms_nothing(trial, workers):
    ctx, manager, _ = workers
    save_outcomes(trial, _table(trial, 3))
    for delay in (0.15, 0.6):
        started = manager.Event()
        writer = ctx.Process(target=_count_forever, args=(trial, started))
        writer.start()
        assert started.wait(timeout=300)
        time.sleep(delay)
        os.kill(writer.pid, signal.SIGKILL)
        writer.join()
        assert writer.exitcode == -signal.SIGKILL

        # the trial is whole: it opens, its records check, its outcomes load
        assert verify_trial(trial).ok
        assert load_outcomes(trial).counts["pre"].isin([1, 2, 3]).all()
        left = temporary_paths(trial)
        said = []
        save_outcomes(trial, _table(trial, 3), notify=said.append)
        assert temporary_paths(trial) == []
        if left:
            assert any(f"removed {len(left)} temporary file" in s for s in said)

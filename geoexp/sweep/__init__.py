"""Design sweeps: many candidate designs of one trial compared side by side, here or on a cluster.

A sweep spec (:class:`SweepSpec`) takes a base design and a grid of changes
(number treated, gap, bands, method); every combination is a candidate with
its own seed, derived from the sweep's seed and its values alone
(:func:`candidate_seed`). :func:`run_sweep` evaluates each candidate
(:func:`evaluate_candidate`: expected units per condition, positivity, power
by simulation for the stated effects, minimum detectable effect, bias) and
ranks them; with ``chunk_sims`` one candidate's simulated trials are split
into chunks, each from its own stream, so that one large design also runs
as several tasks; the work runs in this process or as tasks on a Dask cluster
(:class:`DaskBackend`, the optional extra ``cluster``), with the same results.
"""

from geoexp.sweep._candidates import Candidate, candidate_key, candidate_seed
from geoexp.sweep._cluster import (
    Backend,
    DaskBackend,
    LocalBackend,
    apply_to_shared,
    make_backend,
)
from geoexp.sweep._evaluate import (
    SweepLayer,
    chunk_sizes,
    evaluate_candidate,
    evaluate_part,
    minimum_detectable_effect,
    pooled_mean_sd,
    power_columns,
)
from geoexp.sweep._figure import plot_power
from geoexp.sweep._run import SweepResult, rank_table, run_sweep
from geoexp.sweep._spec import GRID_KEYS, Simulation, SweepSpec

__all__ = [
    "GRID_KEYS",
    "Backend",
    "Candidate",
    "DaskBackend",
    "LocalBackend",
    "Simulation",
    "SweepLayer",
    "SweepResult",
    "SweepSpec",
    "apply_to_shared",
    "candidate_key",
    "candidate_seed",
    "chunk_sizes",
    "evaluate_candidate",
    "evaluate_part",
    "make_backend",
    "minimum_detectable_effect",
    "plot_power",
    "pooled_mean_sd",
    "power_columns",
    "rank_table",
    "run_sweep",
]

"""Design sweeps: many candidate designs of one trial compared side by side, here or on a cluster.

A sweep spec (:class:`SweepSpec`) takes a base design and a grid of changes
(number treated, gap, bands, method); every combination is a candidate with
its own seed, derived from the sweep's seed and its values alone
(:func:`candidate_seed`). :func:`run_sweep` evaluates each candidate
(:func:`evaluate_candidate`: expected units per condition, positivity, power
by simulation for the stated effects, minimum detectable effect, bias) and
ranks them; the work runs in this process or as tasks on a Dask cluster
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
from geoexp.sweep._evaluate import SweepLayer, evaluate_candidate, minimum_detectable_effect
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
    "evaluate_candidate",
    "make_backend",
    "minimum_detectable_effect",
    "plot_power",
    "rank_table",
    "run_sweep",
]

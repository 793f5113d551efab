"""A sweep spec: one base design, a grid of changes to it, the effects to detect and the ranking.

A sweep file is TOML::

    name = "Patrol options"
    design = "design.toml"        # the base design spec, relative to this file
    seed = 20261202               # optional; default: the base design's seed
    rank_by = "power"             # "power", "mde" or "cost"
    rank_contrast = "treated"     # the contrast that power and mde rank by
    target_power = 0.8            # what "cost" must reach, and the power of the mde

    [grid]                        # every combination is one candidate design
    treated = [30, 40, 60]
    gap_m = [0, 150, 300]         # 0: no gap
    bands_m = [[150, 300], [100, 200]]
    method = ["complete"]

    [effects]                     # rate ratio per condition (1 when not named)
    treated = 0.8
    spillover_1 = 0.95

    [simulation]
    sims = 200
    draws = 500
    alpha = 0.05
    baseline_column = "incidents_y1"
    dispersion = 0.5
    outcome = "change"
    probability_draws = 2000      # default: the base design's draws
    chunk_sims = 50               # optional: simulated trials per task, so that one large
                                  # design's power runs as several tasks on a cluster

Every key is checked, with the same rules as a design spec's keys, before any
candidate is built: the message names the file, the table, the key and what
was expected.
"""

from __future__ import annotations

import itertools
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import Any, Literal

from geoexp.design import (
    MAX_DRAWS,
    SPEC_KEYS,
    DesignSpec,
    check_choice,
    check_list,
    check_real,
    check_text,
    check_whole,
)
from geoexp.errors import DesignError
from geoexp.sweep._candidates import Candidate

RankBy = Literal["power", "mde", "cost"]
GRID_KEYS = ("treated", "gap_m", "bands_m", "method")
MAX_CANDIDATES = 1_000  # more designs than anyone compares; surely a typo in the grid

_gap = check_real(0, 100_000, low_open=False, high_open=False, what="a distance (0: no gap)")
_GRID: dict[str, Any] = {
    "treated": check_list(SPEC_KEYS["assignment"]["treated"], "numbers of units", non_empty=True),
    "gap_m": check_list(_gap, "distances in metres", non_empty=True),
    "bands_m": check_list(
        SPEC_KEYS["exposure"]["bands_m"], "lists of band edges in metres", non_empty=True
    ),
    "method": check_list(SPEC_KEYS["assignment"]["method"], "methods", non_empty=True),
}
_SIMULATION: dict[str, Any] = {
    "sims": check_whole(1, MAX_DRAWS, "a number of simulated trials"),
    "draws": check_whole(1, MAX_DRAWS, "a number of randomization draws"),
    "alpha": check_real(0, 1, low_open=True, high_open=True, what="a significance level"),
    "baseline_column": check_text,
    "dispersion": check_real(0, 1e6, low_open=False, high_open=False, what="a dispersion"),
    "outcome": check_choice("change", "post"),
    "probability_draws": check_whole(100, MAX_DRAWS, "a number of Monte Carlo draws"),
    "chunk_sims": check_whole(1, MAX_DRAWS, "a number of simulated trials per task"),
}
_RATIO = check_real(0, 1e6, low_open=True, high_open=False, what="a rate ratio")
_TOP: dict[str, Any] = {
    "name": check_text,
    "design": check_text,
    "seed": check_whole(0, 2**63 - 1, "a seed"),
    "rank_by": check_choice("power", "mde", "cost"),
    "rank_contrast": check_text,
    "target_power": check_real(0, 1, low_open=True, high_open=True, what="a power"),
}


@dataclass(frozen=True)
class Simulation:
    """How each candidate's power is simulated (see :func:`geoexp.power.simulate_power`)."""

    sims: int = 200
    draws: int = 500
    alpha: float = 0.05
    baseline_column: str = "incidents_y1"
    dispersion: float = 0.5
    outcome: Literal["change", "post"] = "change"
    probability_draws: int | None = None
    chunk_sims: int | None = None


@dataclass(frozen=True)
class SweepSpec:
    """A base design, a grid of changes to it, the effects to detect and how to rank.

    Build it with :meth:`from_toml` or :meth:`from_dict`. :meth:`candidates`
    lists every combination of the grid as a :class:`Candidate`, in the grid's
    order; each carries its own seed, derived from the sweep's seed and its
    parameters alone (:func:`geoexp.sweep.candidate_seed`).
    """

    name: str
    base: DesignSpec
    seed: int
    grid: MappingProxyType = field(default_factory=lambda: MappingProxyType({}))
    effects: MappingProxyType = field(default_factory=lambda: MappingProxyType({}))
    simulation: Simulation = field(default_factory=Simulation)
    rank_by: RankBy = "power"
    rank_contrast: str = "treated"
    target_power: float = 0.8
    source: str = "<dict>"

    @classmethod
    def from_toml(cls, path: str | Path) -> SweepSpec:
        """Read a sweep file; its ``design`` path is relative to the file."""
        path = Path(path)
        if not path.is_file():
            raise DesignError(f"sweep spec {str(path)!r} does not exist or is not a file")
        try:
            data = tomllib.loads(path.read_bytes().decode("utf-8"))
        except UnicodeDecodeError:
            raise DesignError(f"sweep spec {str(path)!r} is not UTF-8 text") from None
        except tomllib.TOMLDecodeError as err:
            raise DesignError(f"sweep spec {str(path)!r} is not valid TOML: {err}") from None
        return cls.from_dict(data, base_dir=path.parent.resolve(), source=str(path))

    @classmethod
    def from_dict(
        cls,
        data: dict[str, Any],
        *,
        base_dir: str | Path = ".",
        source: str = "<dict>",
        base: DesignSpec | None = None,
    ) -> SweepSpec:
        """Build a sweep from a nested dict (the TOML structure), checking every key.

        ``base`` gives the base design directly instead of the ``design`` path.
        """
        if not isinstance(data, dict):
            raise DesignError(f"{source}: a sweep spec must be a table of keys")
        tables = {"grid": _GRID, "effects": None, "simulation": _SIMULATION}
        unknown = sorted(str(k) for k in data if k not in _TOP and k not in tables)
        if unknown:
            raise DesignError(
                f"{source}: unknown key(s) {unknown}; expected some of {sorted(_TOP)} and the "
                "tables [grid], [effects], [simulation]"
            )
        top = {k: _TOP[k](v, f"{source}: {k}") for k, v in data.items() if k in _TOP}
        if base is None:
            if "design" not in top:
                raise DesignError(f"{source}: the sweep needs 'design', the base design spec")
            design_path = Path(top["design"])
            if not design_path.is_absolute():
                design_path = Path(base_dir) / design_path
            base = DesignSpec.from_toml(design_path)
        grid_raw = _table(data, "grid", source)
        bad = sorted(str(k) for k in grid_raw if k not in _GRID)
        if bad:
            raise DesignError(
                f"{source}: unknown key(s) {bad} in [grid]; expected some of {list(GRID_KEYS)}"
            )
        grid = {k: _GRID[k](v, f"{source}: [grid] {k}") for k, v in grid_raw.items()}
        for key, values in grid.items():
            canonical = [_canonical(key, v) for v in values]
            if len(set(canonical)) != len(canonical):
                raise DesignError(f"{source}: [grid] {key} lists a value twice: {values}")
        sim_raw = _table(data, "simulation", source)
        bad = sorted(str(k) for k in sim_raw if k not in _SIMULATION)
        if bad:
            raise DesignError(
                f"{source}: unknown key(s) {bad} in [simulation]; expected some of "
                f"{sorted(_SIMULATION)}"
            )
        simulation = Simulation(
            **{k: _SIMULATION[k](v, f"{source}: [simulation] {k}") for k, v in sim_raw.items()}
        )
        effects = {
            str(k): float(_RATIO(v, f"{source}: [effects] {k}"))
            for k, v in _table(data, "effects", source).items()
        }
        spec = cls(
            name=top.get("name", base.name),
            base=base,
            seed=top.get("seed", base.seed),
            grid=MappingProxyType({k: tuple(grid[k]) for k in GRID_KEYS if k in grid}),
            effects=MappingProxyType(effects),
            simulation=simulation,
            rank_by=top.get("rank_by", "power"),
            rank_contrast=top.get("rank_contrast", "treated"),
            target_power=float(top.get("target_power", 0.8)),
            source=source,
        )
        n_bands = max(len(b) for b in spec.grid.get("bands_m", (tuple(base.exposure.bands_m),)))
        codes = ["treated", *(f"spillover_{k + 1}" for k in range(n_bands))]
        unknown = [k for k in effects if k not in (*codes, "pure_control")]
        if unknown:
            raise DesignError(
                f"{source}: unknown condition(s) {unknown} in [effects]; the candidates' "
                f"conditions are {[*codes, 'pure_control']}"
            )
        if spec.rank_contrast not in codes:
            raise DesignError(
                f"{source}: rank_contrast must be one of {codes}, got {spec.rank_contrast!r}"
            )
        n = len(spec.candidates())
        if n > MAX_CANDIDATES:
            raise DesignError(
                f"{source}: the grid makes {n:,} candidate designs; at most {MAX_CANDIDATES:,}"
            )
        for candidate in spec.candidates():
            spec.design_spec(candidate)  # each candidate is a valid design, or fail now
        return spec

    def candidates(self) -> list[Candidate]:
        """Every combination of the grid's values, in the grid's order."""
        keys = [k for k in GRID_KEYS if k in self.grid]
        combos = itertools.product(*(self.grid[k] for k in keys))
        return [
            Candidate.from_values(dict(zip(keys, values, strict=True)), self.seed)
            for values in combos
        ]

    def design_spec(self, candidate: Candidate) -> DesignSpec:
        """The candidate's full design spec: the base design with the grid's values and seed.

        Its seed is the candidate's own (:attr:`Candidate.design_seed`), so the
        spec alone reproduces the candidate's assignment, probabilities and power.
        """
        data = self.base.to_dict()
        assignment = dict(data.get("assignment", {}))
        exposure = dict(data.get("exposure", {}))
        values = dict(candidate.values)
        if "treated" in values:
            assignment.pop("share", None)
            assignment["treated"] = values["treated"]
        if "gap_m" in values:
            assignment.pop("gap_m", None)
            if values["gap_m"] > 0:
                assignment["gap_m"] = values["gap_m"]
        if "method" in values:
            assignment["method"] = values["method"]
        if "bands_m" in values:
            exposure["bands_m"] = list(values["bands_m"])
            exposure["unit"] = "m"
        data["assignment"] = assignment
        data["exposure"] = exposure
        data["name"] = f"{self.base.name} [{candidate.label}]"
        data["seed"] = candidate.design_seed
        if self.simulation.probability_draws is not None:
            data["draws"] = self.simulation.probability_draws
        where = f"{self.source}: candidate {candidate.label}"
        try:
            return DesignSpec.from_dict(data, base_dir=self.base.base_dir, source=where)
        except DesignError as err:
            raise DesignError(str(err)) from None


def _table(data: dict, name: str, source: str) -> dict:
    value = data.get(name, {})
    if not isinstance(value, dict):
        raise DesignError(f"{source}: [{name}] must be a table, got {type(value).__name__}")
    return value


def _canonical(key: str, value: Any) -> Any:
    if key == "bands_m":
        return tuple(float(v) for v in value)
    if key == "gap_m":
        return float(value)
    return value

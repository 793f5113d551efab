"""Design specs: a plain TOML file plus a seed, with a content hash.

A spec says which layer holds the units, which units are eligible, how
treatment is assigned, how exposure is measured and which seed draws the
assignment. Relative paths are read relative to the spec file. A spec is a
pure value: it checks its keys' types and ranges but reads no layer; reading
the units and applying the rules is :mod:`geoexp.design._build`'s job. The content
hash is a SHA-256 of the spec's canonical JSON form (keys sorted, defaults
filled in), so two files that say the same thing have the same hash, and any
change to what the design does changes it.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import tomllib
from dataclasses import dataclass
from dataclasses import field as dc_field
from pathlib import Path
from typing import Any, Literal

import tomli_w

from geoexp._atomic import atomic_path
from geoexp.design._schema import checked as _checked
from geoexp.errors import DesignError

Method = Literal["complete", "blocked", "saturation"]


@dataclass(frozen=True)
class UnitsSpec:
    """Where the units come from.

    ``path`` is a file, or a ``postgresql://`` URL whose table is named by
    ``layer`` (``schema.name``) or whose rows come from ``query`` (a SQL
    ``SELECT``); a URL may not hold a password, since the spec is kept in the
    trial file (libpq reads it from ``PGPASSWORD``, ``~/.pgpass`` or a service
    file).
    """

    path: str
    id_column: str | None = None
    layer: str | None = None
    crs: str | int | None = None  # text pyproj reads, or an EPSG code
    # a layer with no CRS in local planar coordinates: "m", "ft" or "us-ft"
    planar: Literal["m", "ft", "us-ft"] | None = None
    # no unique id column: the units are numbered 0, 1, ... in file order (ids "row")
    number_rows: bool = False
    query: str | None = None  # SQL for a database path


@dataclass(frozen=True)
class EligibilitySpec:
    """Which units may be treated: a rule, then hot spots, then exclusion zones."""

    where: str | None = None
    top_column: str | None = None
    top_k: int | None = None
    top_share: float | None = None
    exclude: tuple[str, ...] = ()
    exclude_how: Literal["intersects", "within"] = "intersects"


@dataclass(frozen=True)
class AssignmentSpec:
    """How treatment is assigned among the eligible units."""

    method: Method = "complete"
    treated: int | None = None
    share: float | None = None
    block_column: str | None = None
    block_share: float | None = None
    block_treated: int | None = None
    block_quotas: dict[str, int] = dc_field(default_factory=dict)
    gap_m: float | None = None
    min_pure_controls: int | None = None
    cluster_column: str | None = None
    saturations: tuple[float, ...] = ()
    cluster_counts: tuple[int, ...] = ()


@dataclass(frozen=True)
class RerandomizeSpec:
    """Rerandomization for balance (Morgan & Rubin 2012)."""

    covariates: tuple[str, ...]
    acceptance: float = 0.1


@dataclass(frozen=True)
class ExposureSpec:
    """How exposure to treatment is measured."""

    bands_m: tuple[float, ...] = (150.0, 300.0)
    metric: Literal["euclidean", "network"] = "euclidean"
    snap_tolerance_m: float = 1.0
    # the unit outputs show distances in: "ft" when the spec gave bands_ft
    unit: Literal["m", "ft"] = "m"
    # network metric: join lines where they cross or touch away from their end points
    split_at_crossings: bool = False
    # network metric: column marking bridges, tunnels, flyovers (never joined where they cross)
    bridge_column: str | None = None
    # network metric: draw even when the along-street graph is implausibly sparse
    accept_sparse_network: bool = False
    # the positivity floor of the analysis's rows (None: the project's default, 0.05)
    positivity_floor: float | None = None


@dataclass(frozen=True)
class FieldSpec:
    """Columns that field outputs show."""

    district_column: str | None = None
    description_column: str | None = None
    instructions_column: str | None = None


@dataclass(frozen=True)
class DesignSpec:
    """A complete, human-editable design: units, eligibility, assignment, exposure, seed.

    Build it with :meth:`from_toml` or :meth:`from_dict`; save it with
    :meth:`to_toml`. ``hash`` identifies what the design does.
    """

    name: str
    seed: int
    units: UnitsSpec
    eligible: EligibilitySpec = dc_field(default_factory=EligibilitySpec)
    assignment: AssignmentSpec = dc_field(default_factory=AssignmentSpec)
    rerandomize: RerandomizeSpec | None = None
    exposure: ExposureSpec = dc_field(default_factory=ExposureSpec)
    field: FieldSpec = dc_field(default_factory=FieldSpec)
    draws: int = 10_000
    base_dir: str = dc_field(default=".", compare=False)

    def __post_init__(self) -> None:
        # the same checks as from_dict, so a spec built directly is held to them too
        _checked(self.to_dict(), "the spec")
        _validate(self)

    # ---- construction -------------------------------------------------
    @classmethod
    def from_toml(cls, path: str | Path) -> DesignSpec:
        """Read a spec from a TOML file; relative paths are relative to that file."""
        path = Path(path)
        if not path.exists():
            raise DesignError(f"design spec {str(path)!r} does not exist")
        if not path.is_file():
            raise DesignError(f"design spec {str(path)!r} is not a file (a folder?)")
        try:
            text = path.read_bytes().decode("utf-8")
        except UnicodeDecodeError as err:
            raise DesignError(
                f"design spec {str(path)!r} is not UTF-8 text (byte {err.start}): save it as "
                "UTF-8 TOML"
            ) from None
        except OSError as err:
            raise DesignError(f"design spec {str(path)!r} cannot be read: {err.strerror}") from None
        if "\x00" in text:
            raise DesignError(f"design spec {str(path)!r} is a binary file, not TOML text")
        try:
            data = tomllib.loads(text)
        except tomllib.TOMLDecodeError as err:
            raise DesignError(f"design spec {str(path)!r} is not valid TOML: {err}") from None
        return cls.from_dict(data, base_dir=str(path.parent.resolve()), source=str(path))

    @classmethod
    def from_dict(
        cls, data: dict[str, Any], *, base_dir: str = ".", source: str = "<dict>"
    ) -> DesignSpec:
        """Build a spec from a nested dict (the TOML structure).

        Every key's type and range is checked before it is used; a message
        names the table, the key, what was expected and what was received.
        Whole numbers (``treated``, ``draws``, ``seed``, counts) must be
        integers; a float is accepted only when it is integral (``12.0``), and
        a true/false value is never a number.
        """
        if not isinstance(data, dict):
            raise DesignError(
                f"{source}: a design spec must be a table of keys, got {type(data).__name__}"
            )
        data = _checked(data, source)
        data = _feet_to_metres(dict(data), source)
        units = _section(data.pop("units", None), UnitsSpec, "units", source, required=True)
        eligible = _section(data.pop("eligible", None), EligibilitySpec, "eligible", source)
        assignment = _section(data.pop("assignment", None), AssignmentSpec, "assignment", source)
        rerand = data.pop("rerandomize", None)
        rerandomize = (
            None
            if rerand is None
            else _section(rerand, RerandomizeSpec, "rerandomize", source, required=True)
        )
        exposure = _section(data.pop("exposure", None), ExposureSpec, "exposure", source)
        field_spec = _section(data.pop("field", None), FieldSpec, "field", source)
        for key in ("name", "seed"):
            if key not in data:
                raise DesignError(f"{source}: the spec needs a top-level '{key}'")
        try:
            return cls(
                name=data["name"],
                seed=data["seed"],
                draws=data.get("draws", 10_000),
                units=units,
                eligible=eligible,
                assignment=assignment,
                rerandomize=rerandomize,
                exposure=exposure,
                field=field_spec,
                base_dir=base_dir,
            )
        except DesignError as err:
            raise DesignError(f"{source}: {err}") from None

    # ---- output -------------------------------------------------------
    def to_dict(self) -> dict[str, Any]:
        """The spec as a nested dict of plain values (no Nones, tuples as lists)."""
        out: dict[str, Any] = {"name": self.name, "seed": self.seed, "draws": self.draws}
        for name in ("units", "eligible", "assignment", "rerandomize", "exposure", "field"):
            section = getattr(self, name)
            if section is None:
                continue
            values = {
                k: (list(v) if isinstance(v, tuple) else v)
                for k, v in dataclasses.asdict(section).items()
                # an unset switch (False) is left out, as an unset key is
                if v is not None and v is not False and v != () and v != {}
            }
            if values:
                out[name] = values
        return out

    def to_toml(self, path: str | Path | None = None) -> str:
        """Return the spec as TOML text, and write it atomically to ``path`` if given."""
        text = tomli_w.dumps(self.to_dict())
        if path is not None:
            with atomic_path(path) as tmp:
                tmp.write_text(text, encoding="utf-8")
        return text

    @property
    def hash(self) -> str:
        """SHA-256 of the spec's canonical JSON (sorted keys, defaults filled in)."""
        canonical = json.dumps(self.to_dict(), sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(canonical.encode("utf-8")).hexdigest()

    @property
    def short_hash(self) -> str:
        """First 12 hex digits of :attr:`hash`, as printed on field outputs."""
        return self.hash[:12]

    def resolve(self, path: str) -> Path:
        """A path from the spec, resolved relative to the spec file's folder."""
        p = Path(path)
        return p if p.is_absolute() else Path(self.base_dir) / p

    def replace(self, **changes: Any) -> DesignSpec:
        """A copy with top-level fields changed (e.g. ``seed=``)."""
        return dataclasses.replace(self, **changes)


FOOT = 0.3048  # the international foot, in metres


def _feet_to_metres(data: dict[str, Any], source: str) -> dict[str, Any]:
    """Accept ``bands_ft`` and ``gap_ft`` by converting them to metres (international feet).

    The spec keeps metres, so its hash does not depend on the unit it was typed in.
    """
    for table, key in (("exposure", "bands"), ("assignment", "gap")):
        section = data.get(table)
        if not isinstance(section, dict) or f"{key}_ft" not in section:
            continue
        section = dict(section)
        if f"{key}_m" in section:
            raise DesignError(f"{source}: [{table}] give {key}_m or {key}_ft, not both")
        value = section.pop(f"{key}_ft")
        try:
            section[f"{key}_m"] = (
                [float(v) * FOOT for v in value] if isinstance(value, list) else float(value) * FOOT
            )
        except (TypeError, ValueError):
            raise DesignError(f"{source}: [{table}] {key}_ft must be numbers of feet") from None
        if table == "exposure":
            section.setdefault("unit", "ft")
        data[table] = section
    return data


def _section(raw: Any, cls: type, name: str, source: str, required: bool = False) -> Any:
    if raw is None:
        if required:
            raise DesignError(f"{source}: the spec needs a [{name}] table")
        return cls()
    if not isinstance(raw, dict):
        raise DesignError(f"{source}: [{name}] must be a table, got {type(raw).__name__}")
    known = {f.name for f in dataclasses.fields(cls)}
    unknown = sorted(set(raw) - known)
    if unknown:
        raise DesignError(
            f"{source}: unknown key(s) {unknown} in [{name}]; expected some of {sorted(known)}"
        )
    values = {}
    for f in dataclasses.fields(cls):
        if f.name not in raw:
            continue
        v = raw[f.name]
        if isinstance(v, list):
            v = tuple(v)
        if f.name == "exclude" and isinstance(v, str):
            v = (v,)
        values[f.name] = v
    missing = [
        f.name
        for f in dataclasses.fields(cls)
        if f.name not in values
        and f.default is dataclasses.MISSING
        and f.default_factory is dataclasses.MISSING
    ]
    if missing:
        raise DesignError(f"{source}: [{name}] needs {missing}")
    return cls(**values)


def _validate(spec: DesignSpec) -> None:
    a = spec.assignment
    e = spec.eligible
    _validate_units(spec.units)
    if spec.draws < 100:
        raise DesignError(f"draws must be at least 100 Monte Carlo draws, got {spec.draws}")
    if a.method not in ("complete", "blocked", "saturation"):
        raise DesignError(
            f"[assignment] method must be 'complete', 'blocked' or 'saturation', got {a.method!r}"
        )
    if e.top_k is not None and e.top_share is not None:
        raise DesignError("[eligible] give top_k or top_share, not both")
    if (e.top_k is not None or e.top_share is not None) and e.top_column is None:
        raise DesignError("[eligible] top_k/top_share need top_column (the count to rank by)")
    if a.method == "complete":
        if (a.treated is None) == (a.share is None):
            raise DesignError(
                "[assignment] a complete design needs exactly one of 'treated' (a count) or 'share'"
            )
    if a.method == "blocked":
        if a.block_column is None:
            raise DesignError("[assignment] a blocked design needs block_column")
        given = sum(
            x is not None and x != {} for x in (a.block_share, a.block_treated, a.block_quotas)
        )
        if given != 1:
            raise DesignError(
                "[assignment] a blocked design needs exactly one of block_share, block_treated "
                "or a [assignment.block_quotas] table"
            )
    if a.method == "saturation":
        if a.cluster_column is None or not a.saturations or not a.cluster_counts:
            raise DesignError(
                "[assignment] a saturation design needs cluster_column, saturations and cluster_counts"
            )
        if len(a.saturations) != len(a.cluster_counts):
            raise DesignError(
                f"[assignment] saturations ({len(a.saturations)}) and cluster_counts "
                f"({len(a.cluster_counts)}) must have the same length"
            )
        if any(not 0 <= s <= 1 for s in a.saturations):
            raise DesignError(
                f"[assignment] saturations must lie in [0, 1], got {list(a.saturations)}"
            )
        if a.gap_m is not None:
            raise DesignError(
                "[assignment] gap_m (kept apart) cannot be combined with a saturation design"
            )
    if a.gap_m is not None and a.gap_m <= 0:
        raise DesignError(
            f"[assignment] gap_m must be a positive distance in metres, got {a.gap_m}"
        )
    if a.min_pure_controls is not None and a.min_pure_controls < 0:
        raise DesignError("[assignment] min_pure_controls must be a non-negative count")
    if spec.rerandomize is not None:
        r = spec.rerandomize
        if not r.covariates:
            raise DesignError("[rerandomize] needs at least one covariate")
        if not 0 < r.acceptance <= 1:
            raise DesignError(f"[rerandomize] acceptance must lie in (0, 1], got {r.acceptance}")
        if a.method == "saturation":
            raise DesignError("[rerandomize] cannot be combined with a saturation design")
    u = spec.units
    if u.id_column is None and not u.number_rows:
        raise DesignError(
            "[units] needs ['id_column'] (a column of unique ids), or number_rows = true to "
            "number the units 0, 1, ... in file order when no column holds unique ids"
        )
    if u.id_column is not None and u.number_rows:
        raise DesignError(
            "[units] give id_column or number_rows = true, not both: number_rows numbers the "
            "units in file order instead of reading ids from a column"
        )
    if u.planar is not None and u.crs is not None:
        raise DesignError(
            "[units] give crs (the layer's real CRS) or planar (a layer with no CRS in local "
            "planar coordinates), not both"
        )
    x = spec.exposure
    if x.metric != "network" and (
        x.split_at_crossings or x.bridge_column is not None or x.accept_sparse_network
    ):
        raise DesignError(
            "[exposure] split_at_crossings, bridge_column and accept_sparse_network are for "
            "metric = 'network' (distances along streets)"
        )
    if x.unit not in ("m", "ft"):
        raise DesignError(f"[exposure] unit must be 'm' or 'ft', got {x.unit!r}")
    if x.metric not in ("euclidean", "network"):
        raise DesignError(f"[exposure] metric must be 'euclidean' or 'network', got {x.metric!r}")
    bands = list(x.bands_m)
    if (
        not bands
        or any(b <= 0 for b in bands)
        or any(b2 <= b1 for b1, b2 in zip(bands, bands[1:], strict=False))
    ):
        raise DesignError(f"[exposure] bands_m must be increasing positive metres, got {bands}")


def _validate_units(u: UnitsSpec) -> None:
    from geoexp.postgis import has_password, is_database_url, mask_url

    if not is_database_url(u.path):
        if u.query is not None:
            raise DesignError("[units] query is for a database path (postgresql://...) only")
        return
    if has_password(u.path):
        raise DesignError(
            f"[units] path {mask_url(u.path)} holds a password, which would be kept in the "
            "trial file: remove it and let libpq read it from PGPASSWORD, ~/.pgpass or a "
            "service file"
        )
    if u.query is not None and u.layer is not None:
        raise DesignError("[units] give layer (the table) or query for a database, not both")

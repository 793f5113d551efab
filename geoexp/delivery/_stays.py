"""Group the pings of each device into stays at units.

A *step* joins two consecutive pings of one device (in time order). A step
is *at rest at a unit* when

* the gap between its pings is at most ``max_gap_s`` seconds,
* its speed (straight-line distance over time) is at most ``max_speed_kmh``,
* both pings were snapped to the same unit.

A *stay* is a maximal run of consecutive steps at rest at one unit; it starts
at the run's first ping and ends at its last, and only stays of at least
``min_minutes`` count. A single ping is never a stay: one position says a
device passed, not that it stayed.

Defaults, and why:

* ``max_gap_s = 300`` (5 minutes). Patrol devices report every 30 seconds to
  2 minutes; 5 minutes allows one or two lost reports at the slowest common
  rate. Across a longer silence geoexp does not know where the device was
  and credits no presence.
* ``max_speed_kmh = 8``. Above walking pace (about 5 km/h, foot patrols
  count) and above the apparent drift of a parked device's GPS fixes (a few
  metres per report), well below driving speeds in town (20-50 km/h), so a
  car driving through a segment makes fast steps and no stay.
* ``min_minutes = 2``. Stops at traffic lights and in traffic rarely last two
  minutes; the presence a hot-spot patrol plan asks for is typically 10-15
  minutes per visit (Koper 1995, "Just enough police presence"; from memory),
  so a 2-minute floor drops stops that are not visits without losing short
  planned ones.

Streaming: pings arrive in chunks. Within each device, times must not go
back (a file sorted by time, or by device and time, is fine); a ping earlier
than the one before it for the same device is an error naming its row. At the
end of a chunk the pings of each device's unfinished run are carried into
the next chunk, so a stay that spans chunks is found whole and the result
equals grouping all pings at once. Memory is one chunk plus the carried runs.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from geoexp.errors import InputError, describe_rows

DEFAULT_MAX_GAP_S = 300.0
DEFAULT_MAX_SPEED_KMH = 8.0
DEFAULT_MIN_MINUTES = 2.0


@dataclass(frozen=True)
class StayRules:
    """The three rules that turn pings into stays (see the module's notes for defaults)."""

    max_gap_s: float = DEFAULT_MAX_GAP_S
    max_speed_kmh: float = DEFAULT_MAX_SPEED_KMH
    min_minutes: float = DEFAULT_MIN_MINUTES

    def __post_init__(self):
        for name in ("max_gap_s", "max_speed_kmh", "min_minutes"):
            value = getattr(self, name)
            if not (isinstance(value, (int, float)) and np.isfinite(value) and value >= 0):
                raise InputError(f"{name} must be a finite number >= 0, got {value!r}")


def rest_steps(dev, t, x, y, unit, rules: StayRules, metres_per_unit: float) -> np.ndarray:
    """For pings sorted by device then time: True for each step (i, i+1) at rest at a unit.

    A step is at rest when both pings are of the same device, at most
    ``rules.max_gap_s`` seconds apart, snapped to the same unit, and the
    device moved no faster than ``rules.max_speed_kmh`` between them (two
    pings at the same time are at rest only if the position did not change).

    Parameters
    ----------
    dev : numpy.ndarray
        Device code of each ping (any type comparable with ``==``).
    t : numpy.ndarray
        Time of each ping in seconds (integer or float).
    x, y : numpy.ndarray
        Position of each ping in the units' CRS.
    unit : numpy.ndarray
        Position of the unit each ping was snapped to, -1 where none.
    rules : StayRules
        The largest gap and speed of a step at rest.
    metres_per_unit : float
        Metres in one unit of the CRS, to turn ``x``/``y`` distances into metres.

    Returns
    -------
    numpy.ndarray
        Boolean, one entry fewer than the pings: entry i for the step from
        ping i to ping i + 1.
    """
    same = dev[1:] == dev[:-1]
    dt = (t[1:] - t[:-1]).astype(np.float64)
    dist = np.hypot(x[1:] - x[:-1], y[1:] - y[:-1]) * metres_per_unit
    limit = rules.max_speed_kmh / 3.6  # metres per second
    # Equal times: at rest only if the device did not move (0/0 is a speed of 0).
    slow = np.where(dt > 0, dist <= limit * np.where(dt > 0, dt, 1.0), dist == 0)
    return same & (dt <= rules.max_gap_s) & slow & (unit[1:] >= 0) & (unit[1:] == unit[:-1])


def stay_bounds(rest: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """First and last ping of each maximal run of rest steps.

    Parameters
    ----------
    rest : numpy.ndarray
        Boolean per step between consecutive pings, as :func:`rest_steps` gives.

    Returns
    -------
    first : numpy.ndarray
        int64 index of the first ping of each run.
    last : numpy.ndarray
        int64 index of the last ping of each run (a run of steps i .. j-1
        spans pings i .. j).
    """
    edge = np.diff(np.r_[0, rest.astype(np.int8), 0])
    return np.flatnonzero(edge == 1), np.flatnonzero(edge == -1)


@dataclass
class StayBuilder:
    """Feeds chunks of pings and emits finished stays (mutable; private to one reading)."""

    rules: StayRules
    metres_per_unit: float
    row_word: str = "line"
    carry: dict | None = None

    _FIELDS = ("dev", "t", "x", "y", "unit", "row")

    def finish(self) -> dict[str, np.ndarray]:
        """Close the stays still open after the last chunk (those carried forward)."""
        if self.carry is None:
            empty = np.empty(0, dtype=np.int64)
            return {"dev": empty, "unit": empty, "start": empty, "end": empty, "pings": empty}
        return self.feed({k: v[:0] for k, v in self.carry.items()}, last=True)

    def feed(self, chunk: dict[str, np.ndarray], last: bool = False) -> dict[str, np.ndarray]:
        """Add a chunk (arrays dev, t, x, y, unit, row); return the stays it finished."""
        if self.carry is not None:
            chunk = {k: np.concatenate([self.carry[k], chunk[k]]) for k in self._FIELDS}
        order = np.argsort(chunk["dev"], kind="stable")  # carried pings stay first
        c = {k: chunk[k][order] for k in self._FIELDS}
        dev, t = c["dev"], c["t"]
        back = np.flatnonzero((dev[1:] == dev[:-1]) & (t[1:] < t[:-1])) + 1
        if len(back):
            raise InputError(
                f"pings go back in time for a device at {self.row_word}s "
                f"{describe_rows(c['row'][back].tolist())}: within each device the times must "
                "not decrease; sort the file by time (or by device, then time)"
            )
        rest = rest_steps(dev, t, c["x"], c["y"], c["unit"], self.rules, self.metres_per_unit)
        first, stop = stay_bounds(rest)
        n = len(dev)
        if last or n == 0:
            done = np.ones(len(first), dtype=bool)
            self.carry = None
        else:
            # Each device's last ping; a stay ending there may go on in the next chunk.
            ends = np.flatnonzero(np.r_[dev[1:] != dev[:-1], True])
            starts = np.r_[0, ends[:-1] + 1]
            keep_from = ends.copy()
            trailing = np.isin(stop, ends)
            block = np.searchsorted(ends, stop[trailing])
            keep_from[block] = first[trailing]
            done = ~trailing
            keep = np.arange(n) >= np.repeat(keep_from, ends - starts + 1)
            self.carry = {k: c[k][keep] for k in self._FIELDS}
        first, stop = first[done], stop[done]
        minutes = (t[stop] - t[first]).astype(np.float64) / 60.0
        ok = minutes >= self.rules.min_minutes
        first, stop = first[ok], stop[ok]
        return {
            "dev": dev[first],
            "unit": c["unit"][first],
            "start": t[first],
            "end": t[stop],
            "pings": (stop - first + 1).astype(np.int64),
        }

"""How many Monte Carlo draws a design may ask for: a hard maximum and a memory estimate.

Every probability geoexp reports comes from draws of the design's own sampler
(Aronow & Samii 2017), so a request for draws is a request for memory. The
estimate below is what a run keeps at its peak in the worst case:

* the draws themselves, as CSR rows of treated positions: 4 bytes per treated
  unit and 8 bytes of row pointer per draw;
* the condition bits used for joint probabilities: for each unit and each
  exposure condition one bit per draw, packed into 64-bit words.

A request whose estimate exceeds the cap is refused with both figures in the
message, rather than let the machine run out of memory part way through. The
cap is half of the machine's physical memory (4 GiB where it cannot be read);
set the environment variable ``GEOEXP_MEMORY_CAP_GB`` to change it.
"""

from __future__ import annotations

import math
import numbers
import os

from geoexp.errors import DesignError

__all__ = ["MAX_DRAWS", "MIN_DRAWS", "check_draws", "memory_cap_bytes", "monte_carlo_bytes"]

#: fewest Monte Carlo draws a spec may ask for (probabilities of 1% have ~10% error below this)
MIN_DRAWS = 100
#: most Monte Carlo draws any call may ask for, whatever the memory
MAX_DRAWS = 10_000_000
_FALLBACK_CAP = 4 * 1024**3
_GIB = 1024**3


def monte_carlo_bytes(n_draws: int, n_treated: int, n_units: int, n_conditions: int) -> int:
    """Bytes a Monte Carlo run of ``n_draws`` draws may hold at its peak.

    Parameters
    ----------
    n_draws : int
        Number of draws.
    n_treated : int
        Treated units per draw (the largest number, for designs where it varies).
    n_units : int
        Units in the layer.
    n_conditions : int
        Exposure conditions (treated, each spillover band, pure control).

    Returns
    -------
    int
        ``n_draws * (4 * n_treated + 8) + n_units * n_conditions * 8 * ceil(n_draws / 64)``.
    """
    draws = int(n_draws) * (4 * int(n_treated) + 8)
    bits = int(n_units) * int(n_conditions) * 8 * math.ceil(int(n_draws) / 64)
    return draws + bits


def memory_cap_bytes() -> int:
    """The memory a Monte Carlo run may use: ``GEOEXP_MEMORY_CAP_GB``, else half the machine's.

    Returns
    -------
    int
        The cap in bytes: ``GEOEXP_MEMORY_CAP_GB`` gigabytes (GiB, 1024**3
        bytes) if set, else half the machine's physical memory, else 4 GiB
        when the memory cannot be read.

    Raises
    ------
    geoexp.errors.DesignError
        ``GEOEXP_MEMORY_CAP_GB`` is not a positive number.
    """
    text = os.environ.get("GEOEXP_MEMORY_CAP_GB")
    if text:
        try:
            value = float(text)
        except ValueError:
            value = float("nan")
        if not (math.isfinite(value) and value > 0):
            raise DesignError(
                f"GEOEXP_MEMORY_CAP_GB must be a positive number of gigabytes, got {text!r}"
            )
        return int(value * _GIB)
    try:
        total = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (AttributeError, ValueError, OSError):
        return _FALLBACK_CAP
    return int(total) // 2 if total > 0 else _FALLBACK_CAP


def check_draws(
    n_draws: object,
    *,
    n_treated: int,
    n_units: int,
    n_conditions: int,
    minimum: int = 1,
    what: str = "n_draws",
    cap_bytes: int | None = None,
) -> int:
    """Check a number of Monte Carlo draws: an integer, within bounds and within memory.

    Parameters
    ----------
    n_draws : object
        The number asked for; an integral float such as ``1e4`` is accepted, a
        bool is not.
    n_treated, n_units, n_conditions : int
        Size of the design, for :func:`monte_carlo_bytes`.
    minimum : int
        Fewest draws allowed.
    what : str
        Name of the argument, for messages (``"draws"`` in a spec).
    cap_bytes : int, optional
        Memory cap; default :func:`memory_cap_bytes`.

    Returns
    -------
    int
        ``n_draws`` as an int.

    Raises
    ------
    geoexp.errors.DesignError
        Not a whole number, outside ``[minimum, MAX_DRAWS]``, or an estimate
        of memory above the cap (the message gives both).
    """
    if isinstance(n_draws, bool) or not isinstance(n_draws, numbers.Real):
        raise DesignError(
            f"{what} must be a whole number of Monte Carlo draws, got "
            f"{type(n_draws).__name__} {n_draws!r}"
        )
    if isinstance(n_draws, numbers.Integral):
        n = int(n_draws)
    elif math.isfinite(float(n_draws)) and float(n_draws).is_integer():
        n = int(float(n_draws))
    else:
        raise DesignError(f"{what} must be a whole number of Monte Carlo draws, got {n_draws!r}")
    if not minimum <= n <= MAX_DRAWS:
        raise DesignError(
            f"{what} must be between {minimum:,} and {MAX_DRAWS:,} Monte Carlo draws, got {n:,}"
        )
    need = monte_carlo_bytes(n, n_treated, n_units, n_conditions)
    cap = memory_cap_bytes() if cap_bytes is None else int(cap_bytes)
    if need > cap:
        most = max(0, n * cap // max(need, 1))
        raise DesignError(
            f"{what} = {n:,} Monte Carlo draws would need about {need / _GIB:,.2f} GiB of memory "
            f"({n_treated:,} treated of {n_units:,} units, {n_conditions} exposure conditions), "
            f"more than the cap of {cap / _GIB:,.2f} GiB (half the machine's memory unless "
            f"GEOEXP_MEMORY_CAP_GB says otherwise); ask for at most about {most:,} draws"
        )
    return n

"""Progress of long loops over draws, told to whoever listens (the command line draws a bar).

The library never prints progress itself: a loop over chunks of draws calls
:func:`tracked` once and the returned function after each chunk. Nothing
happens unless a caller installed a listener with :func:`listening` (the
command line does, on a terminal and without ``--quiet``). The listener is held
in a context variable, so it is scoped to the ``with`` block and to its thread.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from contextlib import contextmanager
from contextvars import ContextVar

__all__ = ["Listener", "listening", "tracked"]

# A listener is called with (what, total) when a loop starts and returns the function
# called with the number of steps done since the last call.
Listener = Callable[[str, int], Callable[[int], None]]

_LISTENER: ContextVar[Listener | None] = ContextVar("geoexp_progress", default=None)


def _ignore(steps: int) -> None:
    return None


def tracked(what: str, total: int) -> Callable[[int], None]:
    """Announce a loop of ``total`` steps; return the function to call with the steps done."""
    listener = _LISTENER.get()
    if listener is None:
        return _ignore
    return listener(what, int(total))


@contextmanager
def listening(listener: Listener | None) -> Iterator[None]:
    """Send the progress of loops run inside the block to ``listener`` (None: to nobody)."""
    token = _LISTENER.set(listener)
    try:
        yield
    finally:
        _LISTENER.reset(token)

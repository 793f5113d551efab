"""Where the heavy loops run: the engine choice, numba compiled on first use, and one thread policy.

Every hot loop of geoexp exists twice, a numba kernel and a numpy twin that
gives identical results. This module is the one place that

* turns the user's ``engine`` ("auto" | "numba" | "numpy") into the engine
  used (:func:`resolve_engine`): "auto" is numba when it imports, else the
  numpy twins with a one-time note; "numba" without numba installed is an
  error saying how to install it;
* imports numba and compiles kernels only when a numba kernel first runs
  (:func:`numba_module`, :func:`jit`, :func:`compile_kernels`), so importing
  geoexp stays fast and works without numba;
* keeps numba's threads, BLAS threads and the project's own worker threads
  from oversubscribing the cores (:func:`compute_threads`, :func:`thread_count`,
  :func:`limit_threads`).
"""

from __future__ import annotations

import os
import sys
import warnings
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager
from types import ModuleType
from typing import Any, Literal

from geoexp.errors import InputError, MissingPackageError

Engine = Literal["auto", "numba", "numpy"]
ENGINES = ("auto", "numba", "numpy")

_UNSET = object()
_numba: Any = _UNSET
_noted = False
_compiled: dict = {}
_controller: list = [None, -1]  # threadpoolctl controller and the module count it saw
_cap: list = [None]  # threads this process may use for kernels (set by limit_threads)


def numba_module() -> ModuleType | None:
    """The numba module, imported on first call; None when it is not installed."""
    global _numba
    if _numba is _UNSET:
        try:
            import numba
        except ImportError:
            _numba = None
        else:
            _numba = numba
    return _numba


def resolve_engine(engine: Engine) -> Literal["numba", "numpy"]:
    """The engine that runs for a request: "auto" is numba when it imports, else numpy.

    Raises
    ------
    InputError
        ``engine`` is not one of "auto", "numba", "numpy".
    MissingPackageError
        ``engine="numba"`` and numba is not installed.
    """
    global _noted
    if engine not in ENGINES:
        raise InputError(f"engine must be 'auto', 'numba' or 'numpy', got {engine!r}")
    if engine == "numpy":
        return "numpy"
    if numba_module() is not None:
        return "numba"
    if engine == "numba":
        raise MissingPackageError(
            "engine='numba' needs the Python package 'numba'. Install it with: pip install numba "
            "(or use engine='numpy': the same results, more slowly)"
        )
    if not _noted:
        _noted = True
        warnings.warn(
            "numba is not installed: geoexp runs its numpy kernels instead (the same results, "
            "more slowly). Install it with: pip install numba",
            RuntimeWarning,
            stacklevel=2,
        )
    return "numpy"


def jit(function: Callable, *, parallel: bool = False, inline: bool = False) -> Callable:
    """``function`` compiled by numba (cached on disk and per process), compiled on first call."""
    key = (function, parallel, inline)
    if key not in _compiled:
        numba = numba_module()
        if numba is None:
            resolve_engine("numba")  # raises the error saying how to install it
            raise AssertionError("unreachable: resolve_engine raised")
        options: dict[str, Any] = {"cache": True}
        if inline:
            options["inline"] = "always"
        else:
            options["nogil"] = True
        if parallel:
            options["parallel"] = True
        _compiled[key] = numba.njit(**options)(function)
    return _compiled[key]


def compile_kernels(
    namespace: dict, names: Iterable[str], *, parallel: bool = False, inline: bool = False
) -> None:
    """Replace the Python functions ``names`` of a module's ``namespace`` by their numba versions.

    numba resolves a kernel's calls to other functions through the module's
    globals when it compiles the kernel, so the callees must be replaced
    before the caller first runs. Calling this again does nothing.
    """
    for name in names:
        function = namespace[name]
        if not hasattr(function, "py_func"):
            namespace[name] = jit(function, parallel=parallel, inline=inline)


def cores() -> int:
    """Cores this process may run on."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - platforms without affinity masks
        return max(1, os.cpu_count() or 1)


def thread_count() -> int:
    """Threads for a parallel kernel: the cores available, at most numba's configured number.

    ``NUMBA_NUM_THREADS`` (numba's own setting) and :func:`limit_threads`
    lower it; nothing raises it above the cores this process may use.
    """
    numba = numba_module() if "numba" in sys.modules else None
    configured = int(numba.config.NUMBA_NUM_THREADS) if numba is not None else cores()
    capped = configured if _cap[0] is None else min(configured, _cap[0])
    return max(1, min(cores(), capped))


@contextmanager
def limit_threads(n_threads: int) -> Iterator[None]:
    """Cap the threads of every parallel kernel run inside at ``n_threads`` (restored on exit).

    For a process that shares its machine's cores with others of its kind,
    such as one of several workers of a cluster on one machine: each runs its
    kernels on its share of the cores, so that together they never run more
    threads than there are cores. BLAS is held to one thread inside
    :func:`compute_threads` already.
    """
    if isinstance(n_threads, bool) or not isinstance(n_threads, int) or n_threads < 1:
        raise InputError(f"n_threads must be a whole number >= 1, got {n_threads!r}")
    before = _cap[0]
    _cap[0] = n_threads if before is None else min(before, n_threads)
    try:
        yield
    finally:
        _cap[0] = before


def _blas_controller():
    """threadpoolctl's view of the loaded BLAS libraries, refreshed when modules were imported."""
    from threadpoolctl import ThreadpoolController

    if _controller[0] is None or _controller[1] != len(sys.modules):
        _controller[0] = ThreadpoolController()
        _controller[1] = len(sys.modules)
    return _controller[0]


@contextmanager
def compute_threads() -> Iterator[int]:
    """Run a hot section under the one thread policy; yields the threads a parallel kernel may use.

    Inside, BLAS libraries run on one thread (a parallel kernel already keeps
    every core busy, and many small matrix products lose more to thread
    start-up than they gain), and numba's parallel kernels get
    :func:`thread_count` threads. Everything is restored on exit. Wrap numba
    parallel kernels and loops of many small products (e.g. a variance
    computed block by block) in it::

        with compute_threads() as n_threads:
            ...
    """
    n_threads = thread_count()
    numba = _numba if _numba is not _UNSET else None
    with _blas_controller().limit(limits=1, user_api="blas"):
        if numba is None:
            yield n_threads
            return
        before = numba.get_num_threads()
        numba.set_num_threads(n_threads)
        try:
            yield n_threads
        finally:
            numba.set_num_threads(before)


@contextmanager
def matrix_threads() -> Iterator[int]:
    """BLAS on :func:`thread_count` threads for a few large matrix products; yields that number.

    For a section of large products only (each thousands of rows on a side),
    where BLAS's own threads pay off and nothing else runs beside them; in a
    worker held to one thread by :func:`limit_threads` it is one thread.
    Restored on exit, also inside :func:`compute_threads`.
    """
    n_threads = thread_count()
    with _blas_controller().limit(limits=n_threads, user_api="blas"):
        yield n_threads

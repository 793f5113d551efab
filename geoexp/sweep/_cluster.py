"""Where a sweep's tasks run: in this process, or as tasks on a Dask cluster.

Both back ends run the same task function on the same inputs, and every
task's result depends on its inputs alone (each candidate carries its own
seed), so a cluster gives bit-identical results to this process. On a
cluster the shared inputs (units, eligible mask, graph) are scattered to
every worker once, and each task holds its kernels to one thread
(:func:`geoexp._engine.limit_threads`, BLAS on one thread inside
:func:`geoexp._engine.compute_threads`): a machine running as many worker
threads as it has cores is never oversubscribed. Dask is an optional extra:
``pip install 'geoexp[cluster]'``.
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Iterator, Sequence
from typing import Any, Protocol

from geoexp._engine import limit_threads
from geoexp._optional import import_optional
from geoexp.errors import InputError


class Backend(Protocol):
    """Runs ``function(item, shared)`` for every item; yields (index, result) as they finish."""

    def run(
        self, function: Callable[[Any, Any], Any], items: Sequence[Any], shared: Any
    ) -> Iterator[tuple[int, Any]]:
        """Run every task; yield each result with its item's index."""
        ...

    def describe(self) -> str:
        """Where the tasks run, in words."""
        ...

    def close(self) -> None:
        """Release what the back end started."""
        ...


class LocalBackend:
    """Every task in this process, one after the other (numba kernels use this process's cores)."""

    def run(self, function, items, shared):
        """Run the tasks in order."""
        for i, item in enumerate(items):
            yield i, function(item, shared)

    def describe(self) -> str:
        """Where the tasks run."""
        return "this process"

    def close(self) -> None:
        """Nothing to release."""


def apply_to_shared(item: tuple, shared: Any) -> Any:
    """A task for any library function, called on the data sent once to every worker.

    ``item`` is (function, args, kwargs), called as
    ``function(shared, *args, **kwargs)``, e.g. a randomization test of a
    design sent once.

    Parameters
    ----------
    item : tuple
        ``(function, args, kwargs)`` of the task.
    shared : object
        The data every task shares (e.g. a design).

    Returns
    -------
    object
        What ``function`` returns.
    """
    function, args, kwargs = item
    return function(shared, *args, **kwargs)


def _one_thread_task(function: Callable[[Any, Any], Any], item: Any, shared: Any) -> Any:
    """A task on a worker: its kernels and BLAS on one thread, whatever the worker's machine."""
    with limit_threads(1):
        return function(item, shared)


def _prepare_worker() -> None:
    """Import the modules a sweep's tasks use, so that the first tasks do not pay for it."""
    import geoexp.power  # noqa: F401
    import geoexp.sweep  # noqa: F401


class DaskBackend:
    """Tasks on a Dask cluster: a local one of ``workers`` processes, or a running scheduler.

    Parameters
    ----------
    workers
        Start a local cluster of this many worker processes, one thread each.
    scheduler
        Address of a running scheduler, e.g. ``tcp://10.0.0.5:8786``.
    timeout
        Seconds to wait for the scheduler.
    """

    def __init__(
        self, *, workers: int | None = None, scheduler: str | None = None, timeout: float = 20
    ) -> None:
        if (workers is None) == (scheduler is None):
            raise InputError("give either a number of local workers or a scheduler address")
        distributed = import_optional("distributed", "cluster", "Running on a Dask cluster")
        self._cluster = None
        if scheduler is not None:
            try:
                self.client = distributed.Client(scheduler, timeout=f"{timeout}s")
            except (OSError, TimeoutError, ValueError) as err:
                raise InputError(
                    f"could not reach the Dask scheduler at {scheduler!r} within {timeout:g} s "
                    f"({err}); start one with 'dask scheduler' and workers with "
                    f"'dask worker {scheduler} --nthreads 1'"
                ) from None
            self._where = f"the Dask scheduler at {scheduler}"
        else:
            if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
                raise InputError(f"workers must be a whole number >= 1, got {workers!r}")
            self._cluster = distributed.LocalCluster(
                n_workers=workers,
                threads_per_worker=1,
                processes=True,
                dashboard_address=None,
                silence_logs=logging.ERROR,
            )
            self.client = distributed.Client(self._cluster)
            self._where = f"a local Dask cluster of {workers} worker process(es), 1 thread each"
        self._as_completed = distributed.as_completed
        self._shared: tuple[Any, Any] | None = None
        # import geoexp on every worker now, not inside the first tasks
        try:
            self.client.run(_prepare_worker)
        except ImportError as err:
            self.close()
            raise InputError(
                f"the Dask workers of {self._where} cannot import geoexp ({err}); install "
                "geoexp with the extra 'cluster' on every machine that runs a worker"
            ) from None

    def run(self, function, items, shared):
        """Scatter ``shared`` to every worker once, submit one task per item, yield as they finish.

        The same object given again (e.g. the layer of a second sweep on the
        same back end) is not sent again.
        """
        if self._shared is None or self._shared[0] is not shared:
            self._shared = (shared, self.client.scatter(shared, broadcast=True))
        shared_future = self._shared[1]
        futures = [
            self.client.submit(_one_thread_task, function, item, shared_future, pure=False)
            for item in items
        ]
        index = {future.key: i for i, future in enumerate(futures)}
        try:
            for future in self._as_completed(futures):
                yield index[future.key], future.result()
        finally:
            self.client.cancel(futures)

    def describe(self) -> str:
        """Where the tasks run."""
        n = len(self.client.scheduler_info().get("workers", {}))
        return f"{self._where} ({n} worker(s) connected)"

    def close(self) -> None:
        """Close the client, and the local cluster if this back end started it."""
        self._shared = None
        self.client.close()
        if self._cluster is not None:
            self._cluster.close()


def make_backend(*, workers: int | None = None, scheduler: str | None = None) -> Backend:
    """The back end that runs a sweep's tasks: this process, or a Dask cluster.

    Parameters
    ----------
    workers : int, optional
        Start a local Dask cluster of this many worker processes.
    scheduler : str, optional
        Address of a running Dask scheduler, e.g. ``tcp://10.0.0.5:8786``.

    Returns
    -------
    Backend
        A :class:`LocalBackend` when neither is given; else a :class:`DaskBackend`.
    """
    if workers is None and scheduler is None:
        return LocalBackend()
    return DaskBackend(workers=workers, scheduler=scheduler)

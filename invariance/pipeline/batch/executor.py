"""A ``concurrent.futures``-like executor on Dask, for code that maps over refits.

The partial-invariance search (:func:`invariance.partial.release_search`) confirms its
candidates by likelihood-ratio refits through ``executor.map``. :class:`DaskExecutor`
runs them on the batch runner's backend: an in-process local cluster by default, or an
existing cluster when a scheduler address is given. Every call runs with one BLAS
thread, as the batch tasks do::

    with DaskExecutor(workers=2) as ex:
        result = release_search(fit, stats, judge, verify=True, executor=ex)
"""

from __future__ import annotations

import logging
from typing import Any, Callable, Iterable, Iterator

from ...errors import SpecificationError
from .runner import _one_line, single_thread_blas

__all__ = ["DaskExecutor"]


def _limited(function: Callable, *args) -> Any:
    with single_thread_blas():
        return function(*args)


class DaskExecutor:
    """``map`` (results in input order, the first exception raised) over a Dask cluster.

    Parameters
    ----------
    scheduler
        Address of an existing scheduler; ``None`` starts a local cluster.
    workers
        Workers of the local cluster (one thread each).
    processes
        Local cluster with worker processes instead of threads.
    """

    def __init__(self, *, scheduler: str | None = None, workers: int = 2, processes: bool = False) -> None:
        if int(workers) != workers or workers < 1:
            raise SpecificationError(f"A Dask executor needs at least one worker; got {workers!r}.")
        self.scheduler, self.workers, self.processes = scheduler, int(workers), bool(processes)
        self._client = self._cluster = None

    def __enter__(self) -> "DaskExecutor":
        from distributed import Client, LocalCluster  # 0.5 s to import: only when a cluster is asked for

        if self.scheduler is None:
            self._cluster = LocalCluster(n_workers=self.workers, threads_per_worker=1, processes=self.processes,
                                         dashboard_address=":0", silence_logs=logging.CRITICAL)
            self._client = Client(self._cluster)
        else:
            try:
                self._client = Client(self.scheduler, timeout="10s")
            except (OSError, TimeoutError) as exc:
                raise SpecificationError(
                    f"Cannot reach the Dask scheduler at {self.scheduler!r} ({_one_line(exc)}); check the address."
                ) from None
        return self

    def map(self, function: Callable, *iterables: Iterable) -> Iterator[Any]:
        """Apply ``function`` to the items of ``iterables`` on the cluster, in order."""
        if self._client is None:
            raise SpecificationError("Use the DaskExecutor in a with block (it starts the cluster there).")
        columns = [list(it) for it in iterables]
        n = min((len(c) for c in columns), default=0)
        futures = self._client.map(_limited, [function] * n, *[c[:n] for c in columns], pure=False)
        return iter(self._client.gather(futures))

    def shutdown(self, wait: bool = True) -> None:
        """Close the client and the local cluster it started."""
        if self._client is not None:
            self._client.close()
        if self._cluster is not None:
            self._cluster.close()
        self._client = self._cluster = None

    def __exit__(self, *exc) -> None:
        self.shutdown()

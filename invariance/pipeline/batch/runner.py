"""Run many independent tasks on Dask (dask.distributed) and collect one summary table.

A :class:`Task` is a module-level function plus keyword arguments; the runner calls
``function(**kwargs, seed=seed)`` with a seed derived deterministically from the batch's
base seed and the task's position (:func:`task_seed`), so a batch gives the same
results on one worker, on many, or run one by one (``workers=0``).

Execution backends
------------------
* default: an in-process ``LocalCluster`` (``processes=False``: worker threads in this
  process, nothing to pickle, starts in a fraction of a second); ``processes=True``
  starts worker processes instead, which sidesteps the interpreter lock;
* ``scheduler="tcp://host:8786"``: an existing cluster (the task functions must be
  importable on its workers);
* ``workers=0``: no Dask at all, tasks run one by one in this process.

While a batch runs in this process, the BLAS library is limited to one thread
(threadpoolctl): the model matrices are small, and a multi-threaded BLAS on a busy
machine made a 138 x 138 Cholesky factorization 200 times slower than one thread did
(docs/many_groups.md). Each task also runs under that limit on its worker, whether
a thread, a local process or a remote machine.

A task that raises records its error as one line (``ExceptionName: message``) and the
other tasks go on. Progress goes to stderr when it is a terminal and ``quiet`` is false.
"""

from __future__ import annotations

import logging
import sys
import time
import uuid
import warnings
from dataclasses import dataclass, field
from contextlib import contextmanager
from typing import Any, Callable, Iterable, Iterator, Mapping, Sequence

import numpy as np

from threadpoolctl import threadpool_limits
import pandas as pd

from ...decide.verdict import supported_level
from ...errors import InvarianceWarning, SpecificationError
from ...escape import write_csv

__all__ = ["Task", "TaskOutcome", "BatchResult", "run_batch", "task_seed", "highest_level", "Progress", "single_thread_blas"]

LEVEL_ORDER = ("configural", "metric", "scalar", "strict")


@contextmanager
def single_thread_blas() -> Iterator[None]:
    """Limit BLAS/OpenMP thread pools to one thread inside the block."""
    with threadpool_limits(limits=1):
        yield


def task_seed(base_seed: int, index: int) -> int:
    """Seed of task ``index``: a numpy ``SeedSequence`` of the base seed, spawned at ``index``."""
    seq = np.random.SeedSequence(entropy=int(base_seed), spawn_key=(int(index),))
    return int(seq.generate_state(1, dtype=np.uint64)[0] >> np.uint64(1))


@dataclass(frozen=True)
class Task:
    """One unit of work.

    Parameters
    ----------
    name
        Label in the summary table (unique within a batch).
    function
        A module-level callable ``function(**kwargs, seed=int) -> Mapping``.
    kwargs
        Plain keyword arguments (picklable when workers are processes or remote).
    """

    name: str
    function: Callable[..., Any]
    kwargs: Mapping[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class TaskOutcome:
    """What one task gave: ``status`` is ``ok`` or ``failed``; ``error`` one line or ``""``."""

    index: int
    name: str
    status: str
    seed: int
    seconds: float
    value: Any = None
    error: str = ""

    @property
    def ok(self) -> bool:
        return self.status == "ok"


def highest_level(levels: Sequence[Mapping]) -> str | None:
    """Highest level of an unbroken run of supported decisions from the first level
    (``holds`` or ``holds_partially``): :func:`invariance.decide.verdict.supported_level`,
    for results that lack the run's own ``supported_level``."""
    return supported_level(levels)


def _flagged_text(flagged) -> str:
    if not flagged:
        return ""
    out = []
    for f in flagged:
        if isinstance(f, Mapping):
            bits = [str(f.get(k)) for k in ("parameter", "item", "factor") if f.get(k)]
            grp = f.get("groups")
            out.append(":".join(bits) + (f"[{','.join(map(str, grp))}]" if grp else ""))
        else:
            out.append(str(f))
    return "; ".join(out)


def _summary_fields(value) -> dict:
    if not isinstance(value, Mapping):
        return {"highest_level": "", "partial": "", "flagged": ""}
    level = value.get("highest_level", value.get("supported_level"))
    if level is None and isinstance(value.get("levels"), Sequence):
        level = highest_level(value["levels"])
    partial = value.get("supported_partially")
    return {"highest_level": level or "", "partial": "" if partial is None else bool(partial),
            "flagged": _flagged_text(value.get("flagged"))}


@dataclass(frozen=True)
class BatchResult:
    """Every task's outcome, in task order, and the backend that ran them."""

    outcomes: tuple[TaskOutcome, ...]
    backend: str
    base_seed: int
    seconds: float

    @property
    def values(self) -> list[Any]:
        return [o.value for o in self.outcomes]

    @property
    def n_failed(self) -> int:
        return sum(not o.ok for o in self.outcomes)

    def table(self):
        """One row per task: task, status, highest_level, partial (whether it holds only
        partially), flagged, seed, seconds, error."""

        rows = []
        for o in self.outcomes:
            rows.append(
                {"task": o.name, "status": o.status, **_summary_fields(o.value), "seed": str(o.seed),
                 "seconds": round(o.seconds, 3), "error": o.error}
            )
        cols = ["task", "status", "highest_level", "partial", "flagged", "seed", "seconds", "error"]
        return pd.DataFrame(rows, columns=cols)

    def write_csv(self, path) -> None:
        """Write the summary table (batch.csv)."""
        write_csv(self.table(), path)


def _one_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return f"{type(exc).__name__}: {text[0] if text else ''}".rstrip(": ")


def _guarded(function: Callable, kwargs: Mapping, seed: int) -> tuple[str, Any, str, float]:
    start = time.perf_counter()
    try:
        with single_thread_blas():  # also in worker processes and on remote workers
            value = function(**dict(kwargs), seed=seed)
        return "ok", value, "", time.perf_counter() - start
    except Exception as exc:  # noqa: BLE001 - a failing task must not stop the batch
        return "failed", None, _one_line(exc), time.perf_counter() - start


class Progress:
    """``done/total`` counter on stderr; silent when ``quiet`` or stderr is not a terminal."""

    def __init__(self, total: int, *, label: str = "batch", quiet: bool = False, stream=None) -> None:
        self.stream = sys.stderr if stream is None else stream
        self.on = not quiet and getattr(self.stream, "isatty", lambda: False)()
        self.total, self.done, self.failed, self.label = total, 0, 0, label
        self.t0 = time.perf_counter()

    def step(self, ok: bool = True) -> None:
        self.done += 1
        self.failed += not ok
        if self.on:
            el = time.perf_counter() - self.t0
            fail = f", {self.failed} failed" if self.failed else ""
            self.stream.write(f"\r{self.label}: {self.done}/{self.total} done{fail} ({el:.1f} s)")
            if self.done == self.total:
                self.stream.write("\n")
            self.stream.flush()


def _check_options(tasks: Sequence[Task], workers: int) -> None:
    if not isinstance(workers, (int, np.integer)) or workers < 0:
        raise SpecificationError(f"The number of workers must be a whole number >= 0; got {workers!r}.")
    names = [t.name for t in tasks]
    if len(set(names)) != len(names):
        dup = next(n for n in names if names.count(n) > 1)
        raise SpecificationError(f"Task names must be unique in a batch; {dup!r} appears twice: rename one.")
    for t in tasks:
        if not callable(t.function):
            raise SpecificationError(f"Task {t.name!r} has no callable function; give a module-level function.")


def run_batch(
    tasks: Iterable[Task],
    *,
    seed: int = 0,
    scheduler: str | None = None,
    workers: int = 2,
    processes: bool = False,
    quiet: bool = False,
    label: str = "batch",
) -> BatchResult:
    """Run ``tasks`` and collect their outcomes in task order.

    Parameters
    ----------
    tasks
        The :class:`Task` list.
    seed
        Base seed; task ``k`` gets :func:`task_seed` ``(seed, k)``.
    scheduler
        Address of an existing Dask scheduler; ``None`` starts a local cluster.
    workers
        Workers of the local cluster (one thread each); 0 runs the tasks one by one
        without Dask.
    processes
        Local cluster with worker processes instead of threads.
    quiet
        No progress on stderr.
    label
        Name shown in the progress line.

    Returns
    -------
    BatchResult
    """
    tasks = list(tasks)
    _check_options(tasks, workers)
    seeds = [task_seed(seed, k) for k in range(len(tasks))]
    progress = Progress(len(tasks), label=label, quiet=quiet)
    t0 = time.perf_counter()
    results: list[tuple] = [None] * len(tasks)  # type: ignore[list-item]
    with warnings.catch_warnings(), single_thread_blas():
        # the problems reach each task's result; do not print them from every worker
        warnings.simplefilter("ignore", InvarianceWarning)
        if scheduler is None and workers == 0:
            backend = "one by one in this process"
            for k, t in enumerate(tasks):
                results[k] = _guarded(t.function, t.kwargs, seeds[k])
                progress.step(results[k][0] == "ok")
        else:
            backend = _run_dask(tasks, seeds, results, progress, scheduler=scheduler, workers=workers,
                                processes=processes)
    outcomes = tuple(
        TaskOutcome(index=k, name=t.name, status=r[0], seed=seeds[k], seconds=float(r[3]), value=r[1], error=r[2])
        for k, (t, r) in enumerate(zip(tasks, results))
    )
    return BatchResult(outcomes=outcomes, backend=backend, base_seed=int(seed), seconds=time.perf_counter() - t0)


def _run_dask(tasks, seeds, results, progress, *, scheduler, workers, processes) -> str:
    try:
        from distributed import Client, LocalCluster, as_completed  # 0.5 s to import: only on Dask runs
    except ImportError:  # pragma: no cover - dependency declared in pyproject
        raise SpecificationError(
            "Batch runs need dask.distributed; install it with: pip install 'dask[distributed]'."
        ) from None
    cluster = None
    if scheduler is None:
        cluster = LocalCluster(
            n_workers=int(workers), threads_per_worker=1, processes=processes,
            dashboard_address=":0", silence_logs=logging.CRITICAL,
        )
        client = Client(cluster)
        kind = ("process" if processes else "thread") + ("es" if processes and workers != 1 else "")
        kind += "s" if not processes and workers != 1 else ""
        backend = f"local Dask cluster, {workers} worker {kind}"
    else:
        try:
            client = Client(scheduler, timeout="10s")
        except (OSError, TimeoutError) as exc:
            raise SpecificationError(
                f"Cannot reach the Dask scheduler at {scheduler!r} ({_one_line(exc)}); check the address "
                "or leave it out to use a local cluster."
            ) from None
        backend = f"Dask scheduler {scheduler}"
    try:
        futures = {}
        token = uuid.uuid4().hex[:12]
        for k, t in enumerate(tasks):
            fut = client.submit(_guarded, t.function, t.kwargs, seeds[k], pure=False, key=f"invariance-{token}-{k}")
            futures[fut] = k
        for fut in as_completed(list(futures)):
            k = futures[fut]
            try:
                results[k] = fut.result()
            except Exception as exc:  # worker lost, unpicklable result, ...
                results[k] = ("failed", None, _one_line(exc), 0.0)
            progress.step(results[k][0] == "ok")
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
    return backend

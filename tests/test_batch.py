"""Batch runner on Dask: same results as one by one, failures recorded, seeds fixed.

Issue 8 acceptance checks; the tasks are engine-level fits of invented simulated data.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from invariance import SpecificationError, Structure
from invariance.pipeline.batch import Population, Task, highest_level, replicate, run_batch, task_seed
from invariance.pipeline.batch.runner import BatchResult

STRUCT = Structure({"F": ("a", "b", "c", "d")}, family="single")
LAM = np.array([[0.7], [0.6], [0.8], [0.65]])


def _population(shift: float = 0.0) -> Population:
    th = np.diag(1 - LAM[:, 0] ** 2)
    nu = np.array([2.0, 2.5, 3.0, 1.5])
    mats = []
    for k, (m, v) in enumerate(((0.0, 1.0), (0.3, 1.2))):
        nug = nu + (np.array([0, shift, 0, 0]) if k else 0)
        mats.append((LAM, np.zeros((1, 1)), np.eye(1) * v, th, nug, np.array([m])))
    return Population(STRUCT, ("g1", "g2"), tuple(mats))


def seeded_fit(*, n: int, seed: int) -> dict:
    """A task that uses the runner's seed: simulate and fit two levels."""
    out = replicate(population=_population(), sizes=(n, n), levels=("configural", "metric"), data_seed=seed)
    return {"chi2": out["fits"]["metric"]["chi2"], "dchi2": out["steps"]["metric"]["dchi2"]}


def broken(*, seed: int) -> dict:
    raise ValueError("deliberately broken task\nsecond line that must not reach the table")


def _tasks(k: int = 6) -> list[Task]:
    return [Task(f"rep{r}", seeded_fit, {"n": 150 + 10 * r}) for r in range(k)]


def test_two_workers_equal_one_by_one():
    # issue 8: a batch on a local cluster with two workers gives the results of the same tasks run one by one
    tasks = _tasks()
    par = run_batch(tasks, seed=11, workers=2, quiet=True)
    ser = run_batch(tasks, seed=11, workers=0, quiet=True)
    assert "2 worker" in par.backend and "one by one" in ser.backend
    assert [o.status for o in par.outcomes] == ["ok"] * len(tasks)
    assert [o.seed for o in par.outcomes] == [o.seed for o in ser.outcomes]
    for a, b in zip(par.values, ser.values):
        assert a == b  # identical floats: same seeds, same arithmetic
    # and directly, task by task, without the runner
    direct = [seeded_fit(n=150 + 10 * r, seed=task_seed(11, r)) for r in range(len(tasks))]
    assert par.values == direct
    # a different base seed gives different samples
    other = run_batch(tasks[:2], seed=12, workers=0, quiet=True)
    assert other.values[0] != par.values[0]


def test_broken_task_is_reported_and_rest_complete(tmp_path):
    tasks = _tasks(4)
    tasks.insert(2, Task("bad", broken))
    res = run_batch(tasks, seed=3, workers=2, quiet=True)
    assert res.n_failed == 1
    bad = res.outcomes[2]
    assert bad.status == "failed" and bad.error == "ValueError: deliberately broken task"
    assert all(o.ok for k, o in enumerate(res.outcomes) if k != 2)
    path = tmp_path / "batch.csv"
    res.write_csv(path)
    table = pd.read_csv(path, keep_default_na=False)
    assert list(table.columns) == ["task", "status", "highest_level", "partial", "flagged", "seed", "seconds", "error"]
    assert table["status"].tolist() == ["ok", "ok", "failed", "ok", "ok"]
    assert table.loc[2, "error"] == "ValueError: deliberately broken task"


def test_seeds_are_deterministic_and_distinct():
    seeds = [task_seed(2026, k) for k in range(1000)]
    assert len(set(seeds)) == 1000
    assert seeds == [task_seed(2026, k) for k in range(1000)]
    assert task_seed(2026, 0) != task_seed(2027, 0)
    # numpy SeedSequence spawning: the same stream as spawning children in order
    child = np.random.SeedSequence(2026).spawn(3)[2]
    assert int(child.generate_state(1, dtype=np.uint64)[0] >> np.uint64(1)) == task_seed(2026, 2)


def test_summary_levels_and_flagged():
    levels = [{"level": "configural", "decision": "holds"}, {"level": "metric", "decision": "holds_partially"},
              {"level": "scalar", "decision": "fails"}, {"level": "strict", "decision": "holds"}]
    assert highest_level(levels) == "metric"
    assert highest_level([{"level": "configural", "decision": "fails"}]) is None
    from invariance.pipeline.batch.runner import TaskOutcome

    out = TaskOutcome(0, "t", "ok", 1, 0.1, {"levels": levels, "flagged": [
        {"parameter": "intercept", "item": "x3", "groups": ["b"]}]})
    table = BatchResult((out,), "test", 0, 0.0).table()
    assert table.loc[0, "highest_level"] == "metric"
    assert table.loc[0, "flagged"] == "intercept:x3[b]"


def test_bad_options():
    with pytest.raises(SpecificationError, match="unique"):
        run_batch([Task("a", broken), Task("a", broken)], workers=0, quiet=True)
    with pytest.raises(SpecificationError, match="workers"):
        run_batch([Task("a", broken)], workers=-1, quiet=True)


def test_progress_only_on_a_terminal():
    import io

    from invariance.pipeline.batch.runner import Progress

    class Tty(io.StringIO):
        def isatty(self):
            return True

    tty, pipe = Tty(), io.StringIO()
    for stream, quiet in ((tty, False), (pipe, False)):
        pr = Progress(2, label="plan", quiet=quiet, stream=stream)
        pr.step(True)
        pr.step(False)
    assert "plan: 2/2 done, 1 failed" in tty.getvalue() and pipe.getvalue() == ""
    quiet = Tty()
    pr = Progress(1, quiet=True, stream=quiet)
    pr.step()
    assert quiet.getvalue() == ""


def test_worker_processes_give_the_same_results():
    # the process backend pickles the tasks and their arguments (Population included)
    pop = _population()
    tasks = [Task(f"r{r}", replicate, {"population": pop, "sizes": (120, 120), "levels": ("configural", "metric"),
                                       "data_seed": r}) for r in range(3)]
    par = run_batch(tasks, workers=1, processes=True, quiet=True)
    ser = run_batch(tasks, workers=0, quiet=True)
    assert par.backend == "local Dask cluster, 1 worker process"
    assert [o.status for o in par.outcomes] == ["ok"] * 3
    assert par.values == ser.values


def test_existing_cluster_by_scheduler_address():
    import logging

    from distributed import LocalCluster

    with LocalCluster(n_workers=1, threads_per_worker=1, processes=False, dashboard_address=":0",
                      silence_logs=logging.ERROR) as cluster:
        res = run_batch(_tasks(2), seed=11, scheduler=cluster.scheduler_address, quiet=True)
        assert res.backend == f"Dask scheduler {cluster.scheduler_address}"
    ser = run_batch(_tasks(2), seed=11, workers=0, quiet=True)
    assert res.values == ser.values


def test_dask_executor_runs_the_lr_verification_refits():
    # the partial search's likelihood-ratio refits (issue 8: "on the same executor"):
    # a Dask executor gives the same search as the plain in-process map
    from invariance import build_level, fit
    from invariance.pipeline.batch import DaskExecutor, Shift, simulate_groups
    from invariance.data.moments import stats_from_arrays
    from invariance.partial import release_search
    from scipy import stats as st

    pop = _population().shifted(Shift("intercept", "b", 0.5))
    data = simulate_groups(pop, (400, 400), seed=5)
    stats = stats_from_arrays(data, pop.groups, STRUCT.items)
    metric = fit(build_level(STRUCT, stats.names, "metric"), stats)
    scalar = fit(build_level(STRUCT, stats.names, "scalar"), stats)
    judge = lambda x: st.chi2.sf(x.fit.chi2 - metric.fit.chi2, x.spec.df - metric.spec.df) > 0.05
    plain = release_search(scalar, stats, judge, verify=True)
    with DaskExecutor(workers=2) as ex:
        on_dask = release_search(scalar, stats, judge, verify=True, executor=ex)
    assert [(s.item, s.parameter) for s in plain.releases] == [("b", "intercept")]
    assert [(s.item, s.parameter, s.lr_statistic) for s in on_dask.releases] == \
        [(s.item, s.parameter, s.lr_statistic) for s in plain.releases]
    with pytest.raises(SpecificationError, match="with block"):
        DaskExecutor().map(abs, [1])

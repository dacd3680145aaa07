"""Benchmarks of the many-runs layer (a script, not a test: run it by hand).

1. Speed-up of 200 Monte Carlo replications from one to two Dask workers, with worker
   threads (the default, in-process) and with worker processes.
2. Time of the scalar fit against the number of groups (2 to 64).

    PYTHONPATH=. python tests/benchmarks/bench_batch.py [--replications 200]

Prints the figures that docs/many_groups.md reports.
"""

from __future__ import annotations

import argparse
import os
import time
import warnings

import numpy as np

from invariance import Structure, build_level, fit
from invariance.pipeline.batch import Population, Task, replicate, run_batch, task_seed
from invariance.data.moments import stats_from_arrays

ITEMS = ("a", "b", "c", "d", "e", "f")
STRUCT = Structure({"F": ITEMS}, family="single")
LAM = np.array([[0.7], [0.6], [0.8], [0.65], [0.75], [0.55]])
NU = np.array([2.0, 2.5, 3.0, 1.5, 2.2, 2.8])


def population(G: int, seed: int = 5) -> Population:
    rng = np.random.default_rng(seed)
    th = np.diag(1 - LAM[:, 0] ** 2)
    mats = []
    for g in range(G):
        m, v = (0.0, 1.0) if g == 0 else (rng.normal(0, 0.4), rng.uniform(0.7, 1.3))
        mats.append((LAM, np.zeros((1, 1)), np.eye(1) * v, th, NU, np.array([m])))
    return Population(STRUCT, tuple(f"g{g:02d}" for g in range(G)), tuple(mats))


def bench_workers(reps: int) -> None:
    pop = population(2)
    tasks = [Task(f"r{r}", replicate, {"population": pop, "sizes": (300, 300),
                                        "levels": ("configural", "metric", "scalar"), "data_seed": task_seed(1, r)})
             for r in range(reps)]
    print(f"cores visible: {os.cpu_count()}; load average {os.getloadavg()[0]:.1f}; "
          f"{reps} replications x 3 fits (6 items, 2 groups, N = 300 each)")
    t = time.perf_counter()
    base = run_batch(tasks, workers=0, quiet=True)
    serial = time.perf_counter() - t
    busy = lambda r: sum(o.seconds for o in r.outcomes)
    print(f"  one by one (no Dask): {serial:7.2f} s (time inside the tasks {busy(base):.2f} s)")
    for processes in (False, True):
        times, inside = {}, {}
        for w in (1, 2):
            t = time.perf_counter()
            res = run_batch(tasks, workers=w, processes=processes, quiet=True)
            times[w] = time.perf_counter() - t
            inside[w] = busy(res)
            assert res.values == base.values, "parallel results differ from the one-by-one run"
        kind = "processes" if processes else "threads"
        print(f"  Dask {kind:9s}: 1 worker {times[1]:7.2f} s, 2 workers {times[2]:7.2f} s, "
              f"speed-up {times[1] / times[2]:.2f}x (time inside the tasks {inside[1]:.2f} s and {inside[2]:.2f} s: "
              "a sum that grows with 2 workers means the tasks competed, for the interpreter lock or for the cores)")


def bench_groups(max_groups: int = 64, n: int = 300, *, single: bool = True) -> None:
    from invariance.pipeline.batch.runner import single_thread_blas
    from contextlib import nullcontext

    blas = "BLAS limited to 1 thread" if single else "default BLAS threads"
    print(f"scalar fit time by number of groups (6 items, one factor, N = {n} per group; {blas})")
    G = 2
    while G <= max_groups:
        pop = population(G)
        rng_seed = 100 + G
        from invariance.pipeline.batch import simulate_groups

        data = simulate_groups(pop, (n,) * G, rng_seed)
        stats = stats_from_arrays(data, pop.groups, ITEMS)
        spec = build_level(STRUCT, stats.names, "scalar")
        best = np.inf
        for _ in range(3 if G <= 16 else 1):
            t = time.perf_counter()
            with warnings.catch_warnings(), (single_thread_blas() if single else nullcontext()):
                warnings.simplefilter("ignore")
                res = fit(spec, stats)
            best = min(best, time.perf_counter() - t)
        print(f"  G = {G:3d}: {spec.n_params:4d} parameters, {best:7.3f} s, {res.iterations} iterations, "
              f"converged {res.converged}")
        G *= 2


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--replications", type=int, default=200)
    ap.add_argument("--max-groups", type=int, default=64)
    args = ap.parse_args()
    bench_workers(args.replications)
    bench_groups(args.max_groups, single=True)
    bench_groups(min(args.max_groups, 16), single=False)


if __name__ == "__main__":
    main()

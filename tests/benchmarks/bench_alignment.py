"""Monte Carlo check of the alignment standard errors (a script, not a test).

Simulates R replications of a G-group one-factor population with two noninvariant
intercepts, aligns each, and compares the spread of the aligned means across
replications with the average delta-method standard error (ratio near 1 means the SEs
are right), plus the coverage of 95% intervals and the time per alignment.

    PYTHONPATH=. python tests/benchmarks/bench_alignment.py [--replications 100] [--groups 10]
"""

from __future__ import annotations

import argparse
import time
import warnings

import numpy as np

from invariance import Structure, build_level, fit
from invariance.partial.alignment import align
from invariance.pipeline.batch import Population, Task, run_batch, simulate_groups
from invariance.data.moments import stats_from_arrays

ITEMS = ("a", "b", "c", "d", "e")
STRUCT = Structure({"F": ITEMS}, family="single")


def population(G: int) -> tuple[Population, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(99)
    lam = np.array([[0.8], [0.7], [0.6], [0.75], [0.65]])
    th = np.diag(1 - 0.8 * lam[:, 0] ** 2)
    nu = np.array([3.0, 2.5, 2.8, 3.1, 2.6])
    alpha = np.r_[0.0, rng.normal(0, 0.4, G - 1)]
    psi = np.r_[1.0, rng.uniform(0.7, 1.3, G - 1)]
    mats = []
    for g in range(G):
        nug = nu + (np.array([0, 0, 0.5, 0, 0]) if g in (1, 2) else 0)
        mats.append((lam, np.zeros((1, 1)), np.eye(1) * psi[g], th, nug, np.array([alpha[g]])))
    return Population(STRUCT, tuple(f"g{g:02d}" for g in range(G)), tuple(mats)), alpha, psi


def one(*, population: Population, n: int, seed: int) -> dict:
    data = simulate_groups(population, (n,) * len(population.groups), seed)
    stats = stats_from_arrays(data, population.groups, ITEMS)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = fit(build_level(STRUCT, stats.names, "configural"), stats)
    t = time.perf_counter()
    al = align(res)
    return {"means": [al.means["F"][g] for g in stats.names], "se": [al.means_se["F"][g] for g in stats.names],
            "seconds": time.perf_counter() - t}


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--replications", type=int, default=100)
    ap.add_argument("--groups", type=int, default=10)
    ap.add_argument("--n", type=int, default=300)
    args = ap.parse_args()
    pop, alpha, _ = population(args.groups)
    tasks = [Task(f"r{r}", one, {"population": pop, "n": args.n}) for r in range(args.replications)]
    res = run_batch(tasks, seed=17, workers=0)
    ok = [o.value for o in res.outcomes if o.ok]
    m = np.array([v["means"] for v in ok])[:, 1:]
    se = np.array([v["se"] for v in ok])[:, 1:]
    sd = m.std(axis=0, ddof=1)
    cover = np.mean(np.abs(m - alpha[1:]) <= 1.96 * se)
    print(f"{len(ok)} replications ({res.n_failed} failed), {args.groups} groups, N = {args.n} per group")
    print(f"  mean bias of aligned means: {np.mean(m.mean(axis=0) - alpha[1:]):+.4f}")
    print(f"  empirical SD / mean SE per group: {np.round(sd / se.mean(axis=0), 2)}")
    print(f"  median ratio {np.median(sd / se.mean(axis=0)):.2f}; 95% interval coverage {cover:.3f}")
    print(f"  time per alignment: {np.median([v['seconds'] for v in ok]):.3f} s")


if __name__ == "__main__":
    main()

"""Engine benchmark (a script, not a test): prints timings measured in this one run.

1. The configural Holzinger & Swineford model by school against semopy's two per-school
   fits (shared with bench_speed.py, which prints the issue-12 targets).
2. The scalar model of a 12-item bifactor structure (general + 3 specific factors) at 2,
   8 and 32 groups (N = 500 per group), with time per group. Target: no worse than
   linear in the number of groups.

Run:  python tests/benchmarks/bench_engine.py [--repeat N]
"""

from __future__ import annotations

import argparse
import statistics
import time

import numpy as np
import pandas as pd
from bench_speed import bench_holzinger


def _best(fn, repeat):
    times = []
    for _ in range(repeat):
        t = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t)
    return statistics.median(times), out


def _bifactor_data(n_groups, n, rng):
    from invariance.data.simulate import draw_group, implied_from_matrices

    items = [f"i{k:02d}" for k in range(12)]
    lam = np.zeros((12, 4))
    lam[:, 3] = rng.uniform(0.5, 0.8, 12)
    for j in range(3):
        lam[4 * j : 4 * j + 4, j] = rng.uniform(0.3, 0.5, 4)
    theta = np.diag(rng.uniform(0.3, 0.6, 12))
    nu = rng.uniform(2, 4, 12)
    frames = []
    for g in range(n_groups):
        psi = np.diag(rng.uniform(0.8, 1.2, 4)) if g else np.eye(4)
        alpha = rng.normal(0, 0.2, 4) if g else np.zeros(4)
        sigma, mu = implied_from_matrices(lam, psi, theta, nu, alpha)
        f = pd.DataFrame(draw_group(n, sigma, mu, rng), columns=items)
        f["grp"] = f"g{g:02d}"
        frames.append(f)
    return items, pd.concat(frames, ignore_index=True)


def bench_groups(repeat):
    import invariance as inv

    rng = np.random.default_rng(1)
    print("Scalar model, 12-item bifactor (general + 3 specific), N = 500 per group")
    base = None
    for G in (2, 8, 32):
        items, data = _bifactor_data(G, 500, rng)
        st = inv.Structure({"s1": items[0:4], "s2": items[4:8], "s3": items[8:12]}, family="bifactor", general="gen")
        stats = inv.sample_stats(data, items, "grp")
        spec = inv.build_level(st, stats.names, "scalar")
        t, r = _best(lambda: inv.fit(spec, stats), repeat)
        per = t / G
        base = base or per
        print(
            f"  {G:3d} groups: {t * 1e3:8.1f} ms  ({per * 1e3:6.2f} ms per group, "
            f"{per / base:4.2f} x the 2-group rate)  params {spec.n_params:5d}  iterations {r.iterations}  converged {r.converged}"
        )


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=7)
    a = ap.parse_args()
    bench_holzinger(a.repeat)
    bench_groups(max(3, a.repeat // 2))


if __name__ == "__main__":
    main()

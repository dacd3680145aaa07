"""Benchmark: the ordinal level sequence (configural .. strict, DWLS with robust
statistics and robust differences) for a bifactor model of 12 five-category items,
four groups of 2000 cases (invented population).

Run: PYTHONPATH=. python tests/benchmarks/bench_ordinal_levels.py
"""

from __future__ import annotations

import os
import sys
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.dirname(HERE))
sys.path.insert(0, os.path.dirname(os.path.dirname(HERE)))

from ordinal_sim import simulate_bifactor  # noqa: E402

from invariance.estimate.dwls_robust import dwls_difference, fit_dwls  # noqa: E402
from invariance.model import Structure  # noqa: E402
from invariance.model.ordinal_levels import ORDINAL_LEVELS, build_ordinal_level  # noqa: E402
from invariance.data.ordinal_stats import ordinal_stats_from_arrays  # noqa: E402


def main() -> None:
    rng = np.random.default_rng(12)
    items = [f"q{i + 1}" for i in range(12)]
    st = Structure(factors={f"s{k + 1}": tuple(items[4 * k : 4 * k + 4]) for k in range(3)},
                   family="bifactor", general="gen")
    lg = rng.uniform(0.5, 0.65, 12)
    ls = rng.uniform(0.3, 0.45, 12)
    cuts = np.array([-1.3, -0.5, 0.3, 1.1])[None, :] + rng.uniform(-0.3, 0.3, (12, 1))
    blocks = np.repeat(np.arange(3), 4)
    groups = ["g1", "g2", "g3", "g4"]
    arrays = [simulate_bifactor(rng, 2000, loads_g=lg, loads_s=ls, blocks=blocks, cuts=cuts, mean=0.1 * k)
              for k in range(4)]
    t0 = time.perf_counter()
    ost = ordinal_stats_from_arrays(arrays, groups, items)
    t1 = time.perf_counter()
    fits = {}
    for lv in ORDINAL_LEVELS:
        s = time.perf_counter()
        fits[lv] = fit_dwls(build_ordinal_level(st, groups, lv, ost.n_categories), ost)
        r = fits[lv]
        print(f"{lv:11s} T={r.fit.chi2:9.2f} df={r.fit.df:4d} T_mv={r.extra['robust']['chi2_scaled_shifted']:8.2f} "
              f"p={r.extra['robust']['pvalue_scaled_shifted']:.3f} iter={r.iterations:3d} {time.perf_counter() - s:.2f}s")
    for a, b in zip(ORDINAL_LEVELS[:-1], ORDINAL_LEVELS[1:]):
        d = dwls_difference(fits[b], fits[a], ost)
        print(f"{a} -> {b}: dT={d['delta_chi2']:.2f} ddf={d['delta_df']} adjusted={d['chi2']:.2f} p={d['pvalue']:.3f}")
    t2 = time.perf_counter()
    print(f"statistics {t1 - t0:.2f}s; five levels and four differences {t2 - t1:.2f}s; total {t2 - t0:.2f}s")


if __name__ == "__main__":
    main()

"""Benchmark: polychoric matrix and asymptotic covariance, 12 five-category items,
four groups of 2000 cases, against the plain cell-by-cell scipy reference.

Run: PYTHONPATH=. python tests/benchmarks/bench_polychoric.py [--ref-pairs 6]

The reference (tests/polychoric_reference.py: one multivariate_normal.cdf call per
grid point, minimize_scalar per pair, numerical sandwich) is run on a subset of pairs
of each group and its time scaled per pair to all 66 pairs; the estimates of that
subset are compared with ours.
"""

from __future__ import annotations

import argparse
import os
import sys
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.dirname(HERE))
sys.path.insert(0, os.path.dirname(os.path.dirname(HERE)))

from polychoric_reference import ref_polychoric  # noqa: E402

from invariance.data.polychoric import polychoric  # noqa: E402


def simulate(rng, n=2000, p=12, groups=4):
    out = []
    for g in range(groups):
        lam = rng.uniform(0.45, 0.8, p)
        R = np.outer(lam, lam)
        np.fill_diagonal(R, 1.0)
        z = rng.multivariate_normal(np.zeros(p), R, size=n)
        cuts = np.sort(rng.normal(0, 0.9, (p, 4)), axis=1) + 0.1 * g
        out.append((z[:, :, None] > cuts[None]).sum(2))
    return out


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--ref-pairs", type=int, default=6, help="pairs per group timed for the reference")
    args = ap.parse_args()
    rng = np.random.default_rng(2026)
    data = simulate(rng)
    K = np.full(12, 5)
    npairs = 66
    # ours: all pairs, thresholds, correlations, full ACOV; best of 3
    best = np.inf
    for _ in range(3):
        t0 = time.perf_counter()
        fits = [polychoric(x, K) for x in data]
        best = min(best, time.perf_counter() - t0)
    # reference on a subset of pairs per group
    sub = [(0, 1), (2, 7), (3, 11), (5, 6), (8, 10), (4, 9), (1, 10), (0, 6)][: args.ref_pairs]
    t0 = time.perf_counter()
    maxdiff_rho, maxdiff_acov = 0.0, 0.0
    for x, f in zip(data, fits):
        taus, rhos, if_t, infl = ref_polychoric(x, K, pairs=sub)
        i, j = f.pairs
        nt = f.n_thresholds
        for (a, b), r in rhos.items():
            q = int(np.flatnonzero((i == a) & (j == b))[0])
            maxdiff_rho = max(maxdiff_rho, abs(f.corr[a, b] - r))
            v_ref = infl[(a, b)] @ infl[(a, b)] / x.shape[0] ** 2
            maxdiff_acov = max(maxdiff_acov, abs(f.acov[nt + q, nt + q] - v_ref) / v_ref)
    ref_time = time.perf_counter() - t0
    ref_scaled = ref_time * npairs / len(sub)
    print(f"ours: {best:.3f} s for 4 groups x 66 pairs (thresholds, polychorics, full ACOV {fits[0].acov.shape})")
    print(f"reference: {ref_time:.2f} s for 4 groups x {len(sub)} pairs, scaled per pair to 66 pairs: {ref_scaled:.1f} s")
    print(f"speed ratio (reference scaled / ours): {ref_scaled / best:.0f}x (target >= 50x)")
    print(f"max |rho ours - rho ref| over the timed pairs: {maxdiff_rho:.2e}")
    print(f"max relative difference of var(rho) ours vs ref: {maxdiff_acov:.2e}")


if __name__ == "__main__":
    main()

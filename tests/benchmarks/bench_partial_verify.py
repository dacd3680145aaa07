"""Likelihood-ratio verification of the release search: serial vs a process pool.

Run: PYTHONPATH=. python tests/benchmarks/bench_partial_verify.py [workers]
Prints the wall time of one metric-level search with verify_top=6 run serially and
through concurrent.futures.ProcessPoolExecutor, and their ratio (the refits are
independent, so the pool should approach the number of free cores).
"""

import concurrent.futures as cf
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from test_partial_search import BIFACTOR, chi2_judge, simulate  # noqa: E402

from invariance import build_level, fit  # noqa: E402
from invariance.partial import release_search  # noqa: E402


def main(workers: int = 2) -> None:
    stats = simulate(17, True)
    base = fit(build_level(BIFACTOR, stats.names, "configural"), stats)
    metric = fit(build_level(BIFACTOR, stats.names, "metric"), stats)
    opts = dict(verify=True, verify_top=6, release_in="groups")
    t0 = time.perf_counter()
    serial = release_search(metric, stats, chi2_judge(base), **opts)
    t1 = time.perf_counter()
    with cf.ProcessPoolExecutor(max_workers=workers) as ex:
        pooled = release_search(metric, stats, chi2_judge(base), executor=ex, **opts)
    t2 = time.perf_counter()
    same = [s.label for s in serial.releases] == [s.label for s in pooled.releases]
    print(f"serial {t1 - t0:.2f} s, pool({workers}) {t2 - t1:.2f} s, ratio {(t1 - t0) / (t2 - t1):.2f}; same releases: {same}")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 2)

"""Recovery rate of the release search over many seeds (not collected by pytest).

Run: PYTHONPATH=. python tests/benchmarks/bench_partial_recovery.py [n_seeds]
Prints, for the planted and the null population of tests/test_partial_search.py, how
often exactly the planted items are flagged (planted) or nothing is flagged (null).
"""

import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from test_partial_search import run_levels, simulate  # noqa: E402


def main(n: int = 20) -> None:
    want = [("i3", "loading"), ("i10", "intercept")]
    for plant in (True, False):
        hits, t0 = 0, time.perf_counter()
        for seed in range(100, 100 + n):
            res = run_levels(simulate(seed, plant))
            got = [(s.item, s.parameter) for r in res for s in r.releases]
            hits += got == (want if plant else [])
        print(f"planted={plant}: {hits}/{n} runs exact; {(time.perf_counter() - t0) / n:.2f} s per run")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 20)

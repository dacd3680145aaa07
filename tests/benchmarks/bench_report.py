"""Time of writing the report against the time of fitting, on the demo pipelines.

Prints, per pipeline, the seconds spent in the fitting stages (``run_stages``: data,
fits, decisions, partial search) and in ``write_reports`` (sections, figures, HTML,
Markdown, tables), and their ratio (report / fit; target: at most 1). Each is the best
of ``--repeat`` runs in this one process (matplotlib imported once before timing).

    python tests/benchmarks/bench_report.py [--repeat 3]
"""

from __future__ import annotations

import argparse
import json
import tempfile
import time
from pathlib import Path

import matplotlib.figure  # noqa: F401 - import cost paid before timing

from invariance.pipeline.output import to_json
from invariance.pipeline.runner import _context, _estimates, run_stages
from invariance.report import write_reports
from invariance.spec.load import load_pipeline

ROOT = Path(__file__).resolve().parents[2]
PIPELINES = ("shift_outlook_by_site.yaml", "shift_outlook_by_site_partial.yaml")


def one(path: Path) -> tuple[float, float]:
    """(fit seconds, report seconds) of one run."""
    spec = load_pipeline(path)
    t0 = time.perf_counter()
    results, state = run_stages(spec)
    t1 = time.perf_counter()
    results = json.loads(to_json(results))
    estimates = _estimates(state["fits"])
    context = _context(spec, results, True)
    with tempfile.TemporaryDirectory() as tmp:
        t2 = time.perf_counter()
        write_reports(Path(tmp), results, estimates, context)
        t3 = time.perf_counter()
    return t1 - t0, t3 - t2


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    for name in PIPELINES:
        runs = [one(ROOT / "pipelines" / name) for _ in range(args.repeat)]
        fit_s, rep_s = min(r[0] for r in runs), min(r[1] for r in runs)
        print(f"{name:40s} fit {fit_s:6.2f} s  report {rep_s:6.2f} s  report/fit {rep_s / fit_s:5.2f}")


if __name__ == "__main__":
    main()

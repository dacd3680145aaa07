"""Command-line commands of the many-runs layer, registered by :mod:`invariance.cli`.

``invariance batch PIPELINE... [--vary KEY=V1,V2] [--scheduler ADDRESS] [--workers N] [--out DIR]``
    Runs every pipeline (with ``--vary``: once per value of a pipeline key, such as
    ``data.group=site,occupation`` for several grouping columns) into ``DIR/<pipeline name>/`` (the files of a single run) and
    writes ``DIR/batch.csv`` (a row per pipeline: status, highest level supported,
    flagged items, seed, seconds, error). Exit code 0 when every pipeline ran, 2 when
    some failed (one line on stderr; each error in batch.csv), as for bad input.

``invariance plan PLANFILE [--replications R] [--workers N] [--scheduler ADDRESS] [--out DIR]``
    Monte Carlo planning from a planning file (:mod:`invariance.batch.planfile`): writes
    ``DIR/plan.json`` (power, false alarms, empirical cutoffs) and
    ``DIR/replications.csv``, and prints the rates.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from ...escape import write_csv
from .planfile import load_plan
from .runner import Task, run_batch
from .simulate import plan
from .tasks import parse_vary, pipeline_task, pipeline_variants

__all__ = ["add_commands", "cmd_batch", "cmd_plan"]


def _common(p: argparse.ArgumentParser, out_default: str) -> None:
    p.add_argument("--scheduler", metavar="ADDRESS", default=None,
                   help="address of a running Dask scheduler (default: a local cluster)")
    p.add_argument("--workers", metavar="N", type=int, default=2,
                   help="workers of the local cluster; 0 runs one by one without Dask (default 2)")
    p.add_argument("--processes", action="store_true", help="local cluster with worker processes instead of threads")
    p.add_argument("--out", metavar="DIR", default=out_default, help=f"output folder (default {out_default})")
    p.add_argument("--seed", type=int, default=None, help="base seed of the per-task seeds")
    p.add_argument("--quiet", action="store_true", help="no progress on stderr")


def add_commands(subparsers) -> None:
    """Add the ``batch`` and ``plan`` commands to an argparse subparsers object."""
    b = subparsers.add_parser(
        "batch", help="run several pipelines as one batch on Dask",
        description="Run several pipelines as one batch on Dask.",
        epilog="example (the demo): invariance batch pipelines/shift_outlook_by_site.yaml "
               "--vary data.group=site,occupation --workers 0",
    )
    b.add_argument("pipelines", nargs="+", metavar="PIPELINE", help="pipeline files")
    b.add_argument("--vary", metavar="KEY=V1,V2", action="append", default=[],
                   help="run every pipeline once per value of a key, e.g. data.group=site,occupation on the demo "
                        "(repeatable; varying data.group drops data.reference and data.groups)")
    _common(b, "batch_results")
    b.set_defaults(handler=cmd_batch)
    p = subparsers.add_parser("plan", help="Monte Carlo power, false alarms and cutoffs for a planned study",
                              description="Monte Carlo planning: power, false alarms and empirical cutoffs.")
    p.add_argument("planfile", metavar="PLANFILE", help="planning file (YAML)")
    p.add_argument("--replications", metavar="R", type=int, default=None, help="replications per condition")
    _common(p, "plan_results")
    p.set_defaults(handler=cmd_plan)


def _unique(stems: list[str]) -> list[str]:
    names, seen = [], {}
    for stem in stems:
        k = seen.get(stem, 0)
        seen[stem] = k + 1
        names.append(stem if k == 0 else f"{stem}_{k + 1}")
    return names


def cmd_batch(args: argparse.Namespace) -> int:
    """Run the ``batch`` command; returns the exit code."""
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    paths = [Path(p) for p in args.pipelines]
    vary = parse_vary(args.vary)
    tasks = []
    if vary:
        entries = [(name, doc) for path in paths for name, doc in pipeline_variants(path, vary)]
        names = _unique([n for n, _ in entries])
        for name, (_, doc) in zip(names, entries):
            tasks.append(Task(name, pipeline_task, {"pipeline": doc, "out": str((out / name).resolve())}))
    else:
        for name, path in zip(_unique([p.stem for p in paths]), paths):
            tasks.append(Task(name, pipeline_task, {"pipeline": str(path.resolve()), "out": str((out / name).resolve())}))
    res = run_batch(tasks, seed=args.seed or 0, scheduler=args.scheduler, workers=args.workers,
                    processes=args.processes, quiet=args.quiet)
    res.write_csv(out / "batch.csv")
    table = res.table()
    print(table[["task", "status", "highest_level", "partial", "flagged", "error"]].to_string(index=False))
    print(f"{len(tasks) - res.n_failed} of {len(tasks)} pipelines ran ({res.backend}); summary in {out / 'batch.csv'}")
    if res.n_failed:
        first = next(o for o in res.outcomes if not o.ok)
        print(f"error: {res.n_failed} of {len(tasks)} pipelines failed (first: {first.name}: {first.error}); "
              f"see {out / 'batch.csv'}", file=sys.stderr)
        return 2
    return 0


def cmd_plan(args: argparse.Namespace) -> int:
    """Run the ``plan`` command; returns the exit code."""
    kw = load_plan(args.planfile)
    if args.replications is not None:
        kw["replications"] = args.replications
    if args.seed is not None:
        kw["seed"] = args.seed
    pop = kw.pop("population")
    res = plan(pop, scheduler=args.scheduler, workers=args.workers, processes=args.processes,
               quiet=args.quiet, **kw)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    (out / "plan.json").write_text(json.dumps(res.to_dict(), indent=2, default=float) + "\n")
    write_csv(res.replications, out / "replications.csv")
    t = res.table()
    fmt = lambda v: "n/a" if v is None or v != v else f"{v:.3f}"
    t["rate"] = t["rate"].map(fmt)
    t["95% interval"] = [f"[{fmt(a)}, {fmt(b)}]" for a, b in zip(t["ci_low"], t["ci_high"])]
    print(t[["condition", "rule", "step", "rate", "95% interval", "n"]].to_string(index=False))
    for step, c in res.cutoffs.items():
        if c["n"]:
            print(f"{step}: under invariance, 5th percentile of dCFI {c['dcfi_p05']:+.4f}, "
                  f"95th of dRMSEA {c['drmsea_p95']:+.4f}, of dSRMR {c['dsrmr_p95']:+.4f}")
    if res.failed:
        print(f"{len(res.failed)} replications failed; see plan.json", file=sys.stderr)
    print(f"written: {out / 'plan.json'}, {out / 'replications.csv'}")
    return 0

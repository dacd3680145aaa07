"""The command line: ``invariance run | check | new | demo | batch | plan``.

Exit codes: 0 the command ran (whatever the invariance verdict), 2 bad input (one line
on stderr, no traceback), 1 internal error, 128 + the signal number when a run was
interrupted (Ctrl-C 130, SIGTERM 143, SIGHUP 129; nothing half-written is left).
"""

from __future__ import annotations

import argparse
import signal
import sys
import warnings

import traceback

from .demo import write_demo
from .errors import InvarianceError, SpecificationError
from .escape import terminal_text, visible
from .pipeline.runner import check, run
from .spec.starter import starter_pipeline
from .version import __version__
from .pipeline.batch.commands import add_commands
from .pipeline.batch.executor import DaskExecutor

__all__ = ["main", "build_parser"]


class _Parser(argparse.ArgumentParser):
    def error(self, message: str):  # one line, exit 2
        raise _Usage(f"{self.prog}: {message}; see --help")


class _Usage(Exception):
    pass


def build_parser() -> argparse.ArgumentParser:
    p = _Parser(prog="invariance", description="Measurement invariance testing from one pipeline file.")
    p.add_argument("--version", action="version", version=f"invariance {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    r = sub.add_parser("run", help="fit the levels of a pipeline, decide, write the outputs")
    r.add_argument("pipeline", help="pipeline YAML file")
    r.add_argument("--out", help="output folder (default: output.folder, else results/<pipeline name>)")
    r.add_argument("--quiet", action="store_true", help="print nothing but errors")
    r.add_argument(
        "--second-opinion",
        action="store_true",
        help="also refit each group's configural model in semopy and report the agreement",
    )
    r.add_argument(
        "--workers",
        type=int,
        default=0,
        help="run the partial-invariance likelihood-ratio refits (partial.verify) on a local Dask cluster "
        "with this many workers (default 0: serial)",
    )
    r.add_argument("--scheduler", help="address of an existing Dask scheduler for those refits")
    c = sub.add_parser("check", help="validate the pipeline and its data; fit nothing")
    c.add_argument("pipeline", help="pipeline YAML file")
    n = sub.add_parser("new", help="write a starter pipeline from a data file's columns")
    n.add_argument("data", help="data file (.csv, .tsv, .dta, .sav)")
    n.add_argument("--group", required=True, help="grouping column")
    n.add_argument("--out", help="pipeline file to write (default: print it)")
    d = sub.add_parser("demo", help="write the demo data and pipelines (invented scenario)")
    d.add_argument("--out", default="invariance-demo", help="folder to write into (default: invariance-demo)")
    d.add_argument("--seed", type=int, default=20261201, help="random seed")
    d.add_argument("--n-per-site", type=int, default=400, help="respondents per site")

    add_commands(sub)  # batch, plan
    return p


def _cmd_run(args) -> int:
    if args.workers < 0:
        raise SpecificationError(f"--workers must be 0 or more; got {args.workers}.")
    if args.workers or args.scheduler:

        with DaskExecutor(scheduler=args.scheduler, workers=max(args.workers, 1)) as ex:
            run(args.pipeline, out=args.out, quiet=args.quiet, crosscheck=args.second_opinion, executor=ex)
        return 0
    run(args.pipeline, out=args.out, quiet=args.quiet, crosscheck=args.second_opinion)
    return 0


def _cmd_check(args) -> int:
    info = check(args.pipeline)
    lines = [
        f"Pipeline {info['pipeline']}: valid. Data {info['data_file']}: {len(info['items'])} items, "
        f"group column {info['group_column']!r}, reference group {info['reference_group']}, model {info['family']}.",
        "Levels to fit: " + ", ".join(f"{lv} ({q} free parameters)" for lv, q in info["free_parameters"].items()) + ".",
        f"{'group':<16}{'rows':>7}{'used':>10}  missing values by item",
    ]
    for g, rows in info["rows"].items():
        miss = {k: v for k, v in info["missing"][g].items() if v}
        text = ", ".join(f"{k} {v}" for k, v in miss.items()) or "none"
        lines.append(f"{g:<16}{rows:>7}{info['groups'][g]:>10}  {text}")
    if info.get("cases_used"):
        lines.append(f"Cases used: {info['cases_used']}.")
    lines += [f"note: {w}" for w in info["warnings"]]
    print(terminal_text("\n".join(lines)))
    return 0


def _cmd_new(args) -> int:
    text = starter_pipeline(args.data, group=args.group, out=args.out)
    if args.out:
        print(f"Wrote {args.out}; edit the factors, then run: invariance check {args.out}")
    else:
        sys.stdout.write(text)
    return 0


def _cmd_demo(args) -> int:
    paths = write_demo(args.out, seed=args.seed, n_per_site=args.n_per_site)
    for p in paths:
        print(f"wrote {p}")
    print(f"run: invariance run {paths[1]}")
    return 0


def _cmd_many(args) -> int:
    return args.handler(args)


COMMANDS = {"run": _cmd_run, "check": _cmd_check, "new": _cmd_new, "demo": _cmd_demo, "batch": _cmd_many, "plan": _cmd_many}


def main(argv: list[str] | None = None) -> int:
    """Run the command line; returns the exit code."""
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
        if not args.command:
            parser.print_help()
            return 2
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            return COMMANDS[args.command](args)
    except SystemExit as exc:  # --help
        return int(exc.code or 0)
    except (_Usage, InvarianceError) as exc:
        print(f"error: {_one_line(str(exc))}", file=sys.stderr)
        return 2
    except FileNotFoundError as exc:
        print(f"error: file not found: {_one_line(str(exc.filename))}; check the path", file=sys.stderr)
        return 2
    except OSError as exc:  # unreadable input, unwritable output folder
        where = f": {exc.filename}" if getattr(exc, "filename", None) else ""
        print(_one_line(f"error: {exc.strerror or exc}{where}; check the path and its permissions"), file=sys.stderr)
        return 2
    except KeyboardInterrupt as exc:  # Ctrl-C, or SIGTERM / SIGHUP during a run
        signum = getattr(exc, "signum", signal.SIGINT)
        print(f"error: interrupted by {signal.Signals(signum).name}; no output folder was written "
              "(an earlier one is kept): run again to finish", file=sys.stderr)
        return 128 + int(signum)
    except Exception as exc:  # internal error: keep the traceback for a bug report

        traceback.print_exc()
        print(f"internal error: {type(exc).__name__}: {exc}; please report it", file=sys.stderr)
        return 1


#: The longest error line printed; a longer one keeps its start and its end (the fix).
MAX_LINE = 1000


def _one_line(text: str) -> str:
    line = visible(" ".join(text.split()))
    return line if len(line) <= MAX_LINE else f"{line[:700]} ... {line[-250:]}"


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())

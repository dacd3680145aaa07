"""Running a pipeline: stages in order, results frozen, outputs written atomically."""

from __future__ import annotations

import contextlib
import datetime as _dt
import json
import pathlib
import signal
import threading
from dataclasses import dataclass
from types import MappingProxyType
from typing import Any, Mapping

import pandas as pd

from ..errors import SpecificationError, shorten
from ..progress import Progress
from ..escape import terminal_text, write_csv
from ..spec.load import PipelineSpec, freeze, load_pipeline, thaw
from ..version import __version__
from .crosscheck import stage_crosscheck
from .output import check_destination, format_table, level_table, to_json, write_outputs
from .stages import STAGES, stage_data, stage_levels, stage_stats, with_stage
from .state import RunState
from .. import report

__all__ = ["RunResult", "Interrupted", "run", "check", "default_out_dir"]


@dataclass(frozen=True, eq=False)
class RunResult:
    """The frozen result of a pipeline run.

    Attributes
    ----------
    results
        Everything in results.json, deeply read-only.
    estimates
        Every parameter estimate by level and group (a DataFrame).
    fits
        Level -> :class:`~invariance.results.FitResult` of every fitted level.
    spec
        The validated pipeline.
    out_dir
        The output folder (``None`` when nothing was written).
    """

    results: Mapping[str, Any]
    estimates: Any
    fits: Mapping[str, Any]
    spec: PipelineSpec
    out_dir: pathlib.Path | None

    def to_dict(self) -> dict:
        """results.json as plain dicts and lists."""
        return thaw(self.results)

    @property
    def supported_level(self) -> str | None:
        return self.results["supported_level"]

    def table(self):
        """The stepwise level table as a DataFrame."""
        return level_table(self.to_dict())

    def summary(self) -> str:
        """The stepwise table and verdict as text (what the terminal shows)."""
        return format_table(self.to_dict())


def default_out_dir(spec: PipelineSpec) -> pathlib.Path | None:
    """Output folder: the pipeline's output.folder, else results/<pipeline name> beside
    the file; ``None`` for a dict pipeline that names none."""
    if spec.output_folder is not None:
        return spec.output_folder
    if spec.source is not None:
        return spec.source.parent / "results" / spec.source.stem
    return None


class Interrupted(KeyboardInterrupt):
    """A run stopped by SIGTERM or SIGHUP, handled like Ctrl-C (``signum`` says which)."""

    def __init__(self, signum: int):
        super().__init__(f"stopped by {signal.Signals(signum).name}")
        self.signum = signum


def _raise_interrupted(signum, _frame):
    raise Interrupted(signum)


@contextlib.contextmanager
def _stop_signals_interrupt():
    """SIGTERM and SIGHUP raise :class:`Interrupted` (like SIGINT's KeyboardInterrupt), so the
    output writer removes its temporary folder; the earlier handlers come back afterwards."""
    names = ("SIGTERM", "SIGHUP")
    sigs = [getattr(signal, n) for n in names if hasattr(signal, n)]
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = {s: signal.signal(s, _raise_interrupted) for s in sigs}
    try:
        yield
    finally:
        for s, h in previous.items():
            signal.signal(s, h)


def _out_dir(out, spec: PipelineSpec, write: bool | None) -> pathlib.Path | None:
    """The output folder from ``out`` (checked), the pipeline, or ``None`` (nothing written)."""
    if out is not None and not isinstance(out, (str, pathlib.PurePath)):
        raise SpecificationError(
            f"out must be a folder path (str or pathlib.Path); got {type(out).__name__} {shorten(out)}."
        )
    if isinstance(out, str) and not out.strip():
        raise SpecificationError("out is empty; name a new folder for the outputs.")
    if write is False:
        return None
    return pathlib.Path(out).resolve() if out is not None else default_out_dir(spec)


def _protected(spec: PipelineSpec) -> list[tuple[pathlib.Path, str]]:
    """Folders an output folder may never be: those of the pipeline file and the data file."""
    out = [(spec.data_path.parent, f"the folder of the data file {spec.data_path.name}")]
    if spec.source is not None:
        out.append((spec.source.parent, f"the folder of the pipeline file {spec.source.name}"))
    return out


def _estimates(fits: Mapping[str, Any]):
    frames = []
    for lv, res in fits.items():
        est = res.estimates()
        est.insert(0, "level", lv)
        frames.append(est)
    if not frames:
        return pd.DataFrame()
    return pd.concat(frames, ignore_index=True)


def _context(spec: PipelineSpec, results: dict, quiet: bool) -> dict:
    st = spec.structure
    return {
        "pipeline_text": spec.text,
        "data_file": str(spec.data_path),
        "data_sha256": results["data"]["sha256"],
        "seed": spec.seed,
        "structure": {
            "factors": {f: list(v) for f, v in st.factors.items()},
            "general": st.general,
            "family": st.family,
            "regressions": [list(p) for p in st.regressions],
            "residual_covariances": [list(p) for p in st.residual_covariances],
        },
        "created": _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat(),
        "quiet": bool(quiet),
    }


def run_stages(spec: PipelineSpec, stages=None, *, executor=None,
               progress: Progress | None = None) -> tuple[dict, RunState]:
    """Run stages in order (default :data:`~invariance.pipeline.stages.STAGES`); returns
    (results, the final :class:`~invariance.pipeline.state.RunState`).

    ``progress`` (optional) is advanced once per stage, with the stage's name as note.
    """
    results: dict = {
        "invariance_version": __version__,
        "title": spec.title,
        "estimator": spec.estimator,
        "seed": spec.seed,
    }
    # extra["results"]: what earlier stages returned, read-only (the summary reads scale_bias)
    state = RunState(executor=executor, extra=MappingProxyType({"results": MappingProxyType(results)}))
    for name, stage in stages if stages is not None else STAGES:
        if progress is not None:
            progress.update(0, note=name)
        out, state = stage(spec, state)
        results.update(out)
        if progress is not None:
            progress.update()
    results["warnings"] = list(dict.fromkeys(state.warnings))
    return results, state


def run(
    pipeline,
    *,
    out: str | pathlib.Path | None = None,
    quiet: bool = False,
    crosscheck: bool = False,
    write: bool | None = None,
    executor=None,
    stages: tuple | None = None,
) -> RunResult:
    """Run a pipeline: fit the levels, decide, and write the outputs.

    Parameters
    ----------
    pipeline
        Path to a pipeline YAML file, or the same content as a dict (paths relative to
        the working directory).
    out
        Output folder; default the pipeline's ``output.folder``, else
        ``results/<pipeline name>`` beside the pipeline file. A dict pipeline without
        either writes nothing.
    quiet
        Do not print the stepwise table.
    crosscheck
        Also refit each group's configural model in semopy and record the agreement
        (``results["crosscheck"]``).
    write
        Force writing (``True``) or not writing (``False``) the output folder.
    executor
        An object with a ``map(fn, iterable)`` method (for example
        :class:`invariance.batch.executor.DaskExecutor`) on which the partial-invariance
        search runs its likelihood-ratio refits (``partial.verify: true``); serial otherwise.
    stages
        The stage table (default :data:`~invariance.pipeline.stages.STAGES`); build
        another with :func:`~invariance.pipeline.stages.with_stage`.

    Returns
    -------
    RunResult
    """
    with _stop_signals_interrupt():
        return _run(pipeline, out=out, quiet=quiet, crosscheck=crosscheck, write=write, executor=executor,
                    stages=stages)


def _run(pipeline, *, out, quiet: bool, crosscheck: bool, write: bool | None, executor, stages) -> RunResult:
    spec = load_pipeline(pipeline)
    out_dir = _out_dir(out, spec, write)
    protected = _protected(spec)
    if out_dir is not None:
        check_destination(out_dir, protected=protected)
    stages = STAGES if stages is None else tuple(stages)
    if crosscheck:
        stages = with_stage("crosscheck", stage_crosscheck, table=stages)
    with Progress(len(stages), label="fitting", quiet=quiet) as bar:
        results, state = run_stages(spec, stages, executor=executor, progress=bar)
    results = json.loads(to_json(results))
    estimates = _estimates(state.fits)
    if out_dir is not None:

        context = _context(spec, results, quiet)

        def files(folder: pathlib.Path):
            (folder / "results.json").write_text(to_json(results), encoding="utf-8")
            write_csv(level_table(results), folder / "levels.csv")
            write_csv(estimates, folder / "estimates.csv")
            (folder / "pipeline.yaml").write_text(spec.text, encoding="utf-8")
            if state.scores_table is not None:
                write_csv(state.scores_table, folder / "scores.csv")
            report.write_reports(folder, results, estimates, context)

        out_dir = write_outputs(out_dir, [files], protected=protected)
    if not quiet:
        print(terminal_text(format_table(results)))
        if out_dir is not None:
            try:
                shown = out_dir.relative_to(pathlib.Path.cwd().resolve())
            except ValueError:
                shown = out_dir
            print(f"\nOutputs written to {shown}")
    return RunResult(
        results=freeze(results),
        estimates=estimates,
        fits=state.fits,
        spec=spec,
        out_dir=out_dir,
    )


def check(pipeline) -> dict:
    """Validate a pipeline and its data without fitting anything.

    Returns
    -------
    dict
        ``groups`` (group -> cases used), ``rows``, ``missing`` (group -> item -> count),
        ``cases_used`` (how incomplete rows are handled), ``reference_group``, ``items``,
        ``categories`` (ordinal pipelines: item -> category labels; ``None`` otherwise)
        and ``warnings``.
    """
    spec = load_pipeline(pipeline)
    results, state = run_stages(spec, [("data", stage_data), ("stats", stage_stats), ("levels", stage_levels)])
    checked = state.checked
    return {
        "pipeline": str(spec.source) if spec.source else None,
        "data_file": str(spec.data_path),
        "items": list(checked.items),
        "group_column": spec.group,
        "reference_group": results["reference_group"],
        "rows": dict(checked.rows),
        "groups": results["groups"],
        "missing": {g: dict(v) for g, v in checked.missing.items()},
        "cases_used": results["data"]["cases_used"],
        "levels": list(spec.levels),
        "family": spec.structure.family,
        "categories": results.get("ordinal", {}).get("categories"),
        "free_parameters": results["free_parameters"],
        "warnings": results["warnings"],
    }



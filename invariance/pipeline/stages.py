"""The stages of a pipeline run, each a plain function ``stage(spec, state) -> (results, state)``.

``state`` is the frozen :class:`~invariance.pipeline.state.RunState`: a stage reads what
earlier stages put there (the data, the statistics, the fitted models) and returns a new
state with its own objects. The dict it returns is merged into results.json, so it must
hold plain JSON values. Options are never read from the raw document here:
:class:`~invariance.spec.load.PipelineSpec` holds them typed (``spec.incomplete``,
``spec.partial``, ``spec.make_estimator()``, ...).

The fit stage never branches on the estimator: it asks the estimator for the statistics,
the fits, the level rows, the step changes, and hands failed levels to the one release
search (:func:`invariance.partial.release_search`) with the same estimator.
"""

from __future__ import annotations

from ..data.checks import check_data
from ..data.read import apply_missing, file_sha256, read_table
from ..decide.compare import judge_configural, judge_step
from ..decide.verdict import constrained_record, supported_level
from ..effects.ordinal import ordinal_effects
from ..errors import DataError, SpecificationError
from ..estimate.interface import FIT_KEYS, ROBUST_KEYS, quiet_fit
from ..model.levels import LevelBuilder
from ..partial.search import STOP_REASONS, release_search
from ..spec.load import PipelineSpec, thaw
from . import robust_stage as _rs
from .align_stage import stage_alignment
from .before_after import reuse_fit, stage_group_fit, stage_scores, stage_screening, stage_structures
from .partial_stage import release_rows, stage_effects
from .verdict_stage import stage_summary
from .state import RunState, Stage, StageOutput

__all__ = ["STAGES", "Stage", "stage_data", "stage_stats", "stage_levels", "stage_fits",
           "stage_summary", "FIT_KEYS", "with_stage"]

def stage_data(spec: PipelineSpec, state: RunState) -> StageOutput:
    """Read the data, apply missing codes and run the checks (nothing is fitted)."""
    raw = read_table(spec.data_path, format=spec.data_format, sheet=spec.data_sheet, text_columns=(spec.group,))
    frame = apply_missing(raw, spec.missing)
    checked = check_data(
        frame,
        items=spec.structure.items,
        group=spec.group,
        reference=spec.reference,
        groups=spec.groups,
        complete_cases_needed=spec.incomplete == "listwise",
    )
    reference = spec.reference if spec.reference is not None else checked.groups[0]
    for rel in spec.released:
        for g in rel.groups or ():
            if g not in checked.groups:
                raise DataError(
                    f"model.released names group {g!r} for item {rel.item!r}, but the groups are "
                    f"{', '.join(checked.groups)}; fix the group name."
                )
    state = state.update(checked=checked, frame=frame, reference=reference, estimator=spec.make_estimator())
    return {
        "data": {
            "file": spec.data_path.name,
            "sha256": file_sha256(spec.data_path),
            "rows": int(raw.shape[0]),
            "group_column": spec.group,
            "missing_codes": thaw(spec.missing),
            "cases_used": _rs.cases_used_text(spec, checked),
            "rows_by_group": dict(checked.rows),
            "missing_by_group": {g: dict(v) for g, v in checked.missing.items()},
        },
        "reference_group": reference,
    }, state.warn(*checked.warnings)


def stage_stats(spec: PipelineSpec, state: RunState) -> StageOutput:
    """Per-group statistics, as the run's estimator needs them."""
    checked = state.checked
    stats = state.estimator.group_statistics(checked.arrays(), checked.groups, checked.items)
    state = state.update(stats=stats)
    out = {"groups": {g.name: int(g.n) for g in stats.groups}, "n_total": int(stats.n_total)}
    if spec.ordinal is None:
        out["missing_data"] = _rs.missing_section(stats, checked, spec.incomplete)
        return out, state
    # thresholds, polychoric correlations and their ACOV per group (METHODS section 7)
    out["ordinal"] = {
        "categories": {m.item: list(m.labels) for m in stats.categories if m is not None},
        "continuous_items": [i for i in checked.items if i not in spec.ordinal],
        "statistics": "thresholds and polychoric correlations per group (two-step pairwise ML); "
        "continuous items: means, variances, Pearson and two-step polyserial correlations; "
        "asymptotic covariance from casewise influence values",
        "reported": "chi2: mean-and-variance adjusted DWLS statistic (Asparouhov & Muthen 2010); "
        "cfi, tli, rmsea: robust versions from T - tr(UV) (Brosseau-Liard, Savalei & Li 2012); "
        "delta chi2: Satorra (2000) difference, scale-shifted; unadjusted values under 'dwls'",
    }
    out["missing_data"] = {"method": "listwise", "by_group": {}}
    return out, state


def stage_levels(spec: PipelineSpec, state: RunState) -> StageOutput:
    """Build the model of every requested level (one builder for every item type)."""
    st = spec.structure
    stats = state.stats
    K = None if spec.ordinal is None else tuple(int(k) for k in stats.n_categories)
    builder = LevelBuilder(st, tuple(stats.names), state.reference, spec.fixed_means, K)
    try:
        models = {lv: builder.build(lv, spec.released) for lv in spec.levels}
    except SpecificationError as exc:
        raise SpecificationError(f"model: {exc}") from None
    return {
        "model": {
            "family": st.family,
            "factors": {f: list(v) for f, v in st.factors.items()},
            "general": st.general,
            "items": list(st.items),
            "paths": [list(p) for p in st.regressions],
            "residual_covariances": [list(p) for p in st.residual_covariances],
            "released": [r.to_dict() for r in spec.released],
            "fixed_means": list(spec.fixed_means),
        },
        "free_parameters": {lv: int(m.n_params) for lv, m in models.items()},
    }, state.update(builder=builder, models=models)


def _not_tested(level: str, why: str) -> dict:
    row = {"level": level, "converged": None, "status": "not fitted"}
    row.update({k: None for k in FIT_KEYS})
    row.update({k: None for k in ROBUST_KEYS})
    row.update({"problems": [], "released": [], "delta": None, "compared_with": None,
                "decision": "not_tested", "checks": [], "reason": why})
    return row


def _cutoff_level(level: str) -> str:
    """The thresholds step (ordered items) is judged with the location (intercept-step) cutoffs."""
    return "scalar" if level == "thresholds" else level


def _judge(spec: PipelineSpec, state: RunState, level: str, base: tuple):
    """``judge(fit) -> (row, delta, verdict)`` of a level against the accepted base (level, row, fit)."""
    est, stats = state.estimator, state.stats
    _, base_row, base_fit = base

    def judge(res):
        row = est.level_row(level, res)
        delta = est.step_delta(row, base_row, res, base_fit, stats)
        verdict = judge_step(delta, _cutoff_level(level), spec.rule, converged=res.converged)
        return row, delta, verdict

    return judge


def _search(spec: PipelineSpec, state: RunState, level: str, res, judge, notes: list) -> tuple:
    """Run the release search on a failed level: (search, res, row, delta, verdict) after it."""
    search = release_search(
        res, state.stats, lambda f: judge(f)[2]["decision"] == "holds",
        estimator=state.estimator, builder=state.builder, executor=state.executor,
        **spec.partial.search_options(),
    )
    notes.extend(
        f"{level}: release of {k['label']} skipped, its refit failed: {k['reason']}" for k in search.skipped
    )
    res = search.fit
    row, delta, verdict = judge(res)
    if search.releases:
        verdict = {**verdict, "decision": search.decision}
    row["partial"] = {k: v for k, v in search.to_dict().items() if k not in ("fit", "releases", "released")}
    return search, res, row, delta, verdict


def _fit_level(spec: PipelineSpec, state: RunState, level: str, carried: tuple, accepted, notes: list) -> tuple:
    """Fit one level, judge it, and search it when it fails: (row, fit, search); messages go to ``notes``."""
    est = state.estimator
    model = state.models[level] if not carried else state.builder.build(level, spec.released + carried)
    kept = reuse_fit(state.extra.get("prefit", {}), level, model)
    # a nested level starts from the accepted level's estimates; the fit falls back to the
    # analytic and alternative starts when that start fails
    base = None if accepted is None else accepted[2]
    start = est.warm_start(base, model, state.stats) if base is not None and base.converged else None
    res, caught = kept if kept is not None else quiet_fit(est, model, state.stats, start=start)
    notes.extend(n if n.startswith(f"{level}:") else f"{level}: {n}" for n in caught)
    if accepted is None:
        row = est.level_row(level, res)
        verdict = judge_configural(est.decision_view(row), spec.rule, converged=res.converged, problems=res.problems)
        row.update({"delta": None, "compared_with": None, **verdict})
        return row, res, None
    judge = _judge(spec, state, level, accepted)
    row, delta, verdict = judge(res)
    search = None
    if spec.partial.searches(verdict["decision"]):
        if res.converged:
            before = constrained_record({**row, "delta": delta, "compared_with": accepted[0], **verdict})
            search, res, row, delta, verdict = _search(spec, state, level, res, judge, notes)
            if search.releases:
                row["constrained"] = before  # the fully constrained model, shown before the partial one
        else:
            row["partial"] = {"stop_reason": "not_converged", "stop_message": STOP_REASONS["not_converged"]}
    improper = [p for p in res.problems if not p.startswith("not converged")]
    if improper and res.converged:
        verdict = {**verdict, "reason": verdict["reason"] + "; caution, improper solution: " + "; ".join(improper)}
    if spec.partial.enabled:
        row["released"] = release_rows(res, search, spec.released)
    row.update({"delta": delta, "compared_with": accepted[0], **verdict})
    return row, res, search


def stage_fits(spec: PipelineSpec, state: RunState) -> StageOutput:
    """Fit the levels in order; compare each with the previous accepted level and judge it.

    With a ``partial:`` section, a failed measurement level is handed to the release
    search (every estimator); its releases are carried into the later levels.
    """
    fits, rows, searches, notes = {}, [], [], []
    accepted = None  # (level, row, fit) of the last level that held
    stopped = None
    carried: tuple = ()  # releases made by the search, carried to later levels
    for lv in spec.levels:
        if stopped is not None:
            rows.append(_not_tested(lv, stopped))
            continue
        row, res, search = _fit_level(spec, state, lv, carried, accepted, notes)
        fits[lv] = res
        rows.append(row)
        if search is not None:
            searches.append(search)
            carried = carried + search.released
        if row["decision"] in ("holds", "holds_partially"):
            accepted = (lv, row, res)
        elif lv == "configural":
            stopped = "the configural model was not supported"
        elif spec.stop_at_failure:
            stopped = f"{lv} failed and decision.stop_at_failure is true"
    state = state.update(fits=fits, level_rows=rows, searches=searches, supported_level=supported_level(rows))
    return {"levels": rows}, state.warn(*notes)


def _dict_stage(stage) -> Stage:
    """A stage still written as ``stage(spec, state: dict) -> dict`` (``stage_group_fit``,
    owned by the engine work): it sees ``stats`` and ``reference``, returns its warnings in
    ``warnings`` and the fits it keeps for the fit stage in ``prefit`` (``RunState.extra``)."""

    def wrapped(spec: PipelineSpec, state: RunState) -> StageOutput:
        view = {"stats": state.stats, "reference": state.reference, "warnings": []}
        out = stage(spec, view)
        if "prefit" in view:
            state = state.update(extra={**state.extra, "prefit": view["prefit"]})
        return out, state.warn(*view["warnings"])

    wrapped.__name__ = getattr(stage, "__name__", "stage")
    wrapped.__doc__ = stage.__doc__
    return wrapped


def _continuous_only(stage: Stage, name: str) -> Stage:
    """A stage that needs continuous-item statistics: skipped (with a note) for ordinal items."""

    def wrapped(spec: PipelineSpec, state: RunState) -> StageOutput:
        if spec.ordinal is None:
            return stage(spec, state)
        if name in ("structures", "alignment", "scores") and spec.section(name) is None:
            return {}, state
        return {name: None}, state.warn(f"{name}: not available for ordered-categorical items yet; skipped")

    wrapped.__name__ = getattr(stage, "__name__", name)
    wrapped.__doc__ = stage.__doc__
    return wrapped


def stage_ordinal_effects(spec: PipelineSpec, state: RunState) -> StageOutput:
    """Effects after the level fits; ordinal pipelines add dMACS per item (latent-response
    and expected-score scales) of every group against the reference, and latent-response
    bifactor indices, from the highest supported level that is metric or higher
    (:func:`invariance.effects.ordinal.ordinal_effects`)."""
    out, state = stage_effects(spec, state)
    if spec.ordinal is None:
        return out, state
    fits = state.fits
    best = state.supported_level
    if best not in ("metric", "scalar", "strict") or best not in fits:
        return {**out, "effects": None}, state
    res = fits[best]
    by_group = {}
    for g in res.spec.groups:
        if g != res.spec.reference:
            eff = ordinal_effects(res, state.stats, focal=g)
            by_group[g] = {"dmacs": eff["dmacs"], "bifactor": eff.get("bifactor")}
    return {**out, "effects": {"ordinal": {"level": best, "reference": res.spec.reference, "by_group": by_group}}}, state


#: The stages of a run, in order: (name, function). Immutable: a run with another table
#: passes one built by :func:`with_stage` to :func:`invariance.pipeline.run` (``stages=``).
STAGES: tuple[tuple[str, Stage], ...] = (
    ("data", stage_data),
    ("screening", stage_screening),
    ("stats", stage_stats),
    ("group_fit", _continuous_only(_dict_stage(stage_group_fit), "group_fit")),
    ("structures", _continuous_only(stage_structures, "structures")),
    ("levels", stage_levels),
    ("fits", stage_fits),
    ("effects", stage_ordinal_effects),
    ("alignment", _continuous_only(stage_alignment, "alignment")),
    ("summary", stage_summary),
    ("scores", _continuous_only(stage_scores, "scores")),
)


def with_stage(
    name: str,
    stage: Stage,
    *,
    after: str | None = None,
    table: tuple[tuple[str, Stage], ...] = STAGES,
) -> tuple[tuple[str, Stage], ...]:
    """A new stage table with ``stage`` added (or, for a name already there, replaced).

    Parameters
    ----------
    name
        Stage name.
    stage
        ``stage(spec, state) -> (results, state)`` (:mod:`invariance.pipeline.state`).
    after
        Name of the stage it follows (default: the end of the table).
    table
        The table to extend (default :data:`STAGES`, which is never changed).

    Returns
    -------
    tuple
        The new table; pass it as ``run(..., stages=table)``.
    """
    names = [n for n, _ in table]
    if name in names:
        return tuple((n, stage) if n == name else (n, f) for n, f in table)
    if after is None:
        return (*table, (name, stage))
    if after not in names:
        raise ValueError(f"Unknown stage {after!r}; the stages are {', '.join(names)}.")
    k = names.index(after) + 1
    return (*table[:k], (name, stage), *table[k:])

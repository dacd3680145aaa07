"""Pipeline glue for partial invariance, effect sizes, latent comparisons and structural levels.

The pipeline's level loop hands a failed measurement level to the release search
(:func:`invariance.partial.release_search`, with the run's estimator and a judge that is
the pipeline's own decision rule), and the stage :func:`stage_effects` runs after the
level fits. What they add to results.json:

``levels[i].released``
    every release (the up-front ones, then the search's, with statistic, p-value and
    effect size); ``levels[i].decision`` ``holds_partially`` when a level holds only after
    releases; ``levels[i].partial`` the search summary (stop reason, options).
``flagged``
    one record per released item parameter (:func:`invariance.partial.flagged_items`).
``reliability``
    omega / omegaH / ECV / PUC / H / determinacy per group (bifactor) or omega per
    factor (other families), from the last supported measurement level.
``latent``
    latent mean differences and variance ratios vs the reference, once (partial)
    scalar invariance holds; otherwise a note.
``scale_bias``
    expected sum-score bias per scale and group (raw units).
``structural``
    the structural levels (equal variances, covariances, means, paths) with the same
    decision machinery, releases and the per-parameter score tests.
"""

from __future__ import annotations


import numpy as np

from ..data.moments import SampleStats
from ..decide.compare import judge_step
from ..effects.bifactor import quality_indices
from ..effects.dmacs import scale_bias
from ..effects.latent import compare_latent
from ..effects.ordinal import bifactor_indices_latent
from ..estimate.interface import quiet_fit
from ..estimate.result import FitResult
from ..model.structural import build_structural, structural_parameter
from ..partial.flags import flagged_items
from ..partial.score import constraints, score_tests
from ..partial.search import SearchResult, release_search
from ..spec.load import PipelineSpec
from .state import RunState, StageOutput

__all__ = ["STRUCTURAL_CUTOFF_LEVEL", "release_rows", "stage_effects"]

#: Cutoff column of the decision rule used for structural steps (Chen 2007 gives none for
#: them; the intercept-step cutoffs are used, common practice).
STRUCTURAL_CUTOFF_LEVEL = "scalar"


def release_rows(res: FitResult, search: SearchResult | None, pipeline_released=()) -> list[dict]:
    """The level's ``released`` list: every release of its model, in order, marked by
    ``source``: ``pipeline`` (named in the pipeline file), ``carried`` (found by the
    search at an earlier level) or ``search`` (found at this level, with its statistic,
    p-value and effect size)."""
    n_search = len(search.releases) if search is not None else 0
    upto = len(res.spec.released) - n_search
    pipe = set(pipeline_released)
    rows = [{**r.to_dict(), "source": "pipeline" if r in pipe else "carried"} for r in res.spec.released[:upto]]
    if search is not None:
        rows += [{**s.to_dict(), "source": "search"} for s in search.releases]
    return rows


def _structural(spec: PipelineSpec, state: RunState, base: FitResult, base_row: dict, steps,
                notes: list) -> list[dict]:
    """The structural levels, fitted, judged and searched with the run's estimator."""
    est, stats, settings = state.estimator, state.stats, spec.partial
    rows, released = [], ()
    accepted_fit, accepted_row, accepted_name = base, base_row, base.level
    struct_family_so = tuple((f, spec.structure.general) for f in spec.structure.factors) \
        if spec.structure.family == "second_order" else ()
    for k, step in enumerate(steps):
        mspec = build_structural(base.spec, steps[: k + 1], released=released, second_order_paths=struct_family_so)
        if mspec.df == accepted_fit.spec.df:
            rows.append({"level": step, "decision": "not_applicable", "released": [], "tests": [],
                         "reason": f"the model has no {structural_parameter(step)} to hold equal across groups"})
            continue
        res, caught = quiet_fit(est, mspec, stats)
        notes.extend(f"{step}: {n}" for n in caught)

        def judge(f, step=step, ref_row=accepted_row, ref_fit=accepted_fit):
            r = est.level_row(step, f)
            d = est.step_delta(r, ref_row, f, ref_fit, stats)
            return r, d, judge_step(d, STRUCTURAL_CUTOFF_LEVEL, spec.rule, converged=f.converged)

        row, delta, verdict = judge(res)
        search = None
        kind = structural_parameter(step)
        if settings.searches(verdict["decision"]) and res.converged:
            search = release_search(res, stats, lambda f: judge(f)[2]["decision"] == "holds", estimator=est,
                                    parameters=(kind,), **settings.search_options())
            if search.releases:
                res = search.fit
                row, delta, verdict = judge(res)
                verdict = {**verdict, "decision": search.decision}
            released = released + search.released
        row.update({"delta": delta, "compared_with": accepted_name, **verdict})
        row["released"] = [{**s.to_dict(), "source": "search"} for s in (search.releases if search else ())]
        if search is not None:
            row["partial"] = {kk: v for kk, v in search.to_dict().items() if kk not in ("fit", "releases", "released")}
        # per-parameter score tests at this step (per-path tests for paths)
        row["tests"] = [t.to_dict() for t in score_tests(res, stats, parameters=(kind,)).multivariate]
        rows.append(row)
        if row["decision"] in ("holds", "holds_partially"):
            accepted_fit, accepted_row, accepted_name = res, row, step
        else:
            # a failed structural step is not carried into the next one: its constraints
            # are dropped again (the next step is judged against the last accepted one)
            released = released + tuple(c.release(None) for c in constraints(res.spec, parameters=(kind,)))
    return rows


def stage_effects(spec: PipelineSpec, state: RunState) -> StageOutput:
    """Flagged items, reliability indices, latent comparisons, sum-score bias and the
    structural levels (after the measurement levels have been fitted and judged)."""
    settings = spec.partial
    steps = spec.structural
    stats, fits, rows, searches = state.stats, state.fits, state.level_rows, state.searches
    final = fits.get(state.supported_level) if state.supported_level is not None else None
    if not isinstance(stats, SampleStats):
        # ordinal items: the continuous-item effect sizes below do not apply
        return _ordinal_effects(spec, state, final), state
    scalar_ok = final is not None and final.level in ("scalar", "strict")
    out: dict = {"flagged": flagged_items(searches, stats, final=final if scalar_ok else None)}
    source = final if final is not None else fits.get("configural")
    if source is not None:
        out["reliability"] = {
            "level": source.level,
            "family": spec.structure.family,
            "groups": {q.group: {"overall": q.overall, "factors": q.factors} for q in quality_indices(source, spec.structure)},
        }
    else:
        out["reliability"] = None
    if scalar_ok:
        out["latent"] = compare_latent(final, min_items=settings.min_invariant_items).to_dict()
        out["scale_bias"] = [b.to_dict() for b in scale_bias(final, spec.structure.measured_by)]
    else:
        out["latent"] = {"level": None, "means": [], "variances": [], "notes": [
            "latent means are compared only once (partial) scalar invariance holds; it does not here"]}
        out["scale_bias"] = []
    notes: list[str] = []
    if steps:
        if scalar_ok:
            base_row = next(r for r in rows if r["level"] == final.level)
            out["structural"] = _structural(spec, state, final, base_row, steps, notes)
        else:
            out["structural"] = [{"level": s, "decision": "not_tested",
                                  "reason": "structural levels need (partial) scalar invariance"} for s in steps]
    else:
        out["structural"] = []
    return out, state.warn(*notes)


def _ordinal_effects(spec: PipelineSpec, state: RunState, final) -> dict:
    """Effects section for ordinal (DWLS) runs: latent-response bifactor indices of the
    last supported level; dMACS of flagged items comes with the ordinal search."""
    out: dict = {"flagged": flagged_items(state.searches, state.stats), "scale_bias": [],
                 "structural": []}
    out["latent"] = {"level": None, "means": [], "variances": [], "notes": [
        "latent mean comparisons for ordinal items are reported by the ordinal search only"]}
    out["reliability"] = None
    source = final if final is not None else state.fits.get("configural")
    st = spec.structure
    if source is not None and st.family == "bifactor":
        groups = {}
        for g in source.groups:
            std = source.standardized(g)
            lam = std["lambda"]
            f_ix = {f: k for k, f in enumerate(source.spec.factors)}
            specifics = {f: (f_ix[f], *[source.spec.items.index(i) for i in its]) for f, its in st.factors.items()}
            try:
                groups[g] = bifactor_indices_latent(
                    lam, np.diag(std["theta"]), general=f_ix[st.general], specifics=specifics
                )
            except Exception as exc:  # noqa: BLE001 - reported, not fatal
                groups[g] = {"error": str(exc).splitlines()[0]}
        out["reliability"] = {"level": source.level, "family": st.family, "scale": "latent response", "groups": groups}
    return out

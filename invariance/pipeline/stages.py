"""The stages of a pipeline run, each a plain function ``stage(spec, state) -> dict``.

``state`` is a dict shared by the stages of one run: a stage reads what earlier stages
left there (the data, the statistics, the fitted models) and adds its own objects. The
dict a stage returns is merged into results.json, so it must hold plain JSON values.
A later feature adds one function here (or in its own module) and one entry in
:data:`STAGES`, plus a section in schema.json for its options (read it with
``spec.section(name)``). Useful state keys: ``checked`` (:class:`~invariance.data.CheckedData`),
``stats`` (:class:`~invariance.data.SampleStats`), ``reference``, ``models``
(level -> ModelSpec), ``fits`` (level -> FitResult), ``level_rows`` (the level entries
of results.json, which a later stage may update in place, e.g. to ``holds_partially``),
``warnings`` (list of strings).
"""

from __future__ import annotations

import functools

import warnings
from typing import Callable

import numpy as np

from ..decide.compare import PERMITS, judge_configural, judge_step, level_delta, supported_level
from ..data.checks import check_data
from ..data.moments import sample_stats
from ..data.read import apply_missing, file_sha256, read_table
from ..errors import DataError, InvarianceWarning, SpecificationError
from ..estimate.dwls_robust import dwls_difference, fit_dwls
from ..estimate.ml import fit as ml_fit
from ..model.levels import build_level
from ..model.ordinal_levels import build_ordinal_level
from ..data.ordinal_stats import ordinal_stats
from .partial_stage import stage_effects
from .before_after import stage_group_fit, stage_scores, stage_screening, stage_structures
from .align_stage import stage_alignment
from ..spec.load import PipelineSpec, thaw
from . import robust_stage as _rs

__all__ = ["FITTERS", "STAGES", "Stage", "add_stage", "stage_data", "stage_stats", "stage_levels", "stage_fits", "stage_summary", "FIT_KEYS"]

Stage = Callable[[PipelineSpec, dict], dict]

#: Estimator name (pipeline key ``estimator``) -> fitting function ``(spec, stats) -> FitResult``.
#: A new estimator registers here and adds its name to the schema's ``estimator`` enum.
FITTERS: dict[str, Callable] = {
    "ml": ml_fit,
    "ml_robust": functools.partial(ml_fit, estimator="ml_robust"),
    "dwls": fit_dwls,
}

#: Fit statistics copied into each level of results.json.
FIT_KEYS = ("chi2", "df", "pvalue", "cfi", "tli", "rmsea", "rmsea_ci90", "srmr", "aic", "bic")


def stage_data(spec: PipelineSpec, state: dict) -> dict:
    """Read the data, apply missing codes and run the checks (nothing is fitted)."""
    raw = read_table(spec.data_path, format=spec.data_format, text_columns=(spec.group,))
    frame = apply_missing(raw, spec.missing)
    checked = check_data(
        frame,
        items=spec.structure.items,
        group=spec.group,
        reference=spec.reference,
        groups=spec.groups,
        complete_cases_needed=_rs.incomplete_choice(spec) == "listwise",
    )
    reference = spec.reference if spec.reference is not None else checked.groups[0]
    for rel in spec.released:
        for g in rel.groups or ():
            if g not in checked.groups:
                raise DataError(
                    f"model.released names group {g!r} for item {rel.item!r}, but the groups are "
                    f"{', '.join(checked.groups)}; fix the group name."
                )
    state["checked"] = checked
    state["frame"] = frame  # every column (identifier columns for scores)
    state["reference"] = reference
    state.setdefault("warnings", []).extend(checked.warnings)
    missing = spec.missing
    has_missing = any(any(v.values()) for v in checked.missing.values())
    return {
        "data": {
            "file": spec.data_path.name,
            "sha256": file_sha256(spec.data_path),
            "rows": int(raw.shape[0]),
            "group_column": spec.group,
            "missing_codes": thaw(missing),
            "cases_used": _rs.cases_used_text(_rs.stats_method(spec, checked), has_missing),
            "rows_by_group": dict(checked.rows),
            "missing_by_group": {g: dict(v) for g, v in checked.missing.items()},
        },
        "reference_group": reference,
    }


def stage_stats(spec: PipelineSpec, state: dict) -> dict:
    """Per-group statistics: complete cases, or every case with an observed item (FIML)."""
    checked = state["checked"]
    if spec.ordinal is not None:
        # thresholds, polychoric correlations and their ACOV per group (METHODS section 7)
        merge = None if spec.merge is None else {k: [list(b) for b in v] for k, v in spec.merge.items()}
        continuous = [i for i in checked.items if i not in spec.ordinal]
        stats = ordinal_stats(checked.frame, checked.items, checked.group, groups=checked.groups, merge=merge,
                              continuous=continuous)
        state["stats"] = stats
        return {
            "groups": {g.name: int(g.n) for g in stats.groups},
            "n_total": int(stats.n_total),
            "ordinal": {
                "categories": {m.item: list(m.labels) for m in stats.categories if m is not None},
                "continuous_items": [i for i in checked.items if i not in spec.ordinal],
                "statistics": "thresholds and polychoric correlations per group (two-step pairwise ML); "
                "continuous items: means, variances, Pearson and two-step polyserial correlations; "
                "asymptotic covariance from casewise influence values",
                "reported": "chi2: mean-and-variance adjusted DWLS statistic (Asparouhov & Muthen 2010); "
                "cfi, tli, rmsea: robust versions from T - tr(UV) (Brosseau-Liard, Savalei & Li 2012); "
                "delta chi2: Satorra (2000) difference, scale-shifted; unadjusted values under 'dwls'",
            },
            "missing_data": {"method": "listwise", "by_group": {}},
        }
    method = _rs.stats_method(spec, checked)
    stats = sample_stats(checked.frame, checked.items, checked.group, groups=checked.groups, missing=method)
    state["stats"] = stats
    return {
        "groups": {g.name: int(g.n) for g in stats.groups},
        "n_total": int(stats.n_total),
        "missing_data": _rs.missing_section(stats, checked, method),
    }


def stage_levels(spec: PipelineSpec, state: dict) -> dict:
    """Build the model of every requested level."""
    st = spec.structure
    groups = state["stats"].names
    try:
        if spec.ordinal is not None:
            K = state["stats"].n_categories
            models = {
                lv: build_ordinal_level(st, groups, lv, K, reference=state["reference"], released=spec.released,
                                        fixed_means=spec.fixed_means)
                for lv in spec.levels
            }
        else:
            models = {
                lv: build_level(st, groups, lv, reference=state["reference"], released=spec.released,
                                fixed_means=spec.fixed_means)
                for lv in spec.levels
            }
    except SpecificationError as exc:
        raise SpecificationError(f"model: {exc}") from None
    state["models"] = models
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
    }


def _fit_one(model, stats, estimator: str = "ml"):
    try:
        fitter = FITTERS[estimator]
    except KeyError:
        raise SpecificationError(
            f"Estimator {estimator!r} is not available; use one of {', '.join(FITTERS)}."
        ) from None
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", InvarianceWarning)
        res = fitter(model, stats)
    notes = [str(w.message) for w in caught if issubclass(w.category, InvarianceWarning)]
    return res, notes


def _level_row(level: str, res, released) -> dict:
    fs = res.fit.to_dict()
    row = {"level": level, "converged": bool(res.converged), "status": res.status}
    for k in FIT_KEYS:
        row[k] = fs.get(k)
    row.update(_rs.robust_level_fields(res))
    if res.estimator == "dwls":
        _dwls_row(row, res)
    row["problems"] = list(res.problems)
    row["released"] = [r.to_dict() for r in released]
    return row


def _num(v):
    return None if v is None or not np.isfinite(v) else float(v)


def _dwls_row(row: dict, res) -> None:
    """DWLS rows report the robust statistics (invariance.estimate.dwls_robust): chi2 is
    the mean-and-variance adjusted statistic, cfi/tli/rmsea the robust indices; the
    unadjusted DWLS value and the scaled indices are kept under ``dwls``."""
    rob = res.extra["robust"]
    row["dwls"] = {
        "chi2_unadjusted": row["chi2"],
        "pvalue_unadjusted": row["pvalue"],
        "chi2_mean_scaled": _num(rob["chi2_mean_scaled"]),
        "pvalue_mean_scaled": _num(rob["pvalue_mean_scaled"]),
        "scaling_factor": _num(rob["scaling_factor"]),
        "scale": _num(rob["scale"]),
        "shift": _num(rob["shift"]),
        "cfi_scaled": _num(rob["cfi_scaled"]),
        "tli_scaled": _num(rob["tli_scaled"]),
        "rmsea_scaled": _num(rob["rmsea_scaled"]),
    }
    row.update({
        "chi2": _num(rob["chi2_scaled_shifted"]),
        "pvalue": _num(rob["pvalue_scaled_shifted"]),
        "cfi": _num(rob["cfi_robust"]),
        "tli": _num(rob["tli_robust"]),
        "rmsea": _num(rob["rmsea_robust"]),
        "rmsea_ci90": [_num(v) for v in rob["rmsea_robust_ci90"]],
    })


def _dwls_delta(delta: dict, res, base, stats) -> dict:
    """Replace the chi-square difference by the robust one (Satorra 2000, scale-shifted)."""
    d = dwls_difference(res, base, stats)
    out = dict(delta)
    out["chi2_unadjusted"] = d["delta_chi2"]
    out["chi2"] = _num(d["chi2"])
    out["df"] = int(d["delta_df"])
    out["pvalue"] = _num(d["pvalue"]) if d["delta_df"] > 0 else None
    return out


def _not_tested(level: str, why: str) -> dict:
    row = {"level": level, "converged": None, "status": "not fitted"}
    row.update({k: None for k in FIT_KEYS})
    row.update({k: None for k in _rs.ROBUST_KEYS})
    row.update(
        {
            "problems": [],
            "released": [],
            "delta": None,
            "compared_with": None,
            "decision": "not_tested",
            "checks": [],
            "reason": why,
        }
    )
    return row


def stage_fits(spec: PipelineSpec, state: dict) -> dict:
    """Fit the levels in order; compare each with the previous accepted level and judge it.

    With a ``partial:`` section, a failed measurement level is handed to the release
    search (:mod:`invariance.partial`); its releases are carried into the later levels.
    """
    from .partial_stage import partial_settings, release_rows, search_level

    stats = state["stats"]
    rule = spec.rule
    partial = partial_settings(spec.section("partial"))
    fits, rows = {}, []
    accepted = None  # (level, row) of the last level that held
    stopped = None
    robust = spec.estimator == "ml_robust"
    h1_cache: dict = {}
    carried: tuple = ()  # releases made by the search, carried to later levels
    searches = []
    for lv in spec.levels:
        if stopped is not None:
            rows.append(_not_tested(lv, stopped))
            continue
        model = state["models"][lv]
        if carried:
            if spec.ordinal is not None:
                model = build_ordinal_level(spec.structure, stats.names, lv, stats.n_categories,
                                            reference=state["reference"], released=spec.released + carried,
                                            fixed_means=spec.fixed_means)
            else:
                model = build_level(spec.structure, stats.names, lv, reference=state["reference"],
                                    released=spec.released + carried, fixed_means=spec.fixed_means)
        res, notes = _fit_one(model, stats, spec.estimator)
        fits[lv] = res
        row = _level_row(lv, res, res.spec.released)
        search = None
        if lv == "configural":
            view = _rs.decision_view(row) if robust else row
            verdict = judge_configural(view, rule, converged=res.converged, problems=res.problems)
            row.update({"delta": None, "compared_with": None})
        else:
            base_level, base_row = accepted
            if robust:
                # decisions on the scaled difference and the robust indices
                delta = level_delta(_rs.decision_view(row), _rs.decision_view(base_row))
                delta = _rs.robust_delta(
                    delta, res, fits[base_level], stats, method=_rs.difference_choice(spec), cache=h1_cache
                )
            elif res.estimator == "dwls":
                delta = _dwls_delta(level_delta(row, base_row), res, fits[base_level], stats)
            else:
                delta = level_delta(row, base_row)
            # the thresholds step (ordered items) is judged with the location (intercept-step) cutoffs
            verdict = judge_step(delta, "scalar" if lv == "thresholds" else lv, rule, converged=res.converged)
            improper = [p for p in res.problems if not p.startswith("not converged")]
            if improper and res.converged:
                verdict["reason"] += "; caution, improper solution: " + "; ".join(improper)
            if partial.searches(verdict["decision"]) and res.converged and spec.estimator == "ml":

                def verdict_of(f, lv=lv, base_row=base_row):
                    r = _level_row(lv, f, f.spec.released)
                    return judge_step(level_delta(r, base_row), lv, rule, converged=f.converged)

                search = search_level(res, stats, verdict_of, partial, executor=state.get("executor"))
                searches.append(search)
                if search.releases:
                    res = search.fit
                    fits[lv] = res
                    row = _level_row(lv, res, res.spec.released)
                    delta = level_delta(row, base_row)
                    verdict = {**verdict_of(res), "decision": search.decision}
                carried = carried + search.released
                row["partial"] = {k: v for k, v in search.to_dict().items() if k not in ("fit", "releases", "released")}
            elif partial.searches(verdict["decision"]) and res.converged and res.estimator == "dwls":
                # ordered items: releases rebuild the item's identification (Wu & Estabrook 2016),
                # so candidates are refitted rather than score-tested
                found = _ordinal_search(spec, state, lv, partial, carried)
                new = tuple(found["released"][len(spec.released) + len(carried):])
                if new:
                    res = found["fit"]
                    fits[lv] = res
                    row = _level_row(lv, res, res.spec.released)
                    delta = _dwls_delta(level_delta(row, base_row), res, fits[base_level], stats)
                    verdict = judge_step(delta, "scalar" if lv == "thresholds" else lv, rule, converged=res.converged)
                    if verdict["decision"] == "holds":
                        verdict["decision"] = "holds_partially"
                    carried = carried + new
                state.setdefault("ordinal_flags", []).extend(_ordinal_flag(found, r, lv) for r in new)
                row["partial"] = {"method": "likelihood-ratio refits (DWLS difference), Bonferroni per round",
                                  "rounds": len(found["steps"])}
            if partial.enabled:
                row["released"] = release_rows(res, search, spec.released) if search is not None or res.estimator != "dwls" else [
                    {**r.to_dict(), "source": "pipeline" if r in set(spec.released) else "search"} for r in res.spec.released
                ]
            row.update({"delta": delta, "compared_with": base_level})
        row.update(verdict)
        rows.append(row)
        state.setdefault("warnings", []).extend(n if n.startswith(f"{lv}:") else f"{lv}: {n}" for n in notes)
        if verdict["decision"] in ("holds", "holds_partially"):
            accepted = (lv, row)
        elif lv == "configural":
            stopped = "the configural model was not supported"
        elif spec.stop_at_failure:
            stopped = f"{lv} failed and decision.stop_at_failure is true"
    state["fits"] = fits
    state["level_rows"] = rows
    state["searches"] = searches
    return {"levels": rows, "flagged": list(state.get("ordinal_flags", []))}


def _ordinal_search(spec: PipelineSpec, state: dict, level: str, partial, carried: tuple) -> dict:
    from ..estimate.ordinal_api import release_search as ordinal_release_search

    return ordinal_release_search(
        spec.structure, state["stats"], level, alpha=partial.alpha, released=spec.released + carried,
        reference=state["reference"], max_releases=partial.max_releases, fixed_means=spec.fixed_means,
    )


def _ordinal_flag(found: dict, release, level: str) -> dict:
    """A flagged record for an ordinal release, from the round that chose it."""
    step = next((st for st in found["steps"] if st["candidates"] and st["candidates"][0]["item"] == release.item
                 and st["candidates"][0]["parameter"] == release.parameter), None)
    best = step["candidates"][0] if step else {}
    return {
        "item": release.item,
        "parameter": release.parameter,
        "factor": release.factor,
        "groups": list(release.groups) if release.groups else None,
        "level": level,
        "statistic": _num(best.get("chi2", best.get("statistic"))),
        "df": best.get("delta_df"),
        "pvalue": _num(best.get("pvalue")),
        "test": "DWLS difference of the refit with the constraint released",
        "dmacs": None,
    }


def stage_summary(spec: PipelineSpec, state: dict) -> dict:
    """Say which level the data support and what group comparisons it permits."""
    rows = state["level_rows"]
    best = supported_level(rows)
    n_total = state["stats"].n_total
    ns = [g.n for g in state["stats"].groups]
    notes = []
    if spec.rule.source.startswith("Chen (2007) cutoffs for total N > 300") and (
        n_total <= 300 or max(ns) > 1.5 * min(ns)
    ):
        notes.append(
            f"total N = {n_total}, group sizes {min(ns)} to {max(ns)}: Chen (2007) recommends the "
            "small-sample cutoffs when N <= 300 or groups are unbalanced (here: the largest group more "
            "than 1.5 times the smallest): consider decision.cutoffs: chen2007_small"
        )
    state.setdefault("warnings", []).extend(notes)
    first_bad = next((r for r in rows if r["decision"] not in ("holds", "holds_partially")), None)
    estimation_failed = first_bad is not None and (
        first_bad["converged"] is False
        or (first_bad["level"] == "configural" and any(not p.startswith("not converged") for p in first_bad["problems"]))
    )
    if best is None and estimation_failed:
        verdict = (
            "The configural model did not converge to a proper solution, so no level could be judged: "
            "check the factor structure, the items and the group sizes before reading any result."
        )
    elif best is None:
        verdict = "The data do not support even configural invariance: " + PERMITS[None] + "."
    else:
        verdict = f"The data support {best} invariance: {PERMITS[best]}."
        if estimation_failed:
            verdict += (
                f" (The {first_bad['level']} model did not converge, so that step could not be judged; "
                "a higher level may still hold.)"
            )
    return {
        "supported_level": best,
        "permits": PERMITS[best],
        "verdict": verdict,
        "decision_rule": spec.rule.to_dict(),
        "stop_at_failure": spec.stop_at_failure,
    }


#: The stages of a run, in order: (name, function).
def _continuous_only(stage: Stage, name: str) -> Stage:
    """A stage that needs continuous-item statistics: skipped (with a note) for ordinal items."""

    def wrapped(spec: PipelineSpec, state: dict) -> dict:
        if spec.ordinal is None:
            return stage(spec, state)
        if name in ("structures", "alignment", "scores") and spec.section(name) is None:
            return {}
        state.setdefault("warnings", []).append(
            f"{name}: not available for ordered-categorical items yet; skipped"
        )
        return {name: None}

    wrapped.__name__ = getattr(stage, "__name__", name)
    wrapped.__doc__ = stage.__doc__
    return wrapped


def stage_ordinal_effects(spec: PipelineSpec, state: dict) -> dict:
    """Ordinal pipelines: dMACS per item (latent-response and expected-score scales) of
    every group against the reference, and latent-response bifactor indices, from the
    highest supported level that is metric or higher (:func:`invariance.ordinal_api.ordinal_effects`)."""
    if spec.ordinal is None:
        return stage_effects(spec, state)
    from ..estimate.ordinal_api import ordinal_effects

    fits = state.get("fits", {})
    rows = state.get("level_rows", [])
    best = supported_level(rows)
    if best not in ("metric", "scalar", "strict") or best not in fits:
        return {"effects": None}
    res = fits[best]
    out = {}
    for g in res.spec.groups:
        if g != res.spec.reference:
            eff = ordinal_effects(res, state["stats"], focal=g)
            out[g] = {"dmacs": eff["dmacs"], "bifactor": eff.get("bifactor")}
    return {"effects": {"ordinal": {"level": best, "reference": res.spec.reference, "by_group": out}}}


STAGES: list[tuple[str, Stage]] = [
    ("data", stage_data),
    ("screening", stage_screening),
    ("stats", stage_stats),
    ("group_fit", _continuous_only(stage_group_fit, "group_fit")),
    ("structures", _continuous_only(stage_structures, "structures")),
    ("levels", stage_levels),
    ("fits", stage_fits),
    ("effects", stage_ordinal_effects),
    ("alignment", _continuous_only(stage_alignment, "alignment")),
    ("summary", stage_summary),
    ("scores", _continuous_only(stage_scores, "scores")),
]


def add_stage(name: str, stage: Stage, *, after: str | None = None) -> None:
    """Register a stage (once per name) so every later run calls it.

    Parameters
    ----------
    name
        Stage name; registering a name again replaces that stage.
    stage
        ``stage(spec, state) -> dict``; the dict is merged into results.json.
    after
        Name of the stage it follows (default: the end of the list).
    """
    names = [n for n, _ in STAGES]
    if name in names:
        STAGES[names.index(name)] = (name, stage)
        return
    if after is None:
        STAGES.append((name, stage))
        return
    if after not in names:
        raise ValueError(f"Unknown stage {after!r}; the stages are {', '.join(names)}.")
    STAGES.insert(names.index(after) + 1, (name, stage))

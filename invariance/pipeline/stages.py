"""The stages of a pipeline run, each a plain function ``stage(spec, state) -> dict``.

``state`` is a dict shared by the stages of one run: a stage reads what earlier stages
left there (the data, the statistics, the fitted models) and adds its own objects. The
dict a stage returns is merged into results.json, so it must hold plain JSON values.
A later feature adds one function here (or in its own module) and one entry in
:data:`STAGES`, plus a section in schema.json for its options.
"""

from __future__ import annotations

import warnings
from typing import Callable

import numpy as np

from ..compare import PERMITS, judge_configural, judge_step, level_delta, supported_level
from ..data.checks import check_data
from ..data.moments import sample_stats
from ..data.read import apply_missing, file_sha256, read_table
from ..errors import DataError, InvarianceWarning, SpecificationError
from ..estimate.dwls_robust import dwls_difference
from ..estimate.ml import fit as ml_fit
from ..model.levels import build_level
from ..ordinal.levels import build_ordinal_level
from ..ordinal.stats import ordinal_stats
from .load import PipelineSpec, thaw

__all__ = ["STAGES", "Stage", "stage_data", "stage_stats", "stage_levels", "stage_fits", "stage_summary", "FIT_KEYS"]

Stage = Callable[[PipelineSpec, dict], dict]

#: Fit statistics copied into each level of results.json.
FIT_KEYS = ("chi2", "df", "pvalue", "cfi", "tli", "rmsea", "rmsea_ci90", "srmr", "aic", "bic")


def stage_data(spec: PipelineSpec, state: dict) -> dict:
    """Read the data, apply missing codes and run the checks (nothing is fitted)."""
    raw = read_table(spec.data_path, format=spec.data_format)
    frame = apply_missing(raw, spec.missing)
    checked = check_data(
        frame,
        items=spec.structure.items,
        group=spec.group,
        reference=spec.reference,
        groups=spec.groups,
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
    state["reference"] = reference
    state.setdefault("warnings", []).extend(checked.warnings)
    missing = spec.missing
    return {
        "data": {
            "file": spec.data_path.name,
            "sha256": file_sha256(spec.data_path),
            "rows": int(raw.shape[0]),
            "group_column": spec.group,
            "missing_codes": thaw(missing),
            "cases_used": "complete cases (listwise deletion)",
            "rows_by_group": dict(checked.rows),
            "missing_by_group": {g: dict(v) for g, v in checked.missing.items()},
        },
        "reference_group": reference,
    }


def stage_stats(spec: PipelineSpec, state: dict) -> dict:
    """Per-group sufficient statistics from complete cases."""
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
        }
    stats = sample_stats(checked.frame, checked.items, checked.group, groups=checked.groups)
    state["stats"] = stats
    return {"groups": {g.name: int(g.n) for g in stats.groups}, "n_total": int(stats.n_total)}


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


def _fit_one(model, stats):
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", InvarianceWarning)
        res = ml_fit(model, stats)
    notes = [str(w.message) for w in caught if issubclass(w.category, InvarianceWarning)]
    return res, notes


def _level_row(level: str, res, released) -> dict:
    fs = res.fit.to_dict()
    row = {"level": level, "converged": bool(res.converged), "status": res.status}
    for k in FIT_KEYS:
        row[k] = fs.get(k)
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
    """Fit the levels in order; compare each with the previous accepted level and judge it."""
    stats = state["stats"]
    rule = spec.rule
    fits, rows = {}, []
    accepted = None  # (level, row) of the last level that held
    stopped = None
    for lv in spec.levels:
        if stopped is not None:
            rows.append(_not_tested(lv, stopped))
            continue
        res, notes = _fit_one(state["models"][lv], stats)
        fits[lv] = res
        row = _level_row(lv, res, res.spec.released)
        if lv == "configural":
            verdict = judge_configural(row, rule, converged=res.converged, problems=res.problems)
            row.update({"delta": None, "compared_with": None})
        else:
            base_level, base_row = accepted
            delta = level_delta(row, base_row)
            if res.estimator == "dwls":
                delta = _dwls_delta(delta, res, fits[base_level], stats)
            # the thresholds step is judged with the location (intercept-step) cutoffs
            verdict = judge_step(delta, "scalar" if lv == "thresholds" else lv, rule, converged=res.converged)
            row.update({"delta": delta, "compared_with": base_level})
        row.update(verdict)
        rows.append(row)
        state.setdefault("warnings", []).extend(f"{lv}: {n}" for n in notes)
        if verdict["decision"] == "holds":
            accepted = (lv, row)
        elif lv == "configural":
            stopped = "not tested: the configural model was not supported"
        elif spec.stop_at_failure:
            stopped = f"not tested: {lv} failed and decision.stop_at_failure is true"
    state["fits"] = fits
    state["level_rows"] = rows
    return {"levels": rows, "flagged": []}


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
            "Chen (2007) recommends the small-sample cutoffs when N <= 300 or groups are unbalanced: "
            "set decision.cutoffs: chen2007_small"
        )
    state.setdefault("warnings", []).extend(notes)
    if best is None:
        verdict = "The data do not support even configural invariance: " + PERMITS[None] + "."
    else:
        verdict = f"The data support {best} invariance: {PERMITS[best]}."
    return {
        "supported_level": best,
        "permits": PERMITS[best],
        "verdict": verdict,
        "decision_rule": spec.rule.to_dict(),
        "stop_at_failure": spec.stop_at_failure,
    }


#: The stages of a run, in order: (name, function).
STAGES: list[tuple[str, Stage]] = [
    ("data", stage_data),
    ("stats", stage_stats),
    ("levels", stage_levels),
    ("fits", stage_fits),
    ("summary", stage_summary),
]

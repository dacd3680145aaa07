"""The configural model as separate group fits (METHODS section 14).

A model whose groups share no free parameter (the configural model) is one
single-group model per group: its statistic, degrees of freedom and log-likelihood are
exactly the sums of the single-group ones. Fitting each group on its own keeps a group
that runs away from holding the others back and gives the per-group fit table without a
second fit. :func:`fit_by_group` runs the fits and :func:`combine` puts them together
as one :class:`~invariance.estimate.result.FitResult` whose ``extra["groups"]`` keeps the
single-group results (group name -> FitResult).
"""

from __future__ import annotations

import dataclasses
from typing import Callable

import numpy as np
from scipy import special as _sp

from ..data.moments import SampleStats
from ..model.spec import ModelSpec
from .indices import FitStats, fit_from_totals
from .result import FitResult
from .robust import robust_indices

__all__ = ["shares_nothing", "group_spec", "fit_by_group", "combine"]


def shares_nothing(spec: ModelSpec) -> bool:
    """True for a multi-group continuous model in which no free parameter spans groups."""
    if len(spec.groups) < 2 or spec.moment_count is not None:
        return False
    param = spec.param_index
    free = param >= 0
    owners = np.zeros(spec.n_params, dtype=np.int64)
    np.add.at(owners, np.unique(np.stack([param[free], spec.group[free]]), axis=1)[0], 1)
    return bool(np.all(owners == 1))


def group_spec(spec: ModelSpec, g: int) -> ModelSpec:
    """The entries of group ``g`` alone, as a single-group model (same labels)."""
    idx = spec.group_entries(g)
    name = spec.groups[g]
    return dataclasses.replace(
        spec,
        groups=(name,),
        group=np.zeros(idx.size, dtype=np.int64),
        matrix=spec.matrix[idx],
        row=spec.row[idx],
        col=spec.col[idx],
        free=spec.free[idx],
        label=spec.label[idx],
        value=spec.value[idx],
        reference=spec.reference if spec.reference == name else "",
        released=tuple(r for r in spec.released if r.groups is None or name in r.groups),
    )


def fit_by_group(spec: ModelSpec, stats: SampleStats, fitter: Callable, *, start: np.ndarray | None = None) -> FitResult:
    """Fit every group of a model that shares nothing on its own; ``fitter(spec, stats,
    start=...)`` fits one group. Returns the combined result."""
    where = {lab: j for j, lab in enumerate(spec.param_labels)}
    parts = {}
    for g, name in enumerate(spec.groups):
        sub = group_spec(spec, g)
        x0 = None if start is None else np.asarray(start, dtype=float)[[where[lab] for lab in sub.param_labels]]
        parts[name] = fitter(sub, stats.subset([name]), start=x0)
    return combine(spec, parts)


def combine_stats(parts: list[FitStats], n_groups: int) -> FitStats:
    """Fit statistics of independent groups: sums, and the indices from the sums."""
    n = sum(f.n for f in parts)
    return fit_from_totals(
        t=sum(f.chi2 for f in parts), df=sum(f.df for f in parts), q=sum(f.n_params for f in parts), n=n,
        n_groups=n_groups, t_b=sum(f.baseline_chi2 for f in parts), df_b=sum(f.baseline_df for f in parts),
        loglik=sum(f.loglik for f in parts), loglik_saturated=sum(f.loglik_saturated for f in parts),
        srmr_value=sum(f.n * f.srmr for f in parts) / n,  # N-weighted, as in indices.srmr
    )


def _block_diag(spec: ModelSpec, parts: dict, pick: Callable) -> np.ndarray | None:
    where = {lab: j for j, lab in enumerate(spec.param_labels)}
    out = np.zeros((spec.n_params, spec.n_params))
    for r in parts.values():
        m = pick(r)
        if m is None:
            return None
        ix = [where[lab] for lab in r.spec.param_labels]
        out[np.ix_(ix, ix)] = m
    return out


def _robust_extra(parts: dict, fs: FitStats, n_groups: int) -> dict:
    """Scaled statistic of independent groups: the traces tr(U Gamma) add up."""
    def trace(c, d):
        return 0.0 if d == 0 else c * d
    tr = sum(trace(r.extra["scaling_factor"], r.fit.df) for r in parts.values())
    tr_b = sum(trace(r.extra["baseline_scaling_factor"], r.fit.baseline_df) for r in parts.values())
    c = tr / fs.df if fs.df > 0 else float("nan")
    c_b = tr_b / fs.baseline_df
    t_s = fs.chi2 / c if fs.df > 0 else float("nan")
    return dict(
        chi2_scaled=float(t_s), scaling_factor=float(c),
        pvalue_scaled=float(_sp.chdtrc(fs.df, t_s)) if fs.df > 0 else float("nan"),
        baseline_chi2_scaled=float(fs.baseline_chi2 / c_b), baseline_scaling_factor=float(c_b),
        **robust_indices(fs.chi2, fs.df, c, fs.baseline_chi2, fs.baseline_df, c_b, fs.n, n_groups),
    )


def combine(spec: ModelSpec, parts: dict[str, FitResult]) -> FitResult:
    """One result for ``spec`` from its single-group results (group name -> FitResult)."""
    where = {lab: j for j, lab in enumerate(spec.param_labels)}
    theta = np.zeros(spec.n_params)
    for r in parts.values():
        theta[[where[lab] for lab in r.spec.param_labels]] = r.theta
    res = [parts[g] for g in spec.groups]
    bad = next((r for r in res if not r.converged), None)
    fs = combine_stats([r.fit for r in res], len(res))
    first = res[0]
    extra = {"groups": dict(parts), "separate_groups": True}
    for key in ("likelihood",):
        if key in first.extra:
            extra[key] = first.extra[key]
    if any("missing" in r.extra for r in res):
        extra["missing"] = {k: v for r in res for k, v in (r.extra.get("missing") or {}).items()}
    est = [r.extra.get("estimation", {}) for r in res]
    extra["estimation"] = {
        "variances": est[0].get("variances"),
        "options": est[0].get("options", {}),
        "optimum": _optimum_words(est),
        "starts": {g: e.get("starts") for g, e in zip(spec.groups, est)},
        "at_bound": [m for e in est for m in e.get("at_bound", [])],
        "runaway": [m for e in est for m in e.get("runaway", [])],
        "notes": [m for e in est for m in e.get("notes", [])],
        "separate_groups": "the configural model shares no parameter: each group was fitted on its own "
                           "and the statistics are the sums (METHODS section 14)",
    }
    acov = _block_diag(spec, parts, lambda r: r.acov)
    if first.estimator == "ml_robust":
        extra.update(_robust_extra(parts, fs, len(res)))
        extra["acov_normal"] = _block_diag(spec, parts, lambda r: r.extra.get("acov_normal"))
    return FitResult(
        spec=spec, estimator=first.estimator, theta=theta, acov=acov,
        converged=bad is None, status=first.status if bad is None else bad.status,
        iterations=int(sum(r.iterations for r in res)), fit=fs,
        problems=tuple(p for r in res for p in r.problems),
        matrices=tuple(r.matrices[0] for r in res), sigma=tuple(r.sigma[0] for r in res),
        mu=tuple(r.mu[0] for r in res), group_n=tuple(r.group_n[0] for r in res), extra=extra,
    )


def _optimum_words(est: list[dict]) -> str:
    words = [e.get("optimum", "") for e in est]
    for w in ("no finite optimum", "optimum within bounds"):
        hit = next((x for x in words if x.startswith(w)), None)
        if hit:
            return hit + " (in at least one group)"
    return words[0]

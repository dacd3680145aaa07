"""Words for what went wrong in an estimate: run-away parameters, estimates at a bound,
and an empirically under-identified bifactor model (METHODS section 14).

Every message names the group and the parameters and says what the user can do.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np

from ..model.spec import LAMBDA, ModelSpec
from .linalg import all_above

__all__ = ["VARIANCE_CHOICES", "describe_runaway", "describe_bounds", "weak_identification"]

#: Choices of ``estimation: {variances: ...}``: report an unbounded solution as improper,
#: or estimate residual and factor variances within [0, inf).
VARIANCE_CHOICES = ("unrestricted", "nonnegative")

#: Smallest eigenvalue of the correlation-scaled information below which a group's
#: parameters count as weakly identified (project choice: clean bifactor fits of 800
#: cases give about 1e-2, proportional general and specific loadings about 1e-4).
NEAR_SINGULAR = 1e-3
#: General / specific loading ratios varying by less than this (coefficient of variation)
#: count as close to proportional (project choice).
PROPORTIONAL_CV = 0.25


def _entries(spec: ModelSpec, j: int):
    """(kind, lhs, rhs, group name) of every entry of parameter ``j``."""
    kinds = spec.kinds()
    lhs, rhs = spec.entry_names()
    for k in np.flatnonzero(spec.param_index == j):
        yield kinds[k], lhs[k], rhs[k], spec.groups[spec.group[k]]


def _name(kind: str, lhs, rhs) -> str:
    if kind == "loading":
        return f"loading of {lhs} on {rhs}"
    if kind == "residual":
        return f"residual variance of {lhs}"
    if kind == "variance":
        return f"variance of factor {lhs}"
    return f"{kind} {lhs}" + (f" ~ {rhs}" if rhs is not None else "")


def _top_loading(spec: ModelSpec, theta: np.ndarray, group: str, item: str, general: Sequence[str]):
    """The factor on which ``item`` has its largest free loading in ``group`` (specific
    factors first)."""
    kinds = spec.kinds()
    lhs, rhs = spec.entry_names()
    g = spec.groups.index(group)
    sel = np.flatnonzero((kinds == "loading") & (lhs == item) & (spec.group == g) & (spec.param_index >= 0))
    if not sel.size:
        return None
    key = lambda k: (rhs[k] not in general, abs(theta[spec.param_index[k]]))
    return rhs[max(sel, key=key)]


def _residual(spec: ModelSpec, theta: np.ndarray, group: str, item: str) -> float | None:
    """Estimate of the free residual variance of ``item`` in ``group`` (None if fixed)."""
    kinds = spec.kinds()
    lhs, _ = spec.entry_names()
    g = spec.groups.index(group)
    sel = np.flatnonzero((kinds == "residual") & (lhs == item) & (spec.group == g) & (spec.param_index >= 0))
    return float(theta[spec.param_index[sel[0]]]) if sel.size else None


def _collapses(spec: ModelSpec, theta: np.ndarray, group: str, ents, general: Sequence[str]) -> list[str]:
    """Sentences for the items of the run-away entries ``ents`` onto which a factor collapses:
    negative residual variances first (continuous items), else growing loadings."""
    below, growing = [], []
    for item in dict.fromkeys(lhs for kind, lhs, _ in ents if kind in ("loading", "residual", "threshold")):
        f = _top_loading(spec, theta, group, item, general)
        if f is None:
            continue
        which = "general" if f in general else "specific"
        what = f"the {which} factor '{f}'" if general else f"factor '{f}'"
        res = _residual(spec, theta, group, item)
        if res is not None and res < 0:
            below.append(f"{what} collapses onto item {item}: its residual variance goes below zero while its loading grows")
        else:
            grow = " and ".join(dict.fromkeys(k + "s" for k, i, _ in ents if i == item and k in ("loading", "threshold")))
            growing.append(f"{what} collapses onto item {item}: its {grow or 'loadings'} grow without bound (the "
                           "item's unique variance shrinks to nothing beside the factor's)")
    return below or growing


def describe_runaway(spec: ModelSpec, running: Sequence[int], theta: np.ndarray, *,
                     general: Sequence[str] = ()) -> list[str]:
    """One actionable sentence per group with run-away parameters."""
    by_group: dict[str, list[tuple[str, str, str | None]]] = {}
    for j in running:
        for kind, lhs, rhs, g in _entries(spec, int(j)):
            by_group.setdefault(g, []).append((kind, lhs, rhs))
    out = []
    for g, ents in by_group.items():
        said = _collapses(spec, theta, g, ents, general) or [
            "the estimates of " + ", ".join(_name(*e) for e in ents[:6]) + (" ..." if len(ents) > 6 else "")
            + " head off without bound"]
        out.append(
            f"in group {g} " + "; ".join(said)
            + " (no finite maximum-likelihood solution: the figures are where the estimates were stopped; "
            "estimate within bounds with estimation: {variances: nonnegative}, or give the factor more items "
            "or fewer specific factors)"
        )
    return out


def describe_bounds(spec: ModelSpec, theta: np.ndarray, lower: np.ndarray) -> list[str]:
    """Estimates held at their lower bound, named, with the caution about their SEs."""
    at = np.flatnonzero(np.isfinite(lower) & (theta <= lower + 1e-8))
    out = []
    for j in at:
        names = sorted({f"{_name(kind, lhs, rhs)} in group {g}" for kind, lhs, rhs, g in _entries(spec, int(j))})
        out.append(
            "estimate at its bound 0: " + ", ".join(names)
            + " (the unbounded optimum lies outside the admissible values; standard errors at a bound need care)"
        )
    return out


def _ratio_spread(lam: np.ndarray, gcol: int, f: int) -> float:
    """Coefficient of variation of general / specific loadings over the items of ``f``."""
    its = np.flatnonzero(lam[:, f] != 0)
    if its.size < 2 or np.any(np.abs(lam[its, f]) < 1e-8):
        return float("inf")
    ratio = lam[its, gcol] / lam[its, f]
    return float(np.std(ratio) / max(abs(np.mean(ratio)), 1e-12))


def _null_weight(spec: ModelSpec, idx: np.ndarray, vec: np.ndarray, factor: int) -> float:
    """Weight of the loadings on ``factor`` in the near-null direction ``vec``."""
    lam = (spec.matrix == LAMBDA) & (spec.col == factor)
    mine = np.isin(idx, spec.param_index[lam])
    return float(np.sum(vec[mine] ** 2))


def weak_identification(spec: ModelSpec, info: np.ndarray, part, matrices, *, general: str | None,
                        exclude: Sequence[int] = ()) -> list[str]:
    """Groups whose information is nearly singular (smallest eigenvalue of the
    correlation-scaled information of the group's own parameters below
    :data:`NEAR_SINGULAR`), named with the parameters involved; for a bifactor model
    with two specific factors, the block whose general and specific loadings are the
    least distinguishable (closest to proportional) is named. Parameters in ``exclude``
    (estimates held at a bound) are left out."""
    out = []
    labels = spec.param_labels
    for g, gname in enumerate(spec.groups):
        idx = np.arange(spec.n_params) if part is None else part.local[g]
        idx = idx[~np.isin(idx, exclude)]
        if idx.size < 2:
            continue
        H = info[np.ix_(idx, idx)]
        d = np.sqrt(np.clip(np.abs(np.diag(H)), 1e-300, None))
        scaled = H / np.outer(d, d)
        if all_above(scaled, NEAR_SINGULAR):
            continue  # the eigenvectors are needed only for a nearly singular block
        w, v = np.linalg.eigh(scaled)
        if w[0] < 1e-10:
            continue  # singular: named by the diagnosis of the solution
        involved = [labels[idx[k]] for k in np.argsort(-np.abs(v[:, 0])) if abs(v[k, 0]) > 0.2]
        lam = matrices[g][0]
        gcol = spec.factors.index(general) if general in spec.factors else None
        specific = [] if gcol is None else [f for f in range(lam.shape[1]) if f != gcol and np.any(lam[:, f] != 0)]
        f = max(specific, key=lambda c: _null_weight(spec, idx, v[:, 0], c)) if len(specific) == 2 else None
        if f is not None and _ratio_spread(lam, gcol, f) < PROPORTIONAL_CV:
            s = spec.factors[f]
            out.append(
                f"in group {gname} the model is empirically under-identified (nearly singular information, "
                f"smallest scaled eigenvalue {w[0]:.1e}): the loadings of the items of '{s}' on '{general}' are "
                f"close to proportional to their loadings on '{s}' (ratios vary by {100 * _ratio_spread(lam, gcol, f):.0f}%), "
                f"so the data barely split these items' common variance between '{general}' and '{s}'; their "
                f"estimates and standard errors are unreliable: add a third specific factor, drop '{s}' (its items "
                f"load on '{general}' only), or fit a correlated-factor model"
            )
        else:
            hint = ("; with two specific factors a bifactor model is identified only through general loadings "
                    "that differ from proportional to the specific ones: add a third specific factor or fit a "
                    "correlated-factor model") if f is not None else "; fix one of them or simplify the factor structure"
            out.append(
                f"in group {gname} the model is empirically under-identified (nearly singular information, "
                f"smallest scaled eigenvalue {w[0]:.1e}): {', '.join(involved[:8])} are weakly identified and "
                f"their estimates and standard errors are unreliable{hint}"
            )
    return out

"""Which groups a released parameter differs in.

A release frees an item's parameter in every group (or in the named ones), so the
search says *that* the parameter differs, not *where*. Here the released estimates are
compared, one group at a time, with the groups not yet named: the group whose estimate
lies farthest from the precision-weighted mean of the others (a z statistic whose
variance comes from the estimates' asymptotic covariance, so the dependence between
groups through the shared parameters is kept) is named when that distance is
significant at ``alpha`` with a Bonferroni correction over the groups; the search goes
on among the rest while at least three remain. With two groups the one difference is
tested and both are named when it is significant. Groups that still share one
parameter count as one unit. A parameter with several entries per group (the thresholds
of an ordered item) is located entry by entry and the named groups are pooled.

This is a descriptive reading of the estimates after the search (common practice of
inspecting the freed estimates; the z test of a linear contrast is textbook Wald
inference), not part of the decision.
"""

from __future__ import annotations

from typing import Mapping

import numpy as np
from scipy import stats as _st

from ..estimate.result import FitResult

__all__ = ["LOCATE_ALPHA", "differing_units", "differs_in"]

#: Familywise level of the location tests (Bonferroni over the units).
LOCATE_ALPHA = 0.05


def _contrast_z(u: int, others: list[int], est: np.ndarray, cov: np.ndarray) -> float:
    w = 1.0 / np.diag(cov)[others]
    c = np.zeros(est.size)
    c[u] = 1.0
    c[others] = -w / w.sum()
    var = float(c @ cov @ c)
    return float(c @ est) / np.sqrt(var) if var > 0 else np.nan


def differing_units(est: np.ndarray, cov: np.ndarray, *, alpha: float = LOCATE_ALPHA) -> list[int]:
    """Indices of the units whose estimate differs from the others (see the module docstring).

    Parameters
    ----------
    est
        One estimate per unit (a group, or groups sharing one parameter).
    cov
        Their asymptotic covariance matrix.
    alpha
        Familywise level; each test uses ``alpha / len(est)`` (two-sided).
    """
    est, cov = np.asarray(est, float), np.asarray(cov, float)
    n = est.size
    if n < 2 or not np.all(np.isfinite(cov)) or np.any(np.diag(cov) <= 0):
        return []
    crit = _st.norm.isf(alpha / (2 * n))
    if n == 2:
        z = _contrast_z(0, [1], est, cov)
        return [0, 1] if abs(z) > crit else []
    remaining, named = list(range(n)), []
    while len(remaining) >= 3:
        zs = {u: _contrast_z(u, [v for v in remaining if v != u], est, cov) for u in remaining}
        u = max(zs, key=lambda k: abs(zs[k]) if np.isfinite(zs[k]) else -1.0)
        if not np.isfinite(zs[u]) or abs(zs[u]) <= crit:
            break
        named.append(u)
        remaining.remove(u)
    return named


def _units(fit: FitResult, release: Mapping) -> dict[object, list[tuple[int, tuple[str, ...]]]]:
    """Entry position -> [(parameter index, groups sharing it)] of a released parameter."""
    spec = fit.spec
    kinds = spec.kinds()
    lhs, rhs = spec.entry_names()
    mask = (kinds == release.get("parameter")) & (lhs == release.get("item")) & spec.free
    if release.get("factor") is not None and release.get("parameter") in ("loading", "path"):
        mask &= rhs == release.get("factor")
    out: dict[object, dict[int, list[str]]] = {}
    for k in np.flatnonzero(mask):
        j = int(spec.param_index[k])
        out.setdefault(rhs[k], {}).setdefault(j, []).append(spec.groups[spec.group[k]])
    return {pos: [(j, tuple(g)) for j, g in by.items()] for pos, by in out.items()}


def differs_in(fit: FitResult, release: Mapping, *, alpha: float = LOCATE_ALPHA) -> tuple[str, ...] | None:
    """The groups in which a released parameter differs, in the fit's group order.

    ``None`` when it cannot be located (no standard errors, or the parameter is not
    free in more than one unit); an empty tuple when no group stands out.
    """
    if fit.acov is None:
        return None
    named: set[str] = set()
    located = False
    for units in _units(fit, release).values():
        if len(units) < 2:
            continue
        idx = np.array([j for j, _ in units])
        hit = differing_units(fit.theta[idx], fit.acov[np.ix_(idx, idx)], alpha=alpha)
        located = True
        for u in hit:
            named.update(units[u][1])
    if not located:
        return None
    return tuple(g for g in fit.groups if g in named)

"""Starting values from the sample moments.

Loadings come from average inter-item correlations (a one-factor approximation per
factor: r_ij ~ l_i l_j), which is close enough for Fisher scoring to converge in a few
steps, bifactor models included: the general loadings use all items, the specific
loadings what the general factor leaves of the within-factor correlations.
"""

from __future__ import annotations

import numpy as np

from ..data.moments import SampleStats
from ..model.spec import ALPHA, BETA, LAMBDA, NU, PSI, THETA, ModelSpec

__all__ = ["start_values", "pool_starts"]


def _mean_offdiag(block: np.ndarray) -> np.ndarray:
    n = block.shape[0]
    if n < 2:
        return np.full(n, 0.5)
    return (block.sum(axis=1) - np.diag(block)) / (n - 1)


def _group_starts(spec: ModelSpec, g: int, S: np.ndarray, mean: np.ndarray) -> np.ndarray:
    """Start value for every entry of group ``g`` (nan where not applicable)."""
    sd = np.sqrt(np.diag(S))
    R = S / np.outer(sd, sd)
    p = len(spec.items)
    idx = spec.group_entries(g)
    mats, rows, cols = spec.matrix[idx], spec.row[idx], spec.col[idx]
    lam_sel = mats == LAMBDA
    # sign of each item: its loading on the first principal component (all positive
    # when no correlation is negative: Perron-Frobenius)
    sign = np.ones(p)
    if np.any(R < 0):
        w, v = np.linalg.eigh(R)
        pc = v[:, -1] * np.sign(v[:, -1].sum() or 1.0)
        sign = np.where(pc < 0, -1.0, 1.0)
    Rs = R * np.outer(sign, sign)
    # factor -> items that load on it
    load_items: dict[int, list[int]] = {}
    for r, c in zip(rows[lam_sel], cols[lam_sel]):
        load_items.setdefault(int(c), []).append(int(r))
    # a factor is "general" when it loads on every item and other factors exist
    std_load = np.zeros((p, len(spec.factors)))
    general = [f for f, its in load_items.items() if len(its) == p and len(load_items) > 1]
    lg = np.zeros(p)
    for f in general:
        lg = np.sqrt(np.clip(_mean_offdiag(Rs), 0.02, 0.9))
        std_load[:, f] = lg
    for f, its in load_items.items():
        if f in general:
            continue
        its = np.array(its)
        block = Rs[np.ix_(its, its)] - np.outer(lg[its], lg[its])
        std_load[its, f] = np.sqrt(np.clip(_mean_offdiag(block), 0.02, 0.9))
    std_load *= sign[:, None]
    return _entry_starts(mats, rows, cols, std_load, sd, S, mean, Rs, load_items)


def _entry_starts(mats, rows, cols, std_load, sd, S, mean, Rs, load_items) -> np.ndarray:
    """Start of every entry of a group from its standardized loadings (nan where not
    applicable): loadings rescaled by the item SD, residual variances from the
    communalities (at least 20% of the item variance), intercepts at the item means,
    factor variances 1, factor covariances from the cross-block correlations, paths 0.5
    into factors with items, factor means 0."""
    out = np.full(mats.size, np.nan)
    diag = rows == cols
    sel = mats == LAMBDA
    out[sel] = std_load[rows[sel], cols[sel]] * sd[rows[sel]]
    sel = (mats == THETA) & diag
    h2 = np.sum(std_load**2, axis=1)
    out[sel] = np.diag(S)[rows[sel]] * np.maximum(1.0 - h2[rows[sel]], 0.2)
    out[(mats == THETA) & ~diag] = 0.0
    sel = mats == NU
    out[sel] = mean[rows[sel]]
    out[(mats == PSI) & diag] = 1.0
    out[mats == ALPHA] = 0.0
    for k in np.flatnonzero(mats == BETA):
        out[k] = 0.5 if load_items.get(int(rows[k])) else 0.0
    for k in np.flatnonzero((mats == PSI) & ~diag):
        r, c = int(rows[k]), int(cols[k])
        a, b = load_items.get(r, []), load_items.get(c, [])
        out[k] = 0.0
        if a and b:
            sa = (Rs[np.ix_(a, b)]).mean()
            la, lb = std_load[a, r].mean(), std_load[b, c].mean()
            out[k] = float(np.clip(sa / max(abs(la * lb), 1e-3), -0.8, 0.8))
    return out


def pool_starts(spec: ModelSpec, group_starts) -> np.ndarray:
    """Parameter vector from per-group entry starts: entries with a finite value in
    ``spec.value`` keep it, and a label shared by several groups starts at the average
    of its per-group values (0 where no start is known).

    ``group_starts`` yields, per group ``g``, the start of every entry of
    ``spec.group_entries(g)`` (nan where not applicable).
    """
    total = np.zeros(spec.n_params)
    count = np.zeros(spec.n_params)
    param = spec.param_index
    for g, st in enumerate(group_starts):
        idx = spec.group_entries(g)
        given = spec.value[idx]
        st = np.where(np.isfinite(given), given, st)
        j = param[idx]
        ok = (j >= 0) & np.isfinite(st)
        total += np.bincount(j[ok], weights=st[ok], minlength=spec.n_params)
        count += np.bincount(j[ok], minlength=spec.n_params)
    return np.where(count > 0, total / np.maximum(count, 1), 0.0)


def start_values(spec: ModelSpec, stats: SampleStats) -> np.ndarray:
    """A starting parameter vector for ``spec`` given the sample statistics.

    Entries with a finite start in ``spec.value`` keep it; a label shared by several
    groups starts at the average of its per-group values.
    """
    return pool_starts(spec, (_group_starts(spec, g, gs.cov, gs.mean) for g, gs in enumerate(stats.groups)))

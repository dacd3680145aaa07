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
    member = np.zeros((p, len(spec.factors)))
    for f, its in load_items.items():
        member[its, f] = 1.0
    # a factor is "general" when it loads on every item and other factors exist
    general = [f for f, its in load_items.items() if len(its) == p and len(load_items) > 1]
    lg = np.zeros(p)
    for f in general:
        lg = np.sqrt(np.clip(_mean_offdiag(Rs), 0.02, 0.9))
    # other factors: each item's mean correlation with the other items of the factor,
    # after the general factor's part (0.5 for a factor of one item)
    rest = Rs - np.outer(lg, lg)
    np.fill_diagonal(rest, 0.0)
    size = member.sum(axis=0)
    mean_r = np.where(size > 1, (rest @ member) / np.maximum(size - 1, 1), 0.5)
    std_load = member * np.sqrt(np.clip(mean_r, 0.02, 0.9))
    for f in general:
        std_load[:, f] = lg
    std_load *= sign[:, None]
    return _entry_starts(mats, rows, cols, std_load, sd, S, mean, Rs, member)


def _entry_starts(mats, rows, cols, std_load, sd, S, mean, Rs, member) -> np.ndarray:
    """Start of every entry of a group from its standardized loadings (nan where not
    applicable): loadings rescaled by the item SD, residual variances from the
    communalities (at least 20% of the item variance), intercepts at the item means,
    factor variances 1, factor covariances from the cross-block correlations (``member``:
    items x factors, 1 where an item loads), paths 0.5 into factors with items, factor
    means 0."""
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
    size = member.sum(axis=0)
    sel = mats == BETA
    out[sel] = np.where(size[rows[sel]] > 0, 0.5, 0.0)
    sel = (mats == PSI) & ~diag
    if sel.any():
        # mean cross-block correlation over the product of the blocks' mean loadings
        pairs = np.outer(size, size)
        cross = (member.T @ Rs @ member) / np.maximum(pairs, 1)
        mean_load = (member * std_load).sum(axis=0) / np.maximum(size, 1)
        r, c = rows[sel], cols[sel]
        est = cross[r, c] / np.maximum(np.abs(mean_load[r] * mean_load[c]), 1e-3)
        out[sel] = np.where(pairs[r, c] > 0, np.clip(est, -0.8, 0.8), 0.0)
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

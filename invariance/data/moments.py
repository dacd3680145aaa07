"""Per-group sufficient statistics: the only data complete-case ML needs.

Covariances use divisor N (not N - 1): this is what the ML discrepancy and its
published check values use (METHODS section 2).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

from ..errors import DataError

__all__ = ["GroupStats", "SampleStats", "sample_stats", "stats_from_arrays"]


@dataclass(frozen=True, eq=False)
class GroupStats:
    """Moments of one group.

    Attributes
    ----------
    name
        Group name.
    n
        Cases used.
    mean
        Item means, shape (p,).
    cov
        Covariance matrix with divisor ``n``, shape (p, p).
    raw
        The cases used, shape (n, p), kept for casewise methods (robust corrections,
        full-information ML, scores); may hold NaN where items are missing.
    """

    name: str
    n: int
    mean: np.ndarray
    cov: np.ndarray
    raw: np.ndarray | None = None


@dataclass(frozen=True, eq=False)
class SampleStats:
    """Sufficient statistics of every group, in group order."""

    items: tuple[str, ...]
    groups: tuple[GroupStats, ...]

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(g.name for g in self.groups)

    @property
    def n_total(self) -> int:
        return int(sum(g.n for g in self.groups))

    def subset(self, names: Sequence[str]) -> "SampleStats":
        """The statistics of the named groups only, in the given order."""
        by = {g.name: g for g in self.groups}
        return SampleStats(self.items, tuple(by[n] for n in names))

    def reorder_items(self, order: Sequence[str]) -> "SampleStats":
        """The same statistics with items in ``order``."""
        ix = [self.items.index(i) for i in order]
        gs = tuple(
            GroupStats(g.name, g.n, g.mean[ix], g.cov[np.ix_(ix, ix)], None if g.raw is None else g.raw[:, ix])
            for g in self.groups
        )
        return SampleStats(tuple(order), gs)


def _group_moments(name: str, x: np.ndarray, items: Sequence[str]) -> GroupStats:
    n, p = x.shape
    if n <= p:
        raise DataError(
            f"Group {name!r} has {n} complete cases for {p} items; a covariance matrix needs more "
            f"cases than items: collect more data for this group, merge it with another, or drop it."
        )
    mean = x.mean(axis=0)
    xc = x - mean
    cov = xc.T @ xc / n
    sd = np.sqrt(np.diag(cov))
    const = np.flatnonzero(sd <= 1e-12 * np.maximum(1.0, np.abs(mean)))
    if const.size:
        raise DataError(
            f"Item {items[const[0]]!r} is constant in group {name!r}; drop the item or the group."
        )
    eig = np.linalg.eigvalsh(cov / np.outer(sd, sd))
    if eig[0] <= 1e-10:
        raise DataError(
            f"The covariance matrix of group {name!r} is singular (an item is a linear "
            f"combination of others); drop the redundant item."
        )
    return GroupStats(name, int(n), mean, cov, x)


def stats_from_arrays(
    arrays: Sequence[np.ndarray], names: Sequence[str], items: Sequence[str]
) -> SampleStats:
    """Complete-case statistics from one (n_g, p) array per group."""
    items = tuple(str(i) for i in items)
    out = []
    for name, x in zip(names, arrays):
        x = np.asarray(x, dtype=float)
        x = x[~np.isnan(x).any(axis=1)]
        out.append(_group_moments(str(name), x, items))
    return SampleStats(items, tuple(out))


def sample_stats(frame, items: Sequence[str], group: str | None = None, *, groups: Sequence[str] | None = None) -> SampleStats:
    """Complete-case per-group statistics from a pandas DataFrame.

    Parameters
    ----------
    frame
        The data, one row per case.
    items
        Item columns, in model order.
    group
        Grouping column; ``None`` for a single group called ``"all"``.
    groups
        Group order (default: order of first appearance).
    """
    items = [str(i) for i in items]
    missing = [c for c in items + ([group] if group else []) if c not in frame.columns]
    if missing:
        raise DataError(f"Column {missing[0]!r} is not in the data; check the spelling or the data file.")
    if group is None:
        return stats_from_arrays([frame[items].to_numpy(dtype=float)], ["all"], items)
    keys = frame[group]
    if groups is None:
        groups = list(dict.fromkeys(keys.dropna().tolist()))
    arrays = [frame.loc[keys == g, items].to_numpy(dtype=float) for g in groups]
    return stats_from_arrays(arrays, [str(g) for g in groups], items)

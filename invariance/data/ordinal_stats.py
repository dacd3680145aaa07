"""Per-group ordinal sample statistics: the data the DWLS estimator fits.

The edge between data frames and the array kernels of :mod:`.polychoric`. Complete
cases per group (a case with any item missing is dropped), as for complete-data ML.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np

import warnings

from ..errors import DataError, ImproperSolutionWarning
from .categories import CategoryMap, category_maps, encode
from .moments import group_arrays
from .polychoric import PolychoricFit, polychoric
from .polyserial import mixed_statistics

__all__ = ["GroupCount", "OrdinalStats", "ordinal_stats", "ordinal_stats_from_arrays"]


@dataclass(frozen=True)
class GroupCount:
    """Name and cases of one group (the part of a group summary every estimator shares)."""

    name: str
    n: int


@dataclass(frozen=True, eq=False)
class OrdinalStats:
    """Thresholds, polychoric correlations and their ACOV for every group.

    Attributes
    ----------
    items
        Item names (model order).
    names
        Group names.
    fits
        One :class:`~invariance.ordinal.polychoric.PolychoricFit` per group.
    categories
        One :class:`~invariance.ordinal.categories.CategoryMap` per item (``None`` for a
        continuous item of a mixed set).
    """

    items: tuple[str, ...]
    names: tuple[str, ...]
    fits: tuple[PolychoricFit, ...]
    categories: tuple[CategoryMap, ...]

    @property
    def n_categories(self) -> np.ndarray:
        """Categories per item; 0 marks a continuous item (mixed statistics)."""
        return np.array([0 if m is None else m.n_categories for m in self.categories])

    @property
    def n(self) -> np.ndarray:
        return np.array([f.n for f in self.fits], dtype=float)

    @property
    def n_total(self) -> int:
        return int(self.n.sum())

    @property
    def groups(self) -> tuple[GroupCount, ...]:
        """Per group name and cases (as ``SampleStats.groups`` offers them)."""
        return tuple(GroupCount(name, int(f.n)) for name, f in zip(self.names, self.fits))

    def reorder_items(self, order: Sequence[str]) -> "OrdinalStats":
        """The same statistics with the items in ``order`` (statistic vectors, ACOV and
        influence values permuted accordingly)."""
        order = tuple(str(i) for i in order)
        if sorted(order) != sorted(self.items):
            raise DataError("The model items differ from the items of the ordinal statistics; recompute them.")
        perm = np.array([self.items.index(i) for i in order])
        fits = tuple(_reorder(f, perm) for f in self.fits)
        maps = tuple(self.categories[k] for k in perm)
        return OrdinalStats(order, self.names, fits, maps)

    def subset(self, names: Sequence[str]) -> "OrdinalStats":
        by = dict(zip(self.names, self.fits))
        return OrdinalStats(self.items, tuple(names), tuple(by[n] for n in names), self.categories)


def _reorder(f: PolychoricFit, perm: np.ndarray) -> PolychoricFit:
    """Permute the items of one group's statistics (new item a = old item perm[a])."""
    p = perm.size
    K = f.n_categories
    cont = np.zeros(p, bool) if f.continuous is None else np.asarray(f.continuous, bool)
    start = np.concatenate([[0], np.cumsum(K - 1)])
    nt = int(start[-1])
    old_c = np.flatnonzero(cont)
    nc = old_c.size
    pos_c = {int(c): k for k, c in enumerate(old_c)}
    old_pairs = {(int(a), int(b)): q for q, (a, b) in enumerate(zip(*f.pairs))}
    idx = [start[perm[a]] + k for a in range(p) for k in range(K[perm[a]] - 1)]
    new_c = [int(perm[a]) for a in range(p) if cont[perm[a]]]
    idx += [nt + pos_c[c] for c in new_c]
    idx += [nt + nc + pos_c[c] for c in new_c]
    pairs = np.triu_indices(p, 1)
    for a, b in zip(*pairs):
        i, j = sorted((int(perm[a]), int(perm[b])))
        idx.append(nt + 2 * nc + old_pairs[(i, j)])
    idx = np.asarray(idx)
    return PolychoricFit(
        n=f.n,
        n_categories=K[perm],
        thresholds=f.thresholds[perm],
        corr=f.corr[np.ix_(perm, perm)],
        pairs=pairs,
        stats=f.stats[idx],
        acov=f.acov[np.ix_(idx, idx)],
        influence=f.influence[:, idx],
        iterations=f.iterations,
        continuous=None if f.continuous is None else cont[perm],
    )


def ordinal_stats_from_arrays(
    arrays: Sequence[np.ndarray],
    names: Sequence[str],
    items: Sequence[str],
    *,
    merge: Mapping[str, Sequence[Sequence[float]]] | None = None,
    continuous: Sequence[str] = (),
) -> OrdinalStats:
    """Ordinal statistics from one (n_g, p) value array per group.

    Parameters
    ----------
    arrays
        Item values per group (rows with a missing value are dropped).
    names, items
        Group and item names.
    merge
        Item -> lists of adjacent values to merge (see
        :func:`invariance.ordinal.categories.category_maps`).
    continuous
        Items measured on a continuous scale (means, variances, Pearson and polyserial
        correlations; :mod:`invariance.ordinal.polyserial`); the others are ordered.
    """
    items = tuple(str(i) for i in items)
    names = tuple(str(n) for n in names)
    clean = _complete_cases(arrays, names, len(items))
    cont = np.array([it in set(continuous) for it in items])
    bad = [c for c in continuous if c not in items]
    if bad:
        raise DataError(f"The continuous item {bad[0]!r} is not among the items; check the spelling.")
    if cont.all():
        raise DataError("Every item is continuous; fit them by ML instead of DWLS.")
    oi = np.flatnonzero(~cont)
    omaps = category_maps([x[:, oi] for x in clean], names, [items[i] for i in oi], merge=merge)
    maps_list: list = [None] * len(items)
    for k, i in enumerate(oi):
        maps_list[i] = omaps[k]
    maps = tuple(maps_list)
    K = np.array([0 if m is None else m.n_categories for m in maps])
    if cont.any():
        fits = []
        for x in clean:
            xx = x.copy()
            xx[:, oi] = encode(x[:, oi], omaps)
            fits.append(mixed_statistics(xx, ~cont, K))
        fits = tuple(fits)
    else:
        fits = tuple(polychoric(encode(x, maps), K) for x in clean)
    _warn_boundary(names, items, fits)
    return OrdinalStats(items, names, fits, maps)


def _complete_cases(arrays: Sequence[np.ndarray], names: tuple[str, ...], n_items: int) -> list[np.ndarray]:
    """Each group's complete cases; refuses a group with fewer than two cases per item."""
    clean = []
    for name, x in zip(names, arrays):
        x = np.asarray(x, dtype=float)
        x = x[~np.isnan(x).any(axis=1)]
        if x.shape[0] < 2 * n_items:
            raise DataError(
                f"Group {name!r} has {x.shape[0]} complete cases for {n_items} ordinal items; "
                "collect more data for this group, merge it with another, or drop it."
            )
        clean.append(x)
    return clean


def _warn_boundary(names: tuple[str, ...], items: tuple[str, ...], fits) -> None:
    """Warn (at the caller of :func:`ordinal_stats_from_arrays`) of a correlation with |r| > .999."""
    for name, f in zip(names, fits):
        i, j = f.pairs
        edge = np.flatnonzero(np.abs(f.corr[i, j]) > 0.999)
        if edge.size:
            a, b = items[i[edge[0]]], items[j[edge[0]]]
            warnings.warn(
                f"The polychoric correlation of {a} and {b} in group {name!r} is at the boundary (|r| > .999); "
                "the two items may be redundant or a category nearly empty: drop one item or merge categories.",
                ImproperSolutionWarning,
                stacklevel=3,
            )


def ordinal_stats(
    frame,
    items: Sequence[str],
    group: str | None = None,
    *,
    groups: Sequence[str] | None = None,
    merge: Mapping[str, Sequence[Sequence[float]]] | None = None,
    continuous: Sequence[str] = (),
) -> OrdinalStats:
    """Ordinal statistics from a pandas DataFrame (``group`` names the grouping column;
    ``continuous`` names items that are not ordered)."""
    arrays, names = group_arrays(frame, items, group, groups=groups)
    return ordinal_stats_from_arrays(arrays, names, items, merge=merge, continuous=continuous)

"""Per-group sufficient statistics: the only data complete-case ML needs.

Covariances use divisor N (not N - 1): this is what the ML discrepancy and its
published check values use (METHODS section 2).

Missing values: by default (``missing="listwise"``) only complete cases enter, as
before. With ``missing="fiml"`` every case with at least one observed item is kept
(raw rows with NaN), the means and covariance are the saturated-model ML estimates by
EM (:mod:`invariance.data.em`), and :class:`MissingInfo` records the patterns, the
coverage of each item and the cases dropped because nothing was observed.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Sequence

import numpy as np
import pandas as pd

from ..errors import ConvergenceWarning, DataError
from .em import saturated_with_patterns
from .mcar import LittleTest, little_statistic

__all__ = ["GroupStats", "MissingInfo", "SampleStats", "group_arrays", "sample_stats", "split_rows", "stats_from_arrays"]

MISSING_METHODS = ("listwise", "fiml")


@dataclass(frozen=True, eq=False)
class MissingInfo:
    """How a group's incomplete cases were handled.

    Attributes
    ----------
    method
        ``"listwise"`` (complete cases only) or ``"fiml"`` (every case with an
        observed item).
    n_input
        Rows of the group in the data.
    n_dropped
        Rows not used: incomplete rows under listwise deletion, rows with no observed
        item under ``fiml``.
    observed
        (K, p) boolean patterns of observed items among the cases used.
    pattern_counts
        (K,) cases per pattern.
    coverage
        (p,) share of the cases used that observe each item.
    loglik_h1
        Saturated-model log-likelihood of the cases used (EM under ``fiml``).
    em_iterations, em_converged
        EM run (0 and True when no EM was needed).
    little
        Little's MCAR test at the EM estimates (``fiml`` with several patterns), computed
        with them from the same pattern statistics; ``None`` otherwise.
    """

    method: str
    n_input: int
    n_dropped: int
    observed: np.ndarray
    pattern_counts: np.ndarray
    coverage: np.ndarray
    loglik_h1: float
    em_iterations: int = 0
    em_converged: bool = True
    little: LittleTest | None = None

    @property
    def n_patterns(self) -> int:
        return int(self.observed.shape[0])

    def reorder(self, ix: Sequence[int]) -> "MissingInfo":
        """The same record with items in the order ``ix``."""
        ix = list(ix)
        return MissingInfo(
            self.method, self.n_input, self.n_dropped, self.observed[:, ix], self.pattern_counts,
            self.coverage[ix], self.loglik_h1, self.em_iterations, self.em_converged, self.little,
        )

    def to_dict(self, items: Sequence[str]) -> dict:
        """Plain types for results files."""
        return {
            "method": self.method,
            "n_input": int(self.n_input),
            "n_used": int(self.n_input - self.n_dropped),
            "n_dropped": int(self.n_dropped),
            "n_patterns": self.n_patterns,
            "coverage": {str(i): float(c) for i, c in zip(items, self.coverage)},
            "em_converged": bool(self.em_converged),
        }


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
    missing
        How incomplete cases were handled (``None`` when built by hand).
    """

    name: str
    n: int
    mean: np.ndarray
    cov: np.ndarray
    raw: np.ndarray | None = None
    missing: MissingInfo | None = None

    @property
    def has_missing(self) -> bool:
        """True when the cases used hold missing values (full-information ML applies)."""
        return self.raw is not None and bool(np.isnan(self.raw).any())


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
            GroupStats(
                g.name, g.n, g.mean[ix], g.cov[np.ix_(ix, ix)], None if g.raw is None else g.raw[:, ix],
                None if g.missing is None else g.missing.reorder(ix),
            )
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


def _check_method(missing: str) -> None:
    if missing not in MISSING_METHODS:
        raise DataError(
            f"The missing-data method must be one of {', '.join(MISSING_METHODS)}; got {missing!r}."
        )


def _listwise(name: str, x: np.ndarray, items: Sequence[str]) -> GroupStats:
    keep = ~np.isnan(x).any(axis=1)
    gs = _group_moments(name, x[keep], items)
    n, p = gs.raw.shape
    ll = -0.5 * n * (p * np.log(2 * np.pi) + np.linalg.slogdet(gs.cov)[1] + p)
    info = MissingInfo(
        "listwise", int(x.shape[0]), int((~keep).sum()), np.ones((1, p), dtype=bool),
        np.array([n]), np.ones(p), float(ll),
    )
    return GroupStats(gs.name, gs.n, gs.mean, gs.cov, gs.raw, info)


def _full_information(name: str, x: np.ndarray, items: Sequence[str]) -> GroupStats:
    obs = ~np.isnan(x)
    keep = obs.any(axis=1)
    xu, obs = (x, obs) if keep.all() else (x[keep], obs[keep])
    n, p = xu.shape
    if n <= p:
        raise DataError(
            f"Group {name!r} has {n} cases with an observed item for {p} items; collect more data "
            f"for this group, merge it with another, or drop it."
        )
    count = obs.sum(axis=0)
    for j in np.flatnonzero(count < 2):
        raise DataError(f"Item {items[j]!r} is observed in fewer than 2 cases of group {name!r}; drop the item or the group.")
    of = obs.astype(float)
    pair = of.T @ of
    lo = np.argwhere(np.tril(pair == 0, -1)) if not pair.all() else ()
    if len(lo):
        a, b = lo[0]
        raise DataError(
            f"Items {items[b]!r} and {items[a]!r} are never observed together in group {name!r}, "
            f"so their covariance cannot be estimated; drop one of them."
        )
    mean = np.where(obs, xu, 0.0).sum(axis=0) / count  # numpy.nanmean and nanstd, without their copies
    dev = np.where(obs, xu - mean, 0.0)
    sd = np.sqrt((dev * dev).sum(axis=0) / count)
    const = np.flatnonzero(sd <= 1e-12 * np.maximum(1.0, np.abs(mean)))
    if const.size:
        raise DataError(f"Item {items[const[0]]!r} is constant in group {name!r}; drop the item or the group.")
    try:
        em, pat = saturated_with_patterns(xu)
    except (np.linalg.LinAlgError, FloatingPointError, ValueError):
        i, j = np.unravel_index(np.argmin(pair + np.diag(np.full(p, np.inf))), pair.shape)
        raise DataError(
            f"The saturated model of group {name!r} cannot be estimated from so many missing values "
            f"(items {items[i]!r} and {items[j]!r} are observed together in only {int(pair[i, j])} cases); "
            "drop the items observed least often, or collect more complete data."
        ) from None
    if not em.converged:
        warnings.warn(
            f"EM for the saturated model of group {name!r} stopped after {em.iterations} updates "
            f"before converging; the test statistic may be slightly off: check items with low coverage.",
            ConvergenceWarning,
            stacklevel=3,
        )
    sdv = np.sqrt(np.diag(em.cov))
    if np.linalg.eigvalsh(em.cov / np.outer(sdv, sdv))[0] <= 1e-10:
        raise DataError(
            f"The estimated covariance matrix of group {name!r} is singular (an item is a linear "
            f"combination of others, or too few cases observe some pairs); drop the redundant item."
        )
    info = MissingInfo(
        "fiml", int(x.shape[0]), int((~keep).sum()), pat.observed, pat.counts.astype(np.int64), count / n,
        em.loglik, em.iterations, em.converged, little_statistic(pat, em.mean, em.cov) if pat.counts.size > 1 else None,
    )
    return GroupStats(name, int(n), em.mean, em.cov, xu, info)


def stats_from_arrays(
    arrays: Sequence[np.ndarray], names: Sequence[str], items: Sequence[str], *, missing: str = "listwise"
) -> SampleStats:
    """Per-group statistics from one (n_g, p) array per group (NaN = missing).

    Parameters
    ----------
    arrays, names, items
        The data of each group, the group names and the item names.
    missing
        ``"listwise"`` (default): complete cases only. ``"fiml"``: every case with at
        least one observed item, moments by EM, for full-information ML.
    """
    _check_method(missing)
    items = tuple(str(i) for i in items)
    out = []
    for name, x in zip(names, arrays):
        x = np.asarray(x, dtype=float)
        if missing == "fiml":
            out.append(_full_information(str(name), x, items))
        else:
            out.append(_listwise(str(name), x, items))
    return SampleStats(items, tuple(out))


def sample_stats(
    frame,
    items: Sequence[str],
    group: str | None = None,
    *,
    groups: Sequence[str] | None = None,
    missing: str = "listwise",
) -> SampleStats:
    """Per-group statistics from a pandas DataFrame (complete cases by default).

    Parameters
    ----------
    frame, items, group, groups
        The data and how to split it, as in :func:`group_arrays`.
    missing
        ``"listwise"`` (default) or ``"fiml"``; see :func:`stats_from_arrays`.
    """
    _check_method(missing)
    arrays, names = group_arrays(frame, items, group, groups=groups)
    return stats_from_arrays(arrays, names, items, missing=missing)


def group_arrays(
    frame, items: Sequence[str], group: str | None = None, *, groups: Sequence[str] | None = None
) -> tuple[list[np.ndarray], list[str]]:
    """The item values of every group as (n_g, p) float arrays (NaN = missing), and the
    group names.

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
    absent = [c for c in items + ([group] if group else []) if c not in frame.columns]
    if absent:
        raise DataError(f"Column {absent[0]!r} is not in the data; check the spelling or the data file.")
    # One conversion to arrays, then boolean rows per group: pandas indexing per group
    # costs more than the statistics themselves on small data.
    if frame.columns.is_unique:  # column by column: no intermediate frame of the items
        values = np.column_stack([frame[c].to_numpy(dtype=float) for c in items]) if items else np.empty((len(frame), 0))
    else:
        values = frame[items].to_numpy(dtype=float)
    if group is None:
        return [values], ["all"]
    codes, uniques = pd.factorize(frame[group].to_numpy())  # missing keys: code -1
    if groups is None:  # order of first appearance
        groups = list(uniques)
    where = {g: k for k, g in enumerate(groups)}
    member = np.array([where.get(u, -1) for u in uniques] + [-1], dtype=np.int64)[codes]
    return split_rows(values, member, len(groups)), [str(g) for g in groups]


def split_rows(values: np.ndarray, member: np.ndarray, n_groups: int) -> list[np.ndarray]:
    """The rows of ``values`` of each group ``k < n_groups`` (``member``: row -> group, -1
    for none), in data order; one stable sort, so the cost does not grow with the number
    of groups times the rows. Each group's array is stored item by item (Fortran order):
    the per-item sums, counts and bounds that every later stage takes run along
    contiguous memory."""
    order = np.argsort(member, kind="stable")
    bounds = np.cumsum(np.bincount(member + 1, minlength=n_groups + 1))
    return [np.asfortranarray(values[order[bounds[k]:bounds[k + 1]]]) for k in range(n_groups)]

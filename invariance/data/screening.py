"""Item screening per group, before any model is fitted.

For every group: cases, missing share, mean, SD, skewness, excess kurtosis, floor and
ceiling shares, category counts of items with few distinct values, corrected item-total
correlations, and Mardia's (1970) multivariate skewness and kurtosis with their tests;
then a plain recommendation on how to treat the items.

Conventions
-----------
* Univariate moments use the observed values of each item in the group. The SD uses
  divisor n - 1; skewness g1 = m3 / m2^1.5 and excess kurtosis g2 = m4 / m2^2 - 3 are the
  moment ratios with divisor n (the same as ``scipy.stats.skew`` and
  ``scipy.stats.kurtosis`` with their defaults).
* Floor and ceiling are the lowest and highest values of the item across all groups
  (or the scale bounds given by the caller), so shares compare across groups.
* Mardia's statistics use the complete cases and the covariance with divisor n
  (Mardia 1970): b1p = n^-2 sum_ij d_ij^3, b2p = n^-1 sum_i d_ii^2 with
  d_ij = (x_i - m)' S^-1 (x_j - m). Tests: n b1p / 6 ~ chi2 on p(p+1)(p+2)/6 df;
  z = (b2p - p(p+2)) / sqrt(8 p (p+2) / n) ~ N(0, 1).
* Corrected item-total correlation: item with the sum of the other items of the same
  scale, complete cases of that scale.

Rules of the recommendation (defaults, all keyword options of :func:`screen`)
-----------------------------------------------------------------------------
* Items with fewer than five observed categories: ordered-categorical treatment
  (common practice; Rhemtulla, Brosseau-Liard & Savalei 2012 found continuous ML
  acceptable from about five categories on).
* Marked non-normality: Mardia's kurtosis test p < .05 together with a relative
  multivariate kurtosis b2p / p(p+2) above 1.10, or an item with |skewness| > 2 or
  excess kurtosis > 7 (West, Finch & Curran 1995; common practice): robust ML
  (Satorra & Bentler 1994 scaled statistics, sandwich standard errors). The relative
  kurtosis cut-off is this project's choice: the test alone rejects trivial departures
  in large samples.
* Missing values: full-information ML rather than complete cases.
* Floor or ceiling share above 15% (common practice), corrected item-total correlation
  below .30 (common practice), groups under 200 cases (common practice) are named.
* A category seen in one group but not in another is named (it breaks ordinal
  multi-group models; merge categories or treat the item as continuous).
"""

from __future__ import annotations

import math
from typing import Mapping, Sequence

import numpy as np
from scipy import special as _sp

import pandas as pd

from ..errors import DataError, SpecificationError
from .moments import group_arrays
from .screening_advice import recommend

__all__ = [
    "item_moments",
    "bound_shares",
    "category_counts",
    "distinct_counts",
    "item_total_correlations",
    "mardia",
    "recommend",
    "screen",
    "screen_groups",
    "screening_table",
    "SCREENING_RULES",
]

#: Default thresholds of the recommendation, with their sources.
SCREENING_RULES = {
    "ordinal_below_categories": {"value": 5, "source": "common practice; Rhemtulla, Brosseau-Liard & Savalei (2012)"},
    "few_categories_max": {"value": 10, "source": "this project: category counts are listed up to this many distinct values"},
    "mardia_alpha": {"value": 0.05, "source": "Mardia (1970) kurtosis test"},
    "relative_kurtosis": {"value": 1.10, "source": "this project: b2p / p(p+2) above this marks kurtosis when the test rejects"},
    "item_skewness": {"value": 2.0, "source": "common practice; West, Finch & Curran (1995)"},
    "item_kurtosis": {"value": 7.0, "source": "common practice; West, Finch & Curran (1995)"},
    "floor_ceiling_share": {"value": 0.15, "source": "common practice"},
    "item_total_min": {"value": 0.30, "source": "common practice"},
    "small_group": {"value": 200, "source": "common practice (groups under about 200 cases make the tests weak)"},
}


# ---------------------------------------------------------------------------
# Pure array kernels
# ---------------------------------------------------------------------------


def item_moments(x: np.ndarray) -> dict[str, np.ndarray]:
    """Univariate summaries of every column of ``x`` (NaN = missing).

    Parameters
    ----------
    x
        Array of shape (n, p).

    Returns
    -------
    dict
        Arrays of length p: ``n`` (observed values), ``missing`` (share), ``mean``,
        ``sd`` (divisor n - 1), ``skewness`` (g1), ``kurtosis`` (excess, g2).
    """
    x = np.asarray(x, dtype=float)
    obs = ~np.isnan(x)
    n = obs.sum(axis=0)
    nn = np.where(n > 0, n, 1)
    xz = np.where(obs, x, 0.0)
    mean = xz.sum(axis=0) / nn
    dev = np.where(obs, x - mean, 0.0)
    sq = dev * dev  # products, not powers: ** 3 and ** 4 go through libm pow (50x slower)
    m2 = sq.sum(axis=0) / nn
    m3 = (sq * dev).sum(axis=0) / nn
    m4 = (sq * sq).sum(axis=0) / nn
    with np.errstate(divide="ignore", invalid="ignore"):
        sd = np.where(n > 1, np.sqrt(m2 * nn / np.maximum(nn - 1, 1)), np.nan)
        skew = np.where(m2 > 0, m3 / m2**1.5, np.nan)
        kurt = np.where(m2 > 0, m4 / m2**2 - 3.0, np.nan)
    mean = np.where(n > 0, mean, np.nan)
    return {
        "n": n,
        "missing": 1.0 - n / max(x.shape[0], 1),
        "mean": mean,
        "sd": sd,
        "skewness": skew,
        "kurtosis": kurt,
    }


def bound_shares(x: np.ndarray, low: np.ndarray, high: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Shares of observed values at ``low`` (floor) and at ``high`` (ceiling), per column."""
    x = np.asarray(x, dtype=float)
    obs = ~np.isnan(x)
    n = np.maximum(obs.sum(axis=0), 1)
    tol = 1e-9 * np.maximum(1.0, np.abs(high - low))
    floor = (obs & (np.abs(x - low) <= tol)).sum(axis=0) / n
    ceil = (obs & (np.abs(x - high) <= tol)).sum(axis=0) / n
    return floor, ceil


def distinct_counts(x: np.ndarray) -> np.ndarray:
    """Number of distinct observed values in every column of ``x`` (NaN = missing); the
    same as ``np.unique`` of each column's observed values, in one sort."""
    s = np.sort(np.asarray(x, dtype=float), axis=0)  # NaN sorts last
    ok = ~np.isnan(s)
    return ok[:1].sum(axis=0) + (ok[1:] & (s[1:] != s[:-1])).sum(axis=0)


def category_counts(v: np.ndarray, categories: np.ndarray) -> np.ndarray:
    """Counts of each value of ``categories`` among the observed entries of ``v``."""
    v = np.asarray(v, dtype=float)
    v = v[~np.isnan(v)]
    return np.array([(v == c).sum() for c in categories], dtype=int)


def item_total_correlations(x: np.ndarray) -> np.ndarray:
    """Corrected item-total correlations of the columns of ``x`` (complete rows).

    Each column is correlated with the sum of the other columns. Returns NaN for a
    scale of fewer than two items or with fewer than three complete rows.
    """
    x = np.asarray(x, dtype=float)
    x = x[~np.isnan(x).any(axis=1)]
    n, p = x.shape
    if p < 2 or n < 3:
        return np.full(p, np.nan)
    # from the cross products C of the centred items: (item, total) = row sums of C, and
    # rest = total - item, so (item, rest) = row sum - C_jj and
    # (rest, rest) = sum C - 2 row sum + C_jj
    xc = x - x.mean(axis=0)
    c = xc.T @ xc
    row, own = c.sum(axis=1), np.diag(c)
    rest = c.sum() - 2 * row + own
    den = np.sqrt(np.maximum(own * rest, 0.0))
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(den > 0, (row - own) / den, np.nan)


def _cube_sum(z: np.ndarray, *, block: int = 2048, route: str | None = None) -> float:
    """sum_ij (z_i' z_j)^3, by whichever route is cheaper.

    ``pairs`` sums the cubes of the n x n inner products block by block (O(n^2 p));
    ``tensor`` uses sum_ij (z_i' z_j)^3 = sum_abc (sum_i z_ia z_ib z_ic)^2, the squared
    norm of the third-moment tensor (O(n p^3)), which wins for large n.
    """
    n, p = z.shape
    if route is None:
        route = "tensor" if n > p**3 else "pairs"
    total = 0.0
    if route == "pairs":
        for s in range(0, n, block):
            d = z[s : s + block] @ z.T
            total += float(np.einsum("ij,ij->", d * d, d))
        return total
    T = np.zeros((p, p, p))
    for s in range(0, n, block):
        zb = z[s : s + block]
        for a in range(p):
            T[a] += (zb[:, a, None] * zb).T @ zb
    return float(np.sum(T * T))


def mardia(x: np.ndarray, *, block: int = 2048) -> dict[str, float]:
    """Mardia's (1970) multivariate skewness and kurtosis with their asymptotic tests.

    Parameters
    ----------
    x
        Complete data, shape (n, p) (rows with NaN are dropped).
    block
        Rows per block when summing the cubes (memory stays O(block * max(n, p^2))).
        The skewness sum is taken over pairs of cases (O(n^2 p)) or, when n > p^3,
        through the third-moment tensor (O(n p^3)); both give the same value.

    Returns
    -------
    dict
        ``n``, ``p``, ``skewness`` (b1p), ``skewness_stat`` (n b1p / 6), ``skewness_df``,
        ``skewness_p``, ``kurtosis`` (b2p), ``kurtosis_expected`` (p(p+2)),
        ``kurtosis_relative`` (b2p / p(p+2)), ``kurtosis_z``, ``kurtosis_p`` (two-sided).
    """
    x = np.asarray(x, dtype=float)
    x = x[~np.isnan(x).any(axis=1)]
    n, p = x.shape
    if n <= p:
        raise DataError(
            f"Mardia's statistics need more complete cases than items; got {n} cases for {p} items: "
            "collect more data or screen fewer items."
        )
    xc = x - x.mean(axis=0)
    S = xc.T @ xc / n
    try:
        L = np.linalg.cholesky(S)
    except np.linalg.LinAlgError:
        raise DataError(
            "The covariance matrix of the screened items is singular; drop an item that is "
            "constant or a linear combination of others."
        ) from None
    z = np.linalg.solve(L, xc.T).T  # rows z_i with z_i' z_j = d_ij
    b1 = _cube_sum(z, block=block) / n**2
    dii = np.einsum("ij,ij->i", z, z)
    b2 = float(np.mean(dii**2))
    df = p * (p + 1) * (p + 2) // 6
    stat = n * b1 / 6.0
    expected = p * (p + 2.0)
    zk = (b2 - expected) / np.sqrt(8.0 * p * (p + 2.0) / n)
    return {
        "n": int(n),
        "p": int(p),
        "skewness": b1,
        "skewness_stat": float(stat),
        "skewness_df": int(df),
        "skewness_p": float(_sp.chdtrc(df, stat)),  # = scipy.stats.chi2.sf, without its overhead
        "kurtosis": b2,
        "kurtosis_expected": float(expected),
        "kurtosis_relative": float(b2 / expected),
        "kurtosis_z": float(zk),
        "kurtosis_p": float(2 * _sp.ndtr(-abs(zk))),  # = 2 scipy.stats.norm.sf(|z|)
    }


# ---------------------------------------------------------------------------
# pandas edge
# ---------------------------------------------------------------------------


def _num(v) -> float | None:
    v = float(v)
    return v if math.isfinite(v) else None


def _screen_group(
    name: str,
    x: np.ndarray,
    distinct: np.ndarray,
    items: Sequence[str],
    low: np.ndarray,
    high: np.ndarray,
    cats: dict[int, np.ndarray],
    scales: Mapping[str, Sequence[str]],
) -> dict:
    mom = item_moments(x)
    floor, ceil = bound_shares(x, low, high)
    ix = {it: k for k, it in enumerate(items)}
    itc: dict[str, dict[str, float | None]] = {it: {} for it in items}
    for scale, its in scales.items():
        cols = [ix[i] for i in its]
        r = item_total_correlations(x[:, cols])
        for i, v in zip(its, r):
            itc[i][scale] = _num(v)
    recs = []
    for j, it in enumerate(items):
        col = x[:, j]
        rec = {
            "item": it,
            "n": int(mom["n"][j]),
            "missing": _num(mom["missing"][j]),
            "mean": _num(mom["mean"][j]),
            "sd": _num(mom["sd"][j]),
            "skewness": _num(mom["skewness"][j]),
            "kurtosis": _num(mom["kurtosis"][j]),
            "floor": _num(floor[j]) if mom["n"][j] else None,
            "ceiling": _num(ceil[j]) if mom["n"][j] else None,
            "n_categories": int(distinct[j]),
            "categories": None,
            "absent_categories": [],
            "item_total": itc[it],
        }
        if j in cats:
            counts = category_counts(col, cats[j])
            rec["categories"] = {_label(c): int(k) for c, k in zip(cats[j], counts)}
            rec["absent_categories"] = [_label(c) for c, k in zip(cats[j], counts) if k == 0]
        recs.append(rec)
    complete = x[~np.isnan(x).any(axis=1)]
    try:
        mm = mardia(complete)
    except DataError as exc:
        mm = None
        note = str(exc)
    else:
        note = None
    out = {
        "group": name,
        "n": int(x.shape[0]),
        "n_complete": int(complete.shape[0]),
        "items": recs,
        "mardia": mm,
    }
    if note:
        out["mardia_note"] = note
    return out


def _label(c: float) -> str:
    c = float(c)
    return str(int(c)) if c.is_integer() else repr(c)


def screen(
    frame,
    items: Sequence[str],
    group: str | None = None,
    *,
    groups: Sequence[str] | None = None,
    scales: Mapping[str, Sequence[str]] | None = None,
    bounds: Mapping[str, tuple[float, float]] | None = None,
    rules: Mapping[str, float] | None = None,
) -> dict:
    """Screen the items of every group; a plain dict for results.json (``screening``).

    Parameters
    ----------
    frame
        The data (pandas DataFrame), one row per case; missing values as NaN.
    items
        Item columns.
    group
        Grouping column; ``None`` screens one group called ``"all"``.
    groups
        Group order (default: order of first appearance).
    scales
        Scale name -> items, for corrected item-total correlations (default: one scale
        ``all`` of every item). Pass the factors of the measurement structure.
    bounds
        Item -> (lowest, highest) possible value, for floor and ceiling shares
        (default: the lowest and highest value observed in any group).
    rules
        Overrides of :data:`SCREENING_RULES` values, by key.

    Returns
    -------
    dict
        ``groups`` (per group: ``group``, ``n``, ``n_complete``, ``items`` (one record
        per item), ``mardia``), ``recommendation`` and ``rules`` (thresholds with sources).
    """
    items = [str(i) for i in items]
    if not items:
        raise SpecificationError("Screening needs at least one item; list the item columns.")
    missing = [c for c in items + ([group] if group else []) if c not in frame.columns]
    if missing:
        raise DataError(f"Column {missing[0]!r} is not in the data; check the spelling or the data file.")
    rule, scales = _options(items, scales, rules)
    return _screen(_group_parts(frame, items, group, groups), items, rule, scales, bounds)


def screen_groups(
    parts: Sequence[tuple[str, np.ndarray]],
    items: Sequence[str],
    *,
    scales: Mapping[str, Sequence[str]] | None = None,
    bounds: Mapping[str, tuple[float, float]] | None = None,
    rules: Mapping[str, float] | None = None,
) -> dict:
    """:func:`screen` of data already split by group: ``parts`` holds (group name,
    (n_g, p) array of the items, NaN = missing) per group, in order (the pipeline passes
    the checked data's blocks). The options and the result are those of :func:`screen`."""
    items = [str(i) for i in items]
    if not items:
        raise SpecificationError("Screening needs at least one item; list the item columns.")
    rule, scales = _options(items, scales, rules)
    return _screen(list(parts), items, rule, scales, bounds)


def _options(items: list[str], scales, rules) -> tuple[dict[str, float], dict[str, list[str]]]:
    """The rule values and the scales (default: one scale ``all``), both checked."""
    rule = _screening_rules(rules)
    scales = {"all": items} if scales is None else {str(k): [str(i) for i in v] for k, v in scales.items()}
    for s, its in scales.items():
        bad = [i for i in its if i not in items]
        if bad:
            raise SpecificationError(f"Scale {s!r} names {bad[0]!r}, which is not among the screened items.")
    return rule, scales


def _screen(parts: list[tuple[str, np.ndarray]], items: list[str], rule: dict, scales: dict, bounds) -> dict:
    """The screening records of every group, the recommendation and the rules."""
    pooled = np.concatenate([x for _, x in parts], axis=0)
    low, high = _item_bounds(pooled, items, bounds)
    distinct = [distinct_counts(x) for _, x in parts]
    cats: dict[int, np.ndarray] = {}
    # a column with more distinct values in one group than the limit has more overall:
    # only the others need their pooled values counted
    for j in np.flatnonzero(np.all([k <= rule["few_categories_max"] for k in distinct], axis=0)):
        col = pooled[:, j]
        values = np.unique(col[~np.isnan(col)])
        if 0 < values.size <= rule["few_categories_max"]:
            cats[int(j)] = values
    recs = [_screen_group(name, x, k, items, low, high, cats, scales) for (name, x), k in zip(parts, distinct)]
    return {
        "groups": recs,
        "recommendation": recommend(recs, rules=rule),
        "rules": {k: {"value": rule[k], "source": SCREENING_RULES[k]["source"]} for k in rule},
    }


def _screening_rules(rules: Mapping[str, float] | None) -> dict[str, float]:
    """Default rule values with the caller's overrides; refuses an unknown key."""
    rule = {k: v["value"] for k, v in SCREENING_RULES.items()}
    for k, v in dict(rules or {}).items():
        if k not in rule:
            raise SpecificationError(
                f"Unknown screening rule {k!r}; allowed: {', '.join(sorted(rule))}."
            )
        rule[k] = float(v)
    return rule


def _group_parts(
    frame, items: list[str], group: str | None, groups: Sequence[str] | None
) -> list[tuple[str, np.ndarray]]:
    """(group name, item array) per group, in the given order or that of first appearance
    (:func:`~invariance.data.moments.group_arrays`)."""
    try:
        arrays, names = group_arrays(frame, items, group, groups=groups)
    except (TypeError, ValueError):
        raise DataError(
            "An item column holds values that are not numbers; recode it or declare its missing codes."
        ) from None
    parts = list(zip(names, arrays))
    empty = [name for name, x in parts if x.shape[0] == 0]
    if empty:
        raise DataError(f"Group {empty[0]!r} has no cases in column {group!r}; check the group names.")
    return parts


def _item_bounds(
    pooled: np.ndarray, items: list[str], bounds: Mapping[str, tuple[float, float]] | None
) -> tuple[np.ndarray, np.ndarray]:
    """Lowest and highest value of each item: observed over all groups, or given by the caller."""
    low, high = np.fmin.reduce(pooled, axis=0), np.fmax.reduce(pooled, axis=0)  # NaN only if all are
    low, high = np.where(np.isnan(low), np.inf, low), np.where(np.isnan(high), -np.inf, high)
    for it, (lo, hi) in dict(bounds or {}).items():
        if it not in items:
            raise SpecificationError(f"Bounds are given for {it!r}, which is not among the screened items.")
        low[items.index(it)], high[items.index(it)] = float(lo), float(hi)
    return low, high


def screening_table(result: dict):
    """One row per group and item from the output of :func:`screen` (a DataFrame)."""

    rows = []
    for g in result["groups"]:
        for it in g["items"]:
            row = {"group": g["group"]}
            row.update({k: v for k, v in it.items() if k not in ("categories", "item_total", "absent_categories")})
            for s, r in it["item_total"].items():
                row[f"item_total[{s}]"] = r
            rows.append(row)
    return pd.DataFrame(rows)

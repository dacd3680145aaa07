"""Checks run on the data before any model is fitted.

Each problem raises a one-line :class:`~invariance.errors.DataError` that names the
column and group concerned and the fix. Problems that weaken the analysis without
preventing it (small groups, rows without a group) come back as warning strings.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property
from types import MappingProxyType
from typing import Any, Mapping, Sequence

import numpy as np

import pandas as pd

from ..errors import DataError, shorten
from .moments import split_rows

__all__ = ["CheckedData", "check_data", "column_quartiles", "far_out_columns", "far_out_values", "MAX_MAGNITUDE", "SMALL_GROUP"]

#: Groups smaller than this make the tests weak (common practice: about 200 per group).
SMALL_GROUP = 200


@dataclass(frozen=True, eq=False)
class CheckedData:
    """Data that passed the checks.

    Attributes
    ----------
    frame
        Item columns as floats (NaN = missing) plus the group column as strings, rows
        without a group (or of a group not analysed) removed; the data's row labels kept.
        Built from ``blocks`` on first use (the pipeline's stages read the blocks).
    items, group, groups
        Item columns in model order, the grouping column, the group names in order.
    rows
        Group -> rows in the data.
    complete
        Group -> rows with every item observed (the rows complete-case fitting uses).
    missing
        Group -> item -> number of missing values.
    blocks
        Group -> read-only (rows, items) float array of that group's item values, rows in
        data order (the rows of ``frame`` of that group): later stages take the per-group
        arrays from here instead of indexing the frame again.
    row_index, row_group
        The row labels of the rows kept, in data order, and the position in ``groups``
        of each one's group.
    warnings
        Warnings about the data (small groups, rows without a group).
    """

    items: tuple[str, ...]
    group: str
    groups: tuple[str, ...]
    rows: dict
    complete: dict
    missing: dict
    blocks: Mapping[str, np.ndarray]
    row_index: Any
    row_group: np.ndarray
    warnings: tuple[str, ...] = field(default=())

    def arrays(self) -> list[np.ndarray]:
        """The item values of every group, in group order (see ``blocks``)."""
        return [self.blocks[g] for g in self.groups]

    @cached_property
    def frame(self):
        """The checked data as a DataFrame (see the class attributes)."""
        values = np.empty((self.row_group.size, len(self.items)))
        values[np.argsort(self.row_group, kind="stable")] = np.concatenate(self.arrays())
        out = pd.DataFrame(values, index=self.row_index, columns=list(self.items))
        out.insert(0, self.group, np.asarray(self.groups, dtype=object)[self.row_group])
        return out


def _group_label(value) -> str:
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value)


def check_data(
    frame,
    *,
    items: Sequence[str],
    group: str,
    reference: str | None = None,
    groups: Sequence[str] | None = None,
    complete_cases_needed: bool = True,
) -> CheckedData:
    """Check the data for a multi-group analysis and return it cleaned.

    Parameters
    ----------
    frame
        The data with missing codes already replaced by NaN.
    items
        Item columns, in model order.
    group
        The grouping column.
    reference
        The reference group, which must be present.
    groups
        Groups to analyse, in this order (default: every group, sorted).
    complete_cases_needed
        ``True`` (default): the size checks count complete rows (listwise deletion).
        ``False`` (full-information ML): they count rows with at least one observed item.

    Returns
    -------
    CheckedData
    """
    items = tuple(str(i) for i in items)
    _check_columns(frame, items, group)
    warnings: list[str] = []
    index, labels, values = _numeric_items(frame, items, group, warnings)
    present = sorted(set(labels.uniques), key=_sort_key)
    groups = _select_groups(present, group=group, groups=groups, reference=reference)
    member = labels.member(groups)
    blocks = dict(zip(groups, split_rows(values, member, len(groups))))
    for block in blocks.values():
        block.flags.writeable = False
    rows, complete, missing = _count_groups(
        blocks, items, complete_cases_needed=complete_cases_needed, warnings=warnings
    )
    keep = member >= 0
    return CheckedData(
        items=items,
        group=group,
        groups=tuple(groups),
        rows=rows,
        complete=complete,
        missing=missing,
        blocks=MappingProxyType(blocks),
        row_index=index[keep],
        row_group=member[keep],
        warnings=tuple(warnings),
    )


def _check_columns(frame, items: tuple[str, ...], group: str) -> None:
    """Refuse a missing group or item column, and a group column that is also an item."""
    cols = list(frame.columns)
    for col in (group,) + items:
        if col not in cols:
            near = [c for c in cols if c.lower() == col.lower()]
            hint = f" (did you mean {near[0]!r}?)" if near else ""
            raise DataError(
                f"Column {col!r} is not in the data{hint}; check the pipeline's column names "
                f"against the data file."
            )
    if group in items:
        raise DataError(f"Column {group!r} is both the group column and an item; use another group column.")


def _numeric_items(frame, items: tuple[str, ...], group: str, warnings: list[str]):
    """The rows with a group: their index, their group labels and their items as one
    (rows, items) array of finite floats.

    Appends to ``warnings`` (rows without a group, far-out values that look like missing
    codes); returns ``(index, labels, values)`` (labels: :class:`_Labels`).
    """
    keys = frame[group]
    has = keys.notna().to_numpy()
    no_group = int(has.size - has.sum())
    if no_group:
        warnings.append(f"{no_group} rows have no value in group column {group!r} and were left out")
        frame = frame.loc[has]
    labels = _labels(frame[group], group)
    values = _item_array(frame, items)
    for j, far in enumerate(far_out_columns(values)):
        if far:
            warnings.append(_far_out_note(items[j], values[:, j], far))
    return frame.index, labels, values


def _item_array(frame, items: tuple[str, ...]) -> np.ndarray:
    """The items as one (rows, items) float array (NaN = missing), checked item by item
    in model order: text that is not a number, and values that are not finite or too large,
    are refused."""
    if items and frame.columns.is_unique:
        kinds = dict(zip(frame.columns, frame.dtypes))
        if all(kinds[c].kind in "biuf" for c in items):
            # numbers already (numpy or nullable dtypes): column by column, nothing to parse
            # (no intermediate frame of the items)
            values = np.column_stack([frame[c].to_numpy(dtype=float, na_value=np.nan) for c in items])
            return _finite(values, frame.index, items)
    values = np.empty((frame.shape[0], len(items)))
    for j, col in enumerate(items):
        values[:, j] = _finite(_item_values(frame[col], col)[:, None], frame.index, (col,))[:, 0]
    return values


def _item_values(raw, col: str) -> np.ndarray:
    """An item column as floats (NaN = missing); refuses text that is not a number."""
    if raw.dtype.kind in "biuf":
        return raw.to_numpy(dtype=float, na_value=np.nan)
    num = pd.to_numeric(raw, errors="coerce")
    bad = raw.notna() & num.isna()
    if bad.any():
        example = raw[bad].iloc[0]
        raise DataError(
            f"Item {shorten(col)} holds non-numeric values such as {shorten(str(example))}; recode them or "
            f"list them under data.missing."
        )
    return num.astype(float).to_numpy()


def _select_groups(present: list[str], *, group: str, groups, reference) -> list[str]:
    """The groups to analyse (at least two) with the reference among them."""
    if groups is None:
        groups = present
    else:
        groups = [str(g) for g in groups]
        for g in groups:
            if g not in present:
                raise DataError(
                    f"Group {g!r} is not in column {group!r}; the groups there are {', '.join(present)}."
                )
    if len(groups) < 2:
        raise DataError(
            f"Column {group!r} has {len(groups)} group(s) ({', '.join(groups) or 'none'}); invariance "
            "testing needs at least two groups: check data.group."
        )
    if reference is not None and str(reference) not in groups:
        where = f"column {group!r}" if str(reference) not in present else "the groups selected by data.groups"
        raise DataError(
            f"Reference group {str(reference)!r} is not in {where}; choose one of {', '.join(groups)}."
        )
    return groups


def _count_groups(blocks: Mapping[str, np.ndarray], items: tuple[str, ...], *, complete_cases_needed: bool,
                  warnings: list[str]):
    """Rows, complete rows and missing counts per group; refuse empty or constant items and
    groups with no more usable rows than items, and warn about small groups."""
    p = len(items)
    rows, complete, missing = {}, {}, {}
    for g, block in blocks.items():
        rows[g] = int(block.shape[0])
        obs = ~np.isnan(block)
        missing[g] = dict(zip(items, (block.shape[0] - obs.sum(axis=0)).tolist()))
        _check_item_values(block, obs, items, g)
        n_ok = int(obs.all(axis=1).sum())
        complete[g] = n_ok
        n_use = n_ok if complete_cases_needed else int(obs.any(axis=1).sum())
        what = "complete cases" if complete_cases_needed else "cases with an observed item"
        if n_use <= p:
            raise DataError(
                f"Group {g!r} has {n_use} {what} for {p} items; a covariance matrix needs more "
                "cases than items: collect more data, merge the group with another, or drop it."
            )
        if n_use < SMALL_GROUP:
            warnings.append(
                f"group {g} has {n_use} {what}; under about {SMALL_GROUP} per group "
                "(common practice) every test here is weak"
            )
    return rows, complete, missing


def _check_item_values(block: np.ndarray, obs: np.ndarray, items: tuple[str, ...], g: str) -> None:
    """Refuse an item entirely missing or constant within group ``g`` (the first such item)."""
    seen = obs.any(axis=0)
    low = np.where(obs, block, np.inf).min(axis=0)
    high = np.where(obs, block, -np.inf).max(axis=0)
    wrong = np.flatnonzero(~seen | (high == low))
    if wrong.size == 0:
        return
    j = int(wrong[0])
    it = items[j]
    if not seen[j]:
        raise DataError(
            f"Item {it!r} is entirely missing in group {g!r}; drop the item or the group, "
            "or check the missing codes."
        )
    raise DataError(
        f"Item {it!r} is constant ({_group_label(float(low[j]))}) in group {g!r}; "
        "drop the item or the group."
    )


#: Largest magnitude accepted in an item (beyond it, squares and products lose all precision).
MAX_MAGNITUDE = 1e9


@dataclass(frozen=True, eq=False)
class _Labels:
    """Group labels of the rows: ``uniques`` (in order of first appearance) and ``codes``
    (row -> position in ``uniques``)."""

    uniques: tuple[str, ...]
    codes: np.ndarray

    def member(self, groups: Sequence[str]) -> np.ndarray:
        """Row -> position of its label in ``groups`` (-1 for a group not analysed)."""
        where = {g: k for k, g in enumerate(groups)}
        return np.array([where.get(u, -1) for u in self.uniques], dtype=int)[self.codes]


def _labels(keys, group: str) -> _Labels:
    """Group labels as text without surrounding spaces; labels that differ only by spaces
    are refused (they would split one group in two)."""
    if keys.dtype == object:
        # mixed Python objects (1, 1.0 and True hash alike): label every row, then factorize
        codes, raw = pd.factorize(keys.map(_group_label))
    else:
        codes, raw = pd.factorize(keys)
        raw = [_group_label(v) for v in raw]
    raw = [str(v) for v in raw]
    spaced = {}
    for text in dict.fromkeys(raw):
        spaced.setdefault(" ".join(text.split()), []).append(text)
    clash = next((v for v in spaced.values() if len(v) > 1), None)
    if clash:
        raise DataError(
            f"Group labels {shorten(clash[0])} and {shorten(clash[1])} in column {shorten(group)} differ only by "
            "spaces; correct the data so each group is spelled one way."
        )
    stripped = [text.strip() for text in raw]
    return _Labels(tuple(stripped), np.asarray(codes, dtype=int))


def _finite(values: np.ndarray, index, items: Sequence[str]) -> np.ndarray:
    """``values`` (rows labelled by ``index``, one column per item) when every observed
    value is finite and of a sane magnitude; else the first offending item is named."""
    if not (np.abs(values) > MAX_MAGNITUDE).any():  # NaN compares False; inf is caught
        return values
    with np.errstate(invalid="ignore"):
        bad = ~np.isnan(values) & ~(np.abs(values) <= MAX_MAGNITUDE)
    if bad.any():
        j = int(np.flatnonzero(bad.any(axis=0))[0])
        k = int(np.flatnonzero(bad[:, j])[0])
        row = index[k]
        where = f"data row {row + 1}" if isinstance(row, (int, np.integer)) else f"row {shorten(row)}"
        raise DataError(
            f"Item {shorten(items[j])} holds {float(values[k, j])!r} ({where}); item values must be finite and "
            f"within +-{MAX_MAGNITUDE:g}: correct it, or list it under data.missing if it is a missing-value code."
        )
    return values


def far_out_values(values: np.ndarray) -> list[float]:
    """Whole-number values far outside the rest -- typically missing-value codes such as
    -9 or 99 on a 1-5 scale.

    A value counts when it lies beyond 3 interquartile ranges from the quartiles (Tukey's
    1977 "far out" fences; the interquartile range taken as at least 1) and its distance
    to the nearest other value is at least the range of the other values.
    """
    return far_out_columns(np.asarray(values, dtype=float).reshape(-1, 1))[0]


def far_out_columns(values: np.ndarray) -> list[list[float]]:
    """:func:`far_out_values` of every column of a (rows, items) array (NaN = missing).

    Quartiles are needed only for a column that holds a whole number and spans more than
    3 (a value beyond a fence lies more than 3 IQR >= 3 from a quartile, so both within
    the range); those columns' quartiles come from one sort, and only a column with a
    value beyond its fences is looked at further."""
    observed = ~np.isnan(values)
    n_obs = observed.sum(axis=0)
    out: list[list[float]] = [[] for _ in range(values.shape[1])]
    whole = values == np.round(values)  # False where missing
    cols = np.flatnonzero((n_obs >= 10) & whole.any(axis=0))
    if cols.size:
        x = values[:, cols]
        seen = observed[:, cols]
        spread = np.where(seen, x, -np.inf).max(axis=0) - np.where(seen, x, np.inf).min(axis=0)
        cols = cols[spread > 3]
    if cols.size == 0:
        return out
    x = values[:, cols]
    q1, q3 = column_quartiles(x, n_obs[cols])
    iqr = np.maximum(q3 - q1, 1.0)
    with np.errstate(invalid="ignore"):
        beyond = ((x < q1 - 3 * iqr) | (x > q3 + 3 * iqr)) & whole[:, cols]
    for k in np.flatnonzero(beyond.any(axis=0)):
        col = x[:, k]
        obs = col[~np.isnan(col)]
        out[int(cols[k])] = _far_out(obs, beyond[:, k][~np.isnan(col)])
    return out


def column_quartiles(x: np.ndarray, n_obs: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """First and third quartiles of every column of ``x`` over its ``n_obs`` (> 0) observed
    values (NaN = missing): linear interpolation between order statistics at (n - 1) q
    (Hyndman & Fan 1996, definition 7), the same numbers as ``numpy.nanpercentile``, from
    one column-wise sort instead of one pass per column."""
    s = np.sort(x, axis=0)  # NaN sorts last, so the observed values come first
    cols = np.arange(x.shape[1])
    out = []
    for q in (0.25, 0.75):
        at = n_obs * q - q  # numpy's virtual index (n - 1) q, computed as numpy does
        lo = np.floor(at).astype(np.intp)
        t = at - lo
        a, b = s[lo, cols], s[np.minimum(lo + 1, n_obs - 1), cols]
        diff = b - a
        out.append(np.where(t >= 0.5, b - diff * (1 - t), a + diff * t))  # numpy's two-sided lerp
    return out[0], out[1]


def _far_out(obs: np.ndarray, beyond: np.ndarray) -> list[float]:
    """The far-out values among the candidates ``obs[beyond]`` (see :func:`far_out_values`)."""
    cand = np.unique(obs[beyond])
    rest = obs[~np.isin(obs, cand)]
    if cand.size == 0 or rest.size == 0:
        return []
    lo, hi = rest.min(), rest.max()
    gap = np.where(cand < lo, lo - cand, cand - hi)
    return [float(v) for v in cand[gap >= max(hi - lo, 1.0)]]


def _code_text(v: float) -> str:
    return str(int(v)) if float(v).is_integer() else repr(v)


def _far_out_note(col: str, values: np.ndarray, far: list[float]) -> str:
    obs = values[~np.isnan(values)]
    rest = obs[~np.isin(obs, far)]
    counts = ", ".join(f"{_code_text(v)} ({int((obs == v).sum())} times)" for v in far[:3])
    codes = ", ".join(_code_text(v) for v in far[:3])
    return (
        f"item {col} holds {counts}, far outside its other values ({_code_text(rest.min())} to "
        f"{_code_text(rest.max())}); if these are missing-value codes, add data.missing: [{codes}]"
    )


def _sort_key(label: str):
    try:
        return (0, float(label), label)
    except ValueError:
        return (1, 0.0, label)

"""Checks run on the data before any model is fitted.

Each problem raises a one-line :class:`~invariance.errors.DataError` that names the
column and group concerned and the fix. Problems that weaken the analysis without
preventing it (small groups, rows without a group) come back as warning strings.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Sequence

import numpy as np

import pandas as pd

from ..errors import DataError, shorten

__all__ = ["CheckedData", "check_data", "far_out_values", "MAX_MAGNITUDE", "SMALL_GROUP"]

#: Groups smaller than this make the tests weak (common practice: about 200 per group).
SMALL_GROUP = 200


@dataclass(frozen=True, eq=False)
class CheckedData:
    """Data that passed the checks.

    Attributes
    ----------
    frame
        Item columns as floats (NaN = missing) plus the group column as strings, rows
        without a group removed.
    items, group, groups
        Item columns in model order, the grouping column, the group names in order.
    rows
        Group -> rows in the data.
    complete
        Group -> rows with every item observed (the rows complete-case fitting uses).
    missing
        Group -> item -> number of missing values.
    warnings
        Warnings about the data (small groups, rows without a group).
    """

    frame: object
    items: tuple[str, ...]
    group: str
    groups: tuple[str, ...]
    rows: dict
    complete: dict
    missing: dict
    warnings: tuple[str, ...] = field(default=())


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
    out, present = _numeric_items(frame, items, group, warnings)
    out, groups = _select_groups(out, present, group=group, groups=groups, reference=reference)
    rows, complete, missing = _count_groups(
        out, items, group, groups, complete_cases_needed=complete_cases_needed, warnings=warnings
    )
    return CheckedData(
        frame=out,
        items=items,
        group=group,
        groups=tuple(groups),
        rows=rows,
        complete=complete,
        missing=missing,
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
    """The group labels and the items as finite floats, rows without a group left out.

    Appends to ``warnings`` (rows without a group, far-out values that look like missing
    codes); returns the new frame and the group labels present, sorted.
    """

    keys = frame[group]
    no_group = int(keys.isna().sum())
    if no_group:
        warnings.append(f"{no_group} rows have no value in group column {group!r} and were left out")
    frame = frame.loc[keys.notna()]
    labels = _labels(frame[group], group)
    out = pd.DataFrame({group: labels.to_numpy()}, index=frame.index)
    for col in items:
        raw = frame[col]
        num = pd.to_numeric(raw, errors="coerce")
        bad = raw.notna() & num.isna()
        if bad.any():
            example = raw[bad].iloc[0]
            raise DataError(
                f"Item {shorten(col)} holds non-numeric values such as {shorten(str(example))}; recode them or "
                f"list them under data.missing."
            )
        out[col] = _finite(num.astype(float), col)
        far = far_out_values(out[col].to_numpy())
        if far:
            warnings.append(_far_out_note(col, out[col].to_numpy(), far))
    present = sorted(set(labels), key=_sort_key)
    return out, present


def _select_groups(out, present: list[str], *, group: str, groups, reference):
    """The groups to analyse (at least two) with the reference among them, and their rows."""
    if groups is None:
        groups = present
    else:
        groups = [str(g) for g in groups]
        for g in groups:
            if g not in present:
                raise DataError(
                    f"Group {g!r} is not in column {group!r}; the groups there are {', '.join(present)}."
                )
        out = out.loc[out[group].isin(groups)]
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
    return out, groups


def _count_groups(out, items: tuple[str, ...], group: str, groups, *, complete_cases_needed: bool,
                  warnings: list[str]):
    """Rows, complete rows and missing counts per group; refuse empty or constant items and
    groups with no more usable rows than items, and warn about small groups."""
    p = len(items)
    rows, complete, missing = {}, {}, {}
    for g in groups:
        block = out.loc[out[group] == g, list(items)].to_numpy(dtype=float)
        rows[g] = int(block.shape[0])
        obs = ~np.isnan(block)
        missing[g] = {it: int((~obs[:, j]).sum()) for j, it in enumerate(items)}
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
    """Refuse an item entirely missing or constant within group ``g``."""
    for j, it in enumerate(items):
        vals = block[obs[:, j], j]
        if vals.size == 0:
            raise DataError(
                f"Item {it!r} is entirely missing in group {g!r}; drop the item or the group, "
                "or check the missing codes."
            )
        if np.ptp(vals) == 0:
            raise DataError(
                f"Item {it!r} is constant ({_group_label(float(vals[0]))}) in group {g!r}; "
                "drop the item or the group."
            )


#: Largest magnitude accepted in an item (beyond it, squares and products lose all precision).
MAX_MAGNITUDE = 1e9


def _labels(keys, group: str):
    """Group labels as text without surrounding spaces; labels that differ only by spaces
    are refused (they would split one group in two)."""
    labels = keys.map(_group_label)
    stripped = labels.str.strip()
    spaced = {}
    for raw in dict.fromkeys(labels):
        spaced.setdefault(" ".join(raw.split()), []).append(raw)
    clash = next((v for v in spaced.values() if len(v) > 1), None)
    if clash:
        raise DataError(
            f"Group labels {shorten(clash[0])} and {shorten(clash[1])} in column {shorten(group)} differ only by "
            "spaces; correct the data so each group is spelled one way."
        )
    return stripped


def _finite(values, col: str):
    """``values`` when every observed value is finite and of a sane magnitude."""
    arr = values.to_numpy()
    with np.errstate(invalid="ignore"):
        bad = ~np.isnan(arr) & ~(np.abs(arr) <= MAX_MAGNITUDE)
    if bad.any():
        k = int(np.flatnonzero(bad)[0])
        row = values.index[k]
        where = f"data row {row + 1}" if isinstance(row, (int, np.integer)) else f"row {shorten(row)}"
        raise DataError(
            f"Item {shorten(col)} holds {float(arr[k])!r} ({where}); item values must be finite and within "
            f"+-{MAX_MAGNITUDE:g}: correct it, or list it under data.missing if it is a missing-value code."
        )
    return values


def far_out_values(values: np.ndarray) -> list[float]:
    """Whole-number values far outside the rest -- typically missing-value codes such as
    -9 or 99 on a 1-5 scale.

    A value counts when it lies beyond 3 interquartile ranges from the quartiles (Tukey's
    1977 "far out" fences; the interquartile range taken as at least 1) and its distance
    to the nearest other value is at least the range of the other values.
    """
    obs = values[~np.isnan(values)]
    if obs.size < 10:
        return []
    q1, q3 = np.percentile(obs, [25, 75])
    iqr = max(q3 - q1, 1.0)
    cand = np.unique(obs[((obs < q1 - 3 * iqr) | (obs > q3 + 3 * iqr)) & (obs == np.round(obs))])
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

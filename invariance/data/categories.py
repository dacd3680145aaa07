"""Response categories of ordered items: the per-item, per-group checks and merging.

The categories of an item are the distinct values observed in all groups together,
in increasing order. Each item is recoded 0 .. K_i - 1 on those. A category that some
group never uses makes the thresholds of that group undefined; that is an error
naming the item, the group and the category, and the fix is an explicit merge of
adjacent categories (``merge={item: [[4, 5]]}``).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np

from ..errors import DataError, SpecificationError

__all__ = ["CategoryMap", "category_maps", "encode"]


def _fmt(v: float) -> str:
    return str(int(v)) if float(v).is_integer() else repr(float(v))


@dataclass(frozen=True)
class CategoryMap:
    """How one item's values map to ordered codes.

    Attributes
    ----------
    item
        Item name.
    values
        The distinct observed values, increasing.
    codes
        Code of each value (equal codes for merged values), 0 .. K - 1.
    labels
        One label per code (merged values joined by ``+``).
    """

    item: str
    values: tuple[float, ...]
    codes: tuple[int, ...]
    labels: tuple[str, ...]

    @property
    def n_categories(self) -> int:
        return len(self.labels)

    def to_dict(self) -> dict:
        return {"item": self.item, "categories": list(self.labels)}


def category_maps(
    arrays: Sequence[np.ndarray],
    groups: Sequence[str],
    items: Sequence[str],
    *,
    merge: Mapping[str, Sequence[Sequence[float]]] | None = None,
) -> tuple[CategoryMap, ...]:
    """Check the categories of every item in every group and build the code maps.

    Parameters
    ----------
    arrays
        One (n_g, p) array of item values per group (complete cases).
    groups, items
        Names, for messages.
    merge
        Item -> lists of adjacent values to merge into one category.

    Raises
    ------
    DataError
        An item has fewer than two categories, or a category unused in some group.
    SpecificationError
        A merge names an unknown item or value, or values that are not adjacent.
    """
    merge = dict(merge or {})
    unknown = [k for k in merge if k not in items]
    if unknown:
        raise SpecificationError(
            f"The merge option names {unknown[0]!r}, which is not an ordinal item; use one of {', '.join(items)}."
        )
    out = []
    for i, item in enumerate(items):
        cols = [np.asarray(a, dtype=float)[:, i] for a in arrays]
        pooled = np.concatenate(cols)
        bad = pooled[~np.isfinite(pooled) | (pooled != np.round(pooled))]
        if bad.size:
            raise DataError(
                f"Item {item!r} has the non-integer value {bad[0]!r}; ordered items need integer category codes."
            )
        values = np.unique(pooled)
        code = _merged_codes(item, values, merge.get(item, ()))
        K = int(code.max()) + 1
        if K < 2:
            raise DataError(
                f"Item {item!r} has a single category in the data; drop it from the ordinal items."
            )
        labels = tuple("+".join(_fmt(v) for v in values[code == c]) for c in range(K))
        _check_used(item, groups, cols, values, code, labels)
        out.append(CategoryMap(str(item), tuple(float(v) for v in values), tuple(int(c) for c in code), labels))
    return tuple(out)


def _merged_codes(item: str, values: np.ndarray, blocks: Sequence[Sequence[float]]) -> np.ndarray:
    """Code 0 .. K - 1 of each observed value after merging the adjacent ``blocks``."""
    code = np.arange(values.size)
    for block in blocks:
        block = sorted(float(v) for v in block)
        pos = []
        for v in block:
            hit = np.flatnonzero(values == v)
            if not hit.size:
                raise SpecificationError(
                    f"Cannot merge category {_fmt(v)} of item {item!r}: it is not observed; "
                    f"the categories are {', '.join(_fmt(x) for x in values)}."
                )
            pos.append(int(hit[0]))
        if len(pos) < 2 or np.any(np.diff(pos) != 1):
            raise SpecificationError(
                f"The merge {[_fmt(v) for v in block]} of item {item!r} must list two or more adjacent categories."
            )
        code[pos] = code[pos[0]]
    # renumber codes 0..K-1 keeping order
    _, code = np.unique(code, return_inverse=True)
    return code


def _check_used(
    item: str, groups: Sequence[str], cols: Sequence[np.ndarray], values: np.ndarray, code: np.ndarray,
    labels: tuple[str, ...],
) -> None:
    """Refuse a category that some group never uses, suggesting a merge with a neighbour."""
    K = len(labels)
    for g, col in zip(groups, cols):
        used = np.unique(code[np.searchsorted(values, col)])
        missing = np.setdiff1d(np.arange(K), used)
        if missing.size:
            c = int(missing[0])
            nb = c + 1 if c == 0 else c - 1
            hint = sorted({labels[c], labels[nb]}, key=labels.index)
            raise DataError(
                f"Item {item!r} has no responses in category {labels[c]} in group {g!r}; "
                f"merge it with a neighbouring category (merge: {{{item}: [[{', '.join(h.replace('+', ', ') for h in hint)}]]}}) "
                "or drop the item."
            )


def encode(x: np.ndarray, maps: Sequence[CategoryMap]) -> np.ndarray:
    """Recode an (n, p) value array to integer codes 0 .. K_i - 1 with the maps."""
    x = np.asarray(x, dtype=float)
    out = np.empty(x.shape, dtype=np.int64)
    for i, m in enumerate(maps):
        vals = np.asarray(m.values)
        pos = np.searchsorted(vals, x[:, i])
        pos = np.clip(pos, 0, vals.size - 1)
        if np.any(vals[pos] != x[:, i]):
            raise DataError(f"Item {m.item!r} has a value outside its categories; recompute the category maps.")
        out[:, i] = np.asarray(m.codes)[pos]
    return out

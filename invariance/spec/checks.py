"""Checks of a pipeline's meaning that the schema cannot express.

Run once, by :func:`invariance.spec.load.validate_document`, after the schema check, on
every pipeline (YAML file or dict). Each problem raises one
:class:`~invariance.errors.SpecificationError` line naming the problem and the fix.

* every number is finite (``.nan`` or ``.inf`` would make every decision fail or pass);
* no factor has the name of an item (the two would be confused in every table);
* no factor has a single item (a factor measured by one item is not identified: the fit
  runs long and ends improper);
* in a bifactor model no item is listed under two specific factors (each item loads on
  the general factor and on at most one specific factor);
* group labels named by the pipeline (``data.groups``, ``data.reference``, released
  groups) do not differ only by spaces.
"""

from __future__ import annotations

import math
from typing import Any, Iterator, Mapping

from ..errors import SpecificationError, shorten

__all__ = ["check_finite_numbers", "check_meaning", "walk"]


def walk(obj: Any, path: tuple = ()) -> Iterator[tuple[tuple, Any]]:
    """(path, value) for every leaf and container of a JSON-like document, depth first."""
    stack = [(path, obj)]
    while stack:
        where, value = stack.pop()
        yield where, value
        if isinstance(value, Mapping):
            stack.extend((where + (k,), v) for k, v in reversed(list(value.items())))
        elif isinstance(value, (list, tuple)):
            stack.extend((where + (i,), v) for i, v in reversed(list(enumerate(value))))


def _where(path: tuple) -> str:
    return ".".join(str(p) for p in path) or "(top level)"


def check_finite_numbers(doc: Mapping) -> None:
    """Refuse NaN and infinite numbers anywhere in the document."""
    for path, value in walk(doc):
        if isinstance(value, float) and not math.isfinite(value):
            raise SpecificationError(
                f"{_where(path)} is {value!r}; every number in a pipeline must be finite: write a number "
                "(or drop the key for its default)."
            )


def _factor_names(model: Mapping) -> list[str]:
    names = [str(f) for f in model.get("factors", {})]
    if model.get("general"):
        names.append(str(model["general"]))
    return names


def _check_factors(model: Mapping) -> None:
    factors = {str(f): [str(i) for i in items] for f, items in model.get("factors", {}).items()}
    items = {i for its in factors.values() for i in its}
    for name in _factor_names(model):
        if name in items:
            raise SpecificationError(
                f"model: factor {shorten(name)} has the name of an item; rename the factor (for example "
                f"{shorten(name + '_factor')})."
            )
    for name, its in factors.items():
        if len(its) == 1:
            raise SpecificationError(
                f"model.factors.{name} has one item ({shorten(its[0])}); a factor measured by one item is not "
                "identified: give it at least two items (three if it stands alone) or drop the factor."
            )
    bifactor = model.get("family") == "bifactor" or (model.get("family") is None and model.get("general"))
    if bifactor:
        seen: dict[str, str] = {}
        for name, its in factors.items():
            for it in its:
                if it in seen:
                    raise SpecificationError(
                        f"model: item {shorten(it)} is listed under two specific factors ({shorten(seen[it])} and "
                        f"{shorten(name)}); in a bifactor model an item loads on the general factor and at most "
                        "one specific factor: keep it under one."
                    )
                seen[it] = name


def _check_group_labels(doc: Mapping) -> None:
    data = doc.get("data", {})
    labels = [("data.groups", str(g)) for g in data.get("groups") or ()]
    if data.get("reference") is not None:
        labels.append(("data.reference", str(data["reference"])))
    for r in doc.get("model", {}).get("released", ()) or ():
        labels += [("model.released", str(g)) for g in r.get("groups") or ()]
    by_stripped: dict[str, tuple[str, str]] = {}
    for key, label in labels:
        if label != label.strip():
            raise SpecificationError(
                f"{key} names group {shorten(label)} with leading or trailing spaces; write it as "
                f"{shorten(label.strip())} (group labels are read without those spaces)."
            )
        other = by_stripped.setdefault(" ".join(label.split()), (key, label))
        if other[1] != label:
            raise SpecificationError(
                f"{key} names groups {shorten(other[1])} and {shorten(label)}, which differ only by spaces; "
                "write each group once, spelled as in the data."
            )


def check_meaning(doc: Mapping) -> None:
    """Every meaning check of this module on a schema-valid document."""
    _check_factors(doc.get("model", {}))
    _check_group_labels(doc)

"""The data-screening section (results key ``screening``, written by
:func:`invariance.screening.screen`): the recommendation, Mardia's tests per group and
the item moments per group. Any other layout is shown as given."""

from __future__ import annotations

from typing import Any, Mapping

from . import inputs as I
from .formatting import fmt_p, fnum
from .parts import Bullets, Section, Table, Text, cell, generic_parts
from .sections import ReportInput

__all__ = ["section_screening"]

ITEM_COLUMNS = (
    ("item", "Item"), ("n", "n"), ("missing", "Missing"), ("mean", "Mean"), ("sd", "SD"),
    ("skewness", "Skewness"), ("kurtosis", "Excess kurtosis"), ("floor", "Floor"), ("ceiling", "Ceiling"),
    ("n_categories", "Categories"),
)


def _share(v: Any) -> str:
    v = fnum(v)
    return "" if v is None else f"{100 * v:.1f}%"


def section_screening(inp: ReportInput) -> Section | None:
    """Screening of the items per group, before any model was fitted."""
    scr = I.first_key(inp.results, I.OPTIONAL_KEYS["screening"])
    if scr is None:
        return None
    groups = scr.get("groups") if isinstance(scr, Mapping) else None
    if not isinstance(groups, list) or not all(isinstance(g, Mapping) for g in groups):
        parts = generic_parts(scr)
        return Section("screening", "Data screening", tuple(parts)) if parts else None
    parts: list = []
    rec = scr.get("recommendation") if isinstance(scr.get("recommendation"), Mapping) else {}
    if rec.get("notes"):
        parts.append(Text("What the screening suggests:", style="note"))
        parts.append(Bullets(tuple(str(n) for n in rec["notes"])))
    mrows = []
    for g in groups:
        m = g.get("mardia") if isinstance(g.get("mardia"), Mapping) else {}
        mrows.append((
            str(g.get("group", "")), cell(g.get("n")), cell(g.get("n_complete")),
            cell(m.get("skewness")), fmt_p(m.get("skewness_p")), cell(m.get("kurtosis")),
            cell(m.get("kurtosis_relative")), fmt_p(m.get("kurtosis_p")), str(g.get("mardia_note") or ""),
        ))
    parts.append(Table(
        ("Group", "Cases", "Complete", "Mardia skewness", "p", "Mardia kurtosis", "Relative kurtosis", "p", "Note"),
        tuple(mrows), caption="Multivariate normality per group (Mardia 1970)",
        numeric=(False,) + (True,) * 7 + (False,),
    ))
    scales = []
    for g in groups:
        for it in g.get("items") or []:
            for s in (it.get("item_total") or {}):
                if s not in scales:
                    scales.append(s)
    cols = [label for _, label in ITEM_COLUMNS] + [f"Item-total ({s})" for s in scales]
    rows = []
    for g in groups:
        for it in g.get("items") or []:
            if not isinstance(it, Mapping):
                continue
            row = [str(g.get("group", ""))]
            for key, _ in ITEM_COLUMNS:
                v = it.get(key)
                row.append(_share(v) if key in ("missing", "floor", "ceiling") else cell(v))
            row += [cell((it.get("item_total") or {}).get(s)) for s in scales]
            rows.append(tuple(row))
    if rows:
        parts.append(Table(("Group", *cols), tuple(rows), caption="Items per group",
                           numeric=(False, False) + (True,) * (len(cols) - 1)))
    rules = scr.get("rules")
    if isinstance(rules, Mapping) and rules:
        parts.append(Table(("Rule", "Value", "Source"), tuple(
            (str(k), cell(v.get("value") if isinstance(v, Mapping) else v),
             str(v.get("source", "")) if isinstance(v, Mapping) else "")
            for k, v in rules.items()), caption="Screening rules"))
    return Section("screening", "Data screening", tuple(parts))

"""Data-quality parts: the screening section (results key ``screening``, written by
:func:`invariance.screening.screen`: the recommendation, Mardia's tests and the item
moments per group) and the missing-data tables (results key ``missing_data``). Any
other layout is shown as given."""

from __future__ import annotations

from typing import Any, Mapping

from . import inputs as I
from .formatting import fmt_bounded, fmt_int, fmt_p, fmt_stat, fnum
from .parts import Bullets, Section, Table, Text, cell, generic_parts
from .report_input import ReportInput

__all__ = ["missing_parts", "section_group_fit", "section_screening"]

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


def missing_parts(obj: Any, items: list[str]) -> list:
    """Parts for the missing-data section (results key ``missing_data``).

    Reads ``method`` and ``by_group`` (per group ``method``, ``n_input``, ``n_used``,
    ``n_dropped``, ``n_patterns``, ``coverage`` {item: share observed}, ``em_converged``,
    ``little`` {``statistic``, ``df``, ``pvalue``}); any other layout is shown as given.
    """
    by = obj.get("by_group") if isinstance(obj, Mapping) else None
    if not isinstance(by, Mapping) or not all(isinstance(v, Mapping) for v in by.values()):
        return generic_parts(obj, key_name="group")
    parts: list = []
    if obj.get("method"):
        parts.append(Text(f"Missing values handled by: {str(obj['method']).replace('_', ' ')}.", style="note"))
    rows = []
    for g, v in by.items():
        lt = v.get("little") if isinstance(v.get("little"), Mapping) else {}
        rows.append((str(g), str(v.get("method", "")), cell(v.get("n_input")), cell(v.get("n_used")),
                     cell(v.get("n_dropped")), cell(v.get("n_patterns")), cell(lt.get("statistic")),
                     cell(lt.get("df")), fmt_p(lt.get("pvalue")), cell(v.get("em_converged"))))
    parts.append(Table(
        ("Group", "Method", "Rows", "Used", "Dropped", "Patterns", "Little's \u03c7\u00b2", "df", "p", "EM converged"),
        tuple(rows), caption="Missing data per group (Little 1988 test of missing completely at random)",
        numeric=(False, False) + (True,) * 7 + (False,),
    ))
    cov = {g: v.get("coverage") for g, v in by.items() if isinstance(v.get("coverage"), Mapping)}
    if cov:
        seen = [i for c in cov.values() for i in c]
        order = [i for i in items if i in seen] + [i for i in dict.fromkeys(seen) if i not in items]
        parts.append(Table(("Item", *cov), tuple((i, *(_share(c.get(i)) for c in cov.values())) for i in order),
                           caption="Share of each item observed, per group", numeric=(False,) + (True,) * len(cov)))
    return parts


def section_group_fit(inp: ReportInput) -> Section | None:
    """The model fitted in each group alone (results key ``group_fit``: ``rule`` and
    ``groups``, records with ``group``, ``structure``, ``chi2``, ``df``, ``pvalue``,
    ``cfi``, ``rmsea`` (``rmsea_lower``/``rmsea_upper``), ``srmr``, ``n``, ``acceptable``,
    ``reasons``, ``problems``)."""
    obj = I.first_key(inp.results, I.OPTIONAL_KEYS["group_fit"])
    recs = obj.get("groups") if isinstance(obj, Mapping) else obj
    if not isinstance(recs, list) or not recs or not all(isinstance(r, Mapping) for r in recs):
        parts = generic_parts(obj)
        return Section("group_fit", "The model in each group", tuple(parts)) if parts else None
    rows, styles = [], []
    for r in recs:
        rm = fmt_bounded(r.get("rmsea"))
        if fnum(r.get("rmsea_lower")) is not None and fnum(r.get("rmsea_upper")) is not None:
            rm += f" [{fmt_bounded(r['rmsea_lower'])}, {fmt_bounded(r['rmsea_upper'])}]"
        ok = r.get("acceptable")
        why = "; ".join(str(x) for x in (r.get("reasons") or []) + (r.get("problems") or []))
        rows.append((str(r.get("group", "")), str(r.get("structure", "")), cell(r.get("n")), fmt_stat(r.get("chi2")),
                     fmt_int(r.get("df")), fmt_p(r.get("pvalue")), fmt_bounded(r.get("cfi")), rm,
                     fmt_bounded(r.get("srmr")), "" if ok is None else ("yes" if ok else "no"), why))
        styles.append("" if ok is None else ("ok" if ok else "bad"))
    parts: list = [Table(
        ("Group", "Structure", "N", "\u03c7\u00b2", "df", "p", "CFI", "RMSEA [90% CI]", "SRMR", "Acceptable", "Why not"),
        tuple(rows), caption="The model fitted in each group separately",
        numeric=(False, False) + (True,) * 7 + (False, False), row_styles=tuple(styles))]
    rule = obj.get("rule") if isinstance(obj, Mapping) else None
    if isinstance(rule, Mapping):
        bits = []
        if fnum(rule.get("cfi_min")) is not None:
            bits.append(f"CFI \u2265 {fmt_bounded(rule['cfi_min'])}")
        if fnum(rule.get("rmsea_max")) is not None:
            bits.append(f"RMSEA \u2264 {fmt_bounded(rule['rmsea_max'])}")
        if rule.get("also"):
            bits.append(str(rule["also"]))
        text = "Acceptable when " + ", ".join(bits) if bits else "Rule"
        if rule.get("source"):
            text += f" ({rule['source']})"
        parts.append(Text(text + ". The configural model needs the structure to hold in every group.", style="note"))
    return Section("group_fit", "The model in each group", tuple(parts))

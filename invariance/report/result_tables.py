"""Paper tables of the decisions beyond the levels: flagged items, structural comparisons
and rival structures.

Each builder reads one results.json key and returns a
:class:`~invariance.report.tables.PaperTable` (``None`` when the key is absent or
empty); :func:`result_tables` returns all of them. The report shows the same tables.

Keys read: ``flagged`` (records with item, parameter, factor, level, statistic, df,
pvalue, adjusted_pvalue, dmacs: group -> value, differs_in: the groups whose estimate
differs), ``structural`` (level records like
``levels``), ``structures`` (rows: structure, group, chi2, df, cfi, tli, rmsea, srmr,
aic, bic, bic_adjusted, best_aic, best_bic, best_bic_adjusted) and ``structure_notes``
(``equivalent``: pairs of structures with the reason they fit identically).
"""

from __future__ import annotations

from typing import Any, Mapping

from .formatting import fmt_bounded, fmt_int, fmt_p, fmt_stat, fnum
from .tables import DISPLAY_COLUMNS, PaperTable, level_table_display

__all__ = [
    "STRUCTURAL_LABELS",
    "equivalent_to",
    "flagged_table",
    "result_tables",
    "structural_table",
    "structures_table",
]

#: Row names of the structural levels.
STRUCTURAL_LABELS = {
    "variances": "Equal factor variances",
    "covariances": "Equal factor covariances",
    "means": "Equal factor means",
    "paths": "Equal structural paths",
}
POOLED = "all"
BEST = "*"


def _records(obj: Any) -> list[dict]:
    return [r for r in obj or [] if isinstance(r, Mapping)] if isinstance(obj, (list, tuple)) else []


def _dmacs(rec: Mapping[str, Any]) -> dict[str, float]:
    d = rec.get("dmacs")
    if not isinstance(d, Mapping):
        return {}
    return {str(g): v for g, v in ((g, fnum(x)) for g, x in d.items()) if v is not None}


def flagged_table(results: Mapping[str, Any]) -> PaperTable | None:
    """One row per flagged parameter: score test, adjusted p and dMACS per group."""
    flagged = _records(results.get("flagged"))
    if not flagged:
        return None
    groups = list(dict.fromkeys(g for f in flagged for g in _dmacs(f)))
    rows = []
    for f in flagged:
        dm = _dmacs(f)
        stat = fmt_stat(f.get("statistic"))
        df = fmt_int(f.get("df"))
        what = str(f.get("parameter") or "")
        if f.get("factor"):
            what += f" on {f['factor']}"
        where = f.get("differs_in")
        rows.append((
            str(f.get("item") or ""),
            what,
            ", ".join(map(str, where)) if where else ("no single group" if isinstance(where, list) else ""),
            str(f.get("level") or ""),
            f"{stat} ({df})" if stat and df else stat,
            fmt_p(f.get("adjusted_pvalue") if f.get("adjusted_pvalue") is not None else f.get("pvalue")),
            *(fmt_bounded(dm.get(g), digits=2) for g in groups),
        ))
    note = (
        "Score test: \u03c7\u00b2 (df) of the equality constraint across groups at the level where it was "
        "flagged; p adjusted for the number of constraints tested (the run's correction). dMACS: the root "
        "mean squared difference between the group's and the reference group's expected item scores over the "
        "group's latent distribution, in pooled item standard deviations (Nye & Drasgow 2011); rough guides .2 small, .4 medium, .6 large (Nye, Bradburn, Olenick, "
        "Bialko & Drasgow 2019). Differs in: the groups whose released estimate differs from the other groups' "
        "(Wald z of the estimate against the precision-weighted mean of the others, Bonferroni over groups, "
        "named one at a time)."
    )
    return PaperTable(
        name="flagged",
        caption="Parameters flagged as differing across groups",
        columns=("Item", "Parameter", "Differs in", "Level", "\u03c7\u00b2 (df)", "p (adjusted)",
                 *(f"dMACS {g}" for g in groups)),
        rows=tuple(rows),
        note=note,
        numeric=(False, False, False, False, True, True, *([True] * len(groups))),
    )


def structural_table(results: Mapping[str, Any]) -> PaperTable | None:
    """The structural levels (equal variances, covariances, means, paths) as level rows."""
    recs = _records(results.get("structural"))
    if not recs:
        return None
    shown = [{**r, "label": STRUCTURAL_LABELS.get(str(r.get("level")), str(r.get("level")))} for r in recs]
    rows = level_table_display({"levels": shown})
    why = [f"{s['label']}: {r['reason']}" for s, r in zip(shown, recs)
           if r.get("decision") == "not_applicable" and r.get("reason")]
    note = ("Each structural model adds its equality to the one before it, starting from the supported "
            "measurement level; changes (\u0394) are each model minus the model it is compared with.")
    if why:
        note += " Not applicable: " + "; ".join(why) + "."
    return PaperTable(
        name="structural",
        caption="Structural invariance: factor variances, covariances, means and paths",
        columns=DISPLAY_COLUMNS,
        rows=tuple(tuple(r) for r in rows),
        note=note,
        numeric=(False, *([True] * (len(DISPLAY_COLUMNS) - 2)), False),
    )


def equivalent_to(results: Mapping[str, Any]) -> dict[str, list[str]]:
    """structure -> the structures it is equivalent to (fits identically)."""
    notes = results.get("structure_notes")
    out: dict[str, list[str]] = {}
    for e in _records(notes.get("equivalent") if isinstance(notes, Mapping) else None):
        pair = [str(s) for s in e.get("structures") or []]
        for s in pair:
            out.setdefault(s, []).extend(t for t in pair if t != s and t not in out.get(s, []))
    return out


def _structure_note(results: Mapping[str, Any]) -> str:
    notes = results.get("structure_notes")
    parts = [
        "Each structure fitted in each group alone and in all groups together (pooled: the configural model). "
        "BIC adj.: the sample-size adjusted BIC (Sclove 1987). "
        f"{BEST} lowest information criterion among the structures in that group or pooled."
    ]
    for e in _records(notes.get("equivalent") if isinstance(notes, Mapping) else None):
        a, b = (list(e.get("structures") or []) + ["", ""])[:2]
        parts.append(f"{a} and {b} are equivalent models, not rivals: {e.get('reason', '')} ({e.get('source', '')}).")
    return " ".join(parts)


def structures_table(results: Mapping[str, Any]) -> PaperTable | None:
    """Rival structures per group and pooled: fit, information criteria, equivalences."""
    recs = _records(results.get("structures"))
    if not recs:
        return None
    eq = equivalent_to(results)

    def crit(r: Mapping[str, Any], key: str) -> str:
        text = fmt_stat(r.get(key), digits=1)
        return text + (BEST if text and r.get(f"best_{key}") else "")

    rows = []
    for r in recs:
        g = str(r.get("group"))
        rows.append((
            str(r.get("structure")),
            "pooled" if g == POOLED else g,
            fmt_stat(r.get("chi2")),
            fmt_int(r.get("df")),
            fmt_bounded(r.get("cfi")),
            fmt_bounded(r.get("tli")),
            fmt_bounded(r.get("rmsea")),
            fmt_bounded(r.get("srmr")),
            crit(r, "aic"),
            crit(r, "bic"),
            crit(r, "bic_adjusted"),
            ", ".join(eq.get(str(r.get("structure")), [])),
        ))
    return PaperTable(
        name="structures",
        caption="Rival structures",
        columns=("Structure", "Group", "\u03c7\u00b2", "df", "CFI", "TLI", "RMSEA", "SRMR", "AIC", "BIC",
                 "BIC adj.", "Equivalent to"),
        rows=tuple(rows),
        note=_structure_note(results),
        numeric=(False, False, *([True] * 9), False),
    )


def result_tables(results: Mapping[str, Any]) -> list[PaperTable]:
    """Every decision table the results have (flagged, structural, structures)."""
    built = (flagged_table(results), structural_table(results), structures_table(results))
    return [t for t in built if t is not None]

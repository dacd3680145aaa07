"""The report's input bundle and its main sections (summary, data, model, levels).

Each section is one function ``build(inp: ReportInput) -> Section | None``; ``None``
skips the section (its data are absent). The order of the report is
:data:`invariance.report.registry.SECTIONS`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

import pandas as pd

from . import inputs as I
from .diagram import model_diagram
from .formatting import (
    decision_label,
    estimator_label,
    fmt_bounded,
    fmt_delta,
    fmt_int,
    fmt_p,
    fnum,
    level_label,
    release_text,
)
from .parts import Bullets, Figure, Section, Table, Text, generic_parts
from .plots import change_chart
from .tables import DISPLAY_COLUMNS, level_table_display, level_table_note

__all__ = [
    "ReportInput",
    "section_changes",
    "section_data",
    "section_levels",
    "section_model",
    "section_summary",
]

INDEX_NAMES = {"cfi": "\u0394CFI", "tli": "\u0394TLI", "rmsea": "\u0394RMSEA", "srmr": "\u0394SRMR", "chi2": "\u0394\u03c7\u00b2 test"}


@dataclass
class ReportInput:
    """Everything a section may read: the results dict, the estimates and the run context.

    Attributes
    ----------
    results
        The results.json dict (see :mod:`invariance.report.inputs` for the keys read).
    estimates
        All estimates: columns level, group, parameter, variable, other, label, free,
        estimate, se, z, pvalue, std.
    context
        ``pipeline_text``, ``data_file``, ``data_sha256``, ``seed``, ``structure``
        (``factors``, ``general``, ``family``, ``regressions``,
        ``residual_covariances``), ``created``, ``quiet``.
    """

    results: Mapping[str, Any]
    estimates: pd.DataFrame
    context: Mapping[str, Any]
    _cache: dict = field(default_factory=dict, repr=False)

    @property
    def groups(self) -> dict[str, Any]:
        g = self.results.get("groups")
        if isinstance(g, Mapping):
            return dict(g)
        if isinstance(g, (list, tuple)):
            return {str(x): None for x in g}
        return {}

    @property
    def reference(self) -> str | None:
        ref = self.results.get("reference_group")
        if ref is None and self.groups:
            ref = next(iter(self.groups))
        return None if ref is None else str(ref)

    @property
    def structure(self) -> dict:
        s = self.context.get("structure")
        return dict(s) if isinstance(s, Mapping) else {}

    @property
    def items(self) -> list[str]:
        out: list[str] = []
        for its in dict(self.structure.get("factors") or {}).values():
            for it in its:
                if str(it) not in out:
                    out.append(str(it))
        if not out and not self.estimates.empty and "parameter" in self.estimates:
            out = [str(x) for x in dict.fromkeys(self.estimates.loc[self.estimates["parameter"] == "intercept", "variable"])]
        return out

    @property
    def accepted(self) -> dict | None:
        return I.accepted_entry(self.results)

    def estimates_at(self, level: str | None) -> pd.DataFrame:
        """Estimates of one level (empty frame if the level or the columns are missing)."""
        est = self.estimates
        if est is None or est.empty or level is None or "level" not in est:
            return pd.DataFrame(columns=["group", "parameter", "variable", "other", "estimate", "se", "std", "label"])
        sub = est[est["level"].astype(str) == str(level)]
        keys = [c for c in ("group", "parameter", "variable", "other") if c in sub]
        return sub.drop_duplicates(subset=keys, keep="last") if keys else sub


# ------------------------------------------------------------------ summary
def _supported_lead(inp: ReportInput) -> Text | None:
    """The lead sentence: the supported level (partial or not) from the verdict fields."""
    entries = I.levels(inp.results)
    acc = inp.accepted
    v = I.verdict_fields(inp.results)
    if acc is not None and acc.get("decision") in ("holds", "holds_partially"):
        if "supported_partially" in inp.results:
            label, rel = level_label({"level": acc.get("level"), "partial": v["supported_partially"]}), v["released_constraints"]
        else:
            label, rel = level_label(acc), [r for r in acc.get("released") or [] if isinstance(r, Mapping)]
        lead = f"Most constrained level supported: {label}"
        if rel:
            lead += f", resting on {len(rel)} released constraint{'s' if len(rel) != 1 else ''}"
        return Text(lead + ".", style="lead")
    if acc is not None and acc.get("decision") == "fails":
        return Text(f"Not even the {level_label(acc).lower()} model is supported by the decision rule: the groups "
                    "may not share one factor structure, so no invariance level can be claimed.", style="lead")
    if entries:
        return Text("No decision was recorded for the invariance levels.", style="lead")
    return None


def section_summary(inp: ReportInput) -> Section | None:
    """Overview: the supported level (partial or not), the verdict, the groups, the rule,
    the cutoffs' calibration, the next step, warnings."""
    entries = I.levels(inp.results)
    v = I.verdict_fields(inp.results)
    parts: list = []
    lead = _supported_lead(inp)
    if lead is not None:
        parts.append(lead)
    if isinstance(inp.results.get("verdict"), str) and inp.results["verdict"]:
        parts.append(Text(inp.results["verdict"]))
    if v["cutoff_calibration"]:
        parts.append(Text(v["cutoff_calibration"], style="caution"))
    if v["next_step"]:
        parts.append(Text(v["next_step"], style="note"))
    groups = inp.groups
    facts = []
    if groups:
        facts.append(
            f"Groups: {', '.join(groups)} (reference group: {inp.reference})."
        )
    if inp.results.get("estimator"):
        facts.append(f"Estimator: {estimator_label(inp.results['estimator'])}.")
    if I.rule_name(inp.results):
        facts.append(f"Decision rule: {I.rule_name(inp.results)}.")
    for e in entries:
        reason = e.get("reason") if isinstance(e.get("reason"), str) else ""
        label = decision_label(e.get("decision"))
        if label and reason.lower().startswith(label.lower()):
            reason = reason[len(label):].lstrip(" :;,")
        why = f" ({reason})" if reason else ""
        facts.append(f"{level_label(e)}: {decision_label(e.get('decision')) or 'no decision recorded'}{why}.")
    if facts:
        parts.append(Bullets(tuple(facts)))
    warn = inp.results.get("warnings") or inp.results.get("problems")
    notes = []
    if isinstance(warn, (list, tuple)):
        notes += [str(w) for w in warn]
    elif warn:
        notes.append(str(warn))
    for e in entries:
        if e.get("converged") is False:
            notes.append(f"The {level_label(e).lower()} model did not converge; its fit statistics are not trustworthy.")
        for p in e.get("problems") or []:
            notes.append(f"{level_label(e)}: {p}")
    if notes:
        parts.append(Text("Warnings raised during estimation:", style="caution"))
        parts.append(Bullets(tuple(notes)))
    if not parts:
        return None
    return Section("summary", "Summary", tuple(parts))


# --------------------------------------------------------------------- data
def _missing_table(by_group: Mapping[str, Any], items: list[str]) -> Table | None:
    """Items (rows) by groups (columns) of missing-value counts; ``None`` when nothing is missing."""
    groups = [g for g, v in by_group.items() if isinstance(v, Mapping)]
    if not groups:
        return None
    seen = [i for g in groups for i in by_group[g]]
    order = [i for i in items if i in seen] + [i for i in dict.fromkeys(seen) if i not in items]
    if not any(fnum(by_group[g].get(i)) for g in groups for i in order):
        return None
    rows = tuple((i, *(fmt_int(by_group[g].get(i)) for g in groups)) for i in order)
    return Table(("Item", *groups), rows, caption="Missing values per item and group (before cases were dropped)",
                 numeric=(False,) + (True,) * len(groups))


def section_data(inp: ReportInput) -> Section | None:
    """Groups, rows read and cases used in each; missing values; the data file.

    Reads ``groups``, ``data`` (``file``, ``rows_by_group``, ``missing_by_group``,
    ``missing_codes``, ``cases_used``) and the optional missing-data section.
    """
    groups = inp.groups
    data = inp.results.get("data") if isinstance(inp.results.get("data"), Mapping) else {}
    rows_by = data.get("rows_by_group") if isinstance(data.get("rows_by_group"), Mapping) else {}
    parts: list = []
    if groups:
        ns = {g: fnum(n) for g, n in groups.items()}
        total = sum(v for v in ns.values() if v is not None)
        with_rows = bool(rows_by)
        rows = []
        for g, n in ns.items():
            share = "" if not total or n is None else f"{100 * n / total:.1f}%"
            read = fnum(rows_by.get(g))
            extra = (fmt_int(read), fmt_int(read - n) if read is not None and n is not None else "") if with_rows else ()
            rows.append((g, *extra, fmt_int(n), share, "reference" if g == inp.reference else ""))
        read_total = sum(v for v in (fnum(x) for x in rows_by.values()) if v is not None)
        extra = (fmt_int(read_total), fmt_int(read_total - total)) if with_rows else ()
        rows.append(("Total", *extra, fmt_int(total) if total else "", "100.0%" if total else "", ""))
        cols = ("Group",) + (("Rows read", "Dropped") if with_rows else ()) + ("N used", "Share", "Role")
        parts.append(Table(cols, tuple(rows), caption="Cases per group",
                           numeric=(False,) + (True,) * (len(cols) - 2) + (False,),
                           row_styles=("",) * len(ns) + ("total",)))
    facts = []
    n_items = len(inp.items)
    if n_items:
        facts.append(f"{n_items} items enter the model.")
    if data.get("cases_used"):
        facts.append(f"Cases used: {data['cases_used']}.")
    if data.get("missing_codes"):
        facts.append("Values read as missing: " + ", ".join(str(c) for c in data["missing_codes"]) + ".")
    name = data.get("file") or (Path(str(inp.context["data_file"])).name if inp.context.get("data_file") else None)
    if name:
        facts.append(f"Data file: {name} (full path and SHA-256 under Provenance).")
    if facts:
        parts.append(Bullets(tuple(facts)))
    if isinstance(data.get("missing_by_group"), Mapping):
        tab = _missing_table(data["missing_by_group"], inp.items)
        if tab is not None:
            parts.append(tab)
    miss = I.first_key(inp.results, I.OPTIONAL_KEYS["missing"])
    if miss is not None:
        from .screening_section import missing_parts

        parts += missing_parts(miss, inp.items)
    if not parts:
        return None
    return Section("data", "The data", tuple(parts))


# -------------------------------------------------------------------- model
def _std_values(est: pd.DataFrame, group: str | None, parameter: str) -> dict[tuple[str, str], float]:
    if est.empty or group is None or "parameter" not in est:
        return {}
    col = "std" if "std" in est else "estimate"
    sub = est[(est["group"].astype(str) == group) & (est["parameter"] == parameter)]
    out = {}
    for _, r in sub.iterrows():
        v = fnum(r.get(col))
        if v is not None and r.get("other") is not None and not (isinstance(r.get("other"), float)):
            out[(str(r["variable"]), str(r["other"]))] = v
    return out


def section_model(inp: ReportInput) -> Section | None:
    """The diagram of the model, with the reference group's standardized loadings."""
    st = inp.structure
    factors = dict(st.get("factors") or {})
    if not factors:
        return None
    acc = inp.accepted
    level = acc.get("level") if acc else None
    est = inp.estimates_at(level)
    if est.empty:
        level = "configural"
        est = inp.estimates_at(level)
    ref = inp.reference
    loads = _std_values(est, ref, "loading")
    png = model_diagram(
        st,
        loadings=loads,
        paths=_std_values(est, ref, "path"),
        correlations=_std_values(est, ref, "covariance"),
    )
    parts: list = []
    family = st.get("family") or ("bifactor" if st.get("general") else "correlated")
    desc = f"Model family: {family}"
    if st.get("general"):
        desc += f"; {'general' if family == 'bifactor' else 'higher-order'} factor: {st['general']}"
    parts.append(Text(desc + ". Check that this is the model you meant to test."))
    if png is not None:
        where = (
            f"Standardized estimates in the reference group ({ref}) under the {level} model"
            if loads else "No estimates were available; the diagram shows the structure only"
        )
        parts.append(Figure("model", png, alt="Path diagram of the measurement model",
                            caption=where + ". Arrow width follows the size of the loading; dashed arrows are negative."))
    rows = [(str(f), ", ".join(str(i) for i in its)) for f, its in factors.items()]
    if st.get("general") and family == "bifactor":
        rows.insert(0, (str(st["general"]), "all items"))
    parts.append(Table(("Factor", "Items"), tuple(rows), caption="Which items measure which factor"))
    extra = []
    for out, pred in st.get("regressions") or []:
        extra.append(f"{out} is regressed on {pred}")
    for a, b in st.get("residual_covariances") or []:
        extra.append(f"residuals of {a} and {b} covary")
    if extra:
        parts.append(Bullets(tuple(extra)))
    return Section("model", "The model", tuple(parts))


# ------------------------------------------------------------------- levels
_RELATION_SIGNS = {">=": "\u2265", "<=": "\u2264", ">": ">", "<": "<"}


def _journal(text: str) -> str:
    """``-0.00996`` -> ``\u2212.00996``: a shown number in journal style, digits kept."""
    sign = "\u2212" if text.startswith("-") else ("+" if text.startswith("+") else "")
    body = text.lstrip("+-")
    if body.startswith("0."):
        body = body[1:]
    return sign + body


def _shown(c: Mapping[str, Any]) -> tuple[str, str] | None:
    """(value, relation and cutoff) as the decision shows them, when the check records it."""
    if not isinstance(c.get("value_text"), str) or not isinstance(c.get("relation"), str):
        return None
    rel = _RELATION_SIGNS.get(c["relation"], c["relation"])
    value = c["value_text"] if c["value_text"].startswith("<") else _journal(c["value_text"])
    return value, f"{rel} {_journal(str(c.get('cutoff_text', '')))}"


def _absolute_rows(e: Mapping[str, Any], checks: dict[str, dict]) -> list[tuple]:
    """Rows for a level judged on its own fit (the configural model): value against cutoff."""
    rows = []
    for ix, c in checks.items():
        cut = fnum(c.get("cutoff"))
        up = ix in ("cfi", "tli")
        value = c.get("value") if c.get("value") is not None else e.get(ix)
        shown = _shown(c)
        if shown is not None:
            value_text, cut_text = shown
        else:
            value_text = fmt_bounded(value)
            cut_text = "" if cut is None else ("\u2265 " if up else "\u2264 ") + fmt_bounded(cut)
        ok = c.get("passed")
        if ok is None and cut is not None and fnum(value) is not None:
            ok = fnum(value) >= cut if up else fnum(value) <= cut
        rows.append((ix.upper() if ix != "chi2" else "\u03c7\u00b2", value_text, cut_text or "none set", ok, "decides"))
    return rows


def _change_rows(inp: ReportInput, e: Mapping[str, Any], d: Mapping[str, Any], checks: dict[str, dict]) -> list[tuple]:
    """Rows for a level judged by the change from the level before it: a deciding
    criterion as the decision showed it (digits and inequality), the others for information."""
    names = I.criteria_names(inp.results)
    shown = names + [ix for ix in checks if ix not in names]
    shown += [ix for ix in ("cfi", "rmsea", "srmr", "chi2") if ix not in shown]
    rows = []
    for ix in shown:
        g = checks.get(ix, {})
        cut = fnum(g.get("cutoff")) if g.get("cutoff") is not None else I.cutoff(inp.results, ix, e)
        if ix in ("cfi", "tli") and cut is not None:
            cut = -abs(cut)
        if ix == "chi2":
            change = (f"{float(d['chi2']):.2f} on {fmt_int(d.get('df'))} df, p {fmt_p(d.get('pvalue'))}"
                      if fnum(d.get("chi2")) is not None else "")
            cut_text = "" if cut is None else f"p \u2265 {fmt_bounded(cut)}"
            ok = I.meets(ix, None, cut, pvalue=d.get("pvalue"))
            if _shown(g) is not None:
                cut_text = f"p {_shown(g)[1]}" + ("" if g["value_text"].startswith("<") else f" (p = {_shown(g)[0]})")
        else:
            change = fmt_delta(d.get(ix))
            cut_text = "" if cut is None else (("> " if ix in ("cfi", "tli") else "< ") + fmt_delta(cut))
            ok = I.meets(ix, d.get(ix), cut)
            if _shown(g) is not None:
                change, cut_text = _shown(g)
        if isinstance(g.get("passed"), bool):
            ok = g["passed"]
        if not change and not cut_text:
            continue
        role = "decides" if (ix in names or ix in checks) else ("shown" if names or checks else "")
        rows.append((INDEX_NAMES.get(ix, ix), change, cut_text or "none set", ok, role))
    return rows


def _criteria_rows(inp: ReportInput) -> tuple[list[tuple[str, ...]], list[str]]:
    """Rows (level, criterion, value, cutoff, passes, role, decision) for every judged
    row, the fully constrained and the partial row of a level alike."""
    rows, styles = [], []
    for e in I.display_levels(inp.results):
        d = e.get("delta")
        checks = I.level_checks(e)
        if isinstance(d, Mapping):
            sub = _change_rows(inp, e, d, checks)
        elif checks:
            sub = _absolute_rows(e, checks)
        else:
            continue
        name = level_label(e)
        if e.get("compared_with"):
            name += f" (vs {e['compared_with']})"
        for k, (crit, value, cut_text, ok, role) in enumerate(sub):
            rows.append((
                name if k == 0 else "", crit, value, cut_text,
                "" if ok is None else ("yes" if ok else "no"), role,
                decision_label(e.get("decision")) if k == 0 else "",
            ))
            styles.append("" if ok is None or role != "decides" else ("ok" if ok else "bad"))
    return rows, styles


def section_levels(inp: ReportInput) -> Section | None:
    """The stepwise table: fit per level, the changes, each criterion with its cutoff."""
    entries = I.levels(inp.results)
    if not entries:
        return None
    cells = level_table_display(inp.results)
    styles = tuple(str(e.get("decision") or "") for e in I.display_levels(inp.results))
    parts: list = [
        Table(DISPLAY_COLUMNS, tuple(tuple(r) for r in cells), caption="Fit of each invariance level",
              note=level_table_note(inp.results),
              numeric=(False,) + (True,) * (len(DISPLAY_COLUMNS) - 2) + (False,), row_styles=styles)
    ]
    r = I.rule(inp.results)
    intro = []
    if I.rule_name(inp.results):
        intro.append(f"Decision rule: {I.rule_name(inp.results)}.")
    names = I.criteria_names(inp.results)
    if names:
        how = {"all": " (a level holds when every one passes)", "any": " (a level holds when any one passes)"}
        intro.append("Deciding criteria: " + ", ".join(INDEX_NAMES.get(n, n) for n in names)
                     + how.get(str(r.get("combine")), "") + ".")
    text = I.rule_text(inp.results)
    if text:
        intro.append(text if text.endswith(".") else text + ".")
    for key in ("combination", "note"):
        if isinstance(r.get(key), str):
            intro.append(r[key])
    if inp.results.get("stop_at_failure") and any(e.get("decision") == "not_tested" for e in entries):
        intro.append("Testing stopped at the first level that failed; the levels after it were not tested.")
    if not r:
        intro.append("The results do not record the decision rule; cutoffs are shown where the results give them.")
    if any(isinstance(c, Mapping) and c.get("value_text") for e in entries for c in e.get("checks") or []):
        intro.append("Each deciding comparison is printed with the inequality that decided it and as many "
                     "decimals as it needs to read true (decisions use full precision).")
    if any(isinstance(e.get("constrained"), Mapping) for e in entries):
        intro.append("A level where constraints were released shows the fully constrained model first, then "
                     "the partial model.")
    parts.append(Text(" ".join(intro), style="note"))
    calibration = I.verdict_fields(inp.results)["cutoff_calibration"]
    if calibration:
        parts.append(Text(calibration, style="caution"))
    rows, row_styles = _criteria_rows(inp)
    if rows:
        parts.append(Table(("Level", "Criterion", "Change (or value)", "Against cutoff", "Passes", "Role", "Decision"),
                           tuple(rows), caption="Each criterion against its cutoff",
                           numeric=(False, False, True, True, False, False, False), row_styles=tuple(row_styles)))
    rel = [(level_label(e), release_text(x)) for e, x in I.new_releases(inp.results)]
    if rel:
        parts.append(Text("Constraints released to reach partial invariance (each is kept free in the later models):",
                          style="note"))
        parts.append(Bullets(tuple(f"{m}: {t}" for m, t in rel)))
    return Section("levels", "Invariance levels, step by step", tuple(parts))


def section_changes(inp: ReportInput) -> Section | None:
    """Chart of the change in CFI, RMSEA and SRMR per level against the cutoffs."""
    steps = []
    for e in I.levels(inp.results):
        d = e.get("delta")
        if not isinstance(d, Mapping):
            continue
        step = {"label": level_label(e)}
        for ix in I.CHANGE_INDICES:
            step[ix] = {"change": fnum(d.get(ix)), "cutoff": I.cutoff(inp.results, ix, e)}
        steps.append(step)
    names = I.criteria_names(inp.results)
    png = change_chart(steps, deciding=names or None)
    if png is None:
        return None
    has_cut = any(s[ix]["cutoff"] is not None for s in steps for ix in I.CHANGE_INDICES)
    cap = ("Change in each fit index from the previous level. Dashed lines: the cutoff of each step; "
           "hatched bars go beyond it.")
    if names:
        cap += " Panels marked \u201cnot deciding\u201d are shown for information; the decision rule does not use them."
    if not has_cut:
        cap += " No cutoffs were recorded in the results."
    return Section("changes", "Change in fit per level", (Figure("fit-changes", png, alt="Bar charts of the change in CFI, RMSEA and SRMR per level", caption=cap),))

"""Item-level sections: flagged items, parameter profiles across groups, dMACS heat map."""

from __future__ import annotations

import math
from typing import Any, Mapping

from . import inputs as I
from .formatting import fmt_bounded, fnum, level_label
from .parts import Figure, Section, Table, Text, cell
from .plots import dmacs_heatmap, profile_chart
from .result_tables import flagged_table
from .table_sections import table_part
from .sections import ReportInput

__all__ = ["dmacs_values", "section_effects", "section_flagged", "section_profiles"]

#: Most markers (rows x groups) in one profile figure: larger sets are split so each fits a page.
MAX_MARKERS = 90
KIND_TITLES = {"loading": "Loadings", "intercept": "Intercepts", "threshold": "Thresholds"}


def section_flagged(inp: ReportInput) -> Section | None:
    """Items whose parameters were flagged as differing across groups (``table_flagged``)."""
    table = flagged_table(inp.results)
    if table is None:
        return None
    return Section("flagged", "Flagged items", (table_part(table),))


def _released_rows(entry: Mapping[str, Any] | None, kind: str, rows: dict[str, tuple[str, str]]) -> list[str]:
    out = []
    for r in (entry or {}).get("released") or []:
        if not isinstance(r, Mapping) or str(r.get("parameter")) != kind:
            continue
        for name, (item, fac) in rows.items():
            if item == str(r.get("item")) and (r.get("factor") in (None, "") or str(r.get("factor")) == fac):
                out.append(name)
    return out


def _profile_values(sub) -> tuple[dict[str, tuple[str, str]], dict[tuple[str, str], tuple[float, float | None]]]:
    """Row name -> (item, other) and (row, group) -> (estimate, se) of one parameter kind."""
    rows: dict[str, tuple[str, str]] = {}
    values: dict[tuple[str, str], tuple[float, float | None]] = {}
    for r in sub.to_dict("records"):
        item, other = str(r["variable"]), r.get("other")
        other = "" if other is None or (isinstance(other, float) and other != other) else str(other)
        name = f"{item} \u2190 {other}" if r["parameter"] == "loading" and other else f"{item} {other}".strip()
        rows.setdefault(name, (item, other))
        v = fnum(r.get("estimate"))
        if v is not None:
            values[(name, str(r["group"]))] = (v, fnum(r.get("se")))
    return rows, values


def _differs(name: str, groups: list[str], values: Mapping) -> bool:
    """Whether a row's estimate is not the same in every group (free or released there)."""
    vals = [values[(name, g)][0] for g in groups if (name, g) in values]
    return len(vals) > 1 and max(vals) - min(vals) > 1e-8 * (1.0 + max(abs(v) for v in vals))


def section_profiles(inp: ReportInput) -> Section | None:
    """Loadings and intercepts (or thresholds) that differ across groups, group by group.

    Rows held equal across groups at the accepted level are left out (they would show the
    same value in every group); the section says which kinds were all equal.
    """
    acc = inp.accepted
    level = acc.get("level") if acc else None
    est = inp.estimates_at(level)
    if est.empty:
        level = "configural"
        est = inp.estimates_at(level)
    if est.empty or "parameter" not in est:
        return None
    groups = [g for g in inp.groups] or [str(g) for g in dict.fromkeys(est["group"].astype(str))]
    model = level_label(acc or {"level": level}).lower()
    parts: list = []
    equal: list[str] = []
    for kind in ("loading", "threshold", "intercept"):
        sub = est[est["parameter"] == kind]
        if sub.empty:
            continue
        rows, values = _profile_values(sub)
        names = [n for n in rows if _differs(n, groups, values)]
        if not names:
            equal.append(KIND_TITLES[kind].lower())
            continue
        rel = _released_rows(acc, kind, {n: rows[n] for n in names})
        per = max(4, int(MAX_MARKERS / max(len(groups), 1)))
        per = math.ceil(len(names) / math.ceil(len(names) / per))  # even split
        chunks = [names[k:k + per] for k in range(0, len(names), per)]
        for n_chunk, chunk in enumerate(chunks, start=1):
            part_of = f" ({n_chunk} of {len(chunks)})" if len(chunks) > 1 else ""
            png = profile_chart(chunk, groups, values, released=[r for r in rel if r in chunk],
                                title=KIND_TITLES[kind] + part_of, xlabel=f"{kind} (unstandardized, 95% interval)")
            if png is None:
                continue
            cap = f"{KIND_TITLES[kind]}{part_of} that differ across groups under the {model} model"
            cap += ("; released ones (\u2020, shaded) are estimated per group." if rel else
                    f" (left out: {len(rows) - len(names)} held equal across groups).")
            stem = f"profile-{kind}" + (f"-{n_chunk}" if len(chunks) > 1 else "")
            parts.append(Figure(stem, png, alt=f"{KIND_TITLES[kind]}{part_of} of each item in each group", caption=cap))
    if equal:
        parts.append(Text(f"All {' and '.join(equal)} are held equal across groups under the {model} model, "
                          "so they are the same in every group (the standardized loadings per group are in "
                          "table_loadings).", style="note"))
    return Section("profiles", "Item profiles across groups", tuple(parts)) if parts else None


def _add(out: dict, item: Any, group: Any, value: Any) -> None:
    v = fnum(value)
    if v is None or item is None:
        return
    out[(str(item), "(all focal)" if group in (None, "", "all") else str(group))] = v


def dmacs_values(inp: ReportInput) -> dict[tuple[str, str], float]:
    """``(item, focal group) -> dMACS`` from the effects section or the flagged items."""
    out: dict[tuple[str, str], float] = {}
    eff = I.first_key(inp.results, I.OPTIONAL_KEYS["effects"])
    if isinstance(eff, Mapping) and "dmacs" in eff:
        eff = eff["dmacs"]
    if isinstance(eff, Mapping):
        for item, v in eff.items():
            if isinstance(v, Mapping):
                for g, x in v.items():
                    _add(out, item, g, x)
            else:
                _add(out, item, None, v)
    elif isinstance(eff, (list, tuple)):
        for rec in eff:
            if isinstance(rec, Mapping):
                val = I.first_key(rec, ("dmacs", "value", "estimate"))
                g = I.first_key(rec, ("group", "focal", "focal_group"))
                if isinstance(val, Mapping):
                    for gg, x in val.items():
                        _add(out, rec.get("item"), gg, x)
                else:
                    _add(out, rec.get("item"), g, val)
    for f in inp.results.get("flagged") or []:
        if not isinstance(f, Mapping) or f.get("dmacs") is None:
            continue
        d = f["dmacs"]
        if isinstance(d, Mapping):
            for g, x in d.items():
                if fnum(x) is not None:
                    out.setdefault((str(f.get("item")), str(g)), fnum(x))
        else:
            gs = [g for g in (f.get("groups") or []) if str(g) != inp.reference]
            key_g = gs[0] if len(gs) == 1 else None
            if fnum(d) is not None:
                out.setdefault((str(f.get("item")), "(all focal)" if key_g is None else str(key_g)), fnum(d))
    return out


def section_effects(inp: ReportInput) -> Section | None:
    """Items-by-groups heat map of dMACS."""
    vals = dmacs_values(inp)
    bias = _scale_bias_table(inp)
    if not vals:
        if bias is None:
            return None
        return Section("effects", "Size of the differences", (bias, Text(
            "Expected bias of a scale's sum score: the sum of its items' mean differences at equal latent "
            "values (raw units; zero where every item's intercept and loading are held equal).", style="note")))
    seen_items = {i for i, _ in vals}
    items = list(inp.items) + sorted(seen_items - set(inp.items))
    focal = [g for g in inp.groups if g != inp.reference]
    seen_groups = {g for _, g in vals}
    groups = [g for g in focal if g in seen_groups] + sorted(seen_groups - set(focal))
    png = dmacs_heatmap(items, groups, vals)
    parts: list = []
    if png is not None:
        parts.append(Figure("dmacs", png, alt="Heat map of dMACS by item and focal group",
                            caption="dMACS (Nye & Drasgow 2011): the expected difference in an item's mean at equal latent "
                                    "values, in pooled SD units. White lines on the scale mark the rough guides .2, .4, .6 "
                                    "(Nye et al. 2019); a dash: not computed."))
    rows = tuple((i, g, fmt_bounded(v)) for (i, g), v in sorted(vals.items(), key=lambda kv: -kv[1]))
    parts.append(Table(("Item", "Focal group", "dMACS"), rows, caption="dMACS, largest first",
                       numeric=(False, False, True)))
    if bias is not None:
        parts.append(bias)
    return Section("effects", "Size of the differences (dMACS)", tuple(parts))


def _scale_bias_table(inp: ReportInput) -> Table | None:
    """Expected sum-score bias per scale and group (results key ``scale_bias``: records with
    ``scale``, ``items``, ``group``, ``reference``, ``bias``)."""
    recs = I.first_key(inp.results, I.OPTIONAL_KEYS["scale_bias"])
    if not isinstance(recs, list) or not recs or not all(isinstance(r, Mapping) for r in recs):
        return None
    rows = tuple(
        (str(r.get("scale", "")), str(len(r.get("items") or [])), str(r.get("group", "")),
         str(r.get("reference", inp.reference)), cell(r.get("bias")))
        for r in recs
    )
    return Table(("Scale", "Items", "Group", "Reference", "Expected bias"), rows,
                 caption="Expected bias of each scale's sum score (raw units)",
                 numeric=(False, True, False, False, True))

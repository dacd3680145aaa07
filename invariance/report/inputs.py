"""Defensive readers of the results dict (results.json) used by the report.

The report only reads results; it never re-estimates. Every key is read with ``.get``
so that a results dict from an older or newer pipeline still renders. Keys read:

Top level
    ``title``, ``estimator``, ``groups`` (group -> N used), ``reference_group``,
    ``levels``, ``flagged``, the verdict fields (``supported_level``,
    ``supported_partially``, ``released_constraints``, ``cutoff_calibration``,
    ``next_step``: :func:`verdict_fields`), ``decision_rule`` (``name`` or ``source``, ``rule`` (the
    rule in words), ``criteria``, ``cutoffs``, ``combine``, ``alpha``), ``verdict``,
    ``warnings``, ``stop_at_failure``, ``data`` (``file``, ``rows_by_group``,
    ``missing_by_group``, ``missing_codes``, ``cases_used``), and the optional sections
    listed in :data:`OPTIONAL_KEYS`.
Each level
    ``level``, ``label`` (optional display name), ``converged``, ``chi2``, ``df``,
    ``pvalue``, ``cfi``, ``tli``, ``rmsea``, ``rmsea_ci90``, ``srmr``, ``aic``, ``bic``,
    ``delta`` (``chi2``, ``df``, ``pvalue``, ``cfi``, ``rmsea``, ``srmr``), ``decision``,
    ``released``, and optionally ``compared_with``, ``reason``, ``problems``,
    ``constrained`` (the fully constrained row of a level with releases made at it),
    ``cutoffs`` and ``checks`` (or ``criteria``): a list of {``criterion``, ``value``,
    ``cutoff``, ``passed``, and the shown comparison ``value_text``, ``relation``,
    ``cutoff_text``}.

Cutoffs may be given in any of these shapes (values for CFI/TLI may be given as a
positive drop; they are read as a decrease):

* ``{"cfi": 0.01, "rmsea": 0.015, "srmr": 0.03}`` (also ``delta_cfi``, ``dcfi``)
* ``{"metric": {...}, "scalar": {...}}`` or ``{"loadings": {...}, "intercepts": {...}}``
* ``{"srmr": {"metric": 0.03, "scalar": 0.01}}``
* a ``cutoffs`` dict on the level entry itself (preferred when present)
"""

from __future__ import annotations

from typing import Any, Mapping

from ..decide.verdict import display_rows
from .formatting import fnum, is_number

__all__ = [
    "CHANGE_INDICES",
    "OPTIONAL_KEYS",
    "accepted_entry",
    "criteria_names",
    "display_levels",
    "display_results",
    "cutoff",
    "first_key",
    "levels",
    "level_checks",
    "meets",
    "norm_index",
    "new_releases",
    "rule",
    "rule_name",
    "rule_text",
    "verdict_fields",
]

#: Fit indices whose change between levels is judged against a cutoff.
CHANGE_INDICES = ("cfi", "rmsea", "srmr")

#: Optional sections: section -> accepted top-level keys (first one present wins).
OPTIONAL_KEYS = {
    "missing": ("missing_data", "missing", "missingness"),
    "screening": ("screening", "data_checks", "checks"),
    "effects": ("effects", "dmacs", "effect_sizes"),
    "bifactor": ("reliability", "bifactor", "bifactor_quality", "bifactor_indices", "quality"),
    "latent_means": ("latent", "latent_means", "latent_mean_differences", "means"),
    "scale_bias": ("scale_bias",),
    "group_fit": ("group_fit",),
    "alignment": ("alignment",),
    "structural": ("structural",),
    "structures": ("structures", "structure_notes"),
}

# Which family of cutoffs a level's step constrains (Chen 2007 distinguishes them).
_STEP_FAMILY = {
    "metric": ("loadings", "loading", "metric"),
    "scalar": ("intercepts", "intercept", "thresholds", "scalar"),
    "threshold": ("thresholds", "threshold"),
    "thresholds": ("thresholds", "threshold"),
    "strict": ("residuals", "residual", "strict", "intercepts"),
}


def first_key(d: Mapping[str, Any] | None, names) -> Any:
    """Value of the first of ``names`` present (and not None) in ``d``."""
    if not isinstance(d, Mapping):
        return None
    for n in names:
        if d.get(n) is not None:
            return d[n]
    return None


def levels(results: Mapping[str, Any]) -> list[dict]:
    """The level entries, in order (entries that are not dicts are dropped)."""
    return [e for e in (results.get("levels") or []) if isinstance(e, Mapping)]


def display_levels(results: Mapping[str, Any]) -> list[dict]:
    """The level entries as the tables show them: a level with releases made at it as its
    fully constrained row, then its partial row (each with ``label`` and ``partial``)."""
    try:
        return display_rows(levels(results))
    except (TypeError, AttributeError, ValueError):  # an unexpected shape: the rows as given
        return levels(results)


def verdict_fields(results: Mapping[str, Any]) -> dict:
    """The verdict of the run: ``supported_level``, ``supported_partially``,
    ``released_constraints`` (list of dicts), ``cutoff_calibration`` and ``next_step``
    (``None`` / empty when absent)."""
    rel = results.get("released_constraints")
    return {
        "supported_level": results.get("supported_level"),
        "supported_partially": results.get("supported_partially") is True,
        "released_constraints": [dict(r) for r in rel if isinstance(r, Mapping)] if isinstance(rel, (list, tuple)) else [],
        "cutoff_calibration": results.get("cutoff_calibration") if isinstance(results.get("cutoff_calibration"), str) else None,
        "next_step": results.get("next_step") if isinstance(results.get("next_step"), str) else None,
    }


def rule(results: Mapping[str, Any]) -> dict:
    """The decision rule dict (``name``, ``criteria``, ``cutoffs``); empty if absent."""
    r = results.get("decision_rule")
    if not isinstance(r, Mapping):
        r = {}
    return dict(r)


def rule_name(results: Mapping[str, Any]) -> str | None:
    """Short name of the decision rule (``name``, else ``source``)."""
    r = rule(results)
    name = r.get("name") or r.get("source")
    return None if not name else str(name)


def rule_text(results: Mapping[str, Any]) -> str | None:
    """The rule in words (``rule`` or ``description``), when it says more than the name."""
    r = rule(results)
    text = r.get("rule") or r.get("description")
    name = rule_name(results)
    if not isinstance(text, str) or text == name:
        return None
    if name and text.startswith(name):  # "<name>; a level holds when ..." -> "A level holds when ..."
        text = text[len(name):].lstrip(" ;,.:")
        text = text[:1].upper() + text[1:]
    return text or None


def level_checks(entry: Mapping[str, Any]) -> dict[str, dict]:
    """The checks recorded on a level: index -> {value, cutoff, passed} and, when
    recorded, the shown comparison (``value_text``, ``relation``, ``cutoff_text``)."""
    out = {}
    for c in (entry.get("checks") or entry.get("criteria") or []):
        if not isinstance(c, Mapping):
            continue
        name = c.get("criterion") or c.get("index") or c.get("name")
        if name is None:
            continue
        passed = next((c[k] for k in ("passed", "met", "ok", "within") if isinstance(c.get(k), bool)), None)
        out[norm_index(str(name))] = {"value": c.get("value"), "cutoff": c.get("cutoff"), "passed": passed,
                                      **{k: c[k] for k in ("value_text", "relation", "cutoff_text") if k in c}}
    return out


def criteria_names(results: Mapping[str, Any]) -> list[str]:
    """Names of the criteria that decide (lower case, ``delta_`` prefixes removed)."""
    crit = rule(results).get("criteria") or []
    if isinstance(crit, (str, Mapping)):
        crit = [crit]
    out = []
    for c in crit:
        if isinstance(c, Mapping):
            c = c.get("criterion") or c.get("index") or c.get("name")
        if c is None:
            continue
        name = norm_index(str(c))
        if name not in out:
            out.append(name)
    return out


def norm_index(name: str) -> str:
    n = name.strip().lower().replace("\u0394", "").replace("delta_", "").replace("delta", "")
    if n.startswith("d") and n[1:] in ("cfi", "tli", "rmsea", "srmr", "chi2"):
        n = n[1:]
    if n in ("chisq", "chi-square", "chi_square", "chi2_difference", "lrt"):
        n = "chi2"
    return n


def _lookup(d: Mapping[str, Any], index: str) -> Any:
    for key, val in d.items():
        if norm_index(str(key)) == index:
            return val
    return None


def cutoff(results: Mapping[str, Any], index: str, entry: Mapping[str, Any] | None = None) -> float | None:
    """Cutoff for the change in ``index`` at the step of ``entry``; ``None`` if not given.

    CFI and TLI cutoffs are returned as decreases (negative), RMSEA and SRMR as
    increases (positive), the chi-square cutoff as a significance level.
    """
    index = norm_index(index)
    level = str((entry or {}).get("level", ""))
    sources = []
    if entry is not None and isinstance(entry.get("cutoffs"), Mapping):
        sources.append(entry["cutoffs"])
    r = rule(results)
    if isinstance(r.get("cutoffs"), Mapping):
        sources.append(r["cutoffs"])
    crit = r.get("criteria")
    if isinstance(crit, list):
        sources.append(
            {
                (c.get("criterion") or c.get("index") or c.get("name")): c.get("cutoff")
                for c in crit
                if isinstance(c, Mapping) and (c.get("criterion") or c.get("index") or c.get("name"))
            }
        )
    value = None
    for src in sources:
        # per-step family first: {"scalar": {...}} or {"intercepts": {...}}
        for fam in (level,) + _STEP_FAMILY.get(level, ()):
            sub = src.get(fam)
            if isinstance(sub, Mapping):
                value = _lookup(sub, index)
                if value is not None:
                    break
        if value is None:
            value = _lookup(src, index)
            if isinstance(value, Mapping):
                value = first_key(value, (level,) + _STEP_FAMILY.get(level, ()) + ("default",))
        if value is not None:
            break
    if index == "chi2" and value is None:
        value = first_key(r, ("alpha", "chi2_alpha"))
    v = fnum(value)
    if v is None:
        return None
    if index in ("cfi", "tli"):
        return -abs(v)
    if index in ("rmsea", "srmr"):
        return abs(v)
    return v


def meets(index: str, change: Any, cut: float | None, *, pvalue: Any = None) -> bool | None:
    """Whether a change passes its cutoff by the inequality the decision rule uses
    (display only, when a level records no checks; the decision is recorded).

    CFI/TLI: change > cutoff; RMSEA/SRMR: change < cutoff; chi-square: p >= alpha
    (:mod:`invariance.decide.compare`).
    """
    index = norm_index(index)
    if cut is None:
        return None
    if index == "chi2":
        return None if not is_number(pvalue) else float(pvalue) >= cut
    if not is_number(change):
        return None
    v = round(float(change), 10)
    return v > cut if index in ("cfi", "tli") else v < cut


def new_releases(results: Mapping[str, Any]) -> list[tuple[dict, dict]]:
    """``(level entry, release)`` for each release at the first level that lists it
    (later levels carry earlier releases forward); a release gets ``differs_in`` from the
    verdict's ``released_constraints`` or the ``flagged`` records when they locate it."""
    where = {}
    for r in list(results.get("flagged") or []) + verdict_fields(results)["released_constraints"]:
        if isinstance(r, Mapping) and r.get("differs_in") is not None:
            where[(r.get("parameter"), r.get("item"), r.get("factor"))] = r["differs_in"]
    seen, out = set(), []
    for e in levels(results):
        for r in e.get("released") or []:
            if not isinstance(r, Mapping):
                continue
            key = (r.get("parameter"), r.get("item"), r.get("factor"))
            if key not in seen:
                seen.add(key)
                d = where.get(key)
                out.append((e, dict(r) if d is None else {**r, "differs_in": d}))
    return out


ROBUST_NOTE_KEY = "_shown_statistics"
_TESTS = {"satorra_bentler_2001": "Satorra & Bentler 2001", "satorra_bentler_2010": "Satorra & Bentler 2010"}


def display_results(results: Mapping[str, Any]) -> dict:
    """results as the report shows them: under robust ML the statistics that decided.

    When levels carry scaled statistics (``chi2_scaled``, ``pvalue_scaled``,
    ``cfi_robust``, ``tli_robust``, ``rmsea_robust``; delta ``chi2_scaled``), those
    replace the normal-theory values (the robust RMSEA has no interval here) and a
    sentence saying so is stored under :data:`ROBUST_NOTE_KEY`. Otherwise the results
    are returned unchanged.
    """
    entries = levels(results)
    if not any(e.get("chi2_scaled") is not None for e in entries):
        return dict(results)
    view = dict(results)
    rows, tests = [], set()
    for e in results.get("levels") or []:
        if not isinstance(e, Mapping):
            continue
        row = _robust_row(e, tests)
        if isinstance(e.get("constrained"), Mapping):
            row["constrained"] = _robust_row(e["constrained"], tests)
        rows.append(row)
    view["levels"] = rows
    view[ROBUST_NOTE_KEY] = (
        "Robust ML: \u03c7\u00b2 is the scaled statistic (T/c); CFI, TLI and RMSEA are the robust indices; "
        "\u0394\u03c7\u00b2 is the scaled difference" + (f" ({', '.join(sorted(tests))})" if tests else "")
        + "; the unscaled values are in results.json."
    )
    return view


def _robust_row(e: Mapping[str, Any], tests: set) -> dict:
    """One level row with the scaled statistics and robust indices in place of the others."""
    row = dict(e)
    if e.get("chi2_scaled") is not None:
        row["chi2"], row["pvalue"] = e["chi2_scaled"], e.get("pvalue_scaled")
        row["rmsea_ci90"] = None
    for k in ("cfi", "tli", "rmsea"):
        if e.get(f"{k}_robust") is not None:
            row[k] = e[f"{k}_robust"]
    d = e.get("delta")
    if isinstance(d, Mapping):
        d = dict(d)
        if d.get("chi2_scaled") is not None:
            d["chi2"] = d["chi2_scaled"]
        if d.get("test"):
            tests.add(_TESTS.get(str(d["test"]), str(d["test"])))
        row["delta"] = d
    return row


def accepted_entry(results: Mapping[str, Any]) -> dict | None:
    """The level entry of the run's ``supported_level`` (the verdict), else the configural one.

    Results without the verdict fields: the most constrained level of the unbroken run of
    ``holds`` / ``holds_partially`` from the first level.
    """
    entries = levels(results)
    best = results.get("supported_level") if "supported_level" in results else None
    if "supported_level" not in results:
        ok = []
        for e in entries:
            if e.get("decision") in ("holds", "holds_partially") and e.get("converged", True) is not False:
                ok.append(e)
            else:
                break
        best = ok[-1].get("level") if ok else None
    for e in entries:
        if best is not None and e.get("level") == best:
            return e
    for e in entries:
        if e.get("level") == "configural":
            return e
    return entries[0] if entries else None

"""Paper tables of the estimates: standardized loadings, latent means, variances and
covariances, structural paths with R².

Each builder reads the estimates table (columns level, group, parameter, variable,
other, free, estimate, se, pvalue, std) of one fitted level and returns a
:class:`~invariance.report.tables.PaperTable` (or ``None`` when the model has no such
parameter); :func:`estimate_tables` returns all of them. The level is the highest one
supported (:func:`table_level`), so the tables show the model the conclusions rest on.

Standardized values are the completely standardized solution of each group
(``FitResult.estimates()``, column ``std``): a loading ``lambda sqrt(psi) / sqrt(sigma_ii)``
with ``psi`` the factor's total variance and ``sigma_ii`` the item's model-implied
variance. Their standard errors are the unstandardized standard errors rescaled by the
same factor (the standard deviations treated as fixed), which the notes say.
"""

from __future__ import annotations

from typing import Any, Mapping

import pandas as pd

from . import inputs as I
from .formatting import fmt_bounded, fmt_p, fnum
from .tables import PaperTable

__all__ = [
    "SALIENT_LOADING",
    "estimate_tables",
    "latent_table",
    "loadings_table",
    "paths_table",
    "released_cells",
    "table_level",
]

#: The common-practice mark of a salient standardized loading (|loading| >= .35).
SALIENT_LOADING = 0.35
ALPHA = 0.05
SIGNIFICANT, RELEASED, SMALL = "*", "\u2020", "\u2021"


def table_level(results: Mapping[str, Any], estimates: pd.DataFrame) -> str | None:
    """The level whose estimates the tables show: the supported level, else configural."""
    if estimates.empty or "level" not in estimates:
        return None
    fitted = [str(x) for x in dict.fromkeys(estimates["level"])]
    acc = I.accepted_entry(results)
    for name in (results.get("supported_level"), acc.get("level") if acc else None):
        if name in fitted:
            return str(name)
    return fitted[0]


def released_cells(results: Mapping[str, Any], level: str | None) -> set[tuple[str, str, str | None]]:
    """(parameter, item, factor) of every constraint released up to ``level``."""
    out: set[tuple[str, str, str | None]] = set()
    recs = list((results.get("model") or {}).get("released") or [])
    for e in I.levels(results):
        recs += [r for r in e.get("released") or [] if isinstance(r, Mapping)]
        if e.get("level") == level:
            break
    for r in recs:
        if isinstance(r, Mapping) and r.get("item") is not None:
            out.add((str(r.get("parameter")), str(r["item"]), None if r.get("factor") in (None, "") else str(r["factor"])))
    return out


def _is_released(cells: set, parameter: str, item: str, factor: str | None) -> bool:
    return (parameter, item, factor) in cells or (parameter, item, None) in cells


def _std_se(row: Mapping[str, Any]) -> float | None:
    """Standard error of the standardized value, the scaling treated as fixed."""
    est, se, std = fnum(row.get("estimate")), fnum(row.get("se")), fnum(row.get("std"))
    if est is None or se is None or std is None or est == 0:
        return None
    return abs(se * std / est)


def _value_cell(row: Mapping[str, Any], *, released: bool = False, small_mark: bool = False) -> str:
    """``.52 (.04)*``: standardized value, its SE, and the marks of the notes."""
    std = fnum(row.get("std"))
    if std is None:
        return ""
    text = fmt_bounded(std, digits=2)
    se = _std_se(row)
    if se is not None:
        text += f" ({fmt_bounded(se, digits=2)})"
    p = fnum(row.get("pvalue"))
    if p is not None and p < ALPHA:
        text += SIGNIFICANT
    if released:
        text += RELEASED
    if small_mark and abs(std) < SALIENT_LOADING:
        text += SMALL
    return text


def _at(estimates: pd.DataFrame, level: str | None, parameter: str) -> pd.DataFrame:
    if level is None or estimates.empty:
        return pd.DataFrame()
    return estimates[(estimates["level"] == level) & (estimates["parameter"] == parameter)]


def _groups(results: Mapping[str, Any], sub: pd.DataFrame) -> list[str]:
    known = [str(g) for g in (results.get("groups") or {})]
    present = [str(g) for g in dict.fromkeys(sub["group"])]
    return [g for g in known if g in present] or present


def _level_name(level: str | None) -> str:
    return f"the {level} model" if level else "the model"


def loadings_table(results: Mapping[str, Any], estimates: pd.DataFrame) -> PaperTable | None:
    """Standardized loadings per group (rows: group and item; columns: factors)."""
    level = table_level(results, estimates)
    sub = _at(estimates, level, "loading")
    if sub.empty:
        return None
    factors = [str(f) for f in dict.fromkeys(sub["other"])]
    items = [str(i) for i in dict.fromkeys(sub["variable"])]
    rel = released_cells(results, level)
    index = {(str(r["group"]), str(r["variable"]), str(r["other"])): r for r in sub.to_dict("records")}
    rows = []
    for g in _groups(results, sub):
        for k, item in enumerate(items):
            cells = [g if k == 0 else "", item]
            for f in factors:
                r = index.get((g, item, f))
                cells.append("" if r is None else _value_cell(
                    r, released=_is_released(rel, "loading", item, f), small_mark=True))
            rows.append(tuple(cells))
    note = (
        f"Completely standardized loadings of {_level_name(level)} in each group, standard errors in "
        "parentheses (the unstandardized standard error rescaled by the same factor, the standard "
        f"deviations treated as fixed); empty: the item does not load on the factor. {SIGNIFICANT} p < .05 "
        f"(z test of the unstandardized loading). {RELEASED} released: estimated freely in each group. "
        f"{SMALL} below .35 in absolute value (a common-practice mark of a salient loading)."
    )
    return PaperTable(
        name="loadings",
        caption="Standardized factor loadings by group",
        columns=("Group", "Item", *factors),
        rows=tuple(rows),
        note=note,
        numeric=(False, False, *([True] * len(factors))),
    )


def _latent_rows(sub: pd.DataFrame, group: str, kind: str, outcomes: set[str]) -> list[tuple[str, Mapping]]:
    out = []
    for r in sub[sub["group"] == group].to_dict("records"):
        a, b = str(r["variable"]), r.get("other")
        if kind == "mean":
            out.append((f"{'Intercept' if a in outcomes else 'Mean'} of {a}", r))
        elif b is None or (isinstance(b, float) and b != b) or str(b) == a:
            out.append((f"{'Disturbance variance' if a in outcomes else 'Variance'} of {a}", r))
        else:
            out.append((f"Covariance of {a} and {b}", r))
    return out


def latent_table(results: Mapping[str, Any], estimates: pd.DataFrame) -> PaperTable | None:
    """Latent means, variances and covariances per group (unstandardized, SE, p, standardized)."""
    level = table_level(results, estimates)
    means, var = _at(estimates, level, "mean"), _at(estimates, level, "variance")
    if means.empty and var.empty:
        return None
    paths = _at(estimates, level, "path")
    outcomes = set() if paths.empty else {str(v) for v in paths["variable"]}
    rows = []
    for g in _groups(results, pd.concat([means, var])):
        block = _latent_rows(means, g, "mean", outcomes) + _latent_rows(var, g, "variance", outcomes)
        for k, (name, r) in enumerate(block):
            free = bool(r.get("free")) and fnum(r.get("se")) is not None
            rows.append((
                g if k == 0 else "",
                name,
                fmt_bounded(r.get("estimate"), digits=3) if free else fmt_bounded(r.get("estimate"), digits=3) + " (fixed)",
                fmt_bounded(r.get("se"), digits=3) if free else "",
                fmt_p(r.get("pvalue")) if free else "",
                fmt_bounded(r.get("std"), digits=3),
            ))
    ref = results.get("reference_group")
    note = (
        f"Estimates of {_level_name(level)}. Fixed values identify the model"
        + (f" (the reference group {ref} has factor means 0 and variances 1)" if ref else "")
        + ". Standardized: a mean in standard deviations of the group's own factor; a covariance as "
        "a correlation; the disturbance variance of an outcome factor as its unexplained share (1 \u2212 R\u00b2)."
    )
    return PaperTable(
        name="latent",
        caption="Latent means, variances and covariances by group",
        columns=("Group", "Parameter", "Estimate", "SE", "p", "Standardized"),
        rows=tuple(rows),
        note=note,
        numeric=(False, False, True, True, True, True),
    )


def paths_table(results: Mapping[str, Any], estimates: pd.DataFrame) -> PaperTable | None:
    """Standardized structural paths per group and the R² of each outcome factor."""
    level = table_level(results, estimates)
    paths = _at(estimates, level, "path")
    if paths.empty:
        return None
    var = _at(estimates, level, "variance")
    groups = _groups(results, paths)
    index = {(str(r["group"]), str(r["variable"]), str(r["other"])): r for r in paths.to_dict("records")}
    pairs = [(str(a), str(b)) for a, b in dict.fromkeys(zip(paths["variable"], paths["other"]))]
    rows = [(f"{a} \u2190 {b}", *(("" if index.get((g, a, b)) is None else _value_cell(index[(g, a, b)])) for g in groups))
            for a, b in pairs]
    for outcome in dict.fromkeys(a for a, _ in pairs):
        cells = []
        for g in groups:
            d = var[(var["group"] == g) & (var["variable"] == outcome) & var["other"].isna()]
            r2 = None if d.empty else 1.0 - float(d["std"].iloc[0])
            cells.append(fmt_bounded(r2, digits=2))
        rows.append((f"R\u00b2 of {outcome}", *cells))
    note = (
        f"Completely standardized coefficients of {_level_name(level)} (outcome \u2190 predictor), standard "
        "errors in parentheses (rescaled from the unstandardized ones, the standard deviations treated as "
        f"fixed); {SIGNIFICANT} p < .05. R\u00b2: the share of the outcome factor's variance explained, "
        "1 minus its standardized disturbance variance."
    )
    return PaperTable(
        name="paths",
        caption="Structural paths by group",
        columns=("Path", *groups),
        rows=tuple(rows),
        note=note,
        numeric=(False, *([True] * len(groups))),
    )


def estimate_tables(results: Mapping[str, Any], estimates: pd.DataFrame | None) -> list[PaperTable]:
    """Every estimate table the results have (loadings, latent, paths)."""
    est = estimates if isinstance(estimates, pd.DataFrame) else pd.DataFrame()
    built = (loadings_table(results, est), latent_table(results, est), paths_table(results, est))
    return [t for t in built if t is not None]

"""Pipeline glue for robust ML and missing data (used by :mod:`invariance.pipeline.stages`).

Pipeline keys (schema.json):

``estimator: ml_robust``
    Sandwich standard errors, scaled statistics and robust CFI, TLI and RMSEA; the
    decisions use the scaled difference test and the changes in the robust indices.
``data.incomplete: full_information | listwise``
    How rows with missing item values are used. ``full_information`` (the default) keeps
    every row with at least one observed item and fits by full-information ML;
    ``listwise`` keeps complete rows only and is reported as such.
``decision.scaled_difference: auto | strictly_positive``
    ``auto`` (default): Satorra & Bentler (2001), replaced by the strictly positive
    Satorra & Bentler (2010) version when its scaling factor is not positive;
    ``strictly_positive``: always the 2010 version.

results.json additions: per level ``chi2_scaled``, ``scaling_factor`` (``None`` under
``ml``), ``pvalue_scaled``, ``cfi_robust``, ``tli_robust``, ``rmsea_robust``; per
``delta`` ``chi2_scaled``, ``scaling``, ``test`` (which difference test decided) and
``pvalue_normal``; a top-level ``missing_data`` section with, per group, the cases used,
the number of patterns, the coverage of each item and Little's (1988) MCAR test.
"""

from __future__ import annotations

from typing import Mapping

import numpy as np

from ..data.mcar import little_mcar, missing_report
from ..estimate.robust import H1Moments, robust_difference

__all__ = [
    "INCOMPLETE",
    "incomplete_choice",
    "difference_choice",
    "cases_used_text",
    "missing_section",
    "robust_level_fields",
    "decision_view",
    "robust_delta",
]

INCOMPLETE = ("full_information", "listwise")
ROBUST_KEYS = ("chi2_scaled", "scaling_factor", "pvalue_scaled", "cfi_robust", "tli_robust", "rmsea_robust")


def incomplete_choice(spec) -> str:
    """The pipeline's ``data.incomplete`` (default ``full_information``)."""
    return str(spec.document["data"].get("incomplete", "full_information"))


def difference_choice(spec) -> str:
    """``"auto"`` or ``"2010"`` from ``decision.scaled_difference``."""
    dec = spec.document.get("decision", {})
    return "2010" if dec.get("scaled_difference", "auto") == "strictly_positive" else "auto"


def stats_method(spec, checked) -> str:
    """The :func:`~invariance.data.sample_stats` method for this run."""
    frame = checked.frame[list(checked.items)]
    has_missing = bool(frame.isna().to_numpy().any())
    return "fiml" if has_missing and incomplete_choice(spec) == "full_information" else "listwise"


def cases_used_text(method: str, has_missing: bool) -> str:
    if method == "fiml":
        return "every case with at least one observed item (full-information ML)"
    if has_missing:
        return "complete cases (listwise deletion, as the pipeline asks)"
    return "complete cases (no missing item values)"


def missing_section(stats, checked, method: str) -> dict:
    """Per group: method, cases used and dropped, patterns, coverage, Little's test."""
    by = missing_report(stats)
    for g in checked.groups:
        block = checked.frame.loc[checked.frame[checked.group] == g, list(checked.items)].to_numpy(dtype=float)
        block = block[~np.isnan(block).all(axis=1)]
        entry = by.setdefault(g, {})
        if "little" not in entry and np.isnan(block).any():
            # information about the data, whatever the handling (Little 1988)
            entry["little"] = little_mcar(block).to_dict()
        entry.setdefault("little", None)
    return {"method": "full_information" if method == "fiml" else "listwise", "by_group": by}


def robust_level_fields(res) -> dict:
    """The robust statistics of one fitted level (``None`` under plain ML)."""
    out = {}
    for k in ROBUST_KEYS:
        v = res.extra.get(k)
        out[k] = None if v is None or not np.isfinite(v) else float(v)
    return out


def decision_view(row: Mapping) -> dict:
    """A level row whose CFI, TLI and RMSEA are the robust ones (for judging)."""
    view = dict(row)
    for k in ("cfi", "tli", "rmsea"):
        v = row.get(f"{k}_robust")
        if v is not None:
            view[k] = v
    return view


def robust_delta(delta: dict, res, base_res, stats, *, method: str, cache: dict) -> dict:
    """Add the scaled difference to ``delta``; its p value becomes the deciding one."""
    key = id(stats)
    if key not in cache:
        cache[key] = H1Moments(stats)
    d = robust_difference(res, base_res, stats, method=method, h1=cache[key])
    out = dict(delta)
    out["pvalue_normal"] = delta.get("pvalue")
    out["chi2_scaled"] = None if not np.isfinite(d.chi2) else float(d.chi2)
    out["scaling"] = None if not np.isfinite(d.scaling) else float(d.scaling)
    out["test"] = d.test
    out["pvalue"] = None if not np.isfinite(d.pvalue) else float(d.pvalue)
    return out


def display_view(results: dict) -> dict:
    """results.json as the tables show it: under ``ml_robust`` the level and difference
    statistics are the scaled ones and the indices the robust ones (what decided)."""
    if results.get("estimator") != "ml_robust":
        return results
    view = dict(results)
    levels = []
    for lv in results["levels"]:
        row = dict(lv)
        if lv.get("chi2_scaled") is not None:
            row["chi2"] = lv["chi2_scaled"]
            row["pvalue"] = lv.get("pvalue_scaled")
        for k in ("cfi", "tli", "rmsea"):
            if lv.get(f"{k}_robust") is not None:
                row[k] = lv[f"{k}_robust"]
        row["rmsea_ci90"] = [None, None]
        d = lv.get("delta")
        if d:
            d = dict(d)
            d["chi2"] = d.get("chi2_scaled")
            row["delta"] = d
        levels.append(row)
    view["levels"] = levels
    return view


def display_note(results: dict) -> str | None:
    """One line saying which statistics the tables show under ``ml_robust``."""
    if results.get("estimator") != "ml_robust":
        return None
    tests = sorted({lv["delta"]["test"] for lv in results["levels"] if lv.get("delta") and lv["delta"].get("test")})
    names = {"satorra_bentler_2001": "Satorra-Bentler 2001", "satorra_bentler_2010": "Satorra-Bentler 2010"}
    which = ", ".join(names.get(t, t) for t in tests) or "none"
    return (
        "Robust ML: chi2 is the scaled statistic T/c, CFI, TLI and RMSEA are the robust indices, "
        f"dchi2 is the scaled difference ({which}); unscaled values are in results.json."
    )

"""Pipeline glue for robust ML and missing data (used by :mod:`invariance.pipeline.stages`;
the statistics themselves come from :mod:`invariance.estimate.interface`).

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


import numpy as np

from ..data.mcar import little_mcar, missing_report

__all__ = ["display_view", "display_note", "cases_used_text", "missing_section"]

def cases_used_text(spec, checked) -> str:
    """How rows with a missing item were used, as it really happened."""
    some = sum(int(np.isnan(x).any(axis=1).sum()) for x in checked.arrays())
    if not some:
        return "complete cases (no missing item values)"
    if spec.incomplete == "full_information":
        return "every case with at least one observed item (full-information ML)"
    why = "dwls uses complete cases" if spec.ordinal is not None else "data.incomplete: listwise"
    return f"complete cases ({some} rows with a missing item dropped listwise; {why})"


def missing_section(stats, checked, incomplete: str) -> dict:
    """Per group: method, cases used and dropped, patterns, coverage, Little's test."""
    by = missing_report(stats)
    for g in checked.groups:
        block = checked.blocks[g]
        nan = np.isnan(block)
        block = block[~nan.all(axis=1)] if nan.any() else block
        entry = by.setdefault(g, {})
        if "little" not in entry and np.isnan(block).any():
            # information about the data, whatever the handling (Little 1988)
            entry["little"] = little_mcar(block).to_dict()
        entry.setdefault("little", None)
    fiml = any(getattr(g, "has_missing", False) for g in stats.groups)
    return {"method": "full_information" if fiml else "listwise", "by_group": by}


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

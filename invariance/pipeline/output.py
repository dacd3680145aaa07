"""Output files of a run and the stepwise table printed on the terminal.

Every file of a run is written into a temporary folder beside the destination, which is
renamed into place only when everything was written: a run never leaves a half-written
output folder behind.
"""

from __future__ import annotations

import json
import math
import os
import pathlib
import shutil
import tempfile
from typing import Callable

from ..decide.verdict import display_rows, where_text

__all__ = ["check_destination", "level_table", "write_outputs", "format_table", "to_json"]

TABLE_COLUMNS = (
    "level", "partial", "decision", "compared_with", "converged", "chi2", "df", "pvalue", "cfi", "tli",
    "rmsea", "rmsea_lo", "rmsea_hi", "srmr", "aic", "bic",
    "d_chi2", "d_df", "d_pvalue", "d_cfi", "d_rmsea", "d_srmr", "released", "reason",
)


def _clean(obj):
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {str(k): _clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_clean(v) for v in obj]
    if hasattr(obj, "item") and callable(obj.item):  # numpy scalars
        return _clean(obj.item())
    return obj


def to_json(results: dict) -> str:
    """results.json text (non-finite numbers become null)."""
    return json.dumps(_clean(results), indent=2, allow_nan=False) + "\n"


def level_table(results: dict):
    """The stepwise level table as a DataFrame: one row per level, and for a level with
    releases made at it the fully constrained row (``partial`` false) before the partial
    one (:func:`invariance.decide.verdict.display_rows`)."""
    import pandas as pd

    rows = []
    for lv in display_rows(results["levels"]):
        d = lv.get("delta") or {}
        ci = lv.get("rmsea_ci90") or [None, None]
        rows.append(
            {
                "level": lv["level"],
                "partial": lv["partial"],
                "decision": lv["decision"],
                "compared_with": lv.get("compared_with"),
                "converged": lv["converged"],
                "chi2": lv["chi2"],
                "df": lv["df"],
                "pvalue": lv["pvalue"],
                "cfi": lv["cfi"],
                "tli": lv["tli"],
                "rmsea": lv["rmsea"],
                "rmsea_lo": ci[0],
                "rmsea_hi": ci[1],
                "srmr": lv["srmr"],
                "aic": lv["aic"],
                "bic": lv["bic"],
                "d_chi2": d.get("chi2"),
                "d_df": d.get("df"),
                "d_pvalue": d.get("pvalue"),
                "d_cfi": d.get("cfi"),
                "d_rmsea": d.get("rmsea"),
                "d_srmr": d.get("srmr"),
                "released": "; ".join(_release_text(r) for r in lv.get("released", [])),
                "reason": lv.get("reason", ""),
            }
        )
        if results.get("estimator") == "ml_robust":
            rows[-1].update(
                {k: lv.get(k) for k in ("chi2_scaled", "scaling_factor", "pvalue_scaled", "cfi_robust", "tli_robust", "rmsea_robust")}
            )
            rows[-1].update({"d_chi2_scaled": d.get("chi2_scaled"), "d_test": d.get("test")})
    cols = list(TABLE_COLUMNS)
    if results.get("estimator") == "ml_robust":
        cols += ["chi2_scaled", "scaling_factor", "pvalue_scaled", "cfi_robust", "tli_robust", "rmsea_robust",
                 "d_chi2_scaled", "d_test"]
    return pd.DataFrame(rows, columns=cols)


def _release_text(r: dict) -> str:
    """``intercept of so03 (differs in mesa)``: the located groups when known
    (:func:`invariance.decide.verdict.where_text`), else the groups released in."""
    where = f" on {r['factor']}" if r.get("factor") else ""
    return f"{r['parameter']} of {r['item']}{where} ({where_text(r.get('groups'), r.get('differs_in'))})"


def _num(v, fmt: str) -> str:
    return "" if v is None else format(v, fmt)


def _partial_lines(results: dict) -> list[str]:
    """Flagged items and structural levels (written by the partial-invariance stage)."""
    out = []
    if results.get("flagged"):
        out += ["", "Flagged (released by the search):"]
        for f in results["flagged"]:
            size = "" if f.get("dmacs_max") is None else f", dMACS up to {f['dmacs_max']:.2f}"
            test = "score test" if f.get("test") in ("multivariate", "univariate") else "refit difference"
            out.append(f"  {_release_text(f)} at {f['level']}: {test} {f['statistic']:.2f} "
                       f"on {f['df']} df, p {f['pvalue']:.2g}{size}")
    for s in results.get("structural") or []:
        if s == results["structural"][0]:
            out += ["", "Structural levels:"]
        rel = "; ".join(_release_text(r) for r in s.get("released", []))
        out.append(f"  {s['level']}: {s['decision']} ({s.get('reason', '')})" + (f"; released {rel}" if rel else ""))
    return out


def _table_lines(results: dict) -> list[str]:
    """The stepwise table: fully constrained and partial rows (a partial row is labelled
    ``partial <level>``)."""
    head = (f"{'level':<17}{'chi2':>10}{'df':>5}{'CFI':>7}{'RMSEA':>7}{'SRMR':>7}{'dchi2':>9}{'ddf':>5}{'p':>7}"
            f"{'dCFI':>8}{'dRMSEA':>8}{'dSRMR':>8}  decision")
    lines = [head, "-" * len(head)]
    for lv in results["levels"]:
        d = lv.get("delta") or {}
        p = d.get("pvalue")
        lines.append(
            f"{lv['row_name']:<17}{_num(lv['chi2'], '.2f'):>10}{_num(lv['df'], 'd'):>5}"
            f"{_num(lv['cfi'], '.3f'):>7}{_num(lv['rmsea'], '.3f'):>7}{_num(lv['srmr'], '.3f'):>7}"
            f"{_num(d.get('chi2'), '.2f'):>9}{_num(d.get('df'), 'd'):>5}"
            f"{('<.001' if p is not None and p < 0.001 else _num(p, '.3f')):>7}"
            f"{_num(d.get('cfi'), '+.4f'):>8}{_num(d.get('rmsea'), '+.4f'):>8}{_num(d.get('srmr'), '+.4f'):>8}"
            f"  {lv['decision']}"
        )
    return lines


def format_table(results: dict) -> str:
    """The stepwise table and the verdict as terminal text."""
    from .robust_stage import display_note, display_view

    note = display_note(results)
    results = display_view({**results, "levels": display_rows(results["levels"])})
    groups = ", ".join(f"{g} {n}" for g, n in results["groups"].items())
    out = [
        f"{results.get('title', 'invariance')}: {results['estimator']} on {results.get('data', {}).get('cases_used', 'complete cases')}; "
        f"groups (N used): {groups}; reference {results['reference_group']}",
        "",
        *_table_lines(results),
        *([note] if note else []),
        "",
        f"Rule: {results['decision_rule']['rule']}",
    ]
    if results.get("cutoff_calibration"):
        out.append(f"Caution: {results['cutoff_calibration']}")
    for lv in results["levels"]:
        if lv["decision"] != "not_tested":
            out.append(f"  {lv['row_name']}: {lv['decision']} ({lv['reason']})")
    out.append("")
    out.append(results["verdict"])
    if results.get("next_step"):
        out.append(results["next_step"])
    out.extend(_partial_lines(results))
    cc = results.get("crosscheck")
    if cc:
        out.append("")
        out.append(f"Second opinion ({cc['engine']}), configural model group by group:")
        for r in cc["groups"]:
            theirs = "" if r["semopy_chi2"] is None else f" vs {r['semopy_chi2']:.3f} on {r['semopy_df']} df"
            out.append(f"  {r['group']}: chi2 {r['chi2']:.3f} on {r['df']} df{theirs}: {r['agreement']}")
    if results.get("warnings"):
        out.append("Notes:")
        out.extend(f"  - {w}" for w in results["warnings"])
    return "\n".join(out)


#: A folder holding this file is the output of an earlier run and may be replaced.
MARKER = "results.json"


def check_destination(out_dir: pathlib.Path) -> None:
    """Refuse to replace anything but an empty folder or an earlier run's output folder."""
    from ..errors import SpecificationError

    if not out_dir.exists():
        return
    if not out_dir.is_dir():
        raise SpecificationError(f"Output folder {str(out_dir)!r} is an existing file; choose another --out.")
    if any(out_dir.iterdir()) and not (out_dir / MARKER).is_file():
        raise SpecificationError(
            f"Output folder {str(out_dir)!r} exists and is not the output of an earlier run; "
            "choose a new or empty folder for --out (or output.folder)."
        )


def write_outputs(
    out_dir: pathlib.Path,
    writers: list[Callable[[pathlib.Path], list[pathlib.Path] | pathlib.Path]],
) -> pathlib.Path:
    """Run every writer on a temporary folder, then move the folder to ``out_dir``.

    Parameters
    ----------
    out_dir
        Destination. An existing folder there (empty, or an earlier run's output with its
        results.json) is replaced only after every file of the new run was written; any
        other existing path is refused.
    writers
        Functions that write their files into the folder they are given.

    Returns
    -------
    pathlib.Path
        ``out_dir``.
    """
    out_dir = pathlib.Path(out_dir).resolve()
    check_destination(out_dir)
    out_dir.parent.mkdir(parents=True, exist_ok=True)
    tmp = pathlib.Path(tempfile.mkdtemp(prefix=f".{out_dir.name}.", suffix=".partial", dir=out_dir.parent))
    try:
        for w in writers:
            w(tmp)
        old = None
        if out_dir.exists():
            old = out_dir.parent / f".{out_dir.name}.{os.getpid()}.old"
            if old.exists():
                shutil.rmtree(old)
            out_dir.rename(old)
        tmp.rename(out_dir)
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return out_dir

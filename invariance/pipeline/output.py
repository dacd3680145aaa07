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

__all__ = ["level_table", "write_outputs", "format_table", "to_json"]

TABLE_COLUMNS = (
    "level", "decision", "compared_with", "converged", "chi2", "df", "pvalue", "cfi", "tli",
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
    """The stepwise level table as a DataFrame (one row per level)."""
    import pandas as pd

    rows = []
    for lv in results["levels"]:
        d = lv.get("delta") or {}
        ci = lv.get("rmsea_ci90") or [None, None]
        rows.append(
            {
                "level": lv["level"],
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
    return pd.DataFrame(rows, columns=list(TABLE_COLUMNS))


def _release_text(r: dict) -> str:
    where = f" on {r['factor']}" if r.get("factor") else ""
    groups = f" in {', '.join(r['groups'])}" if r.get("groups") else " in every group"
    return f"{r['parameter']} of {r['item']}{where}{groups}"


def _num(v, fmt: str) -> str:
    return "" if v is None else format(v, fmt)


def format_table(results: dict) -> str:
    """The stepwise table and the verdict as terminal text."""
    head = f"{'level':<11}{'chi2':>10}{'df':>5}{'CFI':>7}{'RMSEA':>7}{'SRMR':>7}{'dchi2':>9}{'ddf':>5}{'p':>7}{'dCFI':>8}{'dRMSEA':>8}{'dSRMR':>8}  decision"
    lines = [head, "-" * len(head)]
    for lv in results["levels"]:
        d = lv.get("delta") or {}
        p = d.get("pvalue")
        lines.append(
            f"{lv['level']:<11}{_num(lv['chi2'], '.2f'):>10}{_num(lv['df'], 'd'):>5}"
            f"{_num(lv['cfi'], '.3f'):>7}{_num(lv['rmsea'], '.3f'):>7}{_num(lv['srmr'], '.3f'):>7}"
            f"{_num(d.get('chi2'), '.2f'):>9}{_num(d.get('df'), 'd'):>5}"
            f"{('<.001' if p is not None and p < 0.001 else _num(p, '.3f')):>7}"
            f"{_num(d.get('cfi'), '+.4f'):>8}{_num(d.get('rmsea'), '+.4f'):>8}{_num(d.get('srmr'), '+.4f'):>8}"
            f"  {lv['decision']}"
        )
    groups = ", ".join(f"{g} {n}" for g, n in results["groups"].items())
    out = [
        f"{results.get('title', 'invariance')}: {results['estimator']} on complete cases; "
        f"groups (N used): {groups}; reference {results['reference_group']}",
        "",
        *lines,
        "",
        f"Rule: {results['decision_rule']['rule']}",
    ]
    for lv in results["levels"]:
        if lv["decision"] != "not_tested":
            out.append(f"  {lv['level']}: {lv['decision']} ({lv['reason']})")
    out.append("")
    out.append(results["verdict"])
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


def write_outputs(
    out_dir: pathlib.Path,
    writers: list[Callable[[pathlib.Path], list[pathlib.Path] | pathlib.Path]],
) -> pathlib.Path:
    """Run every writer on a temporary folder, then move the folder to ``out_dir``.

    Parameters
    ----------
    out_dir
        Destination. An existing folder there is replaced only after every file of the
        new run was written.
    writers
        Functions that write their files into the folder they are given.

    Returns
    -------
    pathlib.Path
        ``out_dir``.
    """
    out_dir = pathlib.Path(out_dir).resolve()
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

"""Output files of a run and the stepwise table printed on the terminal.

Every file of a run is written into a temporary folder beside the destination, which is
renamed into place only when everything was written: a run never leaves a half-written
output folder behind. The last file written is :data:`MANIFEST`, the list of the files the
run wrote; only a folder that still holds exactly those files is ever replaced.
"""

from __future__ import annotations

import json
import math
import os
import pathlib
import shutil
import tempfile
from typing import Callable, Sequence

import pandas as pd
import secrets

from ..data.read import file_sha256
from ..decide.verdict import display_rows, where_text
from ..errors import SpecificationError, shorten
from ..version import __version__
from .robust_stage import display_note, display_view

__all__ = ["MANIFEST", "check_destination", "level_table", "write_manifest", "write_outputs", "format_table", "to_json"]

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


#: The file, written last into every output folder, that lists the files the tool wrote
#: there (relative path -> SHA-256). Only a folder holding it, and still holding exactly
#: those files unchanged, is the tool's own and may be replaced by a later run.
MANIFEST = "manifest.json"
MANIFEST_TOOL = "invariance output folder"


def _folder(path: pathlib.Path) -> str:
    return shorten(str(path), 240)


def _files_in(folder: pathlib.Path) -> dict[str, pathlib.Path]:
    """Relative POSIX path -> path of every entry under ``folder`` that is not a folder."""
    out = {}
    for root, dirs, files in os.walk(folder, followlinks=False):
        base = pathlib.Path(root)
        for name in files + [d for d in dirs if (base / d).is_symlink()]:
            out[(base / name).relative_to(folder).as_posix()] = base / name
    return out


def write_manifest(folder: pathlib.Path) -> pathlib.Path:
    """List every file in ``folder`` with its SHA-256 in :data:`MANIFEST`."""
    files = {rel: file_sha256(p) for rel, p in sorted(_files_in(folder).items()) if rel != MANIFEST}
    doc = {"written_by": MANIFEST_TOOL, "version": __version__, "files": files}
    path = folder / MANIFEST
    path.write_text(json.dumps(doc, indent=2) + "\n", encoding="utf-8")
    return path


def _foreign_entry(folder: pathlib.Path) -> str | None:
    """``None`` when ``folder`` is the tool's own output; else the first entry that is not."""
    present = _files_in(folder)
    try:
        doc = json.loads((folder / MANIFEST).read_text(encoding="utf-8"))
        listed = dict(doc["files"]) if doc.get("written_by") == MANIFEST_TOOL else None
    except (OSError, ValueError, KeyError, TypeError, AttributeError):
        listed = None
    if listed is None:
        shown = ", ".join(shorten(rel) for rel in sorted(present)[:3]) + (" ..." if len(present) > 3 else "")
        return f"no {MANIFEST} of an earlier run; it holds {shown}"
    for rel in sorted(present):
        if rel == MANIFEST:
            continue
        if rel not in listed:
            return f"it holds {shorten(rel)}, which no run wrote"
        path = present[rel]
        if path.is_symlink() or not path.is_file() or file_sha256(path) != listed[rel]:
            return f"its {shorten(rel)} was changed since the run wrote it"
    return None


def _protected(extra: Sequence[tuple[pathlib.Path, str]]) -> list[tuple[pathlib.Path, str]]:
    cwd = pathlib.Path.cwd().resolve()
    out = [(cwd, "the working folder")]
    out += [(a, "a folder above the working folder") for a in cwd.parents]
    for folder, what in extra:
        folder = pathlib.Path(folder).resolve()
        out.append((folder, what))
        out += [(a, f"a folder above {what}") for a in folder.parents]
    return out


def _probe_writable(out_dir: pathlib.Path) -> None:
    """Make and remove a probe folder where ``out_dir`` will be created (nothing is left)."""
    base = out_dir.parent
    while not base.exists():
        base = base.parent
    if not base.is_dir():
        raise SpecificationError(
            f"Output folder {_folder(out_dir)} cannot be made: {_folder(base)} is a file; "
            "choose another --out (or output.folder)."
        )
    try:
        probe = pathlib.Path(tempfile.mkdtemp(prefix=".invariance-probe.", dir=base))
        probe.rmdir()
    except OSError as exc:
        raise SpecificationError(
            f"Output folder {_folder(out_dir)} is not writable ({exc.strerror or exc} in {_folder(base)}); "
            "choose a folder you can write to for --out (or output.folder)."
        ) from None


def check_destination(out_dir: pathlib.Path, *, protected: Sequence[tuple[pathlib.Path, str]] = ()) -> None:
    """Refuse any destination but a new folder, an empty one, or the tool's own output folder.

    Parameters
    ----------
    out_dir
        The output folder.
    protected
        ``(folder, description)`` pairs that must never be replaced (the pipeline file's and
        the data file's folders); the working folder and every folder above it, or above
        any of these, are always refused.

    Raises
    ------
    SpecificationError
        One line naming the folder and the fix. Nothing is changed on disk.
    """
    out_dir = pathlib.Path(out_dir).resolve()
    fix = "choose a new folder for --out (or output.folder)"
    for folder, what in _protected(protected):
        if out_dir == folder:
            raise SpecificationError(f"Output folder {_folder(out_dir)} is {what}, which a run never replaces; {fix}.")
    if out_dir.is_symlink() or (out_dir.exists() and not out_dir.is_dir()):
        raise SpecificationError(f"Output folder {_folder(out_dir)} is an existing file or link; {fix}.")
    if out_dir.exists() and any(out_dir.iterdir()):
        foreign = _foreign_entry(out_dir)
        if foreign is not None:
            raise SpecificationError(
                f"Output folder {_folder(out_dir)} is not the output of an earlier run ({foreign}); "
                f"{fix}, or empty that folder yourself."
            )
    _probe_writable(out_dir)


def _new_folder(parent: pathlib.Path, name: str) -> pathlib.Path:
    """A fresh hidden folder (mode from the umask, unlike ``tempfile.mkdtemp``'s 0700)."""

    for _ in range(100):
        path = parent / f".{name}.{secrets.token_hex(4)}.partial"
        try:
            path.mkdir()
            return path
        except FileExistsError:
            continue
    raise FileExistsError(f"no free temporary folder name in {parent}")


def write_outputs(
    out_dir: pathlib.Path,
    writers: list[Callable[[pathlib.Path], list[pathlib.Path] | pathlib.Path]],
    *,
    protected: Sequence[tuple[pathlib.Path, str]] = (),
) -> pathlib.Path:
    """Run every writer on a temporary folder, then move the folder to ``out_dir``.

    Parameters
    ----------
    out_dir
        Destination. An existing folder there is replaced only if it is empty or the
        tool's own output (:data:`MANIFEST` lists every file in it, unchanged), and only
        after every file of the new run was written; anything else is refused
        (:func:`check_destination`).
    writers
        Functions that write their files into the folder they are given.
    protected
        Folders that are never replaced, as for :func:`check_destination`.

    Returns
    -------
    pathlib.Path
        ``out_dir``.
    """
    out_dir = pathlib.Path(out_dir).resolve()
    check_destination(out_dir, protected=protected)
    out_dir.parent.mkdir(parents=True, exist_ok=True)
    tmp = _new_folder(out_dir.parent, out_dir.name)
    old = None
    try:
        for w in writers:
            w(tmp)
        write_manifest(tmp)
        if out_dir.exists():
            old = _new_folder(out_dir.parent, out_dir.name + ".old")
            old.rmdir()
            out_dir.rename(old)
        tmp.rename(out_dir)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        if old is not None and old.exists() and not out_dir.exists():
            old.rename(out_dir)  # put the earlier output back
        raise
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)
    return out_dir

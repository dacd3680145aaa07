"""Publication tables of the stepwise results: CSV, Markdown and LaTeX.

One row per invariance level (in the order fitted), and for a level where constraints
were released the fully constrained row before the partial one (``partial`` column;
row names ``Scalar`` and ``Partial scalar``); columns chi-square, df, p, CFI,
RMSEA with its 90% interval, SRMR, then the changes from the previous level
(chi-square difference, df, p, change in CFI, RMSEA, SRMR) and the decision. The CSV
keeps full precision with the interval bounds in separate columns; the Markdown and
LaTeX versions are formatted the way journals print them (no leading zero on indices
bounded by 1, signed changes) with a note below the table.
"""

from __future__ import annotations

import csv
import io
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping, Sequence

from .formatting import (
    MINUS,
    decision_label,
    estimator_label,
    fmt_bounded,
    fmt_delta,
    fmt_int,
    fmt_p,
    fmt_stat,
    fnum,
    level_label,
    release_text,
)
from ..escape import csv_cell, visible
from .inputs import ROBUST_NOTE_KEY, display_levels, display_results, new_releases, rule_name

__all__ = [
    "LEVEL_TABLE_FILES",
    "PaperTable",
    "csv_text",
    "table_latex",
    "table_markdown",
    "write_table",
    "level_rows",
    "level_table_csv",
    "level_table_display",
    "level_table_latex",
    "level_table_markdown",
    "level_table_note",
    "write_level_tables",
    "write_texts",
]

#: File names written by :func:`write_level_tables`.
LEVEL_TABLE_FILES = ("table_levels.csv", "table_levels.md", "table_levels.tex")

CSV_COLUMNS = (
    "level", "model", "partial", "converged", "chi2", "df", "pvalue", "cfi", "tli", "rmsea",
    "rmsea_ci90_lower", "rmsea_ci90_upper", "srmr", "aic", "bic", "delta_chi2", "delta_df",
    "delta_pvalue", "delta_cfi", "delta_rmsea", "delta_srmr", "decision", "released",
)

DISPLAY_COLUMNS = (
    "Model", "\u03c7\u00b2", "df", "p", "CFI", "RMSEA [90% CI]", "SRMR",
    "\u0394\u03c7\u00b2", "\u0394df", "p(\u0394\u03c7\u00b2)", "\u0394CFI", "\u0394RMSEA", "\u0394SRMR", "Decision",
)
LATEX_COLUMNS = (
    "Model", r"$\chi^2$", r"\textit{df}", r"\textit{p}", "CFI", r"RMSEA [90\% CI]", "SRMR",
    r"$\Delta\chi^2$", r"$\Delta$\textit{df}", r"\textit{p}$_{\Delta}$", r"$\Delta$CFI", r"$\Delta$RMSEA",
    r"$\Delta$SRMR", "Decision",
)


def _ci(entry: Mapping[str, Any]) -> tuple[float | None, float | None]:
    ci = entry.get("rmsea_ci90")
    if isinstance(ci, (list, tuple)) and len(ci) == 2:
        return fnum(ci[0]), fnum(ci[1])
    return None, None


def level_rows(results: Mapping[str, Any]) -> list[dict]:
    """Plain numeric rows (one per shown level row) with the :data:`CSV_COLUMNS` keys."""
    rows = []
    for e in display_levels(results):
        d = e.get("delta") if isinstance(e.get("delta"), Mapping) else {}
        lo, hi = _ci(e)
        rows.append(
            {
                "level": e.get("level"),
                "model": level_label(e),
                "partial": e.get("partial"),
                "converged": e.get("converged"),
                "chi2": fnum(e.get("chi2")),
                "df": fnum(e.get("df")),
                "pvalue": fnum(e.get("pvalue")),
                "cfi": fnum(e.get("cfi")),
                "tli": fnum(e.get("tli")),
                "rmsea": fnum(e.get("rmsea")),
                "rmsea_ci90_lower": lo,
                "rmsea_ci90_upper": hi,
                "srmr": fnum(e.get("srmr")),
                "aic": fnum(e.get("aic")),
                "bic": fnum(e.get("bic")),
                "delta_chi2": fnum(d.get("chi2")),
                "delta_df": fnum(d.get("df")),
                "delta_pvalue": fnum(d.get("pvalue")),
                "delta_cfi": fnum(d.get("cfi")),
                "delta_rmsea": fnum(d.get("rmsea")),
                "delta_srmr": fnum(d.get("srmr")),
                "decision": e.get("decision"),
                "released": "; ".join(release_text(r) for r in (e.get("released") or []) if isinstance(r, Mapping)),
            }
        )
    return rows


def level_table_display(results: Mapping[str, Any], *, minus: str = "\u2212") -> list[list[str]]:
    """Formatted cells (strings), one list per level, in :data:`DISPLAY_COLUMNS` order."""
    out = []
    for r in level_rows(results):
        rm = fmt_bounded(r["rmsea"], minus=minus)
        if r["rmsea_ci90_lower"] is not None and r["rmsea"] is not None:
            rm += f" [{fmt_bounded(r['rmsea_ci90_lower'], minus=minus)}, {fmt_bounded(r['rmsea_ci90_upper'], minus=minus)}]"
        name = r["model"] + ("" if r["converged"] is not False else " (not converged)")
        out.append(
            [
                name,
                fmt_stat(r["chi2"], minus=minus),
                fmt_int(r["df"]),
                fmt_p(r["pvalue"]),
                fmt_bounded(r["cfi"], minus=minus),
                rm,
                fmt_bounded(r["srmr"], minus=minus),
                fmt_stat(r["delta_chi2"], minus=minus),
                fmt_int(r["delta_df"]),
                fmt_p(r["delta_pvalue"]),
                fmt_delta(r["delta_cfi"], minus=minus),
                fmt_delta(r["delta_rmsea"], minus=minus),
                fmt_delta(r["delta_srmr"], minus=minus),
                decision_label(r["decision"]),
            ]
        )
    return out


def level_table_note(results: Mapping[str, Any]) -> str:
    """The note printed under the table: sample, estimator, what the changes mean."""
    groups = results.get("groups") or {}
    parts = []
    if isinstance(groups, Mapping) and groups:
        ns = [fnum(v) for v in groups.values()]
        total = sum(n for n in ns if n is not None)
        parts.append(
            f"N = {int(total)} ("
            + ", ".join(f"{g} {fmt_int(n)}" for g, n in groups.items())
            + ")."
        )
    if results.get("estimator"):
        parts.append(f"Estimator: {estimator_label(results['estimator'])}.")
    parts.append(
        "Changes (\u0394) are each model minus the model before it; CI = confidence interval."
    )
    if results.get(ROBUST_NOTE_KEY):
        parts.append(str(results[ROBUST_NOTE_KEY]))
    rel = [(level_label(e), release_text(r)) for e, r in new_releases(results)]
    if rel:
        by_model: dict[str, list[str]] = {}
        for m, t in rel:
            by_model.setdefault(m, []).append(t)
        parts.append(
            "Released constraints (carried forward to the later models): "
            + "; ".join(f"{m}: {', '.join(ts)}" for m, ts in by_model.items()) + "."
        )
    name = rule_name(results)
    if name:
        parts.append(f"Decision rule: {name}.")
    return " ".join(parts)


def level_table_csv(results: Mapping[str, Any]) -> str:
    """CSV text of the paper table: the cells of the Markdown and LaTeX versions.

    The machine table with every value at full precision is ``levels.csv``
    (:func:`invariance.pipeline.output.level_table`).
    """
    return csv_text(DISPLAY_COLUMNS, level_table_display(results, minus="-"))


def csv_text(columns: Sequence[str], rows: Sequence[Sequence[str]]) -> str:
    """CSV text of a header and rows of cells (the CSV writer of every paper table)."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow([csv_cell(str(c)) for c in columns])
    for r in rows:
        w.writerow([csv_cell(str(c).replace(MINUS, "-")) for c in r])
    return buf.getvalue()


_TAG_START = re.compile(r"<(?=[A-Za-z/!?])")


def _md_cell(s: str) -> str:
    """One Markdown table cell: pipes and backslashes escaped, a ``<`` that could open an
    HTML tag backslash-escaped (CommonMark), so ``< .001`` stays as printed."""
    s = visible(str(s).replace("\n", " ")).replace("\\", "\\\\").replace("|", "\\|")
    return _TAG_START.sub(r"\\<", s)


def level_table_markdown(results: Mapping[str, Any]) -> str:
    """A Markdown pipe table with the note below it."""
    rows = level_table_display(results)
    head = "| " + " | ".join(DISPLAY_COLUMNS) + " |"
    align = "|" + "|".join([":---"] + ["---:"] * (len(DISPLAY_COLUMNS) - 2) + [":---"]) + "|"
    body = ["| " + " | ".join(_md_cell(c) for c in r) + " |" for r in rows]
    return "\n".join([head, align, *body, "", "*Note.* " + _md_cell(level_table_note(results)), ""])


_TEX = {
    "\\": r"\textbackslash{}", "&": r"\&", "%": r"\%", "$": r"\$", "#": r"\#", "_": r"\_",
    "{": r"\{", "}": r"\}", "~": r"\textasciitilde{}", "^": r"\textasciicircum{}",
    "<": r"\textless{}", ">": r"\textgreater{}",
}


def latex_escape(s: str) -> str:
    """Escape the LaTeX special characters of plain text."""
    s = "".join(_TEX.get(ch, ch) for ch in visible(s))
    return s.replace("\u2212", "$-$").replace("\u0394", r"$\Delta$").replace("\u03c7\u00b2", r"$\chi^2$")


def level_table_latex(results: Mapping[str, Any], *, label: str = "tab:invariance") -> str:
    """A booktabs LaTeX table (``table`` float with caption, tabular and note)."""
    rows = level_table_display(results, minus="-")
    spec = "l" + "r" * (len(LATEX_COLUMNS) - 2) + "l"
    lines = [
        "% Requires \\usepackage{booktabs}",
        "\\begin{table}[htbp]",
        "\\centering",
        "\\caption{Tests of measurement invariance across groups}",
        f"\\label{{{latex_escape(label)}}}",
        "\\small",
        f"\\begin{{tabular}}{{{spec}}}",
        "\\toprule",
        " & ".join(LATEX_COLUMNS) + " \\\\",
        "\\midrule",
    ]
    for r in rows:
        cells = [latex_escape(c).replace("-", "$-$") if k not in (0, len(r) - 1) else latex_escape(c) for k, c in enumerate(r)]
        cells = [c.replace("< .001", "$<$ .001").replace("\\textless{} .001", "$<$ .001") for c in cells]
        lines.append(" & ".join(cells) + " \\\\")
    lines += [
        "\\bottomrule",
        "\\end{tabular}",
        "",
        "\\par\\smallskip\\footnotesize\\textit{Note.} " + latex_escape(level_table_note(results)),
        "\\end{table}",
        "",
    ]
    return "\n".join(lines)


def write_level_tables(out_dir: Path, results: Mapping[str, Any]) -> list[Path]:
    """Write :data:`LEVEL_TABLE_FILES` into ``out_dir``; returns the paths written."""
    results = display_results(results)
    texts = (level_table_csv(results), level_table_markdown(results), level_table_latex(results))
    return write_texts(out_dir, LEVEL_TABLE_FILES, texts)


def write_texts(out_dir: Path, names: Sequence[str], texts: Sequence[str]) -> list[Path]:
    """Write each text to its file name in ``out_dir`` (UTF-8); returns the paths."""
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    paths = []
    for name, text in zip(names, texts):
        p = out_dir / name
        p.write_text(text, encoding="utf-8")
        paths.append(p)
    return paths


@dataclass(frozen=True)
class PaperTable:
    """A table for a paper, written as ``table_<name>.csv``, ``.md`` and ``.tex``.

    The three files hold the same cells: the CSV with a plain hyphen for minus (so
    spreadsheets read numbers), the Markdown with the Unicode minus, the LaTeX with
    ``$-$``. ``numeric`` marks right-aligned columns; ``note`` is printed below.
    """

    name: str
    caption: str
    columns: tuple[str, ...]
    rows: tuple[tuple[str, ...], ...]
    note: str = ""
    numeric: tuple[bool, ...] = ()

    @property
    def files(self) -> tuple[str, str, str]:
        """The three file names."""
        return tuple(f"table_{self.name}.{ext}" for ext in ("csv", "md", "tex"))


def table_markdown(table: PaperTable) -> str:
    """A Markdown pipe table with its caption above and its note below."""
    n = len(table.columns)
    align = [("---:" if k < len(table.numeric) and table.numeric[k] else ":---") for k in range(n)]
    lines = [f"**{_md_cell(table.caption)}**", "", "| " + " | ".join(_md_cell(c) for c in table.columns) + " |",
             "|" + "|".join(align) + "|"]
    lines += ["| " + " | ".join(_md_cell(c) for c in r) + " |" for r in table.rows]
    if table.note:
        lines += ["", "*Note.* " + _md_cell(table.note)]
    return "\n".join(lines) + "\n"


def _tex_cell(text: str) -> str:
    out = latex_escape(text).replace("\\textless{} ", "$<$ ")
    return out.replace("\u2020", "\\textsuperscript{\\dag}").replace("\u2021", "\\textsuperscript{\\ddag}")


def table_latex(table: PaperTable) -> str:
    """A booktabs ``table`` float: caption, label ``tab:<name>``, tabular and note."""
    spec = "".join("r" if k < len(table.numeric) and table.numeric[k] else "l" for k in range(len(table.columns)))
    lines = [
        "% Requires \\usepackage{booktabs}",
        "\\begin{table}[htbp]",
        "\\centering",
        f"\\caption{{{_tex_cell(table.caption)}}}",
        f"\\label{{tab:{latex_escape(table.name)}}}",
        "\\small",
        f"\\begin{{tabular}}{{{spec}}}",
        "\\toprule",
        " & ".join(_tex_cell(c) for c in table.columns) + " \\\\",
        "\\midrule",
        *(" & ".join(_tex_cell(c) for c in r) + " \\\\" for r in table.rows),
        "\\bottomrule",
        "\\end{tabular}",
    ]
    if table.note:
        lines += ["", "\\par\\smallskip\\footnotesize\\textit{Note.} " + _tex_cell(table.note)]
    return "\n".join([*lines, "\\end{table}", ""])


def write_table(out_dir: Path, table: PaperTable) -> list[Path]:
    """Write one :class:`PaperTable` as CSV, Markdown and LaTeX; returns the three paths."""
    texts = (csv_text(table.columns, table.rows), table_markdown(table), table_latex(table))
    return write_texts(out_dir, table.files, texts)

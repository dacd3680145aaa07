"""The report: a self-contained HTML file, the same content in Markdown, and
publication tables of the stepwise results.

Front door: :func:`write_reports`. Files written into ``out_dir``:

``report.html``
    One self-contained page (images inlined as base64 PNG, no script, no network).
``report.md`` and ``figures/*.png``
    The same sections in Markdown, linking the figures written beside it.
``table_levels.csv``, ``table_levels.md``, ``table_levels.tex``
    The stepwise table (levels as rows) for papers (:mod:`invariance.report.tables`).
``table_<name>.csv``, ``.md``, ``.tex``
    The other paper tables, when the results have them: ``loadings`` (standardized, per
    group), ``latent`` (means, variances, covariances), ``paths`` (standardized paths and
    R²), ``flagged``, ``structural`` and ``structures`` (rival structures).

Sections, in order, are listed in :data:`invariance.report.registry.SECTIONS`; each is
one builder function, and a section whose data are absent is skipped. The keys read
from the results dict are documented in :mod:`invariance.report.inputs` and in each
builder's docstring.
"""

from __future__ import annotations

import re
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Mapping

import pandas as pd

from ..progress import Progress
from .formatting import estimator_label
from .inputs import display_results
from .parts import Figure, Section
from .registry import SECTIONS, build_sections
from .render import render_html, render_markdown
from .sections import ReportInput
from .paper_tables import estimate_tables
from .result_tables import result_tables
from .tables import LEVEL_TABLE_FILES, PaperTable, write_level_tables, write_table

__all__ = ["LEVEL_TABLE_FILES", "SECTIONS", "ReportInput", "build_report", "paper_tables", "write_reports"]

REPORT_HTML = "report.html"
REPORT_MD = "report.md"
FIGURE_DIR = "figures"


def _meta(inp: ReportInput) -> dict[str, Any]:
    from .. import __version__

    ctx = inp.context
    bits = []
    if ctx.get("data_file"):
        bits.append(f"Data: {Path(str(ctx['data_file'])).name}")
    if inp.groups:
        bits.append(f"{len(inp.groups)} groups")
    if inp.results.get("estimator"):
        bits.append(f"estimator {estimator_label(inp.results['estimator'])}")
    if ctx.get("created"):
        bits.append(f"run {ctx['created']}")
    return {
        "title": str(ctx.get("title") or inp.results.get("title") or "Measurement invariance report"),
        "subtitle": " \u00b7 ".join(bits),
        "version": __version__,
        "written": datetime.now(timezone.utc).isoformat(timespec="seconds"),
    }


def build_report(
    results: Mapping[str, Any],
    estimates: pd.DataFrame | None,
    context: Mapping[str, Any],
    *,
    progress: Progress | None = None,
) -> tuple[list[Section], dict[str, Any]]:
    """The report's sections and page metadata, without writing anything."""
    est = estimates if isinstance(estimates, pd.DataFrame) else pd.DataFrame()
    inp = ReportInput(results=display_results(results or {}), estimates=est, context=dict(context or {}))
    return build_sections(inp, progress=progress), _meta(inp)


def paper_tables(results: Mapping[str, Any], estimates: pd.DataFrame | None) -> list[PaperTable]:
    """Every paper table beyond the levels: loadings, latent, paths, flagged, structural, structures."""
    shown = display_results(results or {})
    return estimate_tables(shown, estimates) + result_tables(shown)


def _figures(sections: list[Section]) -> list[Figure]:
    return [p for s in sections for p in s.parts if isinstance(p, Figure)]


def write_reports(out_dir: Path, results: dict, estimates: pd.DataFrame, context: dict) -> list[Path]:
    """Write report.html, report.md (with its figures) and the publication tables.

    Parameters
    ----------
    out_dir
        Folder to write into (created if needed).
    results
        The results.json dict: ``estimator``, ``groups`` (group -> N used),
        ``reference_group``, ``levels``, ``flagged``, ``decision_rule`` and optional
        sections (see :mod:`invariance.report.inputs`).
    estimates
        All estimates, with columns level, group, parameter, variable, other, label, free,
        estimate, se, z, pvalue, std.
    context
        ``pipeline_text``, ``data_file``, ``data_sha256``, ``seed``, ``structure``,
        ``created``, ``quiet`` (no progress line when true), optional ``title``.

    Returns
    -------
    list of Path
        Every file written: report.html, report.md, the tables, the figures.
    """
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    quiet = bool((context or {}).get("quiet", False))
    with Progress(len(SECTIONS) + 3, label="report", quiet=quiet) as bar:
        sections, meta = build_report(results, estimates, context, progress=bar)
        figs = _figures(sections)
        written: list[Path] = []
        fig_paths: dict[str, str] = {}
        if figs:
            (out_dir / FIGURE_DIR).mkdir(exist_ok=True)
        for fig in figs:
            stem = re.sub(r"[^A-Za-z0-9-]+", "-", fig.name).strip("-") or "figure"
            name, k = f"{stem}.png", 2
            while f"{FIGURE_DIR}/{name}" in fig_paths.values():
                name, k = f"{stem}-{k}.png", k + 1
            path = out_dir / FIGURE_DIR / name
            path.write_bytes(fig.png)
            fig_paths[fig.name] = f"{FIGURE_DIR}/{name}"
            written.append(path)
        html = out_dir / REPORT_HTML
        html.write_text(render_html(sections, meta), encoding="utf-8")
        bar.update(note=REPORT_HTML)
        md = out_dir / REPORT_MD
        md.write_text(render_markdown(sections, meta, fig_paths), encoding="utf-8")
        bar.update(note=REPORT_MD)
        tables = write_level_tables(out_dir, results)
        for table in paper_tables(results, estimates):
            tables += write_table(out_dir, table)
        bar.update(note="tables")
    return [html, md, *tables, *written]

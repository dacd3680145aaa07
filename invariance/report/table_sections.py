"""Sections that show the paper tables: standardized loadings, structural paths,
structural invariance and rival structures (the same cells as the ``table_<name>`` files).

Keys read: ``structural``, ``structures``, ``structure_notes`` and the estimates.
"""

from __future__ import annotations

from typing import Any, Mapping

from .paper_tables import loadings_table, paths_table
from .parts import Bullets, Section, Table
from .result_tables import structural_table, structures_table
from .sections import ReportInput
from .tables import PaperTable

__all__ = ["section_loadings", "section_paths", "section_structural", "section_structures", "table_part"]


def table_part(table: PaperTable) -> Table:
    """The report part showing a paper table (caption above, note below)."""
    return Table(columns=table.columns, rows=table.rows, caption=table.caption, note=table.note,
                 numeric=table.numeric)


def _section(sid: str, title: str, table: PaperTable | None) -> Section | None:
    return None if table is None else Section(sid, title, (table_part(table),))


def section_loadings(inp: ReportInput) -> Section | None:
    """Standardized loadings per group (``table_loadings``)."""
    return _section("loadings", "Standardized loadings", loadings_table(inp.results, inp.estimates))


def section_paths(inp: ReportInput) -> Section | None:
    """Standardized structural paths per group and R² (``table_paths``)."""
    return _section("paths", "Structural paths", paths_table(inp.results, inp.estimates))


def section_structural(inp: ReportInput) -> Section | None:
    """Equal factor variances, covariances, means and paths (``table_structural``)."""
    return _section("structural", "Structural invariance", structural_table(inp.results))


def _other_notes(notes: Any) -> list[str]:
    """The comparison's notes, less those naming an equivalence (the table's note names them)."""
    if not isinstance(notes, Mapping):
        return []
    pairs = [e.get("structures") or [] for e in notes.get("equivalent") or [] if isinstance(e, Mapping)]
    heads = tuple(f"{p[0]} and {p[1]} are equivalent" for p in pairs if len(p) == 2)
    return [str(n) for n in notes.get("notes") or [] if not str(n).startswith(heads or ("\0",))]


def section_structures(inp: ReportInput) -> Section | None:
    """Rival structures per group and pooled (``table_structures``) and the comparison's notes."""
    sec = _section("structures", "Rival structures", structures_table(inp.results))
    extra = _other_notes(inp.results.get("structure_notes"))
    if sec is None or not extra:
        return sec
    return Section(sec.id, sec.title, (*sec.parts, Bullets(tuple(extra))))

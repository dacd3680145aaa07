"""Building blocks of a report section, rendered alike to HTML and Markdown.

A section is a title and a list of parts: :class:`Text`, :class:`Bullets`,
:class:`Table`, :class:`Figure` and :class:`Code`. Section builders produce parts; the
templates (``templates/part.html.j2`` and ``templates/part.md.j2``) render every part
type, so a new section needs no template of its own. :func:`generic_parts` turns any
JSON-like value (an optional results section whose layout the report does not know)
into tables and text.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Any, ClassVar, Mapping, Sequence

from .formatting import fmt_p, is_number

__all__ = [
    "Bullets",
    "Code",
    "Figure",
    "Section",
    "Table",
    "Text",
    "cell",
    "generic_parts",
]

MAX_ROWS = 200
MAX_CODE = 20000
#: Tables with more rows than this are folded (shown on request) so the results stay near the top.
FOLD_ROWS = 15


@dataclass(frozen=True)
class Text:
    """A paragraph. ``style``: ``p`` (plain), ``lead`` (summary), ``note``, ``caution``."""

    text: str
    style: str = "p"
    part: ClassVar[str] = "text"


@dataclass(frozen=True)
class Bullets:
    """A bullet list of plain-text items."""

    items: tuple[str, ...]
    part: ClassVar[str] = "bullets"


@dataclass(frozen=True)
class Table:
    """A table of plain-text cells.

    ``numeric`` marks right-aligned columns; ``row_styles`` (one per row, may be
    ``""``) lets templates shade rows (``holds``, ``fails``, ...); ``caption`` sits above
    and ``note`` below the table.
    """

    columns: tuple[str, ...]
    rows: tuple[tuple[str, ...], ...]
    caption: str = ""
    note: str = ""
    numeric: tuple[bool, ...] = ()
    row_styles: tuple[str, ...] = ()
    part: ClassVar[str] = "table"

    def is_numeric(self, k: int) -> bool:
        return k < len(self.numeric) and self.numeric[k]

    def row_style(self, k: int) -> str:
        return self.row_styles[k] if k < len(self.row_styles) else ""

    @property
    def folded(self) -> bool:
        """Whether the table is long enough to be folded (more than :data:`FOLD_ROWS` rows)."""
        return len(self.rows) > FOLD_ROWS


@dataclass(frozen=True)
class Figure:
    """A PNG image with its alternative text and caption.

    ``name`` is the file stem used when the figure is written beside report.md.
    """

    name: str
    png: bytes = field(repr=False)
    alt: str
    caption: str = ""
    part: ClassVar[str] = "figure"


@dataclass(frozen=True)
class Code:
    """Preformatted text (the pipeline file, long JSON)."""

    text: str
    language: str = ""
    part: ClassVar[str] = "code"


@dataclass(frozen=True)
class Section:
    """One numbered section of the report."""

    id: str
    title: str
    parts: tuple = ()


def cell(v: Any, *, digits: int = 3) -> str:
    """Plain text of one value in a table cell."""
    if v is None:
        return ""
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, float) or (is_number(v) and not isinstance(v, int)):
        v = float(v)
        if v != v:
            return ""
        return f"{v:.{digits}f}".replace("-", "\u2212")
    if isinstance(v, int):
        return str(v)
    if isinstance(v, (list, tuple)):
        return ", ".join(cell(x, digits=digits) for x in v)
    if isinstance(v, Mapping):
        return "; ".join(f"{k}: {cell(x, digits=digits)}" for k, x in v.items())
    return str(v)


def _scalar(v: Any) -> bool:
    return v is None or isinstance(v, (str, int, float, bool)) or (
        isinstance(v, (list, tuple)) and all(isinstance(x, (str, int, float, bool)) or x is None for x in v)
    )


def _flat(d: Mapping[str, Any], prefix: str = "") -> dict[str, Any]:
    """Flatten nested mappings one or two levels deep: {"H": {"a": 1}} -> {"H (a)": 1}."""
    out: dict[str, Any] = {}
    for k, v in d.items():
        key = f"{prefix} ({k})" if prefix else str(k)
        if isinstance(v, Mapping) and all(_scalar(x) for x in v.values()):
            out.update(_flat(v, key))
        else:
            out[key] = v
    return out


P_KEYS = ("p", "pvalue", "p_value", "p_adjusted", "p_adj", "p_holm", "p_bonferroni", "adjusted_pvalue", "lr_pvalue",
          "pvalue_scaled", "pvalue_normal")


def _pcell(col: str, v: Any) -> str:
    """Cells of p-value columns read ``< .001``; everything else as :func:`cell`."""
    if col.split(" (")[0].lower() in P_KEYS and is_number(v):
        return fmt_p(v)
    return cell(v)


def _rename(col: str, names: Mapping[str, str]) -> str:
    head, sep, rest = col.partition(" (")
    return names.get(col) or (names.get(head, head) + sep + rest)


def records_table(records: Sequence[Mapping[str, Any]], *, caption: str = "", first: str | None = None,
                  names: Mapping[str, str] | None = None, note: str = "") -> Table:
    """A table from a list of flat-ish records (columns: the union of keys, in first-seen order)."""
    flat = [_flat(r) for r in records[:MAX_ROWS]]
    cols: list[str] = [first] if first else []
    for r in flat:
        for k in r:
            if k not in cols:
                cols.append(k)
    names = names or {}
    rows = tuple(tuple(_pcell(c, r.get(c)) for c in cols) for r in flat)
    numeric = tuple(
        all(is_number(r.get(c)) or r.get(c) is None for r in flat) and any(is_number(r.get(c)) for r in flat)
        for c in cols
    )
    extra = f" (first {MAX_ROWS} of {len(records)} rows)" if len(records) > MAX_ROWS else ""
    return Table(
        columns=tuple(_rename(c, names) for c in cols),
        rows=rows,
        caption=caption + extra,
        note=note,
        numeric=numeric,
    )


def generic_parts(obj: Any, *, key_name: str = "name") -> list:
    """Parts showing any JSON-like value: tables for records, text for strings."""
    if obj is None:
        return []
    if isinstance(obj, str):
        return [Text(obj)]
    if is_number(obj) or isinstance(obj, bool):
        return [Text(cell(obj))]
    if isinstance(obj, Mapping):
        if not obj:
            return []
        if all(_scalar(v) for v in obj.values()):
            return [Table(columns=("item", "value"), rows=tuple((str(k), cell(v)) for k, v in obj.items()),
                          numeric=(False, True))]
        if all(isinstance(v, Mapping) for v in obj.values()):
            recs = [{key_name: k, **_flat(v)} for k, v in obj.items()]
            if all(all(_scalar(x) for x in r.values()) for r in recs):
                return [records_table(recs, first=key_name)]
        parts: list = []
        scalars = {k: v for k, v in obj.items() if _scalar(v)}
        if scalars:
            parts += generic_parts(scalars, key_name=key_name)
        for k, v in obj.items():
            if k in scalars:
                continue
            sub = generic_parts(v, key_name=key_name)
            if sub:
                parts.append(Text(str(k), style="note"))
                parts += sub
        return parts
    if isinstance(obj, (list, tuple)):
        if not obj:
            return []
        if all(isinstance(x, Mapping) for x in obj):
            recs = [_flat(x) for x in obj]
            if all(all(_scalar(v) for v in r.values()) for r in recs):
                return [records_table(recs)]
        if all(_scalar(x) for x in obj):
            return [Bullets(tuple(cell(x) for x in obj[:MAX_ROWS]))]
    text = json.dumps(obj, indent=2, default=str)
    if len(text) > MAX_CODE:
        text = text[:MAX_CODE] + "\n... (cut)"
    return [Code(text, language="json")]

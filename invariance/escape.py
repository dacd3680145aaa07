"""Making user text safe in every output: terminal, Markdown, HTML, LaTeX and CSV.

Labels come from the user's pipeline and data (items, factors, groups, titles). Before
they reach an output:

* control characters (C0, DEL, C1) and the bidirectional-override characters are shown
  as escapes such as ``\\x1b`` (:func:`visible`), so a label can neither drive a terminal
  nor break a Markdown, HTML or LaTeX file; the terminal keeps its line breaks and tabs
  (:func:`terminal_text`);
* a CSV cell that begins with ``=``, ``+``, ``-``, ``@``, a tab or a carriage return is
  prefixed with an apostrophe (:func:`csv_cell`), so a spreadsheet shows it as text
  instead of running it as a formula (common practice, after the OWASP advice on CSV
  injection). Numbers are never changed.
"""

from __future__ import annotations

import pathlib
import re
from typing import Any
from pandas.api.types import is_bool_dtype, is_numeric_dtype

__all__ = ["visible", "terminal_text", "csv_cell", "csv_safe_frame", "write_csv"]

_CONTROL = re.compile("[\x00-\x1f\x7f-\x9f\u200e\u200f\u202a-\u202e\u2066-\u2069]")
_CONTROL_TERMINAL = re.compile("[\x00-\x08\x0b-\x1f\x7f-\x9f\u200e\u200f\u202a-\u202e\u2066-\u2069]")
_FORMULA_START = ("=", "+", "-", "@")


def _escape(match: re.Match) -> str:
    code = ord(match.group(0))
    return f"\\x{code:02x}" if code < 0x100 else f"\\u{code:04x}"


def visible(text: Any) -> str:
    """``text`` with every control character shown as an escape (``\\x1b``, ``\\u202e``)."""
    return _CONTROL.sub(_escape, str(text))


def terminal_text(text: Any) -> str:
    """Like :func:`visible`, but line breaks and tabs stay (text printed on a terminal)."""
    return _CONTROL_TERMINAL.sub(_escape, str(text))


def csv_cell(value: Any) -> Any:
    """A CSV cell value: text made :func:`visible` and kept from being read as a formula."""
    if not isinstance(value, str):
        return value
    text = visible(value)  # a leading tab or carriage return becomes \x09 / \x0d
    if not text.startswith(_FORMULA_START) or _is_number(text):
        return text
    return "'" + text


def _is_number(text: str) -> bool:
    """A signed number written as text (``-0.012``) is shown as written, not prefixed."""
    try:
        float(text)
    except ValueError:
        return False
    return True


def csv_safe_frame(frame):
    """A copy of a DataFrame whose text cells and column names pass :func:`csv_cell`."""

    out = frame.copy()
    for k in range(out.shape[1]):
        col = out.iloc[:, k]
        if not (is_numeric_dtype(col.dtype) or is_bool_dtype(col.dtype)):
            out.isetitem(k, col.astype(object).map(csv_cell))
    out.columns = [csv_cell(str(c)) if isinstance(c, str) else c for c in out.columns]
    return out


def write_csv(frame, path: pathlib.Path) -> pathlib.Path:
    """Write a DataFrame as CSV (no index) with every text cell made safe."""
    path = pathlib.Path(path)
    csv_safe_frame(frame).to_csv(path, index=False)
    return path

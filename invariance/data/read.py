"""Reading data files into a pandas DataFrame, with missing-value codes applied.

Formats are chosen from the file suffix (or given explicitly): comma-separated
(``.csv``), tab-separated (``.tsv``, ``.tab``), Stata (``.dta``, through pandas),
SPSS (``.sav``, ``.zsav``, through the optional ``spss`` extra, which installs
pyreadstat) and Excel workbooks (``.xlsx``, ``.xlsm``, through pandas with openpyxl:
the first sheet, or the one named by ``sheet``).
"""

from __future__ import annotations

import csv
import hashlib
import pathlib
from typing import Mapping, Sequence

import numpy as np

import pandas as pd

from ..errors import DataError, SpecificationError, shorten

__all__ = ["FORMATS", "NA_TEXTS", "read_table", "apply_missing", "file_sha256", "guess_format"]

#: Known formats and the suffixes that select them.
FORMATS = {
    "csv": (".csv",),
    "tsv": (".tsv", ".tab"),
    "stata": (".dta",),
    "spss": (".sav", ".zsav"),
    "excel": (".xlsx", ".xlsm"),
}


def guess_format(path: pathlib.Path) -> str:
    """Format name from a file suffix."""
    suffix = path.suffix.lower()
    for name, suffixes in FORMATS.items():
        if suffix in suffixes:
            return name
    raise SpecificationError(
        f"Cannot tell the format of data file {path.name!r} from its suffix; use .csv, .tsv, "
        f".dta, .sav or .xlsx, or set data.format to one of {', '.join(FORMATS)}."
    )


def file_sha256(path: pathlib.Path) -> str:
    """SHA-256 of a file's bytes (recorded so a run can be traced to its data)."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


#: Cell texts read as missing in item columns (pandas' default list). A group column keeps
#: them as labels: a group called NA, None or null stays a group.
NA_TEXTS = (
    "", "#N/A", "#N/A N/A", "#NA", "-1.#IND", "-1.#QNAN", "-NaN", "-nan", "1.#IND", "1.#QNAN",
    "<NA>", "N/A", "NA", "NULL", "NaN", "None", "n/a", "nan", "null",
)
_SEPARATORS = {",": "comma", ";": "semicolon", "\t": "tab", "|": "vertical bar"}


def _read_excel(path: pathlib.Path, sheet: str | int | None, text_columns: Sequence[str] = ()):
    """One sheet of an Excel workbook (the first when ``sheet`` is None)."""

    with pd.ExcelFile(path, engine="openpyxl") as book:
        names = [str(n) for n in book.sheet_names]
        if sheet is None:
            sheet = 0
        if isinstance(sheet, int) and not 0 <= sheet < len(names):
            raise DataError(
                f"Data file {path.name!r} has {len(names)} sheet(s), so there is no sheet {sheet}; "
                f"set data.sheet to a position from 0 to {len(names) - 1} or to a name: {', '.join(names)}."
            )
        if isinstance(sheet, str) and sheet not in names:
            raise DataError(
                f"Data file {path.name!r} has no sheet {sheet!r}; set data.sheet to one of: {', '.join(names)}."
            )
        header = pd.read_excel(book, sheet_name=sheet, header=None, nrows=1).iloc[0].tolist()
        header = [h for h in header if not (isinstance(h, float) and h != h)]
        na = _na_values(path, header, text_columns)
        return pd.read_excel(book, sheet_name=sheet, keep_default_na=False, na_values=na)


def read_table(
    path: str | pathlib.Path, *, format: str | None = None, sheet: str | int | None = None,
    text_columns: Sequence[str] = (),
):
    """Read a data file into a DataFrame.

    Parameters
    ----------
    path
        The data file.
    format
        ``csv``, ``tsv``, ``stata``, ``spss`` or ``excel``; guessed from the suffix when omitted.
    sheet
        Excel workbooks only: the sheet, by name or 0-based position (default the first).
    text_columns
        Columns (the group column) whose cells are labels: only an empty cell is missing
        there, so a group labelled NA, None or null is kept (CSV, TSV and Excel files).

    Returns
    -------
    pandas.DataFrame
        Column names stripped of surrounding spaces. A header naming a column twice, or
        a delimited file whose first line shows another separator than its format's,
        is refused.
    """
    path = pathlib.Path(path)
    _check_path(path)
    fmt = format or guess_format(path)
    if sheet is not None and fmt != "excel":
        raise SpecificationError(f"data.sheet applies to Excel workbooks only, and {path.name!r} is read as {fmt}; remove data.sheet.")
    try:
        frame = _read_format(path, fmt, sheet=sheet, text_columns=text_columns)
    except InvarianceErrorTypes:
        raise
    except Exception as exc:  # parser errors of every reader
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise DataError(
            f"Cannot read data file {shorten(path.name)} as {fmt}: {first[:200]}; check the file and its format."
        ) from None
    if frame.shape[1] == 0 or frame.shape[0] == 0:
        raise DataError(f"Data file {shorten(path.name)} has no rows or no columns; check the file.")
    frame.columns = [str(c).strip() for c in frame.columns]
    return frame


def _check_path(path: pathlib.Path) -> None:
    """Refuse a data path that is a folder or does not exist."""
    if path.is_dir():
        raise DataError(
            f"Data path {shorten(str(path))} is a folder, not a file; set data.path to the data file inside it."
        )
    if not path.is_file():
        raise DataError(f"Data file {shorten(str(path))} does not exist; check data.path (relative to the pipeline file).")


def _read_format(path: pathlib.Path, fmt: str, *, sheet: str | int | None, text_columns: Sequence[str]):
    """The file read by the reader of ``fmt``; an unknown format is refused."""

    if fmt in ("csv", "tsv"):
        return _read_delimited(path, fmt, text_columns)
    if fmt == "stata":
        return pd.read_stata(path, convert_categoricals=False)
    if fmt == "spss":
        try:
            import pyreadstat  # noqa: F401  (the optional `spss` extra)
        except ImportError:
            raise DataError(
                "Reading SPSS files needs the optional extra 'spss'; install it with "
                "pip install 'invariance[spss]' or save the data as CSV."
            ) from None
        return pd.read_spss(path, convert_categoricals=False)
    if fmt == "excel":
        return _read_excel(path, sheet, text_columns)
    raise SpecificationError(f"Unknown data format {fmt!r}; use one of {', '.join(FORMATS)}.")


def _header(path: pathlib.Path, sep: str) -> list[str]:
    """The first line of a delimited file, split on ``sep``."""
    with open(path, newline="", encoding="utf-8-sig", errors="replace") as fh:
        first = next(csv.reader(fh, delimiter=sep), [])
        return first


def _refuse_other_separator(path: pathlib.Path, fmt: str, sep: str, header: list[str]) -> None:
    line = sep.join(header)
    if len(header) > 1:
        return
    seen = [c for c in _SEPARATORS if c != sep and c in line]
    if not seen:
        return
    other = seen[0]
    fix = ("set data.format: tsv (or rename the file .tsv)" if other == "\t"
           else "set data.format: csv (or rename the file .csv)" if other == ","
           else "save it comma-separated")
    raise DataError(
        f"Data file {shorten(path.name)} is read as {fmt} ({_SEPARATORS[sep]}-separated) but its first line looks "
        f"{_SEPARATORS[other]}-separated; {fix}."
    )


def _read_delimited(path: pathlib.Path, fmt: str, text_columns: Sequence[str]):
    """A CSV or TSV file: the texts of :data:`NA_TEXTS` are missing, but in a text column
    only an empty cell is."""
    sep = "," if fmt == "csv" else "\t"
    header = _header(path, sep)
    _refuse_other_separator(path, fmt, sep, header)
    na = _na_values(path, header, text_columns)
    # One list of missing texts for every column reads about twice as fast as a list per
    # column; a text column that came back with a missing cell is read again on its own
    # with its own rule (only an empty cell is missing), so the result is the same.
    frame = pd.read_csv(path, sep=sep, keep_default_na=False, na_values=list(NA_TEXTS))
    if list(frame.columns) != list(header):  # names pandas made up: per-column rules as given
        return pd.read_csv(path, sep=sep, keep_default_na=False, na_values=na)
    text = [c for c in frame.columns if na[c] == [""] and frame[c].count() < frame.shape[0]]
    if text:
        again = pd.read_csv(path, sep=sep, keep_default_na=False, usecols=text, na_values={c: [""] for c in text})
        for c in text:
            frame[c] = again[c]
    return frame


def _na_values(path: pathlib.Path, header: Sequence, text_columns: Sequence[str]) -> dict:
    """Per-column missing-value texts for pandas (a header naming a column twice is refused)."""
    names = [str(h).strip() for h in header]
    twice = sorted({n for n in names if names.count(n) > 1})
    if twice:
        raise DataError(
            f"Data file {shorten(path.name)} names column {shorten(twice[0])} twice in its header; "
            "rename one of them so each column has its own name."
        )
    keep = {str(c) for c in text_columns}
    return {raw: ([""] if str(raw).strip() in keep else list(NA_TEXTS)) for raw in header}


InvarianceErrorTypes = (DataError, SpecificationError)


def apply_missing(frame, missing: Sequence[float] | Mapping[str, Sequence[float]] | None):
    """Replace missing-value codes by NaN.

    Parameters
    ----------
    frame
        The data (not modified).
    missing
        A list of codes that mean "missing" in every column, or a mapping
        column -> codes for that column only.

    Returns
    -------
    pandas.DataFrame
        A copy with the codes replaced; ``frame`` itself when there are no codes
        (nothing to replace, so no copy of the data).
    """
    if not missing:
        return frame
    out = frame.copy()
    if isinstance(missing, Mapping):
        for col, codes in missing.items():
            if col not in out.columns:
                raise DataError(
                    f"data.missing names column {col!r}, which is not in the data; check the spelling."
                )
            out[col] = _replace(out[col], codes)
    else:
        for col in out.columns:
            out[col] = _replace(out[col], missing)
    return out


def _replace(series, codes):
    codes = list(codes)
    num = [c for c in codes if isinstance(c, (int, float)) and not isinstance(c, bool)]
    txt = {str(c) for c in codes}
    mask = series.isin(num) | series.astype(str).str.strip().isin(txt)
    if mask.any():
        series = series.mask(mask, np.nan)
    return series

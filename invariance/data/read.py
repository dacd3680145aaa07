"""Reading data files into a pandas DataFrame, with missing-value codes applied.

Formats are chosen from the file suffix (or given explicitly): comma-separated
(``.csv``), tab-separated (``.tsv``, ``.tab``), Stata (``.dta``, through pandas),
SPSS (``.sav``, ``.zsav``, through the optional ``spss`` extra, which installs
pyreadstat) and Excel workbooks (``.xlsx``, ``.xlsm``, through pandas with openpyxl:
the first sheet, or the one named by ``sheet``).
"""

from __future__ import annotations

import hashlib
import pathlib
from typing import Mapping, Sequence

import numpy as np

from ..errors import DataError, SpecificationError

__all__ = ["FORMATS", "read_table", "apply_missing", "file_sha256", "guess_format"]

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


def _read_excel(path: pathlib.Path, sheet: str | int | None):
    """One sheet of an Excel workbook (the first when ``sheet`` is None)."""
    import pandas as pd

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
        return pd.read_excel(book, sheet_name=sheet)


def read_table(path: str | pathlib.Path, *, format: str | None = None, sheet: str | int | None = None):
    """Read a data file into a DataFrame.

    Parameters
    ----------
    path
        The data file.
    format
        ``csv``, ``tsv``, ``stata``, ``spss`` or ``excel``; guessed from the suffix when omitted.
    sheet
        Excel workbooks only: the sheet, by name or 0-based position (default the first).

    Returns
    -------
    pandas.DataFrame
    """
    import pandas as pd

    path = pathlib.Path(path)
    if not path.is_file():
        raise DataError(f"Data file {str(path)!r} does not exist; check data.path (relative to the pipeline file).")
    fmt = format or guess_format(path)
    if sheet is not None and fmt != "excel":
        raise SpecificationError(f"data.sheet applies to Excel workbooks only, and {path.name!r} is read as {fmt}; remove data.sheet.")
    try:
        if fmt == "csv":
            frame = pd.read_csv(path)
        elif fmt == "tsv":
            frame = pd.read_csv(path, sep="\t")
        elif fmt == "stata":
            frame = pd.read_stata(path, convert_categoricals=False)
        elif fmt == "spss":
            try:
                import pyreadstat  # noqa: F401
            except ImportError:
                raise DataError(
                    "Reading SPSS files needs the optional extra 'spss'; install it with "
                    "pip install 'invariance[spss]' or save the data as CSV."
                ) from None
            frame = pd.read_spss(path, convert_categoricals=False)
        elif fmt == "excel":
            frame = _read_excel(path, sheet)
        else:
            raise SpecificationError(f"Unknown data format {fmt!r}; use one of {', '.join(FORMATS)}.")
    except InvarianceErrorTypes:
        raise
    except Exception as exc:  # parser errors of every reader
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise DataError(f"Cannot read data file {path.name!r} as {fmt}: {first}; check the file and its format.") from None
    if frame.shape[1] == 0 or frame.shape[0] == 0:
        raise DataError(f"Data file {path.name!r} has no rows or no columns; check the file.")
    frame.columns = [str(c).strip() for c in frame.columns]
    return frame


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
        A copy with the codes replaced.
    """
    if not missing:
        return frame.copy()
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

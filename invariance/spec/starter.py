"""A starter pipeline written from a data file's columns (``invariance new``)."""

from __future__ import annotations

import os
import pathlib

import yaml

from ..data.checks import far_out_values
from ..data.read import read_table
from ..errors import DataError, SpecificationError

__all__ = ["starter_pipeline"]


def _looks_like_id(series) -> bool:
    name = str(series.name).lower()
    if name in ("id", "respondent", "case", "caseid", "row") or name.endswith("_id"):
        return True
    return bool(series.notna().all() and series.is_unique and series.dtype.kind in "iu")


def starter_pipeline(data: str | pathlib.Path, *, group: str, out: str | pathlib.Path | None = None) -> str:
    """Write (or return) a starter pipeline for ``data`` grouped by ``group``.

    Every numeric column other than the group column and identifier-like columns
    becomes an item of one factor; edit the factors before running.

    Parameters
    ----------
    data
        The data file.
    group
        The grouping column.
    out
        Pipeline file to write; it must not exist yet. ``None`` only returns the text.

    Returns
    -------
    str
        The pipeline YAML.
    """
    data = pathlib.Path(data)
    frame = read_table(data, text_columns=(group,))
    items = _item_columns(frame, data, group)
    if out is not None:
        out = pathlib.Path(out)
        if out.exists():
            raise SpecificationError(f"{out} already exists; choose another file name or delete it first.")
        rel = os.path.relpath(data.resolve(), out.resolve().parent)
    else:
        rel = str(data)
    codes = sorted({v for c in items for v in far_out_values(frame[c].to_numpy(dtype=float))})
    codes = [int(v) if float(v).is_integer() else v for v in codes]
    text = _starter_text(_starter_body(data, group=group, rel=rel, items=items, codes=codes), codes)
    if out is not None:
        out.parent.mkdir(parents=True, exist_ok=True)
        out.write_text(text, encoding="utf-8")
    return text


def _item_columns(frame, data: pathlib.Path, group: str) -> list[str]:
    """Numeric columns other than the group column and identifier-like ones (at least three)."""
    if group not in frame.columns:
        raise DataError(
            f"Group column {group!r} is not in {data.name}; the columns are {', '.join(map(str, frame.columns[:12]))}"
            + (" ..." if frame.shape[1] > 12 else "")
        )
    items = [
        c for c in frame.columns
        if c != group and frame[c].dtype.kind in "iuf" and not _looks_like_id(frame[c])
    ]
    if len(items) < 3:
        raise DataError(
            f"{data.name} has {len(items)} numeric item columns besides {group!r}; a factor model needs at least three."
        )
    return items


def _starter_body(data: pathlib.Path, *, group: str, rel: str, items: list[str], codes: list) -> dict:
    """The starter pipeline document: one factor over every item, the default decision rule."""
    return {
        "title": f"{data.stem} by {group}",
        "data": {"path": rel, "group": group, "missing": codes},
        "model": {"factors": {"factor1": items}},
        "estimator": "ml",
        "levels": ["configural", "metric", "scalar", "strict"],
        "decision": {"criteria": ["cfi", "rmsea"], "cutoffs": "chen2007", "alpha": 0.05, "stop_at_failure": True},
        "output": {"folder": f"results/{data.stem}_by_{group}"},
        "seed": None,
    }


def _starter_text(body: dict, codes: list) -> str:
    """The document as YAML under a comment header on what to edit."""
    return (
        "# Starter pipeline written by `invariance new`. Edit model.factors (factor -> items);\n"
        "# add model.general for a general factor over all items (bifactor model).\n"
        "# data.missing lists codes meaning 'missing' (or give column -> codes).\n"
        + (f"# data.missing was filled with {', '.join(map(str, codes))}: values far outside the items' other values\n"
           "# (missing-value codes, as it looks); delete any that is a real answer.\n" if codes else "")
        + yaml.safe_dump(body, sort_keys=False, default_flow_style=None, width=100)
    )

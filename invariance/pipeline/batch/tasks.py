"""Task functions for the batch runner.

Every task function is module level (importable on remote workers), takes keyword
arguments and the runner's ``seed``, and returns plain types.
"""

from __future__ import annotations

import copy
import itertools
from pathlib import Path
from typing import Any, Mapping, Sequence

import yaml

from ...errors import SpecificationError
from ..runner import run as run_pipeline
from .runner import highest_level

__all__ = ["pipeline_task", "summarize_results", "pipeline_variants", "parse_vary"]


def summarize_results(results: Mapping[str, Any]) -> dict:
    """The batch summary of one pipeline's results.json content.

    Keeps each level's ``level`` and ``decision``, the flagged items, the highest level
    supported (the run's ``supported_level``, else the end of an unbroken run of
    ``holds`` / ``holds_partially`` decisions; ``"none"`` when not even configural holds)
    and whether it holds only partially (the run's ``supported_partially``).
    """
    levels = [{"level": lv.get("level"), "decision": lv.get("decision")} for lv in results.get("levels", [])]
    best = results["supported_level"] if "supported_level" in results else highest_level(levels)
    return {"levels": levels, "flagged": list(results.get("flagged", []) or []), "highest_level": best or "none",
            "supported_partially": results.get("supported_partially")}


def pipeline_task(*, pipeline, out: str | Path, seed: int = 0) -> dict:
    """Run one pipeline (a mapping or a file path) into the folder ``out``.

    Calls ``invariance.run(pipeline, out=out, quiet=True)``; the folder gets the same
    files as a single run. Returns :func:`summarize_results` of the result plus ``out``.
    """
    result = run_pipeline(pipeline, out=str(out), quiet=True)
    summary = summarize_results(result.to_dict())
    summary["out"] = str(out)
    return summary


#: data keys that name groups of the grouping column.
GROUP_BOUND = ("reference", "groups")


def parse_vary(items: Sequence[str]) -> dict[str, list[str]]:
    """``["data.group=site,occupation"]`` -> ``{"data.group": ["site", "region"]}``."""
    out: dict[str, list[str]] = {}
    for text in items:
        key, sep, values = text.partition("=")
        vals = [v.strip() for v in values.split(",") if v.strip()]
        if not sep or not key.strip() or not vals:
            raise SpecificationError(
                f"A variation must read KEY=VALUE,VALUE (for example data.group=site,occupation); got {text!r}."
            )
        out[key.strip()] = vals
    return out


def pipeline_variants(path: str | Path, vary: Mapping[str, Sequence[str]]) -> list[tuple[str, dict]]:
    """One pipeline file expanded over values of some of its keys (every combination).

    Keys are dotted paths into the pipeline (``data.group``, ``data.reference``,
    ``estimator``). The data path is made absolute (it is relative to the pipeline
    file) and ``output.folder`` is dropped, since the batch gives every variant its
    own folder. Varying ``data.group`` drops ``data.reference`` and ``data.groups``
    (they name groups of one column; each variant then uses its column's defaults)
    unless they are varied too. Returns ``(name, pipeline dict)`` pairs; names join the
    file stem and the values.
    """

    path = Path(path)
    if not path.is_file():
        raise SpecificationError(f"The pipeline file {str(path)!r} does not exist; check the path.")
    base = yaml.safe_load(path.read_text()) or {}
    if not isinstance(base, Mapping):
        raise SpecificationError(f"The pipeline file {path.name} must hold a mapping at the top level.")
    data = base.get("data")
    if isinstance(data, Mapping) and isinstance(data.get("path"), str):
        base = dict(base)
        base["data"] = dict(data, path=str((path.parent / data["path"]).resolve()))
    if isinstance(base.get("output"), Mapping):
        base["output"] = {k: v for k, v in base["output"].items() if k != "folder"}
        if not base["output"]:
            del base["output"]
    keys = list(vary)
    if "data.group" in vary and isinstance(base.get("data"), Mapping):
        # the reference and the group list name groups of one grouping column: with another
        # column they would not exist, so each variant takes its own (unless they are varied too)
        drop = {k for k in GROUP_BOUND if f"data.{k}" not in vary}
        base["data"] = {k: v for k, v in base["data"].items() if k not in drop}
    out = []
    for combo in itertools.product(*(vary[k] for k in keys)):
        doc = copy.deepcopy(base)
        for key, value in zip(keys, combo):
            node = doc
            parts = key.split(".")
            for part in parts[:-1]:
                nxt = node.get(part)
                if nxt is None:
                    nxt = node[part] = {}
                if not isinstance(nxt, dict):
                    raise SpecificationError(f"Cannot vary {key!r}: {part!r} in {path.name} is not a mapping.")
                node = nxt
            node[parts[-1]] = value
        name = "-".join([path.stem, *[str(v) for v in combo]]) if keys else path.stem
        out.append((name, doc))
    return out

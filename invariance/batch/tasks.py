"""Task functions for the batch runner.

Every task function is module level (importable on remote workers), takes keyword
arguments and the runner's ``seed``, and returns plain types.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Mapping

from ..errors import SpecificationError
from .runner import highest_level

__all__ = ["pipeline_task", "summarize_results"]


def summarize_results(results: Mapping[str, Any]) -> dict:
    """The batch summary of one pipeline's results.json content.

    Keeps each level's ``level`` and ``decision``, the flagged items, and the highest
    level supported (an unbroken run of ``holds`` / ``holds_partially`` decisions).
    """
    levels = [{"level": lv.get("level"), "decision": lv.get("decision")} for lv in results.get("levels", [])]
    return {"levels": levels, "flagged": list(results.get("flagged", []) or []), "highest_level": highest_level(levels)}


def pipeline_task(*, pipeline, out: str | Path, seed: int = 0) -> dict:
    """Run one pipeline (a mapping or a file path) into the folder ``out``.

    Calls ``invariance.run(pipeline, out=out, quiet=True)``; the folder gets the same
    files as a single run. Returns :func:`summarize_results` of the result plus ``out``.
    """
    import invariance

    runner = getattr(invariance, "run", None)
    if runner is None:
        raise SpecificationError(
            "Pipeline tasks need invariance.run (the pipeline runner), which this installation lacks; "
            "update the package."
        )
    result = runner(pipeline, out=str(out), quiet=True)
    summary = summarize_results(result.to_dict())
    summary["out"] = str(out)
    return summary

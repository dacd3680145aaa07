"""What the stages of one run hand on to each other: a frozen :class:`RunState`.

A stage is ``stage(spec, state) -> (results, state)``: it reads the fields earlier stages
filled, returns the part of results.json it adds (plain JSON values) and a new state
made with :meth:`RunState.update` (the old one is never changed). Every field is read by
a later stage or by the runner; a stage added later keeps its own objects in ``extra``.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from types import MappingProxyType
from typing import Any, Callable, Mapping

from ..data.checks import CheckedData
from ..estimate.interface import Estimator
from ..estimate.result import FitResult
from ..model.levels import LevelBuilder
from ..model.spec import ModelSpec
from ..partial.search import SearchResult
from ..spec.load import PipelineSpec

__all__ = ["RunState", "Stage", "StageOutput"]

def _empty() -> Mapping:
    return MappingProxyType({})


@dataclass(frozen=True)
class RunState:
    """The objects of one run, filled stage by stage.

    Attributes
    ----------
    executor
        ``map``-capable executor for the release search's refits (``None``: serial).
    checked, frame, reference
        The checked data, every column of the data (identifiers for scores), the
        reference group (stage ``data``).
    estimator
        The run's :class:`~invariance.estimate.interface.Estimator` (stage ``data``).
    stats
        Per-group statistics (stage ``stats``).
    builder, models
        The :class:`~invariance.model.levels.LevelBuilder` and level -> model (stage ``levels``).
    fits, level_rows, searches
        Level -> fit, the level rows of results.json and the release searches (stage ``fits``).
    supported_level
        The highest level that holds, fully or partially (stage ``fits``, computed once by
        :func:`invariance.decide.verdict.supported_level`); every later stage reads it.
    scores_table
        Factor scores per case (stage ``scores``; written to scores.csv).
    warnings
        Messages for results.json, in order.
    extra
        Name -> object, for stages added later.
    """

    executor: Any = None
    checked: CheckedData | None = None
    frame: Any = None
    reference: str | None = None
    estimator: Estimator | None = None
    stats: Any = None
    builder: LevelBuilder | None = None
    models: Mapping[str, ModelSpec] = field(default_factory=_empty)
    fits: Mapping[str, FitResult] = field(default_factory=_empty)
    level_rows: tuple[dict, ...] = ()
    searches: tuple[SearchResult, ...] = ()
    supported_level: str | None = None
    scores_table: Any = None
    warnings: tuple[str, ...] = ()
    extra: Mapping[str, Any] = field(default_factory=_empty)

    def update(self, **changes) -> "RunState":
        """A copy with ``changes`` (mappings are frozen, sequences made tuples)."""
        for k in ("models", "fits", "extra"):
            if k in changes:
                changes[k] = MappingProxyType(dict(changes[k]))
        for k in ("level_rows", "searches", "warnings"):
            if k in changes:
                changes[k] = tuple(changes[k])
        return replace(self, **changes)

    def warn(self, *messages: str) -> "RunState":
        """A copy with ``messages`` added to the warnings."""
        return replace(self, warnings=self.warnings + tuple(messages)) if messages else self


#: What a stage returns: its part of results.json and the new state.
StageOutput = tuple[dict, RunState]
#: A stage of a run.
Stage = Callable[[PipelineSpec, RunState], StageOutput]

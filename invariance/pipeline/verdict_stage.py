"""The summary stage: the run's one verdict (:mod:`invariance.decide.verdict`).

Runs after the level fits and the effects stage; reads the level rows, the final fit of
the supported level (to locate the groups each released parameter differs in), the
effects stage's ``scale_bias`` (from the results so far, ``state.extra["results"]``, a
read-only view the runner keeps) and the pipeline options, and leaves the frozen
:class:`~invariance.decide.verdict.Verdict` in ``state.extra["verdict"]``.
"""

from __future__ import annotations

from typing import Mapping, Sequence

from ..decide.verdict import build_verdict, calibration_note
from ..partial.locate import differs_in
from ..spec.load import PipelineSpec
from .state import RunState, StageOutput

__all__ = ["stage_summary"]


def _sample_note(spec: PipelineSpec, state: RunState) -> list[str]:
    """Chen (2007) recommends the small-sample cutoffs for N <= 300 or unbalanced groups."""
    n_total = state.stats.n_total
    ns = [g.n for g in state.stats.groups]
    if spec.rule.source.startswith("Chen (2007) cutoffs for total N > 300") and (
        n_total <= 300 or max(ns) > 1.5 * min(ns)
    ):
        return [
            f"total N = {n_total}, group sizes {min(ns)} to {max(ns)}: Chen (2007) recommends the "
            "small-sample cutoffs when N <= 300 or groups are unbalanced (here: the largest group more "
            "than 1.5 times the smallest): consider decision.cutoffs: chen2007_small"
        ]
    return []


def _located(rows: Sequence[Mapping], best: str | None, fits: Mapping) -> dict[tuple, tuple[str, ...]]:
    """(parameter, item, factor) -> the groups each release of the supported level differs in."""
    fit = fits.get(best)
    row = next((r for r in rows if r.get("level") == best), None)
    if fit is None or row is None:
        return {}
    out = {}
    for x in row.get("released") or ():
        where = differs_in(fit, x)
        if where is not None:
            out[(x.get("parameter"), x.get("item"), x.get("factor"))] = where
    return out


def stage_summary(spec: PipelineSpec, state: RunState) -> StageOutput:
    """Say which level the data support, how fully, and what group comparisons it permits
    (the one :class:`~invariance.decide.verdict.Verdict` of the run, also left in
    ``state.extra["verdict"]``)."""
    rows = state.level_rows
    done = state.extra.get("results", {})
    verdict = build_verdict(
        rows,
        up_front=[r.to_dict() for r in spec.released],
        scales=spec.structure.measured_by,
        scale_bias=done.get("scale_bias") or (),
        reference=state.reference,
        differs=_located(rows, state.supported_level, state.fits),
        calibration=calibration_note(spec.rule, estimator=spec.estimator, ordinal=spec.ordinal is not None),
        partial_enabled=spec.partial.enabled,
    )
    out = {**verdict.to_dict(), "decision_rule": spec.rule.to_dict(), "stop_at_failure": spec.stop_at_failure}
    state = state.update(extra={**state.extra, "verdict": verdict})
    return out, state.warn(*_sample_note(spec, state))

"""The summary stage: the run's one verdict (:mod:`invariance.decide.verdict`).

Runs after the level fits and the effects stage; reads the level rows, the final fit of
the supported level (to locate the groups each released parameter differs in), the
effects stage's ``scale_bias`` and the pipeline options, and leaves the frozen
:class:`~invariance.decide.verdict.Verdict` in ``state["verdict"]`` for the later stages.
"""

from __future__ import annotations

from typing import Mapping, Sequence

from ..decide.verdict import build_verdict, calibration_note, supported_level
from ..partial.locate import differs_in
from ..spec.load import PipelineSpec
from .partial_stage import partial_settings

__all__ = ["stage_summary"]


def _sample_note(spec: PipelineSpec, state: dict) -> list[str]:
    """Chen (2007) recommends the small-sample cutoffs for N <= 300 or unbalanced groups."""
    n_total = state["stats"].n_total
    ns = [g.n for g in state["stats"].groups]
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


def stage_summary(spec: PipelineSpec, state: dict) -> dict:
    """Say which level the data support, how fully, and what group comparisons it permits
    (the one :class:`~invariance.decide.verdict.Verdict` of the run, also left in
    ``state["verdict"]``)."""
    rows = state["level_rows"]
    state.setdefault("warnings", []).extend(_sample_note(spec, state))
    verdict = build_verdict(
        rows,
        up_front=[r.to_dict() for r in spec.released],
        scales=spec.structure.measured_by,
        scale_bias=state.get("results", {}).get("scale_bias") or (),
        reference=state.get("reference"),
        differs=_located(rows, supported_level(rows), state.get("fits", {})),
        calibration=calibration_note(spec.rule, estimator=spec.estimator, ordinal=spec.ordinal is not None),
        partial_enabled=partial_settings(spec.section("partial")).enabled,
    )
    state["verdict"] = verdict
    return {**verdict.to_dict(), "decision_rule": spec.rule.to_dict(), "stop_at_failure": spec.stop_at_failure}

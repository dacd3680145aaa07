"""The pipeline stage of the alignment (``alignment: {enabled: true}``).

Runs :func:`invariance.alignment.align` on the configural fit and puts the result under
``alignment`` in results.json: ``means`` and ``variances`` map factor -> group -> value
(reference group 0 and 1), with their standard errors, per-parameter agreement and the
settings used.
"""

from __future__ import annotations

from ..partial.alignment import align
from ..spec.load import PipelineSpec
from ..spec.options import check_alignment_section
from .state import RunState, StageOutput

__all__ = ["stage_alignment"]


def stage_alignment(spec: PipelineSpec, state: RunState) -> StageOutput:
    """Align the groups of the configural model when the pipeline asks for it."""
    opts = spec.section("alignment") or {}
    if not opts.get("enabled", False):
        return {}, state
    check_alignment_section(spec.document, spec.structure)
    res = state.fits.get("configural")
    if res is None or not res.converged:
        why = "was not fitted" if res is None else "did not converge"
        return ({"alignment": {"enabled": True, "error": f"the configural model {why}"}},
                state.warn(f"alignment skipped: the configural model {why}"))
    ref = opts.get("reference")
    al = align(
        res,
        reference=None if ref is None else str(ref),
        alpha_pairwise=float(opts.get("alpha_pairwise", 0.01)),
        alpha_set=float(opts.get("alpha_set", 0.001)),
        random_starts=int(opts.get("random_starts", 4)),
        seed=int(spec.seed or 0),
    )
    return {"alignment": {"enabled": True, **al.to_dict()}}, state.warn(*(f"alignment: {n}" for n in al.notes))

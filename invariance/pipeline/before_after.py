"""Pipeline stages before and after the invariance sequence.

* ``screening`` (before any model): item screening per group, :func:`invariance.screening.screen`;
  options under ``screening:`` (``bounds``, ``rules``). results.json ``screening``.
* ``group_fit`` (before the configural model): the chosen structure in each group on its
  own, :func:`invariance.structures.group_fit`; a warning naming each group that does not
  fit acceptably; rule under ``compare: {group_fit: {cfi, rmsea}}``, else
  ``decision.configural_fit``, else CFI >= .90 and RMSEA <= .10 (common practice).
  results.json ``group_fit``.
* ``structures`` (only with ``compare: {structures: [...]}``): rival structures per group and
  as configural models, :func:`invariance.structures.compare_structures`. results.json
  ``structures`` (rows) and ``structure_notes`` (equivalences and problems).
* ``scores`` (only with ``scores: {method, id}``): factor scores from the final accepted
  model (the fit of the supported level, with the releases of the partial search), :func:`invariance.scores.factor_scores`; cases with missing items
  are scored from their observed items when the fit was full-information (or with
  ``scores.incomplete: true``); the table goes to
  scores.csv in the run folder, the summary (level, released constraints, determinacy,
  the statement of what the scores compare) to results.json ``scores``.
"""

from __future__ import annotations

from typing import Mapping
import warnings

import numpy as np

from ..data.ordinal_stats import OrdinalStats
from ..errors import DataError, EstimationError, InvarianceWarning, SpecificationError
from ..model.levels import build_level
from ..effects.scores import factor_scores
from ..data.screening import screen_groups
from ..decide.structures import compare_structures, group_fit
from ..spec.load import PipelineSpec, thaw
from .state import RunState, StageOutput

__all__ = ["stage_screening", "stage_group_fit", "stage_structures", "stage_scores", "reuse_fit"]


def _section(spec: PipelineSpec, name: str) -> dict:
    return thaw(spec.section(name) or {})


def _fitter(spec: PipelineSpec):
    """The pipeline's estimator with the run's estimation options (the per-group and
    rival fits use the same one)."""
    return spec.make_estimator().fit


def _same_model(a, b) -> bool:
    """Do two model specifications have the same entry table?"""
    return a.groups == b.groups and a.items == b.items and all(
        np.array_equal(getattr(a, k), getattr(b, k)) for k in ("group", "matrix", "row", "col", "free", "label")
    ) and np.array_equal(a.value, b.value, equal_nan=True)


def reuse_fit(prefit: Mapping, level: str, model):
    """``(result, notes)`` of a fit an earlier stage made of exactly ``model`` (the
    configural model fitted group by group in ``group_fit``, kept in
    ``RunState.extra["prefit"]``), else ``None``."""
    kept = prefit.get(level)
    if kept is None or not _same_model(kept[0], model):
        return None
    return kept[1], kept[2]


def _configural_prefit(spec: PipelineSpec, state: dict, fitter):
    """Fit the configural model (group by group: it shares nothing) and keep it for the
    fits stage; returns the single-group results, or ``None`` when they are not available."""
    stats = state["stats"]
    model = build_level(spec.structure, stats.names, "configural", reference=state.get("reference"),
                        released=spec.released, fixed_means=spec.fixed_means)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", InvarianceWarning)
        try:
            res = fitter(model, stats)
        except (EstimationError, np.linalg.LinAlgError):
            return None
    notes = [str(w.message) for w in caught if issubclass(w.category, InvarianceWarning)]
    state["prefit"] = {"configural": (model, res, notes)}
    return res.extra.get("groups")


def stage_screening(spec: PipelineSpec, state: RunState) -> StageOutput:
    """Screen the items of every group (before any model is fitted)."""
    checked = state.checked
    opts = _section(spec, "screening")
    out = screen_groups(
        list(zip(checked.groups, checked.arrays())),
        list(checked.items),
        scales={f: list(v) for f, v in spec.structure.factors.items()},
        bounds={k: tuple(v) for k, v in (opts.get("bounds") or {}).items()},
        rules=opts.get("rules"),
    )
    rec = out["recommendation"]
    if rec["estimator"] == "ml_robust" and spec.estimator == "ml":
        state = state.warn("screening: " + rec["notes"][0])
    if rec["ordinal_items"]:
        state = state.warn(
            "screening: items with fewer than five categories are fitted as continuous: "
            + ", ".join(rec["ordinal_items"])
        )
    return {"screening": out}, state


def stage_group_fit(spec: PipelineSpec, state: dict) -> dict:
    """Fit the structure in each group separately, before the configural model.

    The configural model is fitted here, group by group (it shares no parameter), and
    kept for the fits stage (:func:`reuse_fit`); the per-group table reads its
    single-group results. The rule is ``compare.group_fit``, else ``decision.configural_fit``, else CFI >= .90
    and RMSEA <= .10 (common practice).
    """
    if isinstance(state["stats"], OrdinalStats):
        # ordinal statistics: per-group fit is part of the configural DWLS model only
        state.setdefault("warnings", []).append(
            "group_fit: per-group fit before the configural model is computed for continuous items only"
        )
        return {}
    rule = _section(spec, "compare").get("group_fit") or _section(spec, "decision").get("configural_fit") or {}
    fitter = _fitter(spec)
    # the configural model's own single-group fits, when it could be fitted: no second
    # fit of any group
    per_group = _configural_prefit(spec, state, fitter)
    gf = group_fit(
        state["stats"],
        spec.structure,
        cfi_min=float(rule.get("cfi", 0.90)),
        rmsea_max=float(rule.get("rmsea", 0.10)),
        warn=False,
        fitter=fitter,
        fits=per_group,
    )
    state["group_fit"] = gf
    state.setdefault("warnings", []).extend(gf.messages)
    return {"group_fit": gf.to_dict()}


def stage_structures(spec: PipelineSpec, state: RunState) -> StageOutput:
    """Rival structures (only when ``compare.structures`` lists some)."""
    fams = _section(spec, "compare").get("structures")
    if not fams:
        return {}, state
    if isinstance(state.stats, OrdinalStats):
        raise SpecificationError(
            "compare.structures works on continuous items only; remove it or data.ordinal from the pipeline."
        )
    st = spec.structure
    try:
        cmp_ = compare_structures(
            state.stats,
            st.factors,
            fams,
            general=st.general,
            residual_covariances=st.residual_covariances,
            fitter=_fitter(spec),
        )
    except SpecificationError as exc:
        raise SpecificationError(f"compare.structures: {exc}") from None
    notes = list(cmp_.notes)
    if st.regressions:
        notes.insert(0, "Rival structures are compared on the measurement part only (factor regressions left out).")
    return {
        "structures": cmp_.to_records(),
        "structure_notes": {"equivalent": list(cmp_.equivalent), "notes": notes},
    }, state


def _final_fit(state: RunState):
    """The final accepted model: the fit of the supported level (with its releases)."""
    best = state.supported_level
    return None if best is None else state.fits.get(best)


def stage_scores(spec: PipelineSpec, state: RunState) -> StageOutput:
    """Factor scores per case from the final accepted model (only with a ``scores`` section)."""
    if spec.section("scores") is None:
        return {}, state
    opts = _section(spec, "scores")
    res = _final_fit(state)
    if res is None:
        return {"scores": None}, state.warn("scores: no level was supported, so no factor scores were written")
    checked = state.checked
    # a full-information fit used every case with an observed item: score those cases too
    fiml = any(getattr(g, "has_missing", False) for g in state.stats.groups)
    frame = checked.frame.copy()
    id_col = opts.get("id")
    if id_col is None:
        # row number in the data file (from 0); checked.frame keeps the original row index
        id_col = "row" if "row" not in frame.columns else "case_row"
        frame[id_col] = frame.index.to_numpy()
    else:
        full = state.frame
        if id_col not in full.columns:
            raise DataError(f"scores.id names column {id_col!r}, which is not in the data; check the spelling.")
        if id_col in frame.columns:
            raise SpecificationError(
                f"scores.id names column {id_col!r}, which is an item or the group column; name an identifier column."
            )
        frame[id_col] = full.loc[frame.index, id_col].to_numpy()
    fs = factor_scores(
        res,
        frame,
        group=checked.group,
        method=opts.get("method", "regression"),
        id=id_col,
        incomplete=bool(opts.get("incomplete", fiml)),
    )
    state = state.update(scores_table=fs.table).warn(*(f"scores: {n}" for n in fs.notes))
    return {"scores": fs.to_dict()}, state

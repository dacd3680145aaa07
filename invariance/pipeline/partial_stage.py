"""Pipeline glue for partial invariance, effect sizes, latent comparisons and structural levels.

The pipeline's level loop calls :func:`search_level` for a measurement level that fails
(with a callable that judges a refit by the pipeline's own decision rule), and the stage
:func:`stage_effects` runs after the level fits. What they add to results.json:

``levels[i].released``
    every release (the up-front ones, then the search's, with statistic, p-value and
    effect size); ``levels[i].decision`` ``holds_partially`` when a level holds only after
    releases; ``levels[i].partial`` the search summary (stop reason, options).
``flagged``
    one record per released item parameter (:func:`invariance.partial.flagged_items`).
``reliability``
    omega / omegaH / ECV / PUC / H / determinacy per group (bifactor) or omega per
    factor (other families), from the last supported measurement level.
``latent``
    latent mean differences and variance ratios vs the reference, once (partial)
    scalar invariance holds; otherwise a note.
``scale_bias``
    expected sum-score bias per scale and group (raw units).
``structural``
    the structural levels (equal variances, covariances, means, paths) with the same
    decision machinery, releases and the per-parameter score tests.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Any, Callable, Mapping

import numpy as np

from ..errors import InvarianceWarning, SpecificationError
from ..estimate.result import FitResult
from ..partial.search import CORRECTIONS, RELEASE_MODES, UNTIL, SearchResult, release_search

__all__ = [
    "FIT_ROW_KEYS",
    "STRUCTURAL_CUTOFF_LEVEL",
    "PartialSettings",
    "partial_settings",
    "release_rows",
    "search_level",
    "stage_effects",
    "structural_settings",
]

#: Fit statistics copied into each structural level row.
FIT_ROW_KEYS = ("chi2", "df", "pvalue", "cfi", "tli", "rmsea", "rmsea_ci90", "srmr", "aic", "bic")

#: Cutoff column of the decision rule used for structural steps (Chen 2007 gives none for
#: them; the intercept-step cutoffs are used, common practice).
STRUCTURAL_CUTOFF_LEVEL = "scalar"


@dataclass(frozen=True)
class PartialSettings:
    """Options of the ``partial:`` pipeline section (see schema.json)."""

    enabled: bool = False
    alpha: float = 0.05
    correction: str = "holm"
    max_releases: int = 10
    release_in: str = "all"
    verify: bool = False
    verify_top: int = 3
    min_invariant_items: int = 2
    until: str = "holds"

    def search_options(self) -> dict:
        return {"alpha": self.alpha, "correction": self.correction, "max_releases": self.max_releases,
                "release_in": self.release_in, "verify": self.verify, "verify_top": self.verify_top,
                "until": self.until}

    def searches(self, decision: str) -> bool:
        """Whether a level with this decision is searched."""
        return self.enabled and (decision != "holds" or self.until == "clean")

    def to_dict(self) -> dict:
        return dict(self.__dict__)


_ALLOWED = tuple(PartialSettings.__dataclass_fields__)


def partial_settings(section: Mapping[str, Any] | None) -> PartialSettings:
    """Validate the ``partial:`` section. A missing section disables the search; a
    present one enables it unless ``enabled: false``."""
    if section is None:
        return PartialSettings()
    section = dict(section)
    unknown = [k for k in section if k not in _ALLOWED]
    if unknown:
        raise SpecificationError(
            f"partial: unknown key {unknown[0]!r}; the allowed keys are {', '.join(_ALLOWED)}."
        )
    s = PartialSettings(**{"enabled": True, **section})
    if s.correction not in CORRECTIONS:
        raise SpecificationError(f"partial.correction must be one of {', '.join(CORRECTIONS)}; got {s.correction!r}.")
    if s.release_in not in RELEASE_MODES:
        raise SpecificationError(f"partial.release_in must be one of {', '.join(RELEASE_MODES)}; got {s.release_in!r}.")
    if s.until not in UNTIL:
        raise SpecificationError(f"partial.until must be one of {', '.join(UNTIL)}; got {s.until!r}.")
    if not 0 < float(s.alpha) < 1:
        raise SpecificationError(f"partial.alpha must be between 0 and 1; got {s.alpha!r}.")
    if int(s.max_releases) < 0 or int(s.verify_top) < 1 or int(s.min_invariant_items) < 1:
        raise SpecificationError("partial.max_releases must be >= 0, verify_top and min_invariant_items >= 1.")
    return s


def structural_settings(section: Mapping[str, Any] | None) -> tuple[str, ...]:
    """Validate the ``structural:`` section: ``{levels: [variances, covariances, means, paths]}``."""
    from ..model.structural import STRUCTURAL_STEPS

    if section is None:
        return ()
    section = dict(section)
    unknown = [k for k in section if k != "levels"]
    if unknown:
        raise SpecificationError(f"structural: unknown key {unknown[0]!r}; the allowed key is levels.")
    steps = tuple(section.get("levels", ()))
    for s in steps:
        if s not in STRUCTURAL_STEPS:
            raise SpecificationError(
                f"structural.levels: unknown level {s!r}; use any of {', '.join(STRUCTURAL_STEPS)}."
            )
    order = [STRUCTURAL_STEPS.index(s) for s in steps]
    if order != sorted(order) or len(set(steps)) != len(steps):
        raise SpecificationError(
            f"structural.levels must be in the order {', '.join(STRUCTURAL_STEPS)} without repeats."
        )
    return steps


def search_level(
    res: FitResult,
    stats,
    verdict_of: Callable[[FitResult], Mapping],
    settings: PartialSettings,
    *,
    parameters=None,
    executor=None,
) -> SearchResult:
    """Run the release search on a failed level; ``verdict_of(fit)`` returns the
    pipeline's verdict dict (with ``decision``) for a refit."""
    return release_search(
        res, stats, lambda f: verdict_of(f)["decision"] == "holds",
        parameters=parameters, executor=executor, **settings.search_options(),
    )


def release_rows(res: FitResult, search: SearchResult | None, pipeline_released=()) -> list[dict]:
    """The level's ``released`` list: every release of its model, in order, marked by
    ``source``: ``pipeline`` (named in the pipeline file), ``carried`` (found by the
    search at an earlier level) or ``search`` (found at this level, with its statistic,
    p-value and effect size)."""
    n_search = len(search.releases) if search is not None else 0
    upto = len(res.spec.released) - n_search
    pipe = set(pipeline_released)
    rows = [{**r.to_dict(), "source": "pipeline" if r in pipe else "carried"} for r in res.spec.released[:upto]]
    if search is not None:
        rows += [{**s.to_dict(), "source": "search"} for s in search.releases]
    return rows


def _row(level: str, res: FitResult) -> dict:
    fs = res.fit.to_dict()
    row = {"level": level, "converged": bool(res.converged), "status": res.status}
    row.update({k: fs.get(k) for k in FIT_ROW_KEYS})
    row["problems"] = list(res.problems)
    return row


def _fit_quiet(spec, stats) -> tuple[FitResult, list[str]]:
    from ..estimate.ml import fit as ml_fit

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", InvarianceWarning)
        res = ml_fit(spec, stats)
    return res, [str(w.message) for w in caught if issubclass(w.category, InvarianceWarning)]


def _structural(spec, state, base: FitResult, base_row: dict, settings: PartialSettings, steps) -> list[dict]:
    from ..decide.compare import judge_step, level_delta
    from ..model.structural import build_structural, structural_parameter
    from ..partial.score import score_tests

    stats = state["stats"]
    rule = spec.rule
    rows, released = [], ()
    accepted_fit, accepted_row, accepted_name = base, base_row, base.level
    struct_family_so = tuple((f, spec.structure.general) for f in spec.structure.factors) \
        if spec.structure.family == "second_order" else ()
    for k, step in enumerate(steps):
        mspec = build_structural(base.spec, steps[: k + 1], released=released, second_order_paths=struct_family_so)
        if mspec.df == accepted_fit.spec.df:
            rows.append({"level": step, "decision": "not_applicable", "released": [], "tests": [],
                         "reason": f"the model has no {structural_parameter(step)} to hold equal across groups"})
            continue
        res, notes = _fit_quiet(mspec, stats)
        state.setdefault("warnings", []).extend(f"{step}: {n}" for n in notes)

        def verdict_of(f, step=step, ref_row=accepted_row):
            r = _row(step, f)
            return judge_step(level_delta(r, ref_row), STRUCTURAL_CUTOFF_LEVEL, rule, converged=f.converged)

        verdict = verdict_of(res)
        search = None
        kind = structural_parameter(step)
        if settings.searches(verdict["decision"]) and res.converged:
            search = search_level(res, stats, verdict_of, settings, parameters=(kind,))
            if search.releases:
                res = search.fit
                verdict = {**verdict_of(res), "decision": search.decision}
            released = released + search.released
        row = _row(step, res)
        row.update({"delta": level_delta(row, accepted_row), "compared_with": accepted_name, **verdict})
        row["released"] = [{**s.to_dict(), "source": "search"} for s in (search.releases if search else ())]
        if search is not None:
            row["partial"] = {kk: v for kk, v in search.to_dict().items() if kk not in ("fit", "releases", "released")}
        # per-parameter score tests at this step (per-path tests for paths)
        tests = score_tests(res, stats, parameters=(kind,))
        row["tests"] = [t.to_dict() for t in tests.multivariate]
        rows.append(row)
        if row["decision"] in ("holds", "holds_partially"):
            accepted_fit, accepted_row, accepted_name = res, row, step
        else:
            # a failed structural step is not carried into the next one: its constraints
            # are dropped again (the next step is judged against the last accepted one)
            released = released + tuple(c.release(None) for c in _step_constraints(res, kind))
    return rows


def _step_constraints(res: FitResult, kind: str):
    from ..partial.score import constraints

    return constraints(res.spec, parameters=(kind,))


def _last_supported(rows: list[dict], fits: Mapping[str, FitResult]) -> FitResult | None:
    best = None
    for r in rows:
        if r.get("decision") in ("holds", "holds_partially") and r["level"] in fits:
            best = fits[r["level"]]
        else:
            break
    return best


def stage_effects(spec, state: dict) -> dict:
    """Flagged items, reliability indices, latent comparisons, sum-score bias and the
    structural levels (after the measurement levels have been fitted and judged)."""
    from ..effects.bifactor import quality_indices
    from ..effects.dmacs import scale_bias
    from ..effects.latent import compare_latent
    from ..partial.flags import flagged_items

    settings = partial_settings(spec.section("partial"))
    steps = structural_settings(spec.section("structural"))
    stats = state["stats"]
    fits = state.get("fits", {})
    rows = state.get("level_rows", [])
    searches = state.get("searches", [])
    final = _last_supported(rows, fits)
    if any(f.estimator == "dwls" for f in fits.values()):
        # ordinal items: the continuous-item effect sizes below do not apply
        return _ordinal_effects(spec, state, final)
    scalar_ok = final is not None and final.level in ("scalar", "strict")
    out: dict = {"flagged": flagged_items(searches, stats, final=final if scalar_ok else None)}
    source = final if final is not None else fits.get("configural")
    if source is not None:
        out["reliability"] = {
            "level": source.level,
            "family": spec.structure.family,
            "groups": {q.group: {"overall": q.overall, "factors": q.factors} for q in quality_indices(source, spec.structure)},
        }
    else:
        out["reliability"] = None
    if scalar_ok:
        out["latent"] = compare_latent(final, min_items=settings.min_invariant_items).to_dict()
        out["scale_bias"] = [b.to_dict() for b in scale_bias(final, spec.structure.measured_by)]
    else:
        out["latent"] = {"level": None, "means": [], "variances": [], "notes": [
            "latent means are compared only once (partial) scalar invariance holds; it does not here"]}
        out["scale_bias"] = []
    if steps:
        if scalar_ok:
            base_row = next(r for r in rows if r["level"] == final.level)
            out["structural"] = _structural(spec, state, final, base_row, settings, steps)
        else:
            out["structural"] = [{"level": s, "decision": "not_tested",
                                  "reason": "structural levels need (partial) scalar invariance"} for s in steps]
    else:
        out["structural"] = []
    return out


def _ordinal_effects(spec, state: dict, final) -> dict:
    """Effects section for ordinal (DWLS) runs: latent-response bifactor indices of the
    last supported level; dMACS of flagged items comes with the ordinal search."""
    from ..effects.ordinal import bifactor_indices_latent

    out: dict = {"flagged": list(state.get("ordinal_flags", [])), "scale_bias": [], "structural": []}
    out["latent"] = {"level": None, "means": [], "variances": [], "notes": [
        "latent mean comparisons for ordinal items are reported by the ordinal search only"]}
    out["reliability"] = None
    source = final if final is not None else state.get("fits", {}).get("configural")
    st = spec.structure
    if source is not None and st.family == "bifactor":
        groups = {}
        for g in source.groups:
            std = source.standardized(g)
            lam = std["lambda"]
            f_ix = {f: k for k, f in enumerate(source.spec.factors)}
            specifics = {f: (f_ix[f], *[source.spec.items.index(i) for i in its]) for f, its in st.factors.items()}
            try:
                groups[g] = bifactor_indices_latent(
                    lam, np.diag(std["theta"]), general=f_ix[st.general], specifics=specifics
                )
            except Exception as exc:  # noqa: BLE001 - reported, not fatal
                groups[g] = {"error": str(exc).splitlines()[0]}
        out["reliability"] = {"level": source.level, "family": st.family, "scale": "latent response", "groups": groups}
    return out

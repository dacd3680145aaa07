"""Sequential release of equality constraints until a level holds (partial invariance).

METHODS section 8 (Byrne, Shavelson & Muthen 1989; Sorbom 1989). At each round, the
score tests of :mod:`invariance.partial.score` rank the level's constraints; after the
chosen multiple-testing correction over that round's tests (Holm by default, Bonferroni,
or none), the most significant constraint is released, the model refitted and the level
re-judged by the caller's ``judge`` (so the pipeline's own decision criteria decide).
This repeats until the level holds, nothing is significant, or ``max_releases`` is reached.

Options
-------
``release_in="all"``
    Candidates are item parameters, tested across every group sharing them
    (multivariate score test, df = groups - 1); a release frees them in every group.
``release_in="groups"``
    Candidates are single group copies (univariate tests); a release frees the
    parameter only in the group the test points to; the remaining groups keep sharing
    it and are tested again in the next round.
``verify=True``
    The ``verify_top`` most significant candidates are refitted with the constraint
    released and judged by the likelihood-ratio statistic instead (more accurate; the
    refits run through ``executor.map``, so a process pool or a distributed backend with
    a ``concurrent.futures``-like ``map`` plugs in).
``until="clean"``
    Keep releasing while a constraint is significant, even once the level holds
    (default ``"holds"``: stop as soon as the judge accepts the level).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable, Sequence

import numpy as np

from ..data.moments import SampleStats
from ..effects.dmacs import item_effects
from ..errors import EstimationError, SpecificationError
from ..estimate.interface import Estimator, estimator_for
from ..estimate.result import FitResult
from ..model.levels import LevelBuilder
from ..model.spec import Release
from .candidates import refit_candidate, release_tests
from .score import ScoreTests

__all__ = [
    "CORRECTIONS",
    "RELEASE_MODES",
    "STOP_REASONS",
    "UNTIL",
    "ReleaseStep",
    "SearchResult",
    "adjust_pvalues",
    "level_parameters",
    "release_search",
]

CORRECTIONS = ("holm", "bonferroni", "none")
RELEASE_MODES = ("all", "groups")
UNTIL = ("holds", "clean")

#: Fixed table of stop reasons.
STOP_REASONS = {
    "holds": "the level holds",
    "no_significant": "no constraint is significant after the multiple-testing correction",
    "max_releases": "the maximum number of releases was reached",
    "not_confirmed": "no candidate was confirmed by its likelihood-ratio refit",
    "no_candidates": "the level has no testable equality constraint left",
    "refit_failed": "the model with the constraint released could not be estimated or did not converge",
    "not_converged": "the level's model did not converge; score tests need converged estimates",
}

_LEVEL_PARAMETERS = {
    "thresholds": ("threshold",),
    "metric": ("loading", "path"),
    "scalar": ("intercept",),
    "strict": ("residual", "residual_cov"),
    "variances": ("variance",),
    "covariances": ("covariance",),
    "means": ("mean",),
    "paths": ("path",),
}


def level_parameters(level: str) -> tuple[str, ...]:
    """Parameter kinds a level adds (and a search therefore tests).

    ``metric`` -> loadings (and second-order loadings), ``scalar`` -> intercepts,
    ``strict`` -> residual (co)variances; structural levels ``<base>+<step>`` -> the
    step's parameter.
    """
    key = level.rsplit("+", 1)[-1]
    try:
        return _LEVEL_PARAMETERS[key]
    except KeyError:
        raise SpecificationError(
            f"Level {level!r} adds no cross-group constraints to search; "
            f"name the parameters to test or use one of {', '.join(_LEVEL_PARAMETERS)}."
        ) from None


def adjust_pvalues(p: np.ndarray, correction: str = "holm") -> np.ndarray:
    """Adjusted p-values: Holm (1979) step-down, Bonferroni, or none."""
    if correction not in CORRECTIONS:
        raise SpecificationError(
            f"The correction must be one of {', '.join(CORRECTIONS)}; got {correction!r}."
        )
    p = np.asarray(p, float)
    m = p.size
    if correction == "none" or m == 0:
        return p.copy()
    if correction == "bonferroni":
        return np.minimum(1.0, p * m)
    order = np.argsort(p, kind="stable")
    adj = np.empty(m)
    running = 0.0
    for rank, j in enumerate(order):
        running = max(running, min(1.0, (m - rank) * p[j]))
        adj[j] = running
    return adj


@dataclass(frozen=True)
class ReleaseStep:
    """One released constraint and the evidence for it."""

    step: int
    level: str
    parameter: str
    item: str
    factor: str | None
    groups: tuple[str, ...]
    label: str
    test: str               # "multivariate" or "univariate" score test
    statistic: float
    df: int
    pvalue: float
    adjusted_pvalue: float
    epc: tuple[tuple[str, float, float], ...]   # (group, epc, epc_std)
    lr_statistic: float | None
    lr_pvalue: float | None
    chi2_before: float
    chi2_after: float
    holds_after: bool
    dmacs: dict = field(default_factory=dict)

    @property
    def effect_size(self) -> float:
        """Largest dMACS over groups when available, else the largest |standardized EPC|."""
        if self.dmacs:
            return float(max(self.dmacs.values()))
        vals = [abs(s) for _, _, s in self.epc if np.isfinite(s)]
        return float(max(vals)) if vals else float("nan")

    def to_release(self, all_groups: bool) -> Release:
        return Release(self.parameter, self.item, self.factor, None if all_groups else self.groups)

    def to_dict(self) -> dict:
        return {
            "step": self.step,
            "level": self.level,
            "parameter": self.parameter,
            "item": self.item,
            "factor": self.factor,
            "groups": list(self.groups),
            "label": self.label,
            "test": self.test,
            "statistic": self.statistic,
            "df": self.df,
            "pvalue": self.pvalue,
            "adjusted_pvalue": self.adjusted_pvalue,
            "epc": [{"group": g, "epc": e, "epc_std": s} for g, e, s in self.epc],
            "lr_statistic": self.lr_statistic,
            "lr_pvalue": self.lr_pvalue,
            "chi2_before": self.chi2_before,
            "chi2_after": self.chi2_after,
            "holds_after": self.holds_after,
            "dmacs": dict(self.dmacs),
            "effect_size": self.effect_size,
        }


@dataclass(frozen=True)
class SearchResult:
    """Outcome of a release search on one level.

    Attributes
    ----------
    level
        The level searched.
    initial, fit
        The level's fit before any release, and the final fit.
    holds
        The judge's verdict on the final fit.
    releases
        The releases made, in order.
    stop_reason
        A key of :data:`STOP_REASONS`.
    tests
        The score tests of the last round (``None`` if none were computed).
    options
        The search options used.
    initial_holds
        The judge's verdict before any release.
    skipped
        Candidates whose refit failed (``label``, ``groups``, ``reason``), in order.
    """

    level: str
    initial: FitResult
    fit: FitResult
    holds: bool
    releases: tuple[ReleaseStep, ...]
    stop_reason: str
    tests: ScoreTests | None
    options: dict
    initial_holds: bool = False
    skipped: tuple[dict, ...] = ()

    @property
    def decision(self) -> str:
        """``holds``, ``holds_partially`` (holds only after releases) or ``fails``."""
        if not self.holds:
            return "fails"
        return "holds_partially" if self.releases and not self.initial_holds else "holds"

    @property
    def released(self) -> tuple[Release, ...]:
        """The :class:`Release` records to carry to the next levels."""
        return tuple(self.fit.spec.released[len(self.initial.spec.released):])

    def to_dict(self) -> dict:
        return {
            "level": self.level,
            "decision": self.decision,
            "holds": self.holds,
            "initial_holds": self.initial_holds,
            "stop_reason": self.stop_reason,
            "stop_message": STOP_REASONS[self.stop_reason],
            "releases": [r.to_dict() for r in self.releases],
            "released": [r.to_dict() for r in self.released],
            "options": dict(self.options),
            "skipped": [dict(k) for k in self.skipped],
            "fit": self.fit.summary(),
        }


def _refit(job: tuple) -> tuple[FitResult | None, str | None]:
    """Refit one candidate (module level, so executors can pickle it): (fit, why it failed)."""
    estimator, fit, stats, test = job
    try:
        rf = test.refit if test.refit is not None else refit_candidate(estimator, fit, stats, test.spec)
    except EstimationError as exc:
        return None, str(exc).splitlines()[0]
    if not rf.converged:
        return None, f"did not converge ({rf.status})"
    return rf, None


def _item_dmacs(fit: FitResult, stats, item: str, parameter: str) -> dict:
    if not isinstance(stats, SampleStats) or parameter not in ("loading", "intercept") or item not in fit.spec.items:
        return {}
    if not (fit.level.startswith(("scalar", "strict"))):
        return {}  # intercepts are free per group below scalar: dMACS would mix them in
    return {e.group: e.dmacs for e in item_effects(fit, stats, [item])}


def _check_options(correction, until, release_in, alpha, max_releases, verify_top) -> None:
    if correction not in CORRECTIONS:
        raise SpecificationError(f"The correction must be one of {', '.join(CORRECTIONS)}; got {correction!r}.")
    if until not in UNTIL:
        raise SpecificationError(f"'until' must be one of {', '.join(UNTIL)}; got {until!r}.")
    if release_in not in RELEASE_MODES:
        raise SpecificationError(f"'release_in' must be one of {', '.join(RELEASE_MODES)}; got {release_in!r}.")
    if not 0 < alpha < 1:
        raise SpecificationError(f"The significance level alpha must be between 0 and 1; got {alpha!r}.")
    if int(max_releases) < 0 or int(verify_top) < 1:
        raise SpecificationError("max_releases must be 0 or more and verify_top at least 1.")


def _choose(estimator, current, stats, cands, sig, adj, *, verify, verify_top, correction, alpha, mapper, skipped):
    """The candidate to release: (index, refit, lr statistic, lr p, adjusted p) or a stop reason.

    Refits that fail (after the fit's own fallbacks) are recorded in ``skipped`` and the
    next significant candidate is tried."""
    if not verify:
        for j in sig:
            rf, why = _refit((estimator, current, stats, cands[j]))
            if rf is not None:
                return (j, rf, None, None, adj[j])
            skipped.append({"label": cands[j].label, "groups": list(cands[j].groups), "reason": why})
        return "refit_failed"
    top = sig[:verify_top]
    refits = list(mapper(_refit, [(estimator, current, stats, cands[j]) for j in top]))
    lr_p = np.array([c.pvalue for c in cands], float)
    lr = {}
    for j, (rf, why) in zip(top, refits):
        if rf is None:
            lr_p[j] = 1.0
            skipped.append({"label": cands[j].label, "groups": list(cands[j].groups), "reason": why})
            continue
        c = cands[j]
        d = (c.statistic, c.pvalue) if c.test == "refit" else _difference(estimator, current, rf, stats)
        lr[j] = (d[0], d[1], rf)
        lr_p[j] = d[1]
    adj_lr = adjust_pvalues(lr_p, correction)
    ok = [j for j in top if j in lr and adj_lr[j] <= alpha]
    if not ok:
        return "not_confirmed"
    j = min(ok, key=lambda k: (lr[k][1], -lr[k][0]))
    return (j, lr[j][2], lr[j][0], lr[j][1], adj_lr[j])


def _step(number: int, level: str, c, chosen: tuple, before: FitResult, stats, holds: bool) -> ReleaseStep:
    """The record of one release: candidate ``c`` chosen as (index, refit, lr stat, lr p, adjusted p)."""
    _, rf, lr_stat, lr_pv, adj_p = chosen
    return ReleaseStep(
        step=number, level=level, parameter=c.release.parameter, item=c.release.item,
        factor=c.release.factor, groups=tuple(c.groups), label=c.label, test=c.test,
        statistic=float(c.statistic), df=int(c.df), pvalue=float(c.pvalue),
        adjusted_pvalue=float(adj_p), epc=tuple(c.epc),
        lr_statistic=None if lr_stat is None else float(lr_stat),
        lr_pvalue=None if lr_pv is None else float(lr_pv),
        chi2_before=float(before.fit.chi2), chi2_after=float(rf.fit.chi2),
        holds_after=holds, dmacs=_item_dmacs(rf, stats, c.release.item, c.release.parameter),
    )


def _difference(estimator, restricted, free, stats) -> tuple[float, float]:
    d = estimator.difference(restricted, free, stats)
    return float(d.chi2), (float(d.pvalue) if np.isfinite(d.pvalue) else 1.0)


def release_search(
    fit: FitResult,
    stats,
    judge: Callable[[FitResult], bool],
    *,
    estimator: Estimator | None = None,
    builder: LevelBuilder | None = None,
    parameters: Sequence[str] | None = None,
    alpha: float = 0.05,
    correction: str = "holm",
    max_releases: int = 10,
    release_in: str = "all",
    verify: bool = False,
    verify_top: int = 3,
    executor=None, until: str = "holds",
) -> SearchResult:
    """Release constraints of a fitted level one at a time until it holds.

    Parameters
    ----------
    fit, stats
        The fitted level (restricted model) and its statistics (any item type).
    judge
        ``judge(fit) -> bool``: does this (partially released) level hold? The
        pipeline passes its comparison against the previous accepted level.
    estimator, builder
        The :class:`~invariance.estimate.interface.Estimator` that ranks candidates (score
        tests, or refits for DWLS) and refits (default: ``fit.estimator``'s); the level's
        :class:`~invariance.model.levels.LevelBuilder`, needed when releases rebuild the model.
    parameters
        Kinds of constraints to test; default: those the level adds (:func:`level_parameters`).
    alpha, correction
        Significance level after the correction: ``holm`` (default), ``bonferroni``
        or ``none``, over each round's tests.
    max_releases, release_in
        Largest number of releases; release in ``all`` groups or in the ``groups`` a
        univariate test points to.
    verify, verify_top
        Confirm the ``verify_top`` most significant candidates by the estimator's difference
        test of their refits before releasing (likelihood ratio under ML, scaled under robust ML).
    executor, until
        Object with a ``map(fn, iterable)`` method for the refits (default: serial);
        ``holds`` (default) stops as soon as the level holds, ``clean`` keeps releasing
        while a constraint is significant.

    Returns
    -------
    SearchResult
        A candidate whose refit fails is recorded in ``skipped`` and the next one tried.
    """
    _check_options(correction, until, release_in, alpha, max_releases, verify_top)
    estimator = estimator_for(fit.estimator) if estimator is None else estimator
    kinds = tuple(parameters) if parameters is not None else level_parameters(fit.level)
    options = {"parameters": list(kinds), "alpha": alpha, "correction": correction,
               "max_releases": int(max_releases), "release_in": release_in,
               "verify": bool(verify), "verify_top": int(verify_top), "until": until}
    search = _Search(fit=fit, stats=stats, judge=judge, estimator=estimator, builder=builder, kinds=kinds,
                     options=options, mapper=map if executor is None else executor.map)
    return search.run()


@dataclass
class _Search:
    """The state of one release search: the current fit, the steps taken, the skipped refits.

    ``options`` holds the checked options of :func:`release_search` (as recorded in the
    result); ``mapper`` runs the candidate refits.
    """

    fit: FitResult
    stats: object
    judge: Callable[[FitResult], bool]
    estimator: Estimator
    builder: LevelBuilder | None
    kinds: tuple[str, ...]
    options: dict
    mapper: Callable
    steps: list = field(default_factory=list)
    skipped: list = field(default_factory=list)

    def run(self) -> SearchResult:
        """Release one constraint per round until the level holds (or is clean) or a stop reason."""
        until = self.options["until"]
        current = self.fit
        holds = initial_holds = bool(self.judge(current))
        reason = "holds"
        if (until == "clean" or not holds) and not current.converged:
            reason = "not_converged"
        while (until == "clean" or not holds) and reason != "not_converged":
            outcome = self._round(current)
            if isinstance(outcome, str):
                reason = outcome
                break
            cand, chosen = outcome
            rf = chosen[1]
            holds = bool(self.judge(rf))
            self.steps.append(_step(len(self.steps) + 1, self.fit.level, cand, chosen, current, self.stats, holds))
            current = rf
        if holds and until == "holds":
            reason = "holds"
        return SearchResult(self.fit.level, self.fit, current, holds, tuple(self.steps), reason, None,
                            self.options, initial_holds, tuple(self.skipped))

    def _round(self, current: FitResult):
        """One round: test every constraint of ``current`` and refit the chosen release.

        Returns a stop reason (``max_releases``, ``no_candidates``, ``no_significant``
        or one from :func:`_choose`), or ``(candidate, chosen)``.
        """
        opt = self.options
        if len(self.steps) >= opt["max_releases"]:
            return "max_releases"
        cands = release_tests(self.estimator, current, self.stats, self.kinds,
                              release_in=opt["release_in"], builder=self.builder)
        if not cands:
            return "no_candidates"
        adj, sig = _significant(cands, opt["correction"], opt["alpha"], self.fit.spec.reference)
        if not sig:
            return "no_significant"
        chosen = _choose(self.estimator, current, self.stats, cands, sig, adj, verify=opt["verify"],
                         verify_top=opt["verify_top"], correction=opt["correction"], alpha=opt["alpha"],
                         mapper=self.mapper, skipped=self.skipped)
        if isinstance(chosen, str):
            return chosen
        return cands[chosen[0]], chosen


def _significant(cands, correction: str, alpha: float, ref: str) -> tuple[np.ndarray, list[int]]:
    """Adjusted p-values of one round and the significant candidates in release order
    (smallest adjusted p first, then largest statistic, then releases outside the reference group)."""
    p = np.array([c.pvalue for c in cands])
    stat = np.array([c.statistic for c in cands])
    adj = adjust_pvalues(p, correction)
    is_ref = np.array([c.groups == (ref,) for c in cands])
    order = np.lexsort((is_ref, -stat, adj))
    return adj, [j for j in order if adj[j] <= alpha]

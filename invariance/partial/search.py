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

import warnings
from dataclasses import dataclass, field
from typing import Callable, Sequence

import numpy as np
from scipy import stats as _st

from ..data.moments import SampleStats
from ..errors import EstimationError, InvarianceWarning, SpecificationError
from ..estimate.ml import fit as _fit
from ..estimate.ml import refit_options
from ..model.spec import Release
from ..estimate.result import FitResult
from .score import Constraint, ScoreTests, map_theta, release_constraint, score_tests

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
            "fit": self.fit.summary(),
        }


def _refit(job: tuple) -> FitResult | None:
    """Refit a spec from starting values (module level, so executors can pickle it);
    an optional fourth item holds the estimation options of the fit it came from."""
    spec, stats, start, *opts = job
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", InvarianceWarning)
            return _fit(spec, stats, start=start, **(opts[0] if opts else {}))
    except EstimationError:
        return None


def _item_dmacs(fit: FitResult, stats: SampleStats, item: str, parameter: str) -> dict:
    from ..effects.dmacs import item_effects

    if parameter not in ("loading", "intercept") or item not in fit.spec.items:
        return {}
    if not (fit.level.startswith(("scalar", "strict"))):
        return {}  # intercepts are free per group below scalar: dMACS would mix them in
    return {e.group: e.dmacs for e in item_effects(fit, stats, [item])}


def release_search(
    fit: FitResult,
    stats: SampleStats,
    judge: Callable[[FitResult], bool],
    *,
    parameters: Sequence[str] | None = None,
    alpha: float = 0.05,
    correction: str = "holm",
    max_releases: int = 10,
    release_in: str = "all",
    verify: bool = False,
    verify_top: int = 3,
    executor=None,
    until: str = "holds",
) -> SearchResult:
    """Release constraints of a fitted level one at a time until it holds.

    Parameters
    ----------
    fit
        The fitted level (restricted model).
    stats
        Its sample statistics.
    judge
        ``judge(fit) -> bool``: does this (partially released) level hold? The
        pipeline passes its comparison against the previous accepted level.
    parameters
        Kinds of constraints to test; by default those the level adds
        (:func:`level_parameters`).
    alpha
        Significance level after the correction.
    correction
        ``holm`` (default), ``bonferroni`` or ``none``, over each round's tests.
    max_releases
        Largest number of releases.
    release_in
        ``all`` (free in every group) or ``groups`` (only the group a univariate test
        points to).
    verify
        Confirm candidates by a likelihood-ratio refit before releasing.
    verify_top
        How many of the most significant candidates to refit when verifying.
    executor
        Object with a ``map(fn, iterable)`` method for the refits (default: serial).
    until
        ``holds`` (default): stop as soon as the level holds; ``clean``: keep releasing
        while a constraint is significant (locates every noninvariant parameter the
        tests can see, even when the approximate-fit criteria already accept the level).

    Returns
    -------
    SearchResult
    """
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
    level = fit.level
    kinds = tuple(parameters) if parameters is not None else level_parameters(level)
    mapper = map if executor is None else executor.map
    options = {"parameters": list(kinds), "alpha": alpha, "correction": correction,
               "max_releases": int(max_releases), "release_in": release_in,
               "verify": bool(verify), "verify_top": int(verify_top), "until": until}
    current = fit
    holds = initial_holds = bool(judge(current))
    steps: list[ReleaseStep] = []
    tests: ScoreTests | None = None
    reason = "holds"
    ref = fit.spec.reference
    if (until == "clean" or not holds) and not current.converged:
        reason = "not_converged"
    while (until == "clean" or not holds) and reason != "not_converged":
        if len(steps) >= max_releases:
            reason = "max_releases"
            break
        tests = score_tests(current, stats, parameters=kinds)
        cands: list[tuple[Constraint, tuple[str, ...] | None, object, str]] = []
        if release_in == "all":
            for t in tests.multivariate:
                if np.isfinite(t.statistic):
                    cands.append((t.constraint, None, t, "multivariate"))
        else:
            for t in tests.univariate:
                if np.isfinite(t.statistic):
                    cands.append((t.constraint, (t.group,), t, "univariate"))
        if not cands:
            reason = "no_candidates"
            break
        p = np.array([c[2].pvalue for c in cands])
        stat = np.array([c[2].statistic for c in cands])
        adj = adjust_pvalues(p, correction)
        is_ref = np.array([c[1] is not None and c[1][0] == ref for c in cands])
        order = np.lexsort((is_ref, -stat, adj))
        sig = [j for j in order if adj[j] <= alpha]
        if not sig:
            reason = "no_significant"
            break
        chosen = None
        if verify:
            top = sig[:verify_top]
            specs = [release_constraint(current.spec, cands[j][0], cands[j][1]) for j in top]
            jobs = [(s, stats, map_theta(current.spec, current.theta, s), refit_options(current)) for s in specs]
            refits = list(mapper(_refit, jobs))
            lr_p = p.copy()
            lr = {}
            for j, rf in zip(top, refits):
                if rf is None or not rf.converged:
                    lr_p[j] = 1.0
                    continue
                t_lr = max(current.fit.chi2 - rf.fit.chi2, 0.0)
                d = max(current.spec.df - rf.spec.df, 1)
                lr[j] = (t_lr, float(_st.chi2.sf(t_lr, d)), rf)
                lr_p[j] = lr[j][1]
            adj_lr = adjust_pvalues(lr_p, correction)
            ok = [j for j in top if j in lr and adj_lr[j] <= alpha]
            if not ok:
                reason = "not_confirmed"
                break
            j = min(ok, key=lambda k: (lr[k][1], -lr[k][0]))
            chosen = (j, lr[j][2], lr[j][0], lr[j][1], adj_lr[j])
        else:
            j = sig[0]
            s = release_constraint(current.spec, cands[j][0], cands[j][1])
            rf = _refit((s, stats, map_theta(current.spec, current.theta, s), refit_options(current)))
            if rf is None or not rf.converged:
                reason = "refit_failed"
                break
            chosen = (j, rf, None, None, adj[j])
        j, rf, lr_stat, lr_pv, adj_p = chosen
        con, groups, t, kind = cands[j]
        if kind == "multivariate":
            epc = t.epc
            freed = con.testable_groups
        else:
            epc = ((t.group, t.epc, t.epc_std),)
            freed = groups
        holds = bool(judge(rf))
        steps.append(ReleaseStep(
            step=len(steps) + 1, level=level, parameter=con.parameter, item=con.item,
            factor=con.factor, groups=tuple(freed), label=con.label, test=kind,
            statistic=float(t.statistic), df=int(t.df), pvalue=float(t.pvalue),
            adjusted_pvalue=float(adj_p), epc=tuple(epc),
            lr_statistic=None if lr_stat is None else float(lr_stat),
            lr_pvalue=None if lr_pv is None else float(lr_pv),
            chi2_before=float(current.fit.chi2), chi2_after=float(rf.fit.chi2),
            holds_after=holds, dmacs=_item_dmacs(rf, stats, con.item, con.parameter),
        ))
        current = rf
    if holds and until == "holds":
        reason = "holds"
    return SearchResult(level, fit, current, holds, tuple(steps), reason, tests, options, initial_holds)

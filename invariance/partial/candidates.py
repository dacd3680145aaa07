"""Candidate releases of a fitted level, each with its test, for every estimator.

Estimators with score tests (``estimator.score_tests``: ML, robust ML, full-information
ML) rank every cross-group equality by its score test at the restricted estimates,
without refitting (:mod:`invariance.partial.score`). Ordered items have none: releasing
an item's thresholds rebuilds its identification (Wu & Estabrook 2016), so each
candidate is refitted through the level builder and tested by the estimator's difference
test (a likelihood-ratio-type check, METHODS section 8; Satorra 2000 for DWLS).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from ..errors import EstimationError, InvarianceWarning, SpecificationError
from ..estimate.dwls import ordinal_start_values, start_from
from ..estimate.interface import Estimator
from ..estimate.result import FitResult
from ..model.levels import LevelBuilder
from ..model.ordinal_levels import ORDINAL_RELEASES
from ..model.spec import ModelSpec, Release
from .score import map_theta, release_constraint, score_tests

__all__ = ["ReleaseTest", "refit_candidate", "release_tests"]


@dataclass(frozen=True)
class ReleaseTest:
    """One candidate release of a fitted level and its test.

    ``test`` is ``multivariate`` or ``univariate`` (score tests, no refit needed) or
    ``refit`` (the candidate was fitted; ``refit`` holds that fit). ``spec`` is the
    model with the constraint released; ``groups`` the groups it frees.
    """

    release: Release
    label: str
    groups: tuple[str, ...]
    test: str
    statistic: float
    df: int
    pvalue: float
    epc: tuple[tuple[str, float, float], ...]
    spec: ModelSpec
    refit: FitResult | None = None


def release_tests(
    estimator: Estimator,
    fit: FitResult,
    stats,
    kinds: Sequence[str],
    *,
    release_in: str = "all",
    builder: LevelBuilder | None = None,
) -> list[ReleaseTest]:
    """Every candidate release of ``kinds`` with its test (most significant not first: as found).

    Parameters
    ----------
    estimator
        The estimator of ``fit``.
    fit, stats
        The fitted (restricted) level and its statistics.
    kinds
        Parameter kinds to release.
    release_in
        ``all`` (every group sharing the parameter) or ``groups`` (one group at a time).
    builder
        The level builder of ``fit``: needed when candidates are refitted.

    Returns
    -------
    list of ReleaseTest
        Candidates whose refit fails are left out.
    """
    if estimator.score_tests:
        return _score_candidates(fit, stats, kinds, release_in)
    if builder is None:
        raise SpecificationError(
            f"{estimator.name} release tests refit each candidate: pass builder=LevelBuilder(...) of the fitted model."
        )
    out = []
    for rel in _rebuild_candidates(fit, stats, kinds, release_in):
        spec = builder.release(fit.spec, rel)
        if spec.df == fit.spec.df:
            continue  # the release changes nothing at this level
        # a rebuilt model has its own entry table: start from the restricted fit by label
        x0 = start_from(fit.spec.param_labels, fit.theta, spec, ordinal_start_values(spec, stats))
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", InvarianceWarning)
                free = estimator.fit(spec, stats, start=x0)
            d = estimator.difference(fit, free, stats)
        except EstimationError:
            continue
        groups = rel.groups if rel.groups is not None else tuple(g for g in fit.spec.groups if g != fit.spec.reference)
        out.append(ReleaseTest(rel, f"{rel.parameter}:{rel.item}", tuple(groups), "refit", d.chi2, d.df,
                               d.pvalue, (), spec, free))
    return out


def refit_candidate(estimator: Estimator, fit: FitResult, stats, spec: ModelSpec) -> FitResult:
    """``spec`` (``fit.spec`` with one constraint relabelled free) fitted from ``fit``'s
    estimates; warnings are the caller's to report."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", InvarianceWarning)
        return estimator.fit(spec, stats, start=map_theta(fit.spec, fit.theta, spec))


def _score_candidates(fit: FitResult, stats, kinds, release_in: str) -> list[ReleaseTest]:
    tests = score_tests(fit, stats, parameters=tuple(kinds))
    out = []
    if release_in == "all":
        for t in tests.multivariate:
            if np.isfinite(t.statistic):
                c = t.constraint
                out.append(ReleaseTest(c.release(None), c.label, c.testable_groups, "multivariate",
                                       float(t.statistic), int(t.df), float(t.pvalue), tuple(t.epc),
                                       release_constraint(fit.spec, c, None)))
        return out
    for t in tests.univariate:
        if np.isfinite(t.statistic):
            c = t.constraint
            out.append(ReleaseTest(c.release((t.group,)), c.label, (t.group,), "univariate",
                                   float(t.statistic), 1, float(t.pvalue), ((t.group, t.epc, t.epc_std),),
                                   release_constraint(fit.spec, c, (t.group,))))
    return out


def _rebuild_candidates(fit: FitResult, stats, kinds, release_in: str) -> list[Release]:
    """The releases a rebuilt (ordinal) level can still make for ``kinds``."""
    spec = fit.spec
    if tuple(stats.items) != tuple(spec.items):
        stats = stats.reorder_items(spec.items)
    K = stats.n_categories
    done = {(r.parameter, r.item, r.groups) for r in spec.released}
    every = {(r.parameter, r.item) for r in spec.released if r.groups is None}
    others = [g for g in spec.groups if g != spec.reference]
    out = []
    for kind in kinds:
        if kind not in ORDINAL_RELEASES:
            continue
        for i, it in enumerate(spec.items):
            if (kind, it) in every or (kind == "residual" and K[i] == 2) or (kind == "threshold" and K[i] == 0):
                continue
            if release_in == "all":
                out.append(Release(kind, it))
            else:
                out += [Release(kind, it, None, (g,)) for g in others if (kind, it, (g,)) not in done]
    return out

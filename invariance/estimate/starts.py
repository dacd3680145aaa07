"""Several starts around the optimizer: warm start, cold fallback, alternative starts.

Bifactor and second-order models often have more than one optimum (a rotated solution
where the general factor is carried by one block; METHODS section 14). A fit therefore
runs the analytic start of :mod:`invariance.estimate.start` plus a small deterministic set
of alternative starts (the loadings of the general or higher-order factor shrunk or
stretched against the others, each loading jittered by a seeded log-normal factor) and
keeps the lowest optimum. A warm start (a nested level's or a refit's previous
estimates) is tried first; when it fails, the cold start and then the alternatives are
tried before a failure is declared. :class:`StartRecord` says what was tried and how
many distinct optima were found.
"""

from __future__ import annotations

import weakref
from dataclasses import dataclass
from typing import Callable

import numpy as np

from ..model.spec import BETA, LAMBDA, PSI, THETA, ModelSpec
from .optimize import Outcome, minimize

__all__ = ["DEFAULT_SEED", "DEFAULT_STARTS", "StartRecord", "general_factors", "multimodal", "alternative_starts", "variance_bounds", "run_starts"]

#: Seed of the alternative starts when the pipeline gives none.
DEFAULT_SEED = 20121
#: Alternative starts for bifactor and second-order models.
DEFAULT_STARTS = 3
#: Two optima are distinct when their statistics differ by more than this.
_DISTINCT = 1e-4
#: (general scale, other scale) of the alternative starts, in turn.
_TILTS = ((0.5, 1.5), (1.5, 0.6), (1.0, 1.0))


@dataclass(frozen=True)
class StartRecord:
    """What the starts found: ``tried`` runs, ``converged`` of them, the distinct optima
    (lowest first) and which start gave the reported one."""

    tried: int
    converged: int
    optima: tuple[float, ...]
    chosen: str
    #: lowest statistic of a start that ran away, when below the best converged optimum
    runaway_below: float | None = None

    @property
    def distinct(self) -> int:
        return len(self.optima)

    @property
    def gap(self) -> float:
        """Statistic of the worst converged optimum minus the best (0 with one optimum)."""
        return float(self.optima[-1] - self.optima[0]) if self.optima else 0.0

    def to_dict(self) -> dict:
        return {"tried": self.tried, "converged": self.converged, "distinct_optima": self.distinct,
                "chi2_gap": self.gap, "optima": list(self.optima), "chosen": self.chosen,
                "runaway_below": self.runaway_below}


#: general factors per spec (a spec is immutable: its arrays are read-only)
_GENERAL: "weakref.WeakKeyDictionary[ModelSpec, frozenset[int]]" = weakref.WeakKeyDictionary()


def general_factors(spec: ModelSpec) -> frozenset[int]:
    """Factors loading on every item of a group while other factors exist (bifactor)."""
    found = _GENERAL.get(spec)
    if found is not None:
        return found
    out = set()
    lam = spec.matrix == LAMBDA
    p = len(spec.items)
    for g in range(len(spec.groups)):
        sel = lam & (spec.group == g)
        cols = spec.col[sel]
        uniq = np.unique(cols)
        if uniq.size > 1:
            out.update(int(c) for c in uniq if np.sum(cols == c) == p)
    found = _GENERAL[spec] = frozenset(out)
    return found


def multimodal(spec: ModelSpec) -> bool:
    """Is ``spec`` of a family known for several optima (bifactor, second-order)?"""
    return bool(general_factors(spec)) or bool(np.any((spec.matrix == BETA) & spec.free))


def alternative_starts(spec: ModelSpec, x0: np.ndarray, *, n: int, seed: int) -> list[np.ndarray]:
    """``n`` deterministic alternatives to the start ``x0`` (same seed, same starts)."""
    param = spec.param_index
    gen = general_factors(spec)
    tilt_general = np.zeros(spec.n_params, dtype=bool)
    tilt_other = np.zeros(spec.n_params, dtype=bool)
    for k in np.flatnonzero(spec.free & np.isin(spec.matrix, (LAMBDA, BETA))):
        if spec.matrix[k] == BETA or int(spec.col[k]) in gen:
            tilt_general[param[k]] = True
        else:
            tilt_other[param[k]] = True
    out = []
    for k in range(n):
        rng = np.random.default_rng([seed, k])
        a, b = _TILTS[k % len(_TILTS)]
        x = x0.copy()
        jitter = np.exp(rng.normal(0.0, 0.25, x.size))
        x[tilt_general] *= a * jitter[tilt_general]
        x[tilt_other] *= b * jitter[tilt_other]
        out.append(x)
    return out


def variance_bounds(spec: ModelSpec) -> np.ndarray:
    """Lower bounds: 0 for residual and factor variances, ``-inf`` for the rest."""
    lower = np.full(spec.n_params, -np.inf)
    var = spec.free & np.isin(spec.matrix, (PSI, THETA)) & (spec.row == spec.col)
    lower[spec.param_index[var]] = 0.0
    return lower


def _record(runs: list[tuple[str, Outcome]], chosen: str) -> StartRecord:
    vals = sorted(float(o.fun) for _, o in runs if o.converged and np.isfinite(o.fun))
    optima: list[float] = []
    for v in vals:
        if not optima or v - optima[-1] > _DISTINCT * max(1.0, 1e-4 * abs(v)):
            optima.append(v)
    away = [float(o.fun) for _, o in runs if o.status == 6 and np.isfinite(o.fun)]
    below = min(away) if away and optima and min(away) < optima[0] - _DISTINCT else None
    return StartRecord(len(runs), len(vals), tuple(optima), chosen, below)


def _pick(runs: list[tuple[str, Outcome]]) -> tuple[str, Outcome]:
    ok = [(k, o) for k, o in runs if o.converged]
    pool = ok or [(k, o) for k, o in runs if np.isfinite(o.fun)] or runs
    return min(pool, key=lambda ko: ko[1].fun if np.isfinite(ko[1].fun) else np.inf)


def run_starts(
    obj,
    spec: ModelSpec,
    cold: Callable[[], np.ndarray],
    *,
    start: np.ndarray | None = None,
    starts: int = DEFAULT_STARTS,
    seed: int | None = None,
    lower: np.ndarray | None = None,
    max_iter: int = 200,
    tol: float = 1e-12,
) -> tuple[Outcome, StartRecord]:
    """Minimize ``obj`` from a warm start (if given), the analytic start and alternatives.

    A converged warm start is accepted at once. Otherwise the analytic start ``cold()``
    runs; for bifactor and second-order models (:func:`multimodal`) ``starts``
    alternatives always follow, for other models only when everything before failed.
    The lowest converged optimum is kept (the lowest statistic when none converged).
    """
    run = lambda x: minimize(obj, x, max_iter=max_iter, tol=tol, lower=lower)
    runs: list[tuple[str, Outcome]] = []
    if start is not None:
        runs.append(("warm", run(np.asarray(start, dtype=float))))
        if runs[-1][1].converged:
            return runs[-1][1], _record(runs, "warm")
    x0 = cold()
    runs.append(("analytic", run(x0)))
    if multimodal(spec) or not runs[-1][1].converged:
        alts = alternative_starts(spec, x0, n=starts, seed=DEFAULT_SEED if seed is None else int(seed))
        for k, x in enumerate(alts, 1):
            runs.append((f"alternative {k}", run(x)))
    kind, best = _pick(runs)
    return best, _record(runs, kind)

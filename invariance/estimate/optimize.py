"""The optimizer: Fisher scoring with step halving, Newton polishing, and a
quasi-Newton fallback.

Fisher scoring (the expected information) is robust far from the optimum but converges
only linearly when the model misfits; once the Newton decrement is small, objectives that
offer an exact ``hessian(theta)`` switch to Newton steps, which converge quadratically.

One front door, :func:`minimize`, serves every objective (see
:mod:`invariance.estimate.objective`). Stop reasons come from the fixed table
:data:`STATUS`.

Lower bounds (``lower``, ``-inf`` where a parameter is unbounded) turn the scoring steps
into projected steps: a parameter at its bound whose gradient pushes it further out is
held there, the step is solved on the other parameters, and trial points are projected
back onto the bounds (Bertsekas 1982, projected Newton methods).

A run-away solution (a parameter heading off without bound, e.g. a residual variance
going to minus infinity while a loading grows) is caught within tens of iterations by
:func:`running_away`: the same parameters move the same way at every one of the last
:data:`RUNAWAY_WINDOW` iterations by steps that do not shrink. Their indices are kept in
``Outcome.running``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize as _sopt

from .linalg import arrow_solve, pd_solve

__all__ = ["STATUS", "RUNAWAY_WINDOW", "Outcome", "minimize", "running_away"]

#: Fixed table of stop reasons: code -> message.
STATUS = {
    0: "converged",
    1: "iteration limit reached before convergence",
    2: "no step decreased the objective (line search failed)",
    3: "the starting values give an implied covariance matrix that is not positive definite",
    4: "converged by the quasi-Newton fallback",
    5: "the quasi-Newton fallback did not converge",
    6: "estimates diverge (the model is empirically under-identified or its optimum lies on a boundary)",
}

#: Iterations over which a run-away trend is judged.
RUNAWAY_WINDOW = 16
#: The second opinion on a suspected run-away: scoring iterations it takes, and the
#: share of the earlier iterates' Newton decrement the later ones must keep to confirm it.
PROBE_STEPS = 3
PROBE_KEEP = 0.95


@dataclass(frozen=True)
class Outcome:
    """What the optimizer returns (one type for every objective)."""

    x: np.ndarray
    fun: float
    grad: np.ndarray
    info: np.ndarray | None
    status: int
    iterations: int
    #: indices of the parameters that ran away (status 6)
    running: tuple[int, ...] = ()

    def at_bound(self, lower: np.ndarray | None) -> np.ndarray:
        """Indices of the estimates held at their lower bound."""
        if lower is None:
            return np.empty(0, dtype=np.int64)
        return np.flatnonzero(np.isfinite(lower) & (self.x <= lower + 1e-8))

    @property
    def converged(self) -> bool:
        return self.status in (0, 4)

    @property
    def message(self) -> str:
        return STATUS[self.status]


def _solve(info: np.ndarray, grad: np.ndarray, part=None) -> np.ndarray:
    """Scoring step -info^-1 grad (arrow-structured when ``part`` is given), with a
    growing ridge when info is (near) singular or indefinite."""
    scale = max(np.abs(np.diag(info)).max(), 1.0)
    ridge = 0.0
    for _ in range(8):
        try:
            M = info + ridge * scale * np.eye(info.shape[0]) if ridge else info
            if part is not None:
                return -arrow_solve(M, grad, part)
            return -pd_solve(M, grad)
        except np.linalg.LinAlgError:
            ridge = 1e-8 if not ridge else ridge * 100
    return -np.linalg.lstsq(info, grad, rcond=None)[0]


def running_away(path: list[np.ndarray]) -> np.ndarray:
    """Indices of parameters that run away along the last iterates ``path``.

    A parameter runs away when it moved the same way at every step of the window, its
    steps in the second half of the window are not shorter than in the first half (a
    converging sequence has shrinking steps, at least by its linear rate), and it moved
    by more than rounding noise (1e-3 of its size plus one) over the window.
    """
    if len(path) < RUNAWAY_WINDOW + 1:
        return np.empty(0, dtype=np.int64)
    X = np.asarray(path[-(RUNAWAY_WINDOW + 1):])
    d = np.diff(X, axis=0)
    same_way = np.all(d > 0, axis=0) | np.all(d < 0, axis=0)
    half = RUNAWAY_WINDOW // 2
    early = np.abs(d[:half]).sum(axis=0)
    late = np.abs(d[half:]).sum(axis=0)
    moved = np.abs(X[-1] - X[0]) > 1e-3 * (1.0 + np.abs(X[0]))
    return np.flatnonzero(same_way & (late >= early) & moved)


def _direction(obj, x, f, g, h, part, newton_ok: bool, free: np.ndarray | None) -> tuple[np.ndarray, np.ndarray | None]:
    """Newton step (exact Hessian) when allowed and positive definite, else the scoring
    step; and the information (``h``, computed here when it was skipped). With ``free``
    given (bounded problems) the free parameters take that step and the others a
    diagonally scaled gradient step (Bertsekas 1982)."""
    if h is None and (not newton_ok or free is not None):
        h = obj.derivatives(x)[2]
    if free is not None:
        step = -g / np.maximum(np.abs(np.diag(h)), 1e-12)
        if free.any():
            sub = np.ix_(free, free)
            try:
                if not newton_ok:
                    raise np.linalg.LinAlgError
                step[free] = -pd_solve(obj.hessian(x)[sub], g[free])
            except np.linalg.LinAlgError:
                step[free] = _solve(h[sub], g[free])
        return step, h
    if newton_ok:
        try:
            hx = obj.hessian(x)
            if part is not None:
                return -arrow_solve(hx, g, part), h
            return -pd_solve(hx, g), h
        except np.linalg.LinAlgError:
            pass
    if h is None:
        h = obj.derivatives(x)[2]
    return _solve(h, g, part), h


def _scoring(obj, x: np.ndarray, *, max_iter: int, tol: float, lower: np.ndarray | None = None):
    """Scoring iterations; returns (x, f, g, h, status, iterations, running)."""
    none = np.empty(0, dtype=np.int64)
    if lower is not None:
        x = np.maximum(x, lower)
    try:
        f, g, h = obj.derivatives(x)
    except np.linalg.LinAlgError:
        return x, np.inf, None, None, 3, 0, none
    bound = 100.0 * (1.0 + np.max(np.abs(x)))  # far beyond any admissible scale of this data
    newton = hasattr(obj, "hessian")
    part = getattr(obj, "partition", None)
    decrement = np.inf
    path = [x]
    for it in range(1, max_iter + 1):
        free = None
        if lower is not None:
            # epsilon-active set: near the bound and pushed towards it
            free = ~((x <= lower + 1e-3) & (g > 0))
        step, h = _direction(obj, x, f, g, h, part, newton and decrement < 1.0, free)
        full = step if lower is None else np.maximum(x + step, lower) - x  # projected full step
        decrement = -float(g @ step)
        if abs(float(g @ full)) < tol * max(1.0, abs(f)) and np.max(np.abs(full)) < 1e-5:
            return x, f, g, h, 0, it - 1, none
        t = 1.0
        for _ in range(30):
            xn = x + t * step if lower is None else np.maximum(x + t * step, lower)
            fn = obj.value(xn)
            if np.isfinite(fn) and fn <= f + 1e-4 * float(g @ (xn - x)):
                break
            t *= 0.5
        else:
            return x, f, g, h, 2, it, none
        x = xn
        path.append(x)
        run = running_away(path)
        if run.size or np.max(np.abs(x)) > bound:
            try:
                f, g, h = obj.derivatives(x)
            except np.linalg.LinAlgError:
                pass
            if not run.size:
                run = np.flatnonzero(np.abs(x) > bound / 10)
            return x, f, g, h, 6, it, run
        try:
            # a Newton step at x needs no information (computed there only if it fails)
            f, g, h = obj.derivatives(x, information=not (newton and decrement < 1.0 and lower is None))
        except np.linalg.LinAlgError:
            return x, np.inf, None, None, 2, it, none
    return x, f, g, h, 1, max_iter, none


def minimize(
    obj, x0: np.ndarray, *, max_iter: int = 200, tol: float = 1e-12, lower: np.ndarray | None = None
) -> Outcome:
    """Minimize ``obj`` from ``x0``.

    Fisher scoring (Gauss-Newton with the expected information) with backtracking;
    if it stalls, L-BFGS-B with the analytic gradient, then scoring again to polish.

    Parameters
    ----------
    obj
        An objective (``value``, ``derivatives``, ``n_params``).
    x0
        Starting vector.
    max_iter
        Iteration limit of each scoring run.
    tol
        Convergence tolerance on the Newton decrement, relative to the objective.
    lower
        Lower bounds (``-inf`` = none); ``None`` for an unbounded problem.
    """
    x0 = np.asarray(x0, dtype=float)
    if lower is not None and not np.isfinite(lower).any():
        lower = None
    x, f, g, h, status, it, run = _scoring(obj, x0, max_iter=max_iter, tol=tol, lower=lower)
    if status == 0:
        return Outcome(x, f, g, h, 0, it)
    if status == 3:
        return Outcome(x, np.inf, np.full_like(x, np.nan), None, 3, 0)
    first = Outcome(x, f, g, h, 6, it, tuple(int(j) for j in run)) if status == 6 else None

    def fun(z):
        try:
            v, gr, _ = obj.derivatives(z, information=False)
        except np.linalg.LinAlgError:
            return 1e20, np.zeros_like(z)
        return v, gr

    bounds = None if lower is None else [(lo if np.isfinite(lo) else None, None) for lo in lower]
    # A suspected run-away gets a second opinion: a slow, steady approach to a finite
    # optimum in a flat valley looks the same for a while. A short L-BFGS-B probe, then
    # scoring in short legs (:func:`_second_opinion`), either converge (a false alarm) or
    # confirm the run-away, in which case the first stopping point (closer to the data's
    # scale) is what is reported.
    res = _sopt.minimize(fun, x, jac=True, method="L-BFGS-B", bounds=bounds,
                         options={"maxiter": 300 if first else 20000, "ftol": 1e-15, "gtol": 1e-9})
    if first is not None:
        return _second_opinion(obj, first, res.x, it + int(res.nit), max_iter=max_iter, tol=tol, lower=lower)
    x2, f2, g2, h2, st2, it2, run2 = _scoring(obj, res.x, max_iter=max_iter, tol=tol, lower=lower)
    total = it + int(res.nit) + it2
    if st2 == 0:
        return Outcome(x2, f2, g2, h2, 4, total)
    if st2 == 6:
        return Outcome(x2, f2, g2, h2, 6, total, tuple(int(j) for j in run2))
    if f2 is not None and np.isfinite(f2) and g2 is not None:
        return Outcome(x2, f2, g2, h2, 5 if status != 1 else 1, total)
    return Outcome(x, f, g, h, status, total)


def _decrement(obj, x: np.ndarray, g: np.ndarray | None, h: np.ndarray | None, lower: np.ndarray | None) -> float:
    """Newton decrement g' I^-1 g at ``x`` over the parameters free to move (those at a
    lower bound and pushed towards it excluded); derivatives computed when not given."""
    if g is None or h is None:
        _, g, h = obj.derivatives(x)
    if lower is None:
        return -float(g @ _solve(h, g, getattr(obj, "partition", None)))
    free = ~((x <= lower + 1e-3) & (g > 0))
    return -float(g[free] @ _solve(h[np.ix_(free, free)], g[free])) if free.any() else 0.0


def _keeps_running(points: list[np.ndarray], decrements: list[float], flagged: tuple[int, ...],
                   fun: float) -> bool:
    """Do the probe's iterates ``points`` and their Newton decrements confirm a run-away of
    some parameter in ``flagged`` (objective ``fun``)?

    Yes when such a parameter moved the same way at every step, farther in all than
    rounding noise (1e-3 of its size plus one), while the decrement stayed above noise
    (1e-6 of the objective, at least 1e-6) and did not shrink (its mean over the later
    half of the iterates at least :data:`PROBE_KEEP` times the earlier half's). Towards
    a finite optimum, however flat the valley, the decrement shrinks to zero; on a
    run-away the objective keeps promising a decrease that steps cut back at the edge
    of the admissible region never deliver. Convergence at a linear rate r shrinks the
    decrement by about r^4 between the halves of four iterates, so only r > 0.987 is
    read as running on: a rate at which hundreds more iterations would not converge.
    """
    X = np.asarray(points)[:, list(flagged)]
    d = np.diff(X, axis=0)
    same_way = np.all(d > 0, axis=0) | np.all(d < 0, axis=0)
    moved = np.abs(X[-1] - X[0]) > 1e-3 * (1.0 + np.abs(X[0]))
    dec = np.asarray(decrements)
    half = dec.size // 2
    promising = dec.min() > 1e-6 * max(1.0, abs(fun)) and dec[half:].mean() >= PROBE_KEEP * dec[:half].mean()
    return bool(np.any(same_way & moved) and promising)


def _second_opinion(obj, first: Outcome, start: np.ndarray, spent: int, *, max_iter: int, tol: float,
                    lower: np.ndarray | None) -> Outcome:
    """Confirm or dismiss the suspected run-away ``first`` by scoring from ``start``.

    Scoring takes :data:`PROBE_STEPS` single iterations. If it converges, the alarm was
    false (status 4). If a flagged parameter keeps running while the Newton decrement
    does not shrink (:func:`_keeps_running`), the run-away is confirmed at once; so it
    is when a step fails or scoring flags a run-away again. Only a mixed picture
    (neither converging nor running on) earns a full scoring run, which must converge
    to dismiss the alarm. A confirmed run-away reports ``first`` (status 6). ``spent``
    counts the iterations so far.
    """
    confirmed = lambda n: Outcome(first.x, first.fun, first.grad, first.info, 6, n, first.running)
    points, total = [np.asarray(start, dtype=float)], spent
    try:
        decrements = [_decrement(obj, points[0], None, None, lower)]
    except np.linalg.LinAlgError:
        return confirmed(total)
    for _ in range(PROBE_STEPS):
        x2, f2, g2, h2, st2, it2, _ = _scoring(obj, points[-1], max_iter=1, tol=tol, lower=lower)
        total += it2
        if st2 == 0:
            return Outcome(x2, f2, g2, h2, 4, total)
        if st2 != 1:
            return confirmed(total)
        points.append(x2)
        decrements.append(_decrement(obj, x2, g2, h2, lower))
    if _keeps_running(points, decrements, first.running, first.fun):
        return confirmed(total)
    x2, f2, g2, h2, st2, it2, _ = _scoring(obj, points[-1], max_iter=max_iter, tol=tol, lower=lower)
    total += it2
    return Outcome(x2, f2, g2, h2, 4, total) if st2 == 0 else confirmed(total)

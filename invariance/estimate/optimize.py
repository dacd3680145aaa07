"""The optimizer: Fisher scoring with step halving, Newton polishing, and a
quasi-Newton fallback.

Fisher scoring (the expected information) is robust far from the optimum but converges
only linearly when the model misfits; once the Newton decrement is small, objectives that
offer an exact ``hessian(theta)`` switch to Newton steps (below :data:`NEWTON_BELOW`),
which converge quadratically. A point reached by a full Newton step is judged converged
with that step's Hessian (:func:`_reuse`, a tenfold margin) before a new one is computed,
and a step that small is taken with it (a chord step).

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
``Outcome.running``. A suspected run-away gets a second opinion before it is declared
(:func:`_second_opinion`): an L-BFGS-B probe, then a watched scoring polish that stops
once a flagged parameter keeps running while the steps deliver far less than the
decrease the Newton decrement promises; a slow approach to a finite optimum in a flat
valley delivers it, and converges.
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

#: Newton steps (exact Hessian) replace scoring steps once the scoring decrement
#: g' I^-1 g (in chi-square units) falls below this.
NEWTON_BELOW = 10.0

#: After a full Newton step, the next step reuses its Hessian when the decrement this
#: gives is below this fraction of the objective (the quadratic phase).
CHORD_BELOW = 1e-6

#: Iterations over which a run-away trend is judged.
RUNAWAY_WINDOW = 16
#: The second opinion on a suspected run-away: iterates judged together, the share of the
#: earlier half's Newton decrement the later half must keep, and the largest share of the
#: promised decrease the steps may deliver, to confirm it.
PROBE_WINDOW = 5
PROBE_KEEP = 0.95
PROBE_DELIVER = 0.2


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
    half = RUNAWAY_WINDOW // 2
    early = np.abs(d[:half]).sum(axis=0)
    late = np.abs(d[half:]).sum(axis=0)
    return np.flatnonzero(_one_way(X) & (late >= early))


def _one_way(X: np.ndarray) -> np.ndarray:
    """Per column of the iterates ``X`` (rows in order): moved the same way at every step,
    and farther in all than rounding noise (1e-3 of its size plus one)."""
    d = np.diff(X, axis=0)
    same_way = np.all(d > 0, axis=0) | np.all(d < 0, axis=0)
    return same_way & (np.abs(X[-1] - X[0]) > 1e-3 * (1.0 + np.abs(X[0])))


def _free(x: np.ndarray, g: np.ndarray, lower: np.ndarray) -> np.ndarray:
    """Parameters free to move: all but those near their lower bound (epsilon-active set)
    whose gradient pushes them towards it."""
    return ~((x <= lower + 1e-3) & (g > 0))


def _direction(obj, x, f, g, h, part, newton_ok: bool, free: np.ndarray | None):
    """Newton step (exact Hessian) when allowed and positive definite, else the scoring
    step; the information (``h``, computed here when it was skipped); and the Hessian when
    the step is a Newton step (else ``None``). With ``free`` given (bounded problems) the
    free parameters take that step and the others a diagonally scaled gradient step
    (Bertsekas 1982)."""
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
        return step, h, None
    if newton_ok:
        try:
            hx = obj.hessian(x)
            return _newton(hx, g, part), h, hx
        except np.linalg.LinAlgError:
            pass
    if h is None:
        h = obj.derivatives(x)[2]
    return _solve(h, g, part), h, None


def _newton(hx: np.ndarray, g: np.ndarray, part) -> np.ndarray:
    """Newton step -hx^-1 g (arrow-structured when ``part`` is given); raises
    ``LinAlgError`` when ``hx`` is not positive definite."""
    return -arrow_solve(hx, g, part) if part is not None else -pd_solve(hx, g)


def _small(g: np.ndarray, step: np.ndarray, f: float, tol: float, margin: float = 1.0) -> bool:
    """The convergence test: the decrement g'step is below ``tol`` relative to the
    objective and no parameter moves by 1e-5 (both scaled by ``margin``)."""
    return abs(float(g @ step)) < margin * tol * max(1.0, abs(f)) and float(np.max(np.abs(step))) < margin * 1e-5


def _reuse(hx: np.ndarray, g: np.ndarray, part, f: float, tol: float) -> tuple[bool, np.ndarray | None]:
    """At a point reached by a full Newton step, the step of that step's Hessian ``hx``
    instead of a new one: ``(True, None)`` when it shows convergence (with a tenfold
    margin: near the optimum the Hessian changes by O(step), so the Newton step is
    estimated to a few digits); ``(False, step)`` when its decrement is already below
    :data:`CHORD_BELOW` of the objective, so that the step can be taken as it is (a chord
    step: near the optimum it shrinks the error by about the size of the last step);
    ``(False, None)`` when a new Hessian is needed."""
    try:
        step = _newton(hx, g, part)
    except np.linalg.LinAlgError:
        return False, None
    if _small(g, step, f, tol, margin=0.1):
        return True, None
    return False, (step if -float(g @ step) < CHORD_BELOW * max(1.0, abs(f)) else None)


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
    hx = None  # the Hessian of the last step when it was a full Newton step
    for it in range(1, max_iter + 1):
        free = None
        if lower is not None:
            free = _free(x, g, lower)
        done, step = _reuse(hx, g, part, f, tol) if hx is not None else (False, None)
        if done:
            return x, f, g, h, 0, it - 1, none
        if step is None:
            step, h, hx = _direction(obj, x, f, g, h, part, newton and decrement < NEWTON_BELOW, free)
        full = step if lower is None else np.maximum(x + step, lower) - x  # projected full step
        decrement = -float(g @ step)
        if _small(g, full, f, tol):
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
        if t < 1.0:
            hx = None
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
            f, g, h = obj.derivatives(x, information=not (newton and decrement < NEWTON_BELOW and lower is None))
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

    # A suspected run-away gets a second opinion: a slow, steady approach to a finite
    # optimum in a flat valley looks the same for a while. A short L-BFGS-B probe and a
    # watched scoring polish (:func:`_second_opinion`) either converge (a false alarm) or
    # confirm the run-away, in which case the first stopping point (closer to the data's
    # scale) is what is reported.
    res = _quasi_newton(obj, x, lower, first)
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


def _quasi_newton(obj, x: np.ndarray, lower: np.ndarray | None, first: Outcome | None) -> _sopt.OptimizeResult:
    """L-BFGS-B from ``x`` with the analytic gradient (scipy's result). As the second
    opinion on the suspected run-away ``first`` it takes at most 300 iterations and stops
    once :func:`running_away` fires on its own iterates for a flagged parameter."""

    def fun(z):
        try:
            v, gr, _ = obj.derivatives(z, information=False)
        except np.linalg.LinAlgError:
            return 1e20, np.zeros_like(z)
        return v, gr

    trail = [x]

    def same_run(intermediate_result) -> None:
        trail.append(np.array(intermediate_result.x))
        if np.intersect1d(running_away(trail), first.running).size:
            raise StopIteration

    bounds = None if lower is None else [(lo if np.isfinite(lo) else None, None) for lo in lower]
    return _sopt.minimize(fun, x, jac=True, method="L-BFGS-B", bounds=bounds, callback=same_run if first else None,
                          options={"maxiter": 300 if first else 20000, "ftol": 1e-15, "gtol": 1e-9})


def _decrement(obj, x: np.ndarray, g: np.ndarray, h: np.ndarray, lower: np.ndarray | None) -> float:
    """Newton decrement g' I^-1 g at ``x`` (gradient ``g``, information ``h``) over the
    parameters free to move (those at a lower bound and pushed towards it excluded)."""
    if lower is None:
        return -float(g @ _solve(h, g, getattr(obj, "partition", None)))
    free = _free(x, g, lower)
    return -float(g[free] @ _solve(h[np.ix_(free, free)], g[free])) if free.any() else 0.0


def _keeps_running(points: list[np.ndarray], funs: list[float], decrements: list[float],
                   flagged: tuple[int, ...]) -> bool:
    """Do the iterates ``points``, their objective values and Newton decrements
    lambda = g' I^-1 g confirm a run-away of some parameter in ``flagged``?

    Yes when such a parameter moved the same way at every step, farther in all than
    rounding noise (1e-3 of its size plus one), while the steps delivered less than
    :data:`PROBE_DELIVER` of the decrease lambda / 2 the quadratic model promised and
    lambda did not shrink (its mean over the later half of the iterates at least
    :data:`PROBE_KEEP` times the earlier half's) and stayed above noise (1e-6 of the
    objective, at least 1e-6). In a valley towards a finite optimum, however flat,
    steps deliver about what the model promises, and lambda shrinks to zero at the end;
    on a run-away the objective keeps promising a decrease that steps cut back at the
    edge of the admissible region never deliver.
    """
    X = np.asarray(points)[:, list(flagged)]
    lam = np.asarray(decrements)
    half = lam.size // 2
    short = np.all(-np.diff(funs) < PROBE_DELIVER * lam[:-1] / 2)
    steady = lam[half:].mean() >= PROBE_KEEP * lam[:half].mean() and lam.min() > 1e-6 * max(1.0, abs(funs[-1]))
    return bool(np.any(_one_way(X)) and short and steady)


class _Confirmed(Exception):
    """Ends the second opinion's scoring run: the run-away is confirmed."""


class _Watch:
    """The objective as the second opinion's scoring run sees it: every call goes to
    ``obj``; each iterate at which derivatives are taken is kept with its Newton
    decrement, and :class:`_Confirmed` is raised as soon as the last
    :data:`PROBE_WINDOW` iterates confirm the run-away of ``first`` (:func:`_keeps_running`).
    """

    def __init__(self, obj, first: Outcome, lower: np.ndarray | None) -> None:
        self.obj, self.first, self.lower = obj, first, lower
        self.points: list[np.ndarray] = []
        self.funs: list[float] = []
        self.decrements: list[float] = []

    def __getattr__(self, name: str):
        return getattr(self.obj, name)

    def derivatives(self, x: np.ndarray, *, information: bool = True):
        f, g, h = self.obj.derivatives(x, information=True)
        if not self.points or not np.array_equal(self.points[-1], x):
            self.points.append(np.array(x, dtype=float))
            self.funs.append(float(f))
            self.decrements.append(_decrement(self.obj, x, g, h, self.lower))
            w = PROBE_WINDOW
            if len(self.points) >= w and _keeps_running(self.points[-w:], self.funs[-w:], self.decrements[-w:],
                                                        self.first.running):
                raise _Confirmed
        return f, g, h if information else None


def _second_opinion(obj, first: Outcome, start: np.ndarray, spent: int, *, max_iter: int, tol: float,
                    lower: np.ndarray | None) -> Outcome:
    """Confirm or dismiss the suspected run-away ``first`` by scoring from ``start``.

    The scoring run converges: the alarm was false (status 4). It stops as soon as
    :data:`PROBE_WINDOW` iterates show a flagged parameter running on by steps that
    deliver a small share of the promised decrease while the Newton decrement holds
    (:class:`_Watch`, :func:`_keeps_running`); otherwise it runs to its end, and any end
    but convergence confirms the run-away, as a scoring run flagging it again would.
    A confirmed run-away reports ``first`` (status 6). ``spent`` counts the iterations
    so far.
    """
    watch = _Watch(obj, first, lower)
    try:
        x2, f2, g2, h2, st2, it2, _ = _scoring(watch, start, max_iter=max_iter, tol=tol, lower=lower)
    except _Confirmed:
        st2, it2 = 6, len(watch.points) - 1
    total = spent + it2
    if st2 == 0:
        return Outcome(x2, f2, g2, h2, 4, total)
    return Outcome(first.x, first.fun, first.grad, first.info, 6, total, first.running)

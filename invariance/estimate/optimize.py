"""The optimizer: Fisher scoring with step halving, Newton polishing, and a
quasi-Newton fallback.

Fisher scoring (the expected information) is robust far from the optimum but converges
only linearly when the model misfits; once the Newton decrement is small, objectives that
offer an exact ``hessian(theta)`` switch to Newton steps, which converge quadratically.

One front door, :func:`minimize`, serves every objective (see
:mod:`invariance.estimate.objective`). Stop reasons come from the fixed table
:data:`STATUS`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize as _sopt

from .linalg import arrow_solve

__all__ = ["STATUS", "Outcome", "minimize"]

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


@dataclass(frozen=True)
class Outcome:
    """What the optimizer returns (one type for every objective)."""

    x: np.ndarray
    fun: float
    grad: np.ndarray
    info: np.ndarray | None
    status: int
    iterations: int

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
    eye = np.eye(info.shape[0])
    for _ in range(8):
        try:
            M = info + ridge * scale * eye if ridge else info
            if part is not None:
                return -arrow_solve(M, grad, part)
            c = np.linalg.cholesky(M)
            return -np.linalg.solve(c.T, np.linalg.solve(c, grad))
        except np.linalg.LinAlgError:
            ridge = 1e-8 if not ridge else ridge * 100
    return -np.linalg.lstsq(info, grad, rcond=None)[0]


def _scoring(obj, x: np.ndarray, *, max_iter: int, tol: float):
    try:
        f, g, h = obj.derivatives(x)
    except np.linalg.LinAlgError:
        return x, np.inf, None, None, 3, 0
    bound = 100.0 * (1.0 + np.max(np.abs(x)))  # far beyond any admissible scale of this data
    newton = hasattr(obj, "hessian")
    part = getattr(obj, "partition", None)
    decrement = np.inf
    for it in range(1, max_iter + 1):
        step = None
        if newton and decrement < 1.0:
            try:
                hx = obj.hessian(x)
                step = -arrow_solve(hx, g, part) if part is not None else -np.linalg.solve(np.linalg.cholesky(hx).T, np.linalg.solve(np.linalg.cholesky(hx), g))
            except np.linalg.LinAlgError:
                step = None
        if step is None:
            step = _solve(h, g, part)
        decrement = -float(g @ step)
        if decrement < tol * max(1.0, abs(f)) and np.max(np.abs(step)) < 1e-5:
            return x, f, g, h, 0, it - 1
        t = 1.0
        for _ in range(30):
            xn = x + t * step
            fn = obj.value(xn)
            if np.isfinite(fn) and fn <= f + 1e-4 * t * float(g @ step):
                break
            t *= 0.5
        else:
            return x, f, g, h, 2, it
        x = xn
        if np.max(np.abs(x)) > bound:
            try:
                f, g, h = obj.derivatives(x)
            except np.linalg.LinAlgError:
                pass
            return x, f, g, h, 6, it
        try:
            f, g, h = obj.derivatives(x)
        except np.linalg.LinAlgError:
            return x, np.inf, None, None, 2, it
    return x, f, g, h, 1, max_iter


def minimize(obj, x0: np.ndarray, *, max_iter: int = 200, tol: float = 1e-12) -> Outcome:
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
    """
    x0 = np.asarray(x0, dtype=float)
    x, f, g, h, status, it = _scoring(obj, x0, max_iter=max_iter, tol=tol)
    if status == 0:
        return Outcome(x, f, g, h, 0, it)
    if status == 3:
        return Outcome(x, np.inf, np.full_like(x, np.nan), None, 3, 0)
    if status == 6:
        return Outcome(x, f, g, h, 6, it)

    def fun(z):
        try:
            v, gr, _ = obj.derivatives(z, information=False)
        except np.linalg.LinAlgError:
            return 1e20, np.zeros_like(z)
        return v, gr

    res = _sopt.minimize(fun, x, jac=True, method="L-BFGS-B", options={"maxiter": 20000, "ftol": 1e-15, "gtol": 1e-9})
    x2, f2, g2, h2, st2, it2 = _scoring(obj, res.x, max_iter=max_iter, tol=tol)
    total = it + int(res.nit) + it2
    if st2 == 0:
        return Outcome(x2, f2, g2, h2, 4, total)
    if f2 is not None and np.isfinite(f2) and g2 is not None:
        return Outcome(x2, f2, g2, h2, 5 if status != 1 else 1, total)
    return Outcome(x, f, g, h, status, total)

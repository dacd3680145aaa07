"""What a solution says about itself: the observed information, the improper parts of a
solution (:func:`diagnose`) and the record of how it was estimated
(:func:`estimation_record`). Shared by every estimator's front door."""

from __future__ import annotations

import warnings

import numpy as np

from ..errors import ConvergenceWarning, ImproperSolutionWarning
from ..model.spec import ModelSpec
from .linalg import all_above, arrow_min_eigen
from .runaway import describe_bounds, describe_runaway
from .starts import general_factors

__all__ = ["observed_information", "diagnose", "estimation_record", "warn_problems"]


def observed_information(obj, theta: np.ndarray, h: float = 1e-6) -> np.ndarray:
    """Observed Hessian of the objective: central differences of the analytic gradient."""
    q = theta.size
    H = np.empty((q, q))
    for j in range(q):
        step = h * max(1.0, abs(theta[j]))
        e = np.zeros(q)
        e[j] = step
        gp = obj.derivatives(theta + e, information=False)[1]
        gm = obj.derivatives(theta - e, information=False)[1]
        H[:, j] = (gp - gm) / (2 * step)
    return (H + H.T) / 2


def diagnose(spec: ModelSpec, matrices, sigmas, info: np.ndarray | None, part=None) -> list[str]:
    """Name the improper parts of a solution.

    Checks negative residual variances (Heywood cases), non-positive-definite factor
    (Psi) and implied covariance matrices, and a singular information matrix (naming
    the parameters in its null space).
    """
    problems = []
    for g, (mats, sigma) in enumerate(zip(matrices, sigmas)):
        gname = spec.groups[g]
        theta = mats[3]
        for i in np.flatnonzero(np.diag(theta) < 0):
            problems.append(f"negative residual variance of item {spec.items[i]} in group {gname}")
        psi = mats[2]
        if psi.size and not all_above(psi, -1e-10):
            problems.append(f"factor covariance matrix not positive definite in group {gname}")
        if not all_above(sigma, 0.0):
            problems.append(f"implied covariance matrix not positive definite in group {gname}")
    singular = False
    if info is not None and info.size:
        if part is not None:
            singular = arrow_min_eigen(info, part) < 1e-10
        else:
            d = np.sqrt(np.clip(np.abs(np.diag(info)), 1e-300, None))
            singular = not all_above(info / np.outer(d, d), 1e-10)
    if singular:
        d = np.sqrt(np.clip(np.abs(np.diag(info)), 1e-300, None))
        scaled = info / np.outer(d, d)
        w, v = np.linalg.eigh(scaled)
        null = w < 1e-10 * max(w[-1], 1.0)
        if null.any():
            comp = np.abs(v[:, null]).max(axis=1)
            names = [spec.param_labels[j] for j in np.flatnonzero(comp > 0.1)]
            problems.append(
                "singular information matrix (model not identified); parameters involved: "
                + ", ".join(names[:12])
                + (" ..." if len(names) > 12 else "")
            )
    return problems


def estimation_record(spec: ModelSpec, out, record, lower, *, options: dict) -> dict:
    """``extra["estimation"]``: what was estimated, with which ``options`` (variances,
    starts, seed), and what the optimizer found."""
    general = [spec.factors[c] for c in sorted(general_factors(spec))]
    runaway = describe_runaway(spec, out.running, out.x, general=general) if out.status == 6 else []
    notes = []
    if record.runaway_below is not None and not runaway:
        notes = [f"in group{'s' if len(spec.groups) > 1 else ''} {', '.join(spec.groups)} another start runs away "
                   f"to a lower statistic ({record.runaway_below:.2f} against {out.fun:.2f}): the reported solution is "
                   "the best converged one, not the infimum; estimate within bounds with estimation: "
                   "{variances: nonnegative} to get the best admissible solution"]
    at_bound = describe_bounds(spec, out.x, lower) if lower is not None else []
    if runaway:
        optimum = "no finite optimum: the estimates run away (reported where they were stopped)"
    elif lower is not None:
        optimum = "optimum within bounds (residual and factor variances >= 0)" + (
            ", with estimates at a bound" if at_bound else "")
    else:
        optimum = "unbounded optimum (variances unrestricted)"
    return {"variances": options["variances"], "optimum": optimum, "starts": record.to_dict(),
            "at_bound": at_bound, "runaway": runaway, "notes": notes,
            "options": {k: options[k] for k in ("variances", "starts", "seed")}}


def warn_problems(spec: ModelSpec, out, problems: list[str], notes=(), *, stacklevel: int = 4) -> None:
    """Emit the convergence, improper-solution and estimation-note warnings of a fit;
    a failed convergence is put first in ``problems``."""
    if not out.converged:
        problems.insert(0, f"not converged: {out.message}")
        warnings.warn(f"{spec.level or 'model'}: {out.message}", ConvergenceWarning, stacklevel=stacklevel)
    for p in problems:
        if not p.startswith("not converged"):
            warnings.warn(f"{spec.level or 'model'}: {p}", ImproperSolutionWarning, stacklevel=stacklevel)
    for note in notes:
        warnings.warn(f"{spec.level or 'model'}: {note}", ConvergenceWarning, stacklevel=stacklevel)

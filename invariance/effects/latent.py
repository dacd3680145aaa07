"""Latent mean differences and variance ratios against the reference group.

Once (partial) scalar invariance holds, factor means are comparable: the difference of
the total factor means (A alpha) of each group and the reference, raw and in reference-
group SD units (difference / sqrt(reference factor variance)); standard errors by the
delta method from the estimates' asymptotic covariance (``FitResult.acov``) with a
central-difference Jacobian of the estimates -> statistic map; Wald z, two-sided p and
95% interval. Variance ratios (group / reference, total factor variances A Psi A') with a
delta-method SE and an interval formed on the log scale (common practice).

Guard (common practice; Byrne, Shavelson & Muthen 1989): a factor's means are compared
only when it keeps at least two items whose loading and intercept are both held equal
across all groups; variances only when it keeps at least two equal loadings. Otherwise
the comparison is skipped with a note saying why.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats as _st

from ..estimate.kernels import compile_spec, group_matrices
from ..model.spec import BETA, LAMBDA, NU, ModelSpec
from ..estimate.result import FitResult

__all__ = ["MeanDifference", "VarianceRatio", "LatentComparison", "invariant_items", "compare_latent"]


@dataclass(frozen=True)
class MeanDifference:
    """Latent mean of a group minus the reference's."""

    factor: str
    group: str
    reference: str
    difference: float
    se: float
    z: float
    pvalue: float
    ci_low: float
    ci_high: float
    standardized: float
    standardized_se: float

    def to_dict(self) -> dict:
        return dict(self.__dict__)


@dataclass(frozen=True)
class VarianceRatio:
    """Latent variance of a group divided by the reference's (test of ratio 1 on the log scale)."""

    factor: str
    group: str
    reference: str
    ratio: float
    se: float
    z: float
    pvalue: float
    ci_low: float
    ci_high: float

    def to_dict(self) -> dict:
        return dict(self.__dict__)


@dataclass(frozen=True)
class LatentComparison:
    """Latent comparisons of one fitted level."""

    level: str
    reference: str
    means: tuple[MeanDifference, ...]
    variances: tuple[VarianceRatio, ...]
    invariant_items: dict
    notes: tuple[str, ...]

    def to_dict(self) -> dict:
        return {
            "level": self.level,
            "reference": self.reference,
            "means": [m.to_dict() for m in self.means],
            "variances": [v.to_dict() for v in self.variances],
            "invariant_items": {k: {kk: list(vv) for kk, vv in v.items()} for k, v in self.invariant_items.items()},
            "notes": list(self.notes),
        }


def _shared(spec: ModelSpec, mask: np.ndarray) -> bool:
    """The entries under ``mask`` are free, one in every group, with one label."""
    ent = np.flatnonzero(mask)
    if ent.size != len(spec.groups) or not spec.free[ent].all():
        return False
    return len(set(spec.label[ent])) == 1 and np.unique(spec.group[ent]).size == len(spec.groups)


def invariant_items(spec: ModelSpec) -> dict[str, dict[str, tuple[str, ...]]]:
    """Per factor, the items whose loading (``loading``) and whose loading and
    intercept (``scalar``) are held equal across every group.

    A factor without items of its own (a higher-order factor) gets the items of the
    factors it explains.
    """
    out: dict[str, dict[str, tuple[str, ...]]] = {}
    single = len(spec.groups) == 1
    for f_i, f in enumerate(spec.factors):
        load, scal = [], []
        for i_i, it in enumerate(spec.items):
            lm = (spec.matrix == LAMBDA) & (spec.row == i_i) & (spec.col == f_i)
            if not lm.any():
                continue
            ok_l = single or _shared(spec, lm)
            ok_n = single or _shared(spec, (spec.matrix == NU) & (spec.row == i_i))
            if ok_l:
                load.append(it)
                if ok_n:
                    scal.append(it)
        out[f] = {"loading": tuple(load), "scalar": tuple(scal)}
    for f_i, f in enumerate(spec.factors):
        if out[f]["loading"] or out[f]["scalar"]:
            continue
        kids = sorted({spec.factors[r] for r, c, m in zip(spec.row, spec.col, spec.matrix) if m == BETA and c == f_i})
        if kids:
            out[f] = {k: tuple(i for kid in kids for i in out[kid][k]) for k in ("loading", "scalar")}
    return out


def _moments(layouts, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Total factor means and variances of every group, stacked (G, m) each."""
    means, vars_ = [], []
    for lay in layouts:
        lam, beta, psi, th, nu, alpha = group_matrices(lay, theta)
        A = np.linalg.inv(np.eye(beta.shape[0]) - beta)
        means.append(A @ alpha)
        vars_.append(np.diag(A @ psi @ A.T))
    return np.array(means), np.array(vars_)


def _jacobian(fun, theta: np.ndarray, h: float = 1e-6) -> np.ndarray:
    f0 = fun(theta)
    J = np.empty((f0.size, theta.size))
    for j in range(theta.size):
        e = np.zeros_like(theta)
        e[j] = h * max(1.0, abs(theta[j]))
        J[:, j] = (fun(theta + e) - fun(theta - e)) / (2 * e[j])
    return J


def compare_latent(fit: FitResult, *, reference: str | None = None, min_items: int = 2, level: float = 0.95) -> LatentComparison:
    """Latent mean differences and variance ratios of a fitted (partial) scalar level.

    Parameters
    ----------
    fit
        The fitted level; its ``acov`` gives the standard errors.
    reference
        Reference group (default: the spec's).
    min_items
        Invariant items a factor must keep (default 2; common practice).
    level
        Confidence level of the intervals.
    """
    spec = fit.spec
    ref = reference or spec.reference or spec.groups[0]
    r = spec.groups.index(ref)
    layouts = compile_spec(spec)
    G, m = len(spec.groups), len(spec.factors)
    inv = invariant_items(spec)
    zq = float(_st.norm.ppf(0.5 + level / 2))
    notes = []
    if fit.acov is None:
        notes.append("no standard errors: the information matrix is singular")
    acov = fit.acov if fit.acov is not None else np.full((spec.n_params, spec.n_params), np.nan)

    def stat(theta):
        mu, var = _moments(layouts, theta)
        diff = mu - mu[r]
        std = diff / np.sqrt(var[r])
        ratio = np.log(var / var[r])
        return np.concatenate([diff.ravel(), std.ravel(), ratio.ravel()])

    vals = stat(fit.theta)
    J = _jacobian(stat, fit.theta)
    se = np.sqrt(np.clip(np.einsum("ij,jk,ik->i", J, acov, J), 0, None))
    mu, var = _moments(layouts, fit.theta)
    means, ratios = [], []
    scalar_ok = spec.level in ("scalar", "strict") or spec.level.startswith(("scalar", "strict"))
    if not scalar_ok:
        notes.append(f"latent means are compared only once scalar invariance holds; this level is {spec.level or 'unnamed'}")
    for f_i, f in enumerate(spec.factors):
        n_s, n_l = len(inv[f]["scalar"]), len(inv[f]["loading"])
        mean_ok = scalar_ok and n_s >= min_items
        if scalar_ok and not mean_ok:
            notes.append(
                f"means of {f} not compared: it keeps {n_s} item(s) with equal loading and intercept; "
                f"at least {min_items} are needed (Byrne, Shavelson & Muthen 1989)"
            )
        var_ok = n_l >= min_items
        if not var_ok:
            notes.append(f"variances of {f} not compared: it keeps {n_l} equal loading(s); at least {min_items} are needed")
        for g, gname in enumerate(spec.groups):
            if g == r:
                continue
            k = g * m + f_i
            if mean_ok:
                d, s = vals[k], se[k]
                z = d / s if s > 0 else np.nan
                means.append(MeanDifference(
                    f, gname, ref, float(d), float(s), float(z),
                    float(2 * _st.norm.sf(abs(z))) if np.isfinite(z) else float("nan"),
                    float(d - zq * s), float(d + zq * s),
                    float(vals[G * m + k]), float(se[G * m + k]),
                ))
            if var_ok:
                lr, sl = vals[2 * G * m + k], se[2 * G * m + k]
                ratio = float(np.exp(lr))
                z = lr / sl if sl > 0 else np.nan
                ratios.append(VarianceRatio(
                    f, gname, ref, ratio, float(ratio * sl), float(z),
                    float(2 * _st.norm.sf(abs(z))) if np.isfinite(z) else float("nan"),
                    float(np.exp(lr - zq * sl)), float(np.exp(lr + zq * sl)),
                ))
    return LatentComparison(spec.level, ref, tuple(means), tuple(ratios), inv, tuple(notes))

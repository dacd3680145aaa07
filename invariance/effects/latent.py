"""Latent mean differences and variance ratios against the reference group.

Once (partial) scalar invariance holds, factor means are comparable: the difference of
the total factor means (A alpha) of each group and the reference, raw and in reference-
group SD units (difference / sqrt(reference factor variance)); standard errors by the
delta method from the estimates' asymptotic covariance (``FitResult.acov``) with the
analytic Jacobian of the estimates -> statistic map (:func:`latent_moments`); Wald z, two-sided p and
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

from ..estimate.kernels import GroupLayout, compile_spec, group_matrices
from ..model.spec import ALPHA, BETA, LAMBDA, NU, PSI, ModelSpec
from ..estimate.result import FitResult

__all__ = ["MeanDifference", "VarianceRatio", "LatentComparison", "invariant_items", "latent_moments", "compare_latent"]


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


def latent_moments(lay: GroupLayout, theta: np.ndarray):
    """Total factor means A alpha and variances diag(A Psi A') of one group, with their
    analytic Jacobian over the group's alpha, Psi and B parameters.

    With A = (I - B)^-1 and Phi = A Psi A': an alpha entry i moves the means by A[:, i];
    a Psi entry (i, j) the variances by A[f, i] A[f, j] (twice off the diagonal); a B
    entry (i, j) (dA = A E_ij A) the means by A[:, i] (A alpha)_j and the variances by
    2 A[f, i] Phi[j, f].

    Returns
    -------
    mean, var : (m,) arrays
    cols : (c,) global parameter indices the two depend on
    dmean, dvar : (m, c) arrays
    """
    _, beta, psi, _, _, alpha = group_matrices(lay, theta)
    A = np.linalg.inv(np.eye(beta.shape[0]) - beta)
    Aa = A @ alpha
    Phi = A @ psi @ A.T
    (ra, _, pa, _), (rp, cp, pp, _), (rb, cb, pb, _) = lay.sel[ALPHA], lay.sel[PSI], lay.sel[BETA]
    cols, loc = np.unique(np.concatenate([pa, pp, pb]), return_inverse=True)
    la, lp, lb = np.split(loc, [pa.size, pa.size + pp.size])
    dmean = np.zeros((A.shape[0], cols.size))
    dvar = np.zeros_like(dmean)
    np.add.at(dmean.T, la, A[:, ra].T)
    np.add.at(dvar.T, lp, (np.where(rp == cp, 1.0, 2.0) * A[:, rp] * A[:, cp]).T)
    np.add.at(dmean.T, lb, (A[:, rb] * Aa[cb]).T)
    np.add.at(dvar.T, lb, (2.0 * A[:, rb] * Phi[cb, :].T).T)
    return Aa, np.diag(Phi).copy(), cols, dmean, dvar


def _comparisons(layouts, theta: np.ndarray, acov: np.ndarray, r: int) -> tuple[np.ndarray, np.ndarray]:
    """Values and delta-method SEs of [differences, standardized differences, log variance
    ratios], each stacked group by group (G * m).

    Each group's statistics depend only on its own and the reference group's alpha, Psi
    and B parameters, so its Jacobian is a small dense block and the cost is linear in
    the number of groups.
    """
    parts = [latent_moments(lay, theta) for lay in layouts]
    G, m = len(parts), parts[0][0].size
    vals, se = np.zeros((3, G, m)), np.zeros((3, G, m))
    mr, vr, cr, dmr, dvr = parts[r]
    for g, (mg, vg, cg, dmg, dvg) in enumerate(parts):
        diff = mg - mr
        vals[:, g] = diff, diff / np.sqrt(vr), np.log(vg / vr)
        if g == r:
            continue
        cols, loc = np.unique(np.concatenate([cg, cr]), return_inverse=True)
        lg, lr = loc[: cg.size], loc[cg.size:]
        Jm, Jv = np.zeros((m, cols.size)), np.zeros((m, cols.size))
        Jm_r, Jv_r = np.zeros_like(Jm), np.zeros_like(Jm)
        Jm[:, lg], Jv[:, lg], Jm_r[:, lr], Jv_r[:, lr] = dmg, dvg, dmr, dvr
        Jd = Jm - Jm_r
        Js = Jd / np.sqrt(vr)[:, None] - (0.5 * diff / vr**1.5)[:, None] * Jv_r
        Jl = Jv / vg[:, None] - Jv_r / vr[:, None]
        sub = acov[np.ix_(cols, cols)]
        for j, J in enumerate((Jd, Js, Jl)):
            se[j, g] = np.sqrt(np.clip(np.einsum("ij,jk,ik->i", J, sub, J), 0, None))
    return vals.reshape(-1), se.reshape(-1)


def _comparable(factor: str, inv: dict, *, scalar_ok: bool, min_items: int, notes: list[str]) -> tuple[bool, bool]:
    """Whether the means and the variances of ``factor`` may be compared across groups,
    by the number of invariant items it keeps; each refusal is added to ``notes``."""
    n_s, n_l = len(inv["scalar"]), len(inv["loading"])
    mean_ok = scalar_ok and n_s >= min_items
    if scalar_ok and not mean_ok:
        notes.append(
            f"means of {factor} not compared: it keeps {n_s} item(s) with equal loading and intercept; "
            f"at least {min_items} are needed (Byrne, Shavelson & Muthen 1989)"
        )
    var_ok = n_l >= min_items
    if not var_ok:
        notes.append(f"variances of {factor} not compared: it keeps {n_l} equal loading(s); at least {min_items} are needed")
    return mean_ok, var_ok


def _wald_p(z: float) -> float:
    """Two-sided normal p-value of ``z`` (nan when ``z`` is not finite)."""
    return float(2 * _st.norm.sf(abs(z))) if np.isfinite(z) else float("nan")


def _mean_difference(factor: str, group: str, ref: str, vals: np.ndarray, se: np.ndarray, k: int, k_std: int,
                     zq: float) -> "MeanDifference":
    """Mean difference of one factor and group against ``ref`` (entry ``k``; its
    standardized version at ``k_std``) with its Wald test and interval."""
    d, s = vals[k], se[k]
    z = d / s if s > 0 else np.nan
    return MeanDifference(factor, group, ref, float(d), float(s), float(z), _wald_p(z),
                          float(d - zq * s), float(d + zq * s), float(vals[k_std]), float(se[k_std]))


def _variance_ratio(factor: str, group: str, ref: str, log_ratio: float, se_log: float, zq: float) -> "VarianceRatio":
    """Variance ratio of one factor and group against ``ref`` from its log and that log's
    standard error (delta-method SE of the ratio; interval from the log scale)."""
    ratio = float(np.exp(log_ratio))
    z = log_ratio / se_log if se_log > 0 else np.nan
    return VarianceRatio(factor, group, ref, ratio, float(ratio * se_log), float(z), _wald_p(z),
                         float(np.exp(log_ratio - zq * se_log)), float(np.exp(log_ratio + zq * se_log)))


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

    vals, se = _comparisons(layouts, fit.theta, acov, r)
    means, ratios = [], []
    scalar_ok = spec.level in ("scalar", "strict") or spec.level.startswith(("scalar", "strict"))
    if not scalar_ok:
        notes.append(f"latent means are compared only once scalar invariance holds; this level is {spec.level or 'unnamed'}")
    for f_i, f in enumerate(spec.factors):
        mean_ok, var_ok = _comparable(f, inv[f], scalar_ok=scalar_ok, min_items=min_items, notes=notes)
        for g, gname in enumerate(spec.groups):
            if g == r:
                continue
            k = g * m + f_i
            if mean_ok:
                means.append(_mean_difference(f, gname, ref, vals, se, k, G * m + k, zq))
            if var_ok:
                ratios.append(_variance_ratio(f, gname, ref, vals[2 * G * m + k], se[2 * G * m + k], zq))
    return LatentComparison(spec.level, ref, tuple(means), tuple(ratios), inv, tuple(notes))

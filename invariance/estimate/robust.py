"""Robust ML: casewise scores, sandwich covariance, scaled statistics and differences.

Coordinates. The saturated model of a group has parameters s = (mu, vech Sigma)
(p + p(p+1)/2 of them, vech over the lower triangle). For every case the score of its
normal log-likelihood (observed items only, so incomplete data are covered) is
z_i = d l_i / d s; the model scores are Delta' z_i with Delta = d s / d theta the
analytic moment Jacobian.

* Sandwich: acov = A^-1 B A^-1, A the information of logL (expected or observed),
  B = sum_i (Delta' z_i)(Delta' z_i)' at the estimates (Huber 1967; White 1982).
* Gamma: the asymptotic covariance of the saturated estimates, A1^-1 B1 A1^-1 with A1
  the saturated information and B1 = sum_i z_i z_i' at the H1 estimates (sample moments,
  or EM with missing data). With complete data this is exactly the distribution-free
  covariance of (x_i, vech (x_i - xbar)(x_i - xbar)') (Browne 1984). With missing data
  A1 is the observed information (central differences of the analytic casewise scores),
  which stays consistent when data are missing at random (Yuan & Bentler 2000); with
  complete data observed and expected information coincide at the H1 estimates.
* Scaling: U = V - V Delta (Delta' V Delta)^-1 Delta' V, c = tr(U Gamma) / df,
  T_scaled = T / c (Satorra & Bentler 1994). V is the saturated normal-theory
  information evaluated at the H1 estimates (not at the implied moments): both are
  consistent under a correct model, but only this choice gives c -> 1 for normal data
  also when the model is wrong (the baseline model, a rejected invariance level),
  because then Gamma -> V^-1 and tr(U Gamma) -> p* - q. Delta is taken at the
  estimates. Groups enter block-diagonally (Satorra 1993); tr(U Gamma) >= 0.
* Robust RMSEA, CFI and TLI replace each noncentrality estimate T - df by T - c df, with
  the baseline model's own c (Brosseau-Liard, Savalei & Li 2012; Brosseau-Liard &
  Savalei 2014; the formulas here are from memory of those papers).
* Differences: :func:`scaled_difference` (Satorra & Bentler 2001) and
  :func:`strictly_positive_difference` (Satorra & Bentler 2010).
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass

import numpy as np
from scipy import stats as _st

from ..data.patterns import CACHE, PatternMoments, Patterns, missing_patterns, pattern_moments, pattern_terms
from ..data.moments import GroupStats, SampleStats
from ..errors import DataError, EstimationError
from ..model.spec import ModelSpec
from .kernels import compile_spec, group_matrices, implied_moments, moment_jacobian
from .linalg import lower_triangle
from .objective import MLObjective
from .optimize import minimize

__all__ = [
    "saturated_scores",
    "saturated_information",
    "saturated_observed_information",
    "vech_permutation",
    "vech_jacobian",
    "H1Moments",
    "scaling_trace",
    "baseline_trace",
    "score_products",
    "sandwich",
    "robust_indices",
    "DifferenceTest",
    "scaled_difference",
    "strictly_positive_difference",
    "robust_difference",
]


def saturated_scores(x: np.ndarray, pat: Patterns, mean: np.ndarray, cov: np.ndarray) -> np.ndarray:
    """Casewise scores d l_i / d (mu, vech Sigma) of the normal log-likelihood.

    Each case uses its observed items only; entries of missing items are 0.

    Returns
    -------
    (n, p + p(p+1)/2) array
    """
    n, p = x.shape
    r, c = lower_triangle(p)
    coef = np.where(r == c, 1.0, 2.0)
    Z = np.zeros((n, p + r.size))
    for k, rows in enumerate(pat.rows):
        o = pat.observed[k]
        if not o.any():
            continue
        W = np.linalg.inv(cov[np.ix_(o, o)])
        F = (x[np.ix_(rows, o)] - mean[o]) @ W                    # (n_k, p_o) = W e_i
        pos = np.full(p, -1)
        pos[o] = np.arange(o.sum())
        keep = (pos[r] >= 0) & (pos[c] >= 0)
        a, b = pos[r[keep]], pos[c[keep]]
        Zk = np.zeros((rows.size, p + r.size))
        Zk[:, np.flatnonzero(o)] = F
        Zk[:, p + np.flatnonzero(keep)] = 0.5 * coef[keep] * (F[:, a] * F[:, b] - W[a, b])
        Z[rows] = Zk
    return Z


def saturated_information(pat: Patterns, mean: np.ndarray, cov: np.ndarray) -> np.ndarray:
    """Expected information of the saturated normal model summed over cases.

    In (mu, vech Sigma) coordinates: per case with observed set o, the mean block is
    W = Sigma_oo^-1 and the covariance block (W_jl W_km + W_jm W_kl) f_a f_b with
    f = 1/2 on diagonal entries (Magnus & Neudecker: 1/2 D'(W kron W) D).
    """
    p = cov.shape[0]
    r, c = lower_triangle(p)
    f = np.where(r == c, 0.5, 1.0)
    ff = np.outer(f, f)
    A = np.zeros((p + r.size, p + r.size))
    for k, n_k in enumerate(pat.counts):
        o = pat.observed[k]
        if not o.any() or n_k == 0:
            continue
        W = np.zeros((p, p))
        W[np.ix_(o, o)] = np.linalg.inv(cov[np.ix_(o, o)])
        A[:p, :p] += n_k * W
        A[p:, p:] += n_k * (W[np.ix_(r, r)] * W[np.ix_(c, c)] + W[np.ix_(r, c)] * W[np.ix_(c, r)]) * ff
    return A


def _cross(X: np.ndarray, Y: np.ndarray, r: np.ndarray, c: np.ndarray) -> np.ndarray:
    """tr(X E_i Y E_j) / (f_i f_j) over vech pairs i = (a, b), j = (c, d), E = e_a e_b' + e_b e_a'."""
    return (
        X[np.ix_(r, c)] * Y[np.ix_(c, r)] + X[np.ix_(r, r)] * Y[np.ix_(c, c)]
        + X[np.ix_(c, c)] * Y[np.ix_(r, r)] + X[np.ix_(c, r)] * Y[np.ix_(r, c)]
    )


def saturated_observed_information(pm: PatternMoments, mean: np.ndarray, cov: np.ndarray) -> np.ndarray:
    """Observed information of the saturated normal model, analytic, from pattern statistics.

    Per pattern (n_k cases, observed block W = Sigma_oo^-1, d = m_k - mu_o,
    C = S_k + dd', M = W C W) the Hessian of f = log|Sigma| + tr(W C) is: mean block 2W;
    mean x covariance 2 e_j' W E W d; covariance block
    -tr(W E_i W E_j) + tr(W E_i M E_j) + tr(M E_i W E_j). The information of logL is
    sum_k n_k / 2 of these (Magnus & Neudecker 1988 matrix calculus; the observed form is
    the one consistent under MAR, Kenward & Molenberghs 1998). At the complete-data ML
    estimates it equals :func:`saturated_information`.

    Returns
    -------
    (p + p(p+1)/2, p + p(p+1)/2) array
    """
    p = cov.shape[0]
    r, c = lower_triangle(p)
    f = np.where(r == c, 0.5, 1.0)
    ff = np.outer(f, f)
    W, _, d = pattern_terms(pm, mean, cov)
    Cm = pm.covs + d[:, :, None] * d[:, None, :]
    wd = np.einsum("kij,kj->ki", W, d)
    out = np.zeros((p + r.size, p + r.size))
    out[:p, :p] = np.tensordot(pm.counts, W, axes=1)
    for n_k, Wk, Ck, wk in zip(pm.counts, W, Cm, wd):
        Mk = Wk @ Ck @ Wk
        out[:p, p:] += n_k * f * (Wk[:, r] * wk[c] + Wk[:, c] * wk[r])
        out[p:, p:] += 0.5 * n_k * ff * (_cross(Wk, Mk, r, c) + _cross(Mk, Wk, r, c) - _cross(Wk, Wk, r, c))
    out[p:, :p] = out[:p, p:].T
    return (out + out.T) / 2


def vech_permutation(ix: np.ndarray) -> np.ndarray:
    """Coordinates of (mu, vech Sigma) after reordering items to ``ix`` (new i = old ix[i]).

    Returns the old coordinate of every new coordinate.
    """
    ix = np.asarray(ix)
    p = ix.size
    r, c = lower_triangle(p)
    pos = np.full((p, p), -1)
    pos[r, c] = np.arange(r.size)
    a, b = ix[r], ix[c]
    old = pos[np.maximum(a, b), np.minimum(a, b)]
    return np.concatenate([ix, p + old])


def vech_jacobian(dS: np.ndarray, dm: np.ndarray) -> np.ndarray:
    """Delta = d (mu, vech Sigma) / d theta from the kernels' (u, p, p) and (u, p) arrays."""
    p = dm.shape[1]
    r, c = lower_triangle(p)
    return np.concatenate([dm, dS[:, r, c]], axis=1).T


def _group_raw(g: GroupStats) -> np.ndarray:
    if g.raw is None:
        raise DataError(
            f"Group {g.name!r} has no case-level data; the robust estimator needs the raw data: "
            f"build the statistics with sample_stats from the data frame."
        )
    return np.asarray(g.raw, dtype=float)


@dataclass(frozen=True, eq=False)
class _H1Info:
    """V and Gamma of one group in (mu, vech Sigma) coordinates."""

    V: np.ndarray
    gamma: np.ndarray

    def reorder(self, ix) -> "_H1Info":
        k = vech_permutation(ix)
        return _H1Info(self.V[np.ix_(k, k)], self.gamma[np.ix_(k, k)])


def _h1_info(x: np.ndarray, mean: np.ndarray, cov: np.ndarray) -> _H1Info:
    pat = missing_patterns(x)
    Z = saturated_scores(x, pat, mean, cov)
    if pat.n_patterns > 1 or not pat.observed.all():
        V = saturated_observed_information(pattern_moments(x), mean, cov)
    else:
        V = saturated_information(pat, mean, cov)
    Ainv = np.linalg.inv(V)
    return _H1Info(V, Ainv @ (Z.T @ Z) @ Ainv)


def _h1_group(g: GroupStats) -> tuple:
    """(x, patterns, V, Gamma) of one group.

    V and Gamma are cached by the content of the cases and the H1 moments
    (:data:`invariance.data.patterns.CACHE`), whatever the order of the items: levels, refits
    and reordered statistics of the same group share one computation.
    """
    x = _group_raw(g)
    _, order = CACHE.key(x)
    mom = np.round(np.concatenate([g.mean[order], g.cov[np.ix_(order, order)].ravel()]), 10)
    kind = "h1:" + hashlib.blake2b(mom.tobytes(), digest_size=16).hexdigest()
    hit = CACHE.get(kind, x, lambda xc: _h1_info(xc, g.mean[order], g.cov[np.ix_(order, order)]))
    return x, missing_patterns(x), hit.V, hit.gamma


class H1Moments:
    """Per group: the cases, their patterns, V and Gamma at the saturated (H1) estimates.

    The H1 estimates are the ``mean`` and ``cov`` of each group's statistics (sample
    moments, or EM estimates under full-information ML). Results are cached per
    group-statistics object, so the levels of one analysis share the work.
    """

    def __init__(self, stats: SampleStats) -> None:
        self.stats = stats
        self.x, self.pat, self.gamma, self.V = [], [], [], []
        for g in stats.groups:
            x, pat, V, Gam = _h1_group(g)
            self.x.append(x)
            self.pat.append(pat)
            self.V.append(V)
            self.gamma.append(Gam)

    @property
    def n(self) -> np.ndarray:
        return np.array([x.shape[0] for x in self.x], dtype=float)


def _group_parts(spec: ModelSpec, theta: np.ndarray):
    """Per group: (global parameter indices, Delta, Sigma, mu)."""
    out = []
    for lay in compile_spec(spec):
        mats = group_matrices(lay, theta)
        sigma, mu, G, A = implied_moments(mats)
        dS, dm = moment_jacobian(lay, mats, G, A)
        out.append((lay.params, vech_jacobian(dS, dm), sigma, mu))
    return out


def _trace(blocks, q: int) -> float:
    """tr(U Gamma) from per-group (params, Delta, V, Gamma) in total units."""
    tvg = 0.0
    M = np.zeros((q, q))
    N = np.zeros((q, q))
    for u, D, V, Gam in blocks:
        VD = V @ D
        tvg += float(np.sum(V * Gam.T))
        M[np.ix_(u, u)] += D.T @ VD
        N[np.ix_(u, u)] += VD.T @ Gam @ VD
    try:
        return tvg - float(np.trace(np.linalg.solve(M, N)))
    except np.linalg.LinAlgError:
        return float("nan")


def scaling_trace(spec: ModelSpec, theta: np.ndarray, h1: H1Moments) -> float:
    """tr(U Gamma) of the model ``spec`` at ``theta`` (Satorra & Bentler 1994)."""
    blocks = [(u, D, V, Gam) for (u, D, _, _), V, Gam in zip(_group_parts(spec, theta), h1.V, h1.gamma)]
    return _trace(blocks, spec.n_params)


def baseline_trace(h1: H1Moments) -> float:
    """tr(U Gamma) of the baseline model: free means and variances, zero covariances.

    Its Jacobian selects the means and variances; it does not depend on the estimates.
    """
    blocks = []
    q = 0
    for x, V, Gam in zip(h1.x, h1.V, h1.gamma):
        p = x.shape[1]
        r, c = lower_triangle(p)
        D = np.zeros((p + r.size, 2 * p))
        D[np.arange(p), np.arange(p)] = 1.0
        D[p + np.flatnonzero(r == c), p + np.arange(p)] = 1.0
        blocks.append((np.arange(q, q + 2 * p), D, V, Gam))
        q += 2 * p
    return _trace(blocks, q)


def score_products(spec: ModelSpec, theta: np.ndarray, h1: H1Moments) -> np.ndarray:
    """B = sum_i s_i s_i' of the casewise model scores s_i = Delta' z_i at ``theta``."""
    q = spec.n_params
    B = np.zeros((q, q))
    for (u, D, sigma, mu), x, pat in zip(_group_parts(spec, theta), h1.x, h1.pat):
        S = saturated_scores(x, pat, mu, sigma) @ D
        B[np.ix_(u, u)] += S.T @ S
    return B


def sandwich(information: np.ndarray, products: np.ndarray) -> np.ndarray:
    """A^-1 B A^-1 with A the information of logL and B the score cross-products."""
    Ai = np.linalg.inv(information)
    out = Ai @ products @ Ai
    return (out + out.T) / 2


def robust_indices(
    t: float, df: int, c: float, t_b: float, df_b: int, c_b: float, n: int, n_groups: int = 1
) -> dict:
    """Robust RMSEA, CFI and TLI from the unscaled statistics and scaling factors.

    Noncentrality estimates T - c df (model) and T_B - c_B df_B (baseline):
    RMSEA = sqrt(G) sqrt(max(T - c df, 0) / (N df)) (Brosseau-Liard, Savalei & Li 2012);
    CFI = 1 - max(T - c df, 0) / max(T - c df, T_B - c_B df_B, 0);
    TLI = 1 - [(T - c df)/df] / [(T_B - c_B df_B)/df_B] (Brosseau-Liard & Savalei 2014).
    """
    nan = float("nan")
    if df <= 0 or not np.isfinite(c):
        return {"rmsea_robust": nan, "cfi_robust": nan, "tli_robust": nan}
    lam = t - c * df
    lam_b = t_b - c_b * df_b
    rmsea = float(np.sqrt(n_groups) * np.sqrt(max(lam, 0.0) / (df * n)))
    den = max(lam, lam_b, 0.0)
    cfi = 1.0 if den == 0 else 1.0 - max(lam, 0.0) / den
    tli = 1.0 - (lam / df) / (lam_b / df_b) if lam_b != 0 else nan
    return {"rmsea_robust": rmsea, "cfi_robust": float(cfi), "tli_robust": float(tli)}


@dataclass(frozen=True)
class DifferenceTest:
    """A chi-square difference test between nested models.

    ``test`` names the version: ``"normal"`` (unscaled), ``"satorra_bentler_2001"`` or
    ``"satorra_bentler_2010"``; ``scaling`` is the difference scaling factor c_d (1 for
    the unscaled test); ``c10`` the less restricted model's factor at the restricted
    estimates (2010 version only).
    """

    chi2: float
    df: int
    pvalue: float
    scaling: float
    chi2_unscaled: float
    test: str
    c10: float | None = None

    def to_dict(self) -> dict:
        f = lambda v: None if v is None or not np.isfinite(v) else float(v)
        return {
            "chi2_scaled": f(self.chi2),
            "df": int(self.df),
            "pvalue_scaled": f(self.pvalue),
            "scaling": f(self.scaling),
            "chi2": f(self.chi2_unscaled),
            "test": self.test,
            "c10": f(self.c10),
        }


def _diff(dt: float, ddf: int, cd: float, test: str, c10: float | None = None) -> DifferenceTest:
    if ddf <= 0:
        raise EstimationError(
            "The restricted model must have more degrees of freedom than the free model; swap the arguments."
        )
    ok = np.isfinite(cd) and cd > 0
    chi = dt / cd if ok else float("nan")
    pval = float(_st.chi2.sf(chi, ddf)) if ok else float("nan")
    return DifferenceTest(float(chi), int(ddf), pval, float(cd), float(dt), test, c10)


def scaled_difference(t0: float, df0: int, c0: float, t1: float, df1: int, c1: float) -> DifferenceTest:
    """Scaled chi-square difference (Satorra & Bentler 2001).

    Model 0 is the restricted model (more df), model 1 the free one; T are the
    unscaled statistics and c the scaling factors. c_d = (df0 c0 - df1 c1)/(df0 - df1),
    dT = (T0 - T1)/c_d on df0 - df1. c_d can be zero or negative in small samples; the
    statistic is then ``nan`` (use :func:`strictly_positive_difference`).
    """
    ddf = int(df0) - int(df1)
    cd = (df0 * c0 - df1 * c1) / ddf if ddf > 0 else float("nan")
    return _diff(t0 - t1, ddf, cd, "satorra_bentler_2001")


def _nested_point(restricted, free, stats: SampleStats) -> np.ndarray:
    """Parameters of the free model reproducing the restricted model's implied moments."""
    target = SampleStats(
        stats.items,
        tuple(GroupStats(g.name, g.n, mu, sigma) for g, sigma, mu in zip(stats.groups, restricted.sigma, restricted.mu)),
    )
    obj = MLObjective(free.spec, target)
    out = minimize(obj, np.asarray(free.theta, dtype=float))
    if not np.isfinite(out.fun) or out.fun > 1e-7 * float(obj.n.sum()):
        raise EstimationError(
            f"The {free.level or 'free'} model cannot reproduce the {restricted.level or 'restricted'} "
            f"model's implied moments (minimum discrepancy {out.fun:.3g}); the models are not nested."
        )
    return out.x


def strictly_positive_difference(restricted, free, stats: SampleStats, *, h1: H1Moments | None = None) -> DifferenceTest:
    """Strictly positive scaled difference (Satorra & Bentler 2010).

    The free model is evaluated at the restricted estimates (the free model's
    parameters that reproduce the restricted implied moments), giving c10; with c0 of
    the restricted model at its estimates, c_d = (df0 c0 - df1 c10)/(df0 - df1) =
    tr((U0 - U1) Gamma)/(df0 - df1) >= 0 since both U share V and Gamma.

    Parameters
    ----------
    restricted, free
        Fitted :class:`~invariance.results.FitResult` of the nested models (any
        estimator; only estimates and implied moments are used).
    stats
        The statistics both were fitted to (raw data needed).
    h1
        Precomputed :class:`H1Moments` of ``stats`` (saves work over several tests).
    """
    stats = _ordered(stats, restricted.spec)
    h1 = H1Moments(stats) if h1 is None else h1
    theta1 = _nested_point(restricted, free, stats)
    df0, df1 = restricted.spec.df, free.spec.df
    tr0 = scaling_trace(restricted.spec, restricted.theta, h1)
    tr10 = scaling_trace(free.spec, theta1, h1)
    ddf = df0 - df1
    cd = (tr0 - tr10) / ddf if ddf > 0 else float("nan")
    c10 = tr10 / df1 if df1 > 0 else float("nan")
    return _diff(restricted.fit.chi2 - free.fit.chi2, ddf, cd, "satorra_bentler_2010", c10)


def _ordered(stats: SampleStats, spec: ModelSpec) -> SampleStats:
    if tuple(stats.names) != tuple(spec.groups):
        stats = stats.subset(spec.groups)
    if tuple(stats.items) != tuple(spec.items):
        stats = stats.reorder_items(spec.items)
    return stats


def robust_difference(restricted, free, stats: SampleStats, *, method: str = "auto", h1: H1Moments | None = None) -> DifferenceTest:
    """The scaled difference of two robust fits, choosing the version.

    ``method="auto"`` uses Satorra & Bentler (2001) and falls back to the strictly
    positive 2010 version when c_d is not positive; ``"2001"`` or ``"2010"`` force one.
    Both fits must carry ``extra["scaling_factor"]`` (estimator ``ml_robust``) for 2001.
    """
    if method not in ("auto", "2001", "2010"):
        raise EstimationError(f"The difference method must be 'auto', '2001' or '2010'; got {method!r}.")
    if method != "2010":
        try:
            c0, c1 = restricted.extra["scaling_factor"], free.extra["scaling_factor"]
        except KeyError:
            raise EstimationError(
                "The scaled difference needs robust fits; fit both models with estimator='ml_robust'."
            ) from None
        d = scaled_difference(restricted.fit.chi2, restricted.spec.df, c0, free.fit.chi2, free.spec.df, c1)
        if method == "2001" or (np.isfinite(d.scaling) and d.scaling > 0):
            return d
    return strictly_positive_difference(restricted, free, stats, h1=h1)

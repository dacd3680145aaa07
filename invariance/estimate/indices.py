"""Fit indices (METHODS section 4): pure functions plus the :class:`FitStats` record.

SRMR here includes the mean residuals when the model has a mean structure: per group it is
the root mean square of the standardized covariance residuals (s_ij - sigma_ij) /
sqrt(s_ii s_jj) over i <= j together with the standardized mean residuals
(m_i - mu_i) / sqrt(s_ii), and groups are combined weighted by N_g / N. Including the
means makes the change in SRMR respond to intercept differences at the scalar step.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np
from scipy import special

from .linalg import lower_triangle

__all__ = [
    "FitStats",
    "baseline_statistic",
    "cfi",
    "tli",
    "rmsea",
    "rmsea_interval",
    "srmr",
    "information_criteria",
    "mcdonald_centrality",
    "fit_from_totals",
    "compute_fit",
]


def baseline_statistic(covs, ns) -> tuple[float, int]:
    """Independence (baseline) model: free means and variances, zero covariances.

    Returns ``(T_B, df_B)`` with df_B = G p(p-1)/2.
    """
    return _baseline(covs, ns, [np.linalg.slogdet(S)[1] for S in covs])


def _baseline(covs, ns, logdets) -> tuple[float, int]:
    p = covs[0].shape[0]
    t = sum(n * (np.sum(np.log(np.diag(S))) - ld) for S, n, ld in zip(covs, ns, logdets))
    return float(t), len(covs) * p * (p - 1) // 2


def cfi(t: float, df: int, t_b: float, df_b: int) -> float:
    """Comparative fit index (Bentler 1990)."""
    num = max(t - df, 0.0)
    den = max(t_b - df_b, t - df, 0.0)
    return 1.0 if den == 0 else 1.0 - num / den


def tli(t: float, df: int, t_b: float, df_b: int) -> float:
    """Tucker-Lewis index (Tucker & Lewis 1973); ``nan`` for a saturated model."""
    if df <= 0:
        return float("nan")
    return (t_b / df_b - t / df) / (t_b / df_b - 1.0)


def rmsea(t: float, df: int, n: int, n_groups: int = 1) -> float:
    """RMSEA with the sqrt(G) multi-group form (Steiger 1998)."""
    if df <= 0:
        return float("nan")
    return float(np.sqrt(n_groups) * np.sqrt(max(t - df, 0.0) / (df * n)))


def rmsea_interval(t: float, df: int, n: int, n_groups: int = 1, level: float = 0.90) -> tuple[float, float]:
    """Confidence interval of RMSEA by inverting the noncentral chi-square.

    The noncentrality bounds solve P(X <= T; df, lambda) = (1 + level)/2 and
    (1 - level)/2, found directly by ``scipy.special.chndtrinc`` (METHODS section 14);
    a bound is 0 when even lambda = 0 leaves the probability below its target. Each
    bound becomes an RMSEA with the convention of :func:`rmsea`.
    """
    if df <= 0:
        return (float("nan"), float("nan"))

    def root(q: float) -> float:
        if special.chdtr(df, t) < q:
            return 0.0
        return float(special.chndtrinc(t, df, q))

    lam_lo, lam_hi = root((1 + level) / 2), root((1 - level) / 2)
    conv = lambda lam: float(np.sqrt(n_groups) * np.sqrt(lam / (df * n)))
    return conv(lam_lo), conv(lam_hi)


def srmr(covs, means, sigmas, mus, ns, *, include_means: bool = True) -> float:
    """Standardized root mean square residual, groups weighted by N_g / N."""
    total, nsum = 0.0, 0.0
    for S, m, sig, mu, n in zip(covs, means, sigmas, mus, ns):
        sd = np.sqrt(np.diag(S))
        r = (S - sig) / np.outer(sd, sd)
        res = r[lower_triangle(S.shape[0])]
        if include_means:
            res = np.concatenate([res, (m - mu) / sd])
        total += n * np.sqrt(np.mean(res**2))
        nsum += n
    return float(total / nsum)


def information_criteria(loglik: float, q: int, n: int) -> tuple[float, float, float]:
    """AIC, BIC and sample-size adjusted BIC (Sclove 1987: N* = (N + 2) / 24)."""
    aic = -2 * loglik + 2 * q
    bic = -2 * loglik + q * np.log(n)
    bic_adjusted = -2 * loglik + q * np.log((n + 2) / 24)
    return float(aic), float(bic), float(bic_adjusted)


def mcdonald_centrality(t: float, df: int, n: int) -> float:
    """McDonald's (1989) noncentrality index."""
    return float(np.exp(-(t - df) / (2 * n)))


@dataclass(frozen=True)
class FitStats:
    """Model fit of one estimated model (all groups together)."""

    chi2: float
    df: int
    pvalue: float
    cfi: float
    tli: float
    rmsea: float
    rmsea_ci90: tuple[float, float]
    srmr: float
    loglik: float
    loglik_saturated: float
    aic: float
    bic: float
    bic_adjusted: float
    mc: float
    n_params: int
    n: int
    baseline_chi2: float
    baseline_df: int

    def to_dict(self) -> dict:
        d = asdict(self)
        d["rmsea_ci90"] = list(self.rmsea_ci90)
        return {k: (None if isinstance(v, float) and not np.isfinite(v) else v) for k, v in d.items()}


def fit_from_totals(*, t: float, df: int, q: int, n: int, n_groups: int, t_b: float, df_b: int,
                    loglik: float, loglik_saturated: float, srmr_value: float) -> FitStats:
    """Every fit statistic from the totals of a model: the statistic ``t`` on ``df``,
    ``q`` free parameters, ``n`` cases in ``n_groups`` groups, the baseline ``t_b`` on
    ``df_b``, the log-likelihoods and the (N-weighted) SRMR."""
    aic, bic, bic_adjusted = information_criteria(loglik, q, n)
    return FitStats(
        chi2=float(t),
        df=int(df),
        pvalue=float(special.chdtrc(df, t)) if df > 0 else float("nan"),
        cfi=cfi(t, df, t_b, df_b),
        tli=tli(t, df, t_b, df_b),
        rmsea=rmsea(t, df, n, n_groups),
        rmsea_ci90=rmsea_interval(t, df, n, n_groups),
        srmr=float(srmr_value),
        loglik=float(loglik),
        loglik_saturated=float(loglik_saturated),
        aic=aic,
        bic=bic,
        bic_adjusted=bic_adjusted,
        mc=mcdonald_centrality(t, df, n),
        n_params=int(q),
        n=int(n),
        baseline_chi2=float(t_b),
        baseline_df=int(df_b),
    )


def compute_fit(t: float, df: int, q: int, covs, means, sigmas, mus, ns) -> FitStats:
    """All fit statistics from the minimized ML statistic and the implied moments."""
    ns = np.asarray(ns, dtype=float)
    p = covs[0].shape[0]
    logdets = [np.linalg.slogdet(S)[1] for S in covs]
    t_b, df_b = _baseline(covs, ns, logdets)
    ll_sat = float(sum(-0.5 * ng * (p * np.log(2 * np.pi) + ld + p) for ld, ng in zip(logdets, ns)))
    return fit_from_totals(t=t, df=df, q=q, n=int(ns.sum()), n_groups=len(covs), t_b=t_b, df_b=df_b,
                           loglik=ll_sat - 0.5 * t, loglik_saturated=ll_sat,
                           srmr_value=srmr(covs, means, sigmas, mus, ns))

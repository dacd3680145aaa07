"""Little's (1988) test of missing completely at random: pure arrays in, statistic out.

Under MCAR every missingness pattern has the same mean on the items it observes. With
the saturated ML estimates (mu, Sigma) of all the data (EM), the statistic

    d2 = sum_k n_k (ybar_k - mu_k)' Sigma_kk^-1 (ybar_k - mu_k)

(ybar_k the mean of the n_k cases of pattern k on their p_k observed items) is referred
to a chi-square on sum_k p_k - p degrees of freedom; all patterns are evaluated in one
batched call on the cached pattern statistics and EM estimates of :mod:`.em` (Little 1988, J. Amer. Statist.
Assoc. 83, 1198-1202). The test is information only: failing to reject does not show
MCAR, and FIML needs only MAR.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special as _sp

from .em import saturated_with_patterns
from .patterns import PatternMoments, pattern_moments, pattern_terms

__all__ = ["LittleTest", "little_mcar", "little_statistic", "missing_report"]


@dataclass(frozen=True)
class LittleTest:
    """Result of Little's MCAR test."""

    statistic: float
    df: int
    pvalue: float
    n_patterns: int
    n: int

    def to_dict(self) -> dict:
        return {
            "statistic": float(self.statistic),
            "df": int(self.df),
            "pvalue": None if not np.isfinite(self.pvalue) else float(self.pvalue),
            "n_patterns": int(self.n_patterns),
            "n": int(self.n),
        }


def little_mcar(
    x: np.ndarray,
    *,
    mean: np.ndarray | None = None,
    cov: np.ndarray | None = None,
) -> LittleTest:
    """Little's MCAR test of one group.

    Parameters
    ----------
    x
        (n, p) data with NaN where missing; rows with nothing observed are ignored.
    mean, cov
        Saturated ML estimates of the same rows; computed by EM when omitted.

    Returns
    -------
    LittleTest
        With a single pattern (complete data) the statistic is 0 on 0 df and the
        p-value is nan.
    """
    x = np.asarray(x, dtype=float)
    seen = (~np.isnan(x)).any(axis=1)
    if not seen.all():
        x = x[seen]
    if mean is None or cov is None:
        em, pm = saturated_with_patterns(x)
        mean, cov = em.mean, em.cov
    else:
        pm = pattern_moments(x)
    return little_statistic(pm, mean, cov)


def little_statistic(pm: PatternMoments, mean: np.ndarray, cov: np.ndarray) -> LittleTest:
    """:func:`little_mcar` from the pattern statistics of the cases and their saturated
    ML estimates (``mean``, ``cov``)."""
    W, _, d = pattern_terms(pm, mean, cov)
    d2 = float(pm.counts @ np.einsum("ki,kij,kj->k", d, W, d))
    df = int(pm.observed.sum()) - pm.observed.shape[1]
    pval = float(_sp.chdtrc(df, d2)) if df > 0 else float("nan")  # = scipy.stats.chi2.sf
    return LittleTest(float(d2), int(df), pval, int(pm.counts.size), int(round(pm.n)))


def missing_report(stats) -> dict:
    """Per group, how missing values were handled, as plain types.

    For each group with a :class:`~invariance.data.moments.MissingInfo` record: the
    method (``fiml`` or ``listwise``), rows in the data, cases used and dropped, the
    number of patterns, the coverage of each item, and (full information with more
    than one pattern) Little's MCAR test under ``"little"``.
    """
    out = {}
    for g in stats.groups:
        if g.missing is None:
            continue
        d = g.missing.to_dict(stats.items)
        if g.missing.method == "fiml" and g.missing.n_patterns > 1:
            little = g.missing.little or little_mcar(g.raw, mean=g.mean, cov=g.cov)
            d["little"] = little.to_dict()
        out[g.name] = d
    return out

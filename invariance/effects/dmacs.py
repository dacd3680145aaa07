"""Size of noninvariance: dMACS per item and the expected bias of sum scores.

METHODS section 9. Nye & Drasgow (2011): for item i with mean functions
mu_R(xi) = nu_R + lambda_R' xi (reference) and mu_F(xi) = nu_F + lambda_F' xi (focal),

    dMACS = sqrt( E_F[(mu_R(xi) - mu_F(xi))^2] ) / SD_pooled,

the expectation over the focal group's factor distribution xi ~ N(alpha_F, Phi_F).
For linear items it has the closed form (multi-factor, so bifactor items work)

    E[(dnu + dlambda' xi)^2] = (dnu + dlambda' alpha_F)^2 + dlambda' Phi_F dlambda,

dnu = nu_R - nu_F, dlambda = lambda_R - lambda_F. SD_pooled is the pooled observed SD
of the item, sqrt(((N_R - 1) s_R^2 + (N_F - 1) s_F^2) / (N_R + N_F - 2)) (Nye & Drasgow
2011). The signed expected item bias (focal minus reference at equal latent values,
averaged over the focal distribution) is (nu_F - nu_R) + (lambda_F - lambda_R)' alpha_F;
a scale's sum-score bias is the sum over its items. With factor regressions, xi is the
total factor vector: mean A alpha, covariance A Psi A'.
Rough guides .2 / .4 / .6 for small / medium / large (Nye, Bradburn, Olenick, Bialko &
Drasgow 2019).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np

from ..data.moments import SampleStats
from ..errors import SpecificationError
from ..estimate.result import FitResult

__all__ = [
    "dmacs_value",
    "pooled_sd",
    "ItemEffect",
    "ScaleBias",
    "item_effects",
    "scale_bias",
]


def pooled_sd(var_r: float, n_r: int, var_f: float, n_f: int) -> float:
    """Pooled SD from two (unbiased) variances and group sizes (Nye & Drasgow 2011)."""
    return float(np.sqrt(((n_r - 1) * var_r + (n_f - 1) * var_f) / (n_r + n_f - 2)))


def dmacs_value(
    nu_r: float,
    lam_r: np.ndarray,
    nu_f: float,
    lam_f: np.ndarray,
    mean_f: np.ndarray,
    cov_f: np.ndarray,
    sd_pooled: float,
) -> float:
    """Closed-form dMACS of one linear item (pure array function).

    Parameters
    ----------
    nu_r, lam_r
        Reference intercept and loading vector (m,).
    nu_f, lam_f
        Focal intercept and loading vector (m,).
    mean_f, cov_f
        Focal factor mean (m,) and covariance (m, m).
    sd_pooled
        Pooled item SD.
    """
    dl = np.asarray(lam_r, float) - np.asarray(lam_f, float)
    dn = float(nu_r) - float(nu_f)
    e2 = (dn + dl @ np.asarray(mean_f, float)) ** 2 + dl @ np.asarray(cov_f, float) @ dl
    return float(np.sqrt(max(e2, 0.0)) / sd_pooled)


def _total_moments(mats) -> tuple[np.ndarray, np.ndarray]:
    lam, beta, psi, theta, nu, alpha = mats
    A = np.linalg.inv(np.eye(beta.shape[0]) - beta)
    return A @ alpha, A @ psi @ A.T


@dataclass(frozen=True)
class ItemEffect:
    """dMACS and signed expected bias of one item, one focal group vs the reference."""

    item: str
    group: str
    reference: str
    dmacs: float
    bias: float

    def to_dict(self) -> dict:
        return {"item": self.item, "group": self.group, "reference": self.reference,
                "dmacs": self.dmacs, "bias": self.bias}


@dataclass(frozen=True)
class ScaleBias:
    """Expected bias of a scale's sum score (focal minus reference, raw units)."""

    scale: str
    items: tuple[str, ...]
    group: str
    reference: str
    bias: float

    def to_dict(self) -> dict:
        return {"scale": self.scale, "items": list(self.items), "group": self.group,
                "reference": self.reference, "bias": self.bias}


def _check_fit(fit: FitResult, stats: SampleStats, reference: str | None) -> str:
    ref = reference or fit.spec.reference or fit.groups[0]
    if ref not in fit.groups:
        raise SpecificationError(f"The reference group {ref!r} is not among the groups ({', '.join(fit.groups)}).")
    missing = [g for g in fit.groups if g not in stats.names]
    if missing:
        raise SpecificationError(f"The statistics have no group {missing[0]!r}; pass the statistics the model was fitted to.")
    return ref


def item_effects(
    fit: FitResult,
    stats: SampleStats,
    items: Sequence[str] | None = None,
    *,
    reference: str | None = None,
) -> tuple[ItemEffect, ...]:
    """dMACS and expected bias of items, every group against the reference.

    Parameters
    ----------
    fit
        A fitted level (typically partial scalar: released items differ across groups).
    stats
        The sample statistics (pooled SDs use the observed item variances).
    items
        Items to size (default: every item).
    reference
        Reference group (default: the spec's).
    """
    ref = _check_fit(fit, stats, reference)
    spec = fit.spec
    items = list(spec.items if items is None else items)
    unknown = [i for i in items if i not in spec.items]
    if unknown:
        raise SpecificationError(f"Item {unknown[0]!r} is not in the model; choose among {', '.join(spec.items)}.")
    by = {g.name: g for g in stats.groups}
    si = {it: k for k, it in enumerate(stats.items)}
    r = fit.group_index(ref)
    lam_r, nu_r = fit.matrices[r][0], fit.matrices[r][4]
    gr = by[ref]
    out = []
    for g, gname in enumerate(fit.groups):
        if gname == ref:
            continue
        mats = fit.matrices[g]
        lam_f, nu_f = mats[0], mats[4]
        mean_f, cov_f = _total_moments(mats)
        gf = by[gname]
        for it in items:
            i = spec.items.index(it)
            j = si[it]
            var_r = gr.cov[j, j] * gr.n / (gr.n - 1)
            var_f = gf.cov[j, j] * gf.n / (gf.n - 1)
            sd = pooled_sd(var_r, gr.n, var_f, gf.n)
            d = dmacs_value(nu_r[i], lam_r[i], nu_f[i], lam_f[i], mean_f, cov_f, sd)
            bias = float((nu_f[i] - nu_r[i]) + (lam_f[i] - lam_r[i]) @ mean_f)
            out.append(ItemEffect(it, gname, ref, d, bias))
    return tuple(out)


def scale_bias(
    fit: FitResult,
    scales: Mapping[str, Sequence[str]],
    *,
    reference: str | None = None,
) -> tuple[ScaleBias, ...]:
    """Expected bias of each scale's sum score in every group vs the reference.

    Parameters
    ----------
    fit
        A fitted level.
    scales
        Scale name -> its items (for example each factor's items; all items for a
        general factor).
    reference
        Reference group (default: the spec's).
    """
    ref = reference or fit.spec.reference or fit.groups[0]
    spec = fit.spec
    r = fit.group_index(ref)
    lam_r, nu_r = fit.matrices[r][0], fit.matrices[r][4]
    out = []
    for g, gname in enumerate(fit.groups):
        if gname == ref:
            continue
        mats = fit.matrices[g]
        mean_f, _ = _total_moments(mats)
        per_item = (mats[4] - nu_r) + (mats[0] - lam_r) @ mean_f
        for name, its in scales.items():
            ix = [spec.items.index(i) for i in its]
            out.append(ScaleBias(str(name), tuple(its), gname, ref, float(per_item[ix].sum())))
    return tuple(out)

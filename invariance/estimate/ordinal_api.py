"""Ordinal front doors: fit the Wu & Estabrook (2016) level sequence by DWLS, compare
consecutive levels, and locate noninvariant items by releasing constraints.

Locating noninvariance here is by refitting (a likelihood-ratio-type check, METHODS
section 8): each candidate release is fitted and tested against the restricted model
with the robust difference of :func:`invariance.estimate.dwls_robust.dwls_difference`.
The sequential search frees the most significant candidate, refits, and repeats until
no candidate is significant after a Bonferroni correction over the candidates of that
round.
"""

from __future__ import annotations

from typing import Iterable, Mapping, Sequence

import numpy as np

from ..errors import SpecificationError
from .dwls import ordinal_start_values, start_from
from .dwls_robust import dwls_difference, fit_dwls
from ..model.spec import Release
from ..model.structure import Structure
from ..model.ordinal_levels import ORDINAL_LEVELS, ORDINAL_RELEASES, build_ordinal_level, ordinal_level_rank
from ..data.ordinal_stats import OrdinalStats, ordinal_stats
from .result import FitResult

__all__ = [
    "DEFAULT_RELEASE_KINDS",
    "fit_ordinal_level",
    "fit_ordinal_levels",
    "compare_ordinal_levels",
    "release_tests",
    "release_search",
    "ordinal_effects",
]

#: The constraint each level adds, released by default when searching at that level.
DEFAULT_RELEASE_KINDS = {
    "thresholds": ("threshold",),
    "metric": ("loading",),
    "scalar": ("intercept",),
    "strict": ("residual",),
}


def _stats(data, structure: Structure, group, merge, continuous=()) -> OrdinalStats:
    if isinstance(data, OrdinalStats):
        return data
    return ordinal_stats(data, structure.items, group, merge=merge, continuous=continuous)


def fit_ordinal_level(
    data,
    structure: Structure,
    level: str = "configural",
    *,
    group: str | None = None,
    reference: str | None = None,
    released: Iterable[Release] = (),
    merge: Mapping[str, Sequence[Sequence[float]]] | None = None,
    fixed_means: Sequence[str] = (),
    continuous: Sequence[str] = (),
) -> FitResult:
    """Fit one ordinal level by DWLS.

    Parameters
    ----------
    data
        A pandas DataFrame (``group`` names the grouping column) or
        :class:`~invariance.ordinal.OrdinalStats`.
    structure
        The measurement structure; its items are ordered unless named in ``continuous``.
    level
        One of :data:`~invariance.ordinal.ORDINAL_LEVELS`.
    group, reference, released, merge, fixed_means, continuous
        Grouping column, reference group, releases, category merges, factors whose
        means stay 0, and items measured on a continuous scale (the rest are ordered).
    """
    stats = _stats(data, structure, group, merge, continuous)
    spec = build_ordinal_level(structure, stats.names, level, stats.n_categories,
                               reference=reference, released=released, fixed_means=fixed_means)
    return fit_dwls(spec, stats)


def fit_ordinal_levels(
    data,
    structure: Structure,
    levels: Sequence[str] = ORDINAL_LEVELS,
    *,
    group: str | None = None,
    reference: str | None = None,
    released: Iterable[Release] = (),
    merge: Mapping[str, Sequence[Sequence[float]]] | None = None,
    fixed_means: Sequence[str] = (),
    continuous: Sequence[str] = (),
) -> tuple[dict[str, FitResult], OrdinalStats]:
    """Fit several ordinal levels on the same statistics.

    Returns
    -------
    (dict level -> FitResult, OrdinalStats)
    """
    stats = _stats(data, structure, group, merge, continuous)
    released = tuple(released)
    fits: dict[str, FitResult] = {}
    prev = None
    for lv in levels:
        spec = build_ordinal_level(structure, stats.names, lv, stats.n_categories,
                                   reference=reference, released=released, fixed_means=fixed_means)
        x0 = ordinal_start_values(spec, stats)
        if prev is not None:
            x0 = start_from(prev.spec.param_labels, prev.theta, spec, x0)
        fits[lv] = prev = fit_dwls(spec, stats, start=x0)
    return fits, stats


def compare_ordinal_levels(fits: Mapping[str, FitResult], stats: OrdinalStats) -> list[dict]:
    """Robust differences between consecutive fitted levels (in the order given)."""
    names = list(fits)
    out = []
    for a, b in zip(names[:-1], names[1:]):
        d = dwls_difference(fits[b], fits[a], stats)
        rob_a, rob_b = fits[a].extra["robust"], fits[b].extra["robust"]
        out.append({
            "free": a,
            "restricted": b,
            **d,
            "delta_cfi_robust": rob_b["cfi_robust"] - rob_a["cfi_robust"],
            "delta_rmsea_robust": rob_b["rmsea_robust"] - rob_a["rmsea_robust"],
        })
    return out


def _candidates(structure: Structure, stats: OrdinalStats, kinds, released) -> list[Release]:
    done = {(r.parameter, r.item) for r in released}
    out = []
    for kind in kinds:
        if kind not in ORDINAL_RELEASES:
            raise SpecificationError(f"Ordinal models release {', '.join(ORDINAL_RELEASES)}; got {kind!r}.")
        for i, it in enumerate(structure.items):
            K = stats.n_categories[i]
            if (kind, it) in done or (kind == "residual" and K == 2) or (kind == "threshold" and K == 0):
                continue
            out.append(Release(kind, it))
    return out


def release_tests(
    structure: Structure,
    stats: OrdinalStats,
    level: str,
    *,
    kinds: Sequence[str] | None = None,
    released: Iterable[Release] = (),
    reference: str | None = None,
    base: FitResult | None = None,
    fixed_means: Sequence[str] = (),
) -> list[dict]:
    """Test every candidate release at one level by refitting.

    Parameters
    ----------
    structure, stats, level
        The model and data; ``level`` must be past ``configural``.
    kinds
        Parameter kinds to release (default :data:`DEFAULT_RELEASE_KINDS` of the level).
    released
        Releases already in the model.
    reference
        Reference group.
    base
        The fitted restricted model, if already available.
    fixed_means
        Factors whose means stay 0 (see :func:`~invariance.ordinal.build_ordinal_level`).

    Returns
    -------
    list of dict
        One row per candidate (``parameter``, ``item``, ``delta_chi2``, ``delta_df``,
        ``chi2`` (adjusted), ``pvalue``), most significant first.
    """
    if ordinal_level_rank(level) == 0:
        raise SpecificationError("The configural level has no cross-group constraints to release.")
    released = tuple(released)
    kinds = tuple(kinds) if kinds is not None else DEFAULT_RELEASE_KINDS[level]
    K = stats.n_categories
    if base is None:
        base = fit_dwls(build_ordinal_level(structure, stats.names, level, K, reference=reference,
                                            released=released, fixed_means=fixed_means), stats)
    rows = []
    for cand in _candidates(structure, stats, kinds, released):
        spec = build_ordinal_level(structure, stats.names, level, K, reference=reference,
                                   released=released + (cand,), fixed_means=fixed_means)
        if spec.df == base.fit.df:
            continue  # the release changes nothing at this level
        x0 = start_from(base.spec.param_labels, base.theta, spec, ordinal_start_values(spec, stats))
        free = fit_dwls(spec, stats, start=x0)
        d = dwls_difference(base, free, stats)
        rows.append({"parameter": cand.parameter, "item": cand.item, **d})
    rows.sort(key=lambda r: (r["pvalue"], -r["chi2"]))
    return rows


def release_search(
    structure: Structure,
    stats: OrdinalStats,
    level: str,
    *,
    alpha: float = 0.05,
    kinds: Sequence[str] | None = None,
    released: Iterable[Release] = (),
    reference: str | None = None,
    max_releases: int | None = None,
    fixed_means: Sequence[str] = (),
) -> dict:
    """Sequential release: free the most significant candidate until none is significant.

    Significance is judged with a Bonferroni correction over the candidates tested in
    each round (alpha / number of candidates).

    Returns
    -------
    dict
        ``released`` (list of :class:`~invariance.model.Release`), ``steps`` (per round:
        the candidate table and the cutoff), ``fit`` (the final FitResult).
    """
    released = tuple(released)
    steps = []
    while max_releases is None or len(steps) < max_releases:
        rows = release_tests(structure, stats, level, kinds=kinds, released=released, reference=reference,
                             fixed_means=fixed_means)
        if not rows:
            break
        cutoff = alpha / len(rows)
        steps.append({"candidates": rows, "cutoff": cutoff})
        best = rows[0]
        if not best["pvalue"] < cutoff:
            break
        released = released + (Release(best["parameter"], best["item"]),)
    final = fit_dwls(build_ordinal_level(structure, stats.names, level, stats.n_categories,
                                         reference=reference, released=released, fixed_means=fixed_means), stats)
    return {"released": list(released), "steps": steps, "fit": final}


def ordinal_effects(result: FitResult, stats: OrdinalStats, *, focal: str, reference: str | None = None) -> dict:
    """dMACS per item (latent-response and expected-score scales) and, for bifactor
    structures, latent-response bifactor indices per group.

    Parameters
    ----------
    result
        A DWLS fit of an ordinal level (usually scalar with its releases).
    stats
        The ordinal statistics it was fitted to.
    focal, reference
        The two groups compared (reference: the model's reference group by default).

    Returns
    -------
    dict
        ``dmacs``: item -> {``latent``, ``expected_score``}; ``bifactor``: group ->
        indices (only when the model has one factor loading on every item and others).
    """
    from ..effects.ordinal import bifactor_indices_latent, category_sd, dmacs_expected_score, dmacs_latent

    spec = result.spec
    if tuple(stats.items) != tuple(spec.items):
        stats = stats.reorder_items(spec.items)
    ref = reference or spec.reference
    gr, gf = spec.groups.index(ref), spec.groups.index(focal)
    mats = {g: result.matrices[g] for g in (gr, gf)}
    fits = {g: stats.fits[stats.names.index(spec.groups[g])] for g in (gr, gf)}
    lam_f, beta_f, psi_f, th_f, nu_f, al_f, tau_f = mats[gf]
    A = np.linalg.inv(np.eye(beta_f.shape[0]) - beta_f)
    phi_f = A @ psi_f @ A.T
    alpha_f = A @ al_f
    dm = {}
    for i, it in enumerate(spec.items):
        pr = {"nu": mats[gr][4][i], "lam": mats[gr][0][i], "theta": mats[gr][3][i, i], "tau": mats[gr][6][i]}
        pf = {"nu": nu_f[i], "lam": lam_f[i], "theta": th_f[i, i], "tau": tau_f[i]}
        nr, nf = fits[gr].n, fits[gf].n
        sd_lat = [np.sqrt(result.sigma[g][i, i]) for g in (gr, gf)]
        sd_obs = [category_sd(fits[g].thresholds[i]) for g in (gr, gf)]
        pooled = float(np.sqrt(((nr - 1) * sd_obs[0] ** 2 + (nf - 1) * sd_obs[1] ** 2) / (nr + nf - 2)))
        lat = dmacs_latent(pr["nu"], pr["lam"], pf["nu"], pf["lam"], alpha_f, phi_f,
                           sd_r=sd_lat[0], sd_f=sd_lat[1], n_r=nr, n_f=nf)
        if stats.n_categories[i] == 0:
            # a continuous item is its own response scale: the two versions coincide
            dm[it] = {"latent": lat, "expected_score": lat}
            continue
        dm[it] = {"latent": lat, "expected_score": dmacs_expected_score(pr, pf, alpha_f, phi_f, sd_pooled=pooled)}
    out = {"reference": ref, "focal": focal, "dmacs": dm}
    p = len(spec.items)
    lam0 = result.matrices[0][0]
    full = [c for c in range(lam0.shape[1]) if np.all(lam0[:, c] != 0)]
    if len(full) == 1 and lam0.shape[1] > 1:
        gcol = full[0]
        bif = {}
        for g, gname in enumerate(spec.groups):
            std = result.standardized(gname)
            L, T = std["lambda"], np.diag(std["theta"])
            specifics = {spec.factors[c]: [c, *np.flatnonzero(L[:, c] != 0).tolist()]
                         for c in range(L.shape[1]) if c != gcol and np.any(L[:, c] != 0)}
            bif[gname] = bifactor_indices_latent(L, T, general=gcol, specifics=specifics)
        out["bifactor"] = bif
    return out

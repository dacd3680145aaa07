"""Invariance levels for ordered items: Wu & Estabrook (2016) sequence and identification.

The model is the all-indicator model for continuous latent responses y* (METHODS
section 1) plus thresholds: x_i = k when tau_ik < y*_i <= tau_i,k+1. Only the
standardized statistics are observed: the thresholds (tau_ik - mu_i) / sigma_i and the
correlations sigma_ij / (sigma_i sigma_j), so every item has a location and a scale
to fix in every group. The "theta" parameterization is used: unique variances are
parameters (fixed to 1 where the scale must be fixed).

Levels (each adds the constraints of the previous one):

==========  ==========================================================================
configural  everything free per group; per group and item nu = 0, Theta_ii = 1; factor
            means 0 and variances 1 in every group
thresholds  thresholds equal across groups; outside the reference group every item gets
            a free intercept, and items with three or more categories a free unique
            variance
metric      loadings equal; factor variances free outside the reference group
scalar      intercepts equal (all 0); factor means free outside the reference group
strict      unique variances equal (all 1)
==========  ==========================================================================

Counting per item and non-reference group, the thresholds step changes the fit by
K_i - 3 degrees of freedom for K_i >= 3 (K_i - 1 equalities, intercept and unique
variance freed) and by 0 for binary items (one equality, intercept freed). With three
categories, and for binary items, it is therefore an equivalent re-parameterization of
the configural model, the identity of Wu & Estabrook (2016); with four or more
categories it is a testable restriction. A binary item has only one threshold, so its
latent-response scale stays fixed (Theta_ii = 1) at every level: the loadings step
tests its loading, and the strict step adds no constraint for it (its unique variance
is not separately identified).

Releases (partial invariance) are applied when the model is built: ``threshold``
gives the item group-specific thresholds (its intercept and unique variance are then
fixed to 0 and 1 in those groups, as at the configural level), ``loading``,
``intercept`` and ``residual`` free the item's parameter in the released groups.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Iterable, Sequence

import numpy as np

from ..errors import SpecificationError
from .spec import ALPHA, BETA, LAMBDA, NU, PSI, TAU, THETA, ModelSpec, Release, level_position
from .structure import Structure

__all__ = ["ORDINAL_LEVELS", "ORDINAL_RELEASES", "build_ordinal_level", "ordinal_level_rank"]

ORDINAL_LEVELS = ("configural", "thresholds", "metric", "scalar", "strict")
ORDINAL_RELEASES = ("threshold", "loading", "intercept", "residual")


def ordinal_level_rank(level: str) -> int:
    """Position of a level in :data:`ORDINAL_LEVELS`."""
    return level_position(level, ORDINAL_LEVELS, kind="ordinal")


def build_ordinal_level(
    structure: Structure,
    groups: Sequence[str],
    level: str,
    n_categories: Sequence[int],
    *,
    reference: str | None = None,
    released: Iterable[Release] = (),
    fixed_means: Sequence[str] = (),
) -> ModelSpec:
    """Build the multi-group ordinal model of one level.

    Parameters
    ----------
    structure
        The measurement structure (items in model order).
    groups
        Group names.
    level
        One of :data:`ORDINAL_LEVELS`.
    n_categories
        Categories per item (structure item order); 0 marks a continuous item, whose
        mean and variance are observed too: its intercept and residual variance are
        free per group until the scalar and strict levels hold them equal (as for
        continuous items, METHODS section 3).
    reference
        Reference group (first by default).
    released
        :class:`~invariance.model.Release` records with ``parameter`` in
        :data:`ORDINAL_RELEASES`.
    fixed_means
        Factors whose means stay 0 in every group at the scalar and strict levels
        (for example the specific factors of a bifactor model, whose means are weakly
        identified next to the general mean; a common practice choice).

    Returns
    -------
    ModelSpec
        With threshold entries (matrix code ``TAU``) and ``moment_count`` set to
        G [sum_i (K_i - 1) + 2 (continuous items) + p(p - 1)/2].
    """
    rank = ordinal_level_rank(level)
    groups, ref = _groups_and_reference(groups, reference)
    items = structure.items
    K = _categories(n_categories, items)
    released = tuple(released)
    _check_releases(released, items=items, K=K, groups=groups)
    is_released = _release_test(released)
    factors = structure.factor_names
    bad = [f for f in fixed_means if f not in factors]
    if bad:
        raise SpecificationError(f"fixed_means names {bad[0]!r}, which is not a factor; use one of {', '.join(factors)}.")
    rows = _level_rows(structure, groups, ref=ref, rank=rank, K=K, is_released=is_released, fixed_means=fixed_means)
    p = len(items)
    moments = len(groups) * (sum(k - 1 if k else 2 for k in K) + p * (p - 1) // 2)
    return ModelSpec.from_rows(
        rows, items=items, factors=factors, groups=groups, level=level, reference=ref,
        released=released, moment_count=moments,
    )


def _level_rows(structure: Structure, groups: tuple[str, ...], *, ref: str, rank: int, K: list[int],
                is_released: Callable[..., bool], fixed_means: Sequence[str]) -> list[tuple]:
    """The parameter rows of every group, in the order :meth:`ModelSpec.from_rows` takes."""
    rows: list[tuple] = []

    def add(g, mat, r, c, free, label="", value=np.nan):
        rows.append((g, mat, r, c, free, label if free else "", value if free else (0.0 if np.isnan(value) else value)))

    for g, gname in enumerate(groups):
        where = _Where(g=g, name=gname, is_ref=gname == ref, rank=rank, is_released=is_released)
        _factor_rows(add, structure, where)
        _item_rows(add, structure, K, where)
        _mean_rows(add, structure, where, fixed_means=fixed_means)
    return rows


def _groups_and_reference(groups: Sequence[str], reference: str | None) -> tuple[tuple[str, ...], str]:
    """Group names as text (unique, at least one) and the reference group among them."""
    groups = tuple(str(g) for g in groups)
    if not groups or len(set(groups)) != len(groups):
        raise SpecificationError("Give at least one group, with unique names.")
    ref = groups[0] if reference is None else str(reference)
    if ref not in groups:
        raise SpecificationError(f"The reference group {ref!r} is not among the groups ({', '.join(groups)}).")
    return groups, ref


def _categories(n_categories: Sequence[int], items: Sequence[str]) -> list[int]:
    """Categories per item as integers: two or more, or 0 for a continuous item."""
    K = [int(k) for k in n_categories]
    if len(K) != len(items) or any(k == 1 or k < 0 for k in K):
        raise SpecificationError(
            "Give the number of categories (two or more; 0 for a continuous item) of every item, in model order."
        )
    return K


def _check_releases(released: tuple[Release, ...], *, items, K: list[int], groups: tuple[str, ...]) -> None:
    """Refuse a release of an unknown kind, item or group, or one the item type cannot have."""
    for r in released:
        if r.parameter not in ORDINAL_RELEASES:
            raise SpecificationError(
                f"Ordinal models release {', '.join(ORDINAL_RELEASES)}; got {r.parameter!r}."
            )
        if r.item not in items:
            raise SpecificationError(f"The release names {r.item!r}, which is not an item of the model.")
        if r.parameter == "threshold" and K[items.index(r.item)] == 0:
            raise SpecificationError(f"Item {r.item!r} is continuous: it has no thresholds to release.")
        if r.parameter == "residual" and K[items.index(r.item)] == 2:
            raise SpecificationError(
                f"Item {r.item!r} is binary: its unique variance is fixed for identification and cannot be released."
            )
        if r.groups is not None:
            bad = [g for g in r.groups if g not in groups]
            if bad:
                raise SpecificationError(f"Unknown group {bad[0]!r}; the groups are {', '.join(groups)}.")


def _release_test(released: tuple[Release, ...]) -> Callable[..., bool]:
    """``is_released(kind, item, group, factor=None)``: whether a release frees that parameter."""

    def is_released(kind: str, item: str, gname: str, factor: str | None = None) -> bool:
        for r in released:
            if r.parameter == kind and r.item == item and (r.groups is None or gname in r.groups):
                if kind != "loading" or r.factor is None or r.factor == factor:
                    return True
        return False

    return is_released


@dataclass(frozen=True)
class _Where:
    """The group being written: its index and name, whether it is the reference, the
    level's rank and the release test."""

    g: int
    name: str
    is_ref: bool
    rank: int
    is_released: Callable[..., bool]

    @property
    def tag(self) -> str:
        return f"|{self.name}"


def _factor_rows(add: Callable, structure: Structure, w: _Where) -> None:
    """Loadings, second-order and structural paths, factor variances and covariances."""
    items, factors = structure.items, structure.factor_names
    it_ix = {v: k for k, v in enumerate(items)}
    f_ix = {v: k for k, v in enumerate(factors)}
    g, rank, tag = w.g, w.rank, w.tag
    for f, its in structure.measured_by.items():
        for it in its:
            lab = f"loading:{it}<-{f}"
            shared = rank >= 2 and not w.is_released("loading", it, w.name, f)
            add(g, LAMBDA, it_ix[it], f_ix[f], True, lab if shared else lab + tag)
    if structure.family == "second_order":
        for f in structure.factors:
            lab = structure.higher_order_label(f)
            add(g, BETA, f_ix[f], f_ix[structure.general], True, lab if rank >= 2 else lab + tag)
    for out, pred in structure.regressions:
        add(g, BETA, f_ix[out], f_ix[pred], True, f"path:{out}<-{pred}{tag}")
    for f in factors:
        if rank >= 2 and not w.is_ref:
            add(g, PSI, f_ix[f], f_ix[f], True, f"variance:{f}{tag}")
        else:
            add(g, PSI, f_ix[f], f_ix[f], False, value=1.0)
    if structure.family in ("correlated", "single"):
        endo = set(structure.endogenous)
        exo = [f for f in factors if f not in endo]
        for a in range(len(exo)):
            for b in range(a):
                i, j = f_ix[exo[a]], f_ix[exo[b]]
                r, c = max(i, j), min(i, j)
                add(g, PSI, r, c, True, f"covariance:{factors[r]}~{factors[c]}{tag}")


def _item_rows(add: Callable, structure: Structure, K: list[int], w: _Where) -> None:
    """Per item: thresholds, intercept and unique variance; then residual covariances."""
    items = structure.items
    g, rank, tag, gname = w.g, w.rank, w.tag, w.name
    for i, it in enumerate(items):
        if K[i] == 0:
            # continuous item: intercept and residual variance as in the continuous levels
            lab = f"intercept:{it}"
            shared = rank >= 3 and not w.is_released("intercept", it, gname)
            add(g, NU, i, 0, True, lab if shared else lab + tag)
            lab = f"residual:{it}"
            shared = rank >= 4 and not w.is_released("residual", it, gname)
            add(g, THETA, i, i, True, lab if shared else lab + tag)
            continue
        tau_shared = rank >= 1 and not w.is_released("threshold", it, gname)
        # thresholds
        for k in range(K[i] - 1):
            lab = f"threshold:{it}#{k + 1}"
            add(g, TAU, i, k, True, lab if tau_shared else lab + tag)
        # location and scale of the latent response
        nu_free = not w.is_ref and tau_shared and (rank < 3 or w.is_released("intercept", it, gname))
        th_free = (
            not w.is_ref
            and tau_shared
            and K[i] >= 3
            and (rank < 4 or w.is_released("residual", it, gname))
        )
        if nu_free:
            add(g, NU, i, 0, True, f"intercept:{it}{tag}")
        if th_free:
            add(g, THETA, i, i, True, f"residual:{it}{tag}")
        else:
            add(g, THETA, i, i, False, value=1.0)
    it_ix = {v: k for k, v in enumerate(items)}
    for a, b in structure.residual_covariances:
        i, j = it_ix[a], it_ix[b]
        r, c = max(i, j), min(i, j)
        lab = f"residual_cov:{items[r]}~{items[c]}"
        add(g, THETA, r, c, True, lab if rank >= 4 else lab + tag)


def _mean_rows(add: Callable, structure: Structure, w: _Where, *, fixed_means: Sequence[str]) -> None:
    """Factor means, free outside the reference group from the scalar level on."""
    factors = structure.factor_names
    for k, f in enumerate(factors):
        top = not (structure.family == "second_order" and f in structure.factors)
        if w.rank >= 3 and not w.is_ref and top and f not in fixed_means:
            add(w.g, ALPHA, k, 0, True, f"mean:{f}{w.tag}")

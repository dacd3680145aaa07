"""Invariance levels: the constraints and identification of each nested model.

Identification follows METHODS section 3 (Meredith 1993; Widaman & Reise 1997): factors
are scaled by fixing variances, so every loading is free (needed for bifactor models).

=============  ========  ==========  =========  ======================  ==================
level          loadings  intercepts  residuals  factor variances        factor means
=============  ========  ==========  =========  ======================  ==================
configural     free      free        free       1 in every group        0 in every group
metric         equal     free        free       1 in ref, free else     0
scalar         equal     equal       free       1 in ref, free else     0 in ref, free else
strict         equal     equal       equal      1 in ref, free else     0 in ref, free else
=============  ========  ==========  =========  ======================  ==================

Second-order models (Chen, Sousa & West 2005): ``metric`` holds the first-order and the
second-order loadings equal; ``scalar`` holds item intercepts and first-order factor
intercepts equal (both fixed at 0, so the higher-order mean is free outside the
reference group). Structural paths and factor covariances stay free in every group
through the measurement levels; the structural levels constrain them.
Residual covariances are held equal at ``strict`` together with the residual variances.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Iterable, Sequence

import numpy as np

from ..errors import SpecificationError
from .ordinal_levels import ORDINAL_LEVELS, build_ordinal_level
from .spec import ALPHA, BETA, LAMBDA, NU, PSI, THETA, ModelSpec, Release
from .structure import Structure

__all__ = ["LEVELS", "LevelBuilder", "build_level", "level_rank"]

LEVELS = ("configural", "metric", "scalar", "strict")


def level_rank(level: str) -> int:
    """Position of a measurement level in :data:`LEVELS`."""
    try:
        return LEVELS.index(level)
    except ValueError:
        raise SpecificationError(
            f"Unknown invariance level {level!r}; use one of {', '.join(LEVELS)}."
        ) from None


def build_level(
    structure: Structure,
    groups: Sequence[str],
    level: str,
    *,
    reference: str | None = None,
    released: Iterable[Release] = (),
    fixed_means: Sequence[str] = (),
    n_categories: Sequence[int] | None = None,
) -> ModelSpec:
    """Build the multi-group model of one invariance level (every item type).

    Parameters
    ----------
    structure
        The measurement structure shared by all groups.
    groups
        Group names, in data order. One group gives a single-group model.
    level
        One of :data:`LEVELS`.
    reference
        The reference group (variances 1 and means 0 there); the first group by default.
    released
        Constraints released up front (known partial invariance).
    fixed_means
        Factors whose means stay 0 in every group (for example the specific factors of
        a bifactor model, whose means are weakly identified next to the general mean).
    n_categories
        Ordered-categorical items: categories per item in model order (0 marks a
        continuous item). The model is then the Wu & Estabrook (2016) one of
        :func:`~invariance.model.ordinal_levels.build_ordinal_level`, whose levels are
        :data:`~invariance.model.ordinal_levels.ORDINAL_LEVELS`. ``None`` (default):
        every item is continuous.

    Returns
    -------
    ModelSpec
    """
    if n_categories is not None:
        return build_ordinal_level(structure, groups, level, n_categories, reference=reference,
                                   released=released, fixed_means=fixed_means)
    rank = level_rank(level)
    groups = tuple(str(g) for g in groups)
    if not groups:
        raise SpecificationError("At least one group is needed to build a model.")
    if len(set(groups)) != len(groups):
        raise SpecificationError("Group names must be unique.")
    ref = groups[0] if reference is None else str(reference)
    if ref not in groups:
        raise SpecificationError(
            f"The reference group {ref!r} is not among the groups ({', '.join(groups)})."
        )
    items = structure.items
    factors = structure.factor_names
    it_ix = {v: k for k, v in enumerate(items)}
    f_ix = {v: k for k, v in enumerate(factors)}
    endo = set(structure.endogenous)
    rows: list[tuple] = []  # (group, matrix, row, col, free, label, value)

    def add(g, mat, r, c, free, label="", value=np.nan):
        rows.append((g, mat, r, c, free, label if free else "", value if (free or not np.isnan(value)) else 0.0))

    shared_load = rank >= 1
    shared_int = rank >= 2
    shared_res = rank >= 3
    for g, gname in enumerate(groups):
        is_ref = gname == ref
        tag = f"|{gname}"
        # loadings
        for f, its in structure.measured_by.items():
            for it in its:
                lab = f"loading:{it}<-{f}"
                add(g, LAMBDA, it_ix[it], f_ix[f], True, lab if shared_load else lab + tag)
        # second-order loadings (B entries) and structural paths
        if structure.family == "second_order":
            for f in structure.factors:
                lab = structure.higher_order_label(f)
                add(g, BETA, f_ix[f], f_ix[structure.general], True, lab if shared_load else lab + tag)
        for out, pred in structure.regressions:
            add(g, BETA, f_ix[out], f_ix[pred], True, f"path:{out}<-{pred}{tag}")
        # factor (disturbance) variances
        for f in factors:
            if rank == 0 or is_ref:
                add(g, PSI, f_ix[f], f_ix[f], False, value=1.0)
            else:
                add(g, PSI, f_ix[f], f_ix[f], True, f"variance:{f}{tag}")
        # factor covariances among exogenous factors (correlated / single families)
        if structure.family in ("correlated", "single"):
            exo = [f for f in factors if f not in endo]
            for a in range(len(exo)):
                for b in range(a):
                    i, j = f_ix[exo[a]], f_ix[exo[b]]
                    r, c = max(i, j), min(i, j)
                    add(g, PSI, r, c, True, f"covariance:{factors[r]}~{factors[c]}{tag}")
        # residual variances and covariances
        for it in items:
            lab = f"residual:{it}"
            add(g, THETA, it_ix[it], it_ix[it], True, lab if shared_res else lab + tag)
        for a, b in structure.residual_covariances:
            i, j = it_ix[a], it_ix[b]
            r, c = max(i, j), min(i, j)
            lab = f"residual_cov:{items[r]}~{items[c]}"
            add(g, THETA, r, c, True, lab if shared_res else lab + tag)
        # intercepts
        for it in items:
            lab = f"intercept:{it}"
            add(g, NU, it_ix[it], 0, True, lab if shared_int else lab + tag)
        # factor means: only the top of the hierarchy gets a free mean at scalar+
        for f in factors:
            top = not (structure.family == "second_order" and f in structure.factors)
            if rank >= 2 and not is_ref and top and f not in fixed_means:
                add(g, ALPHA, f_ix[f], 0, True, f"mean:{f}{tag}")
    spec = ModelSpec.from_rows(rows, items=items, factors=factors, groups=groups, level=level, reference=ref)
    spec = spec.release_all(released)
    return spec


@dataclass(frozen=True)
class LevelBuilder:
    """Everything that fixes the model of a level except the level and its releases.

    One builder serves every item type: with ``n_categories`` the levels are the ordinal
    ones. Releases of ordinal models change an item's identification (Wu & Estabrook
    2016), so :meth:`release` rebuilds the level rather than relabelling entries; for
    continuous items the rebuilt model equals ``spec.release(...)``.

    Attributes
    ----------
    structure, groups, reference, fixed_means, n_categories
        As in :func:`build_level`.
    """

    structure: Structure
    groups: tuple[str, ...]
    reference: str | None = None
    fixed_means: tuple[str, ...] = ()
    n_categories: tuple[int, ...] | None = None

    @property
    def levels(self) -> tuple[str, ...]:
        """The levels this builder knows, in order."""
        return LEVELS if self.n_categories is None else ORDINAL_LEVELS

    def build(self, level: str, released: Iterable[Release] = ()) -> ModelSpec:
        """The model of ``level`` with ``released`` constraints freed."""
        return build_level(self.structure, self.groups, level, reference=self.reference, released=released,
                           fixed_means=self.fixed_means, n_categories=self.n_categories)

    def release(self, spec: ModelSpec, release: Release) -> ModelSpec:
        """``spec`` (a model this builder made) with one more constraint released."""
        return self.build(spec.level, spec.released + (release,))

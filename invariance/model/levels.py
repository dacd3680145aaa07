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
from .spec import ALPHA, BETA, LAMBDA, NU, PSI, THETA, ModelSpec, Release, level_position
from .structure import Structure

__all__ = ["LEVELS", "LevelBuilder", "build_level", "level_rank"]

LEVELS = ("configural", "metric", "scalar", "strict")


def level_rank(level: str) -> int:
    """Position of a measurement level in :data:`LEVELS`."""
    return level_position(level, LEVELS)


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
    groups, ref = _checked_groups(groups, reference)
    rows = _LevelRows(structure, rank)
    for g, gname in enumerate(groups):
        rows.add_group(g, f"|{gname}", is_ref=gname == ref, fixed_means=fixed_means)
    spec = ModelSpec.from_rows(rows.rows, items=structure.items, factors=structure.factor_names,
                               groups=groups, level=level, reference=ref)
    return spec.release_all(released)


def _checked_groups(groups: Sequence[str], reference: str | None) -> tuple[tuple[str, ...], str]:
    """Group names as strings and the reference group, refusing empty, repeated or unknown names."""
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
    return groups, ref


class _LevelRows:
    """The parameter rows of one continuous-item level, collected group by group.

    Each row is ``(group, matrix, row, col, free, label, value)`` as read by
    :meth:`ModelSpec.from_rows`. A label without a ``|group`` tag is shared by every
    group (an equality constraint); the level's rank decides which kinds are shared.
    """

    def __init__(self, structure: Structure, rank: int) -> None:
        self.structure = structure
        self.items = structure.items
        self.factors = structure.factor_names
        self.it_ix = {v: k for k, v in enumerate(self.items)}
        self.f_ix = {v: k for k, v in enumerate(self.factors)}
        self.shared_load = rank >= 1
        self.shared_int = rank >= 2
        self.shared_res = rank >= 3
        self.rank = rank
        self.rows: list[tuple] = []

    def add(self, g: int, mat: str, r: int, c: int, free: bool, label: str = "", value: float = np.nan) -> None:
        """One entry: free ones carry a label, fixed ones a value (0 when none is given)."""
        fixed_value = value if (free or not np.isnan(value)) else 0.0
        self.rows.append((g, mat, r, c, free, label if free else "", fixed_value))

    def add_group(self, g: int, tag: str, *, is_ref: bool, fixed_means: Sequence[str]) -> None:
        """Every entry of group ``g`` (``tag`` is ``|name``, appended to group-specific labels)."""
        self._loadings_and_paths(g, tag)
        self._factor_variances(g, tag, is_ref=is_ref)
        self._residuals(g, tag)
        self._intercepts_and_means(g, tag, is_ref=is_ref, fixed_means=fixed_means)

    def _loadings_and_paths(self, g: int, tag: str) -> None:
        """Item loadings, second-order loadings (B entries) and structural paths."""
        st, f_ix = self.structure, self.f_ix
        for f, its in st.measured_by.items():
            for it in its:
                lab = f"loading:{it}<-{f}"
                self.add(g, LAMBDA, self.it_ix[it], f_ix[f], True, lab if self.shared_load else lab + tag)
        if st.family == "second_order":
            for f in st.factors:
                lab = st.higher_order_label(f)
                self.add(g, BETA, f_ix[f], f_ix[st.general], True, lab if self.shared_load else lab + tag)
        for out, pred in st.regressions:
            self.add(g, BETA, f_ix[out], f_ix[pred], True, f"path:{out}<-{pred}{tag}")

    def _factor_variances(self, g: int, tag: str, *, is_ref: bool) -> None:
        """Factor (disturbance) variances, and covariances among exogenous factors
        (correlated / single families)."""
        f_ix, factors = self.f_ix, self.factors
        for f in factors:
            if self.rank == 0 or is_ref:
                self.add(g, PSI, f_ix[f], f_ix[f], False, value=1.0)
            else:
                self.add(g, PSI, f_ix[f], f_ix[f], True, f"variance:{f}{tag}")
        if self.structure.family in ("correlated", "single"):
            endo = set(self.structure.endogenous)
            exo = [f for f in factors if f not in endo]
            for a in range(len(exo)):
                for b in range(a):
                    i, j = f_ix[exo[a]], f_ix[exo[b]]
                    r, c = max(i, j), min(i, j)
                    self.add(g, PSI, r, c, True, f"covariance:{factors[r]}~{factors[c]}{tag}")

    def _residuals(self, g: int, tag: str) -> None:
        """Residual variances and covariances (shared at ``strict``)."""
        items, it_ix = self.items, self.it_ix
        for it in items:
            lab = f"residual:{it}"
            self.add(g, THETA, it_ix[it], it_ix[it], True, lab if self.shared_res else lab + tag)
        for a, b in self.structure.residual_covariances:
            i, j = it_ix[a], it_ix[b]
            r, c = max(i, j), min(i, j)
            lab = f"residual_cov:{items[r]}~{items[c]}"
            self.add(g, THETA, r, c, True, lab if self.shared_res else lab + tag)

    def _intercepts_and_means(self, g: int, tag: str, *, is_ref: bool, fixed_means: Sequence[str]) -> None:
        """Item intercepts; factor means, free only at the top of the hierarchy at scalar+."""
        st = self.structure
        for it in self.items:
            lab = f"intercept:{it}"
            self.add(g, NU, self.it_ix[it], 0, True, lab if self.shared_int else lab + tag)
        for f in self.factors:
            top = not (st.family == "second_order" and f in st.factors)
            if self.rank >= 2 and not is_ref and top and f not in fixed_means:
                self.add(g, ALPHA, self.f_ix[f], 0, True, f"mean:{f}{tag}")


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

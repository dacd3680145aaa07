"""Measurement structures: which items measure which factors, and how factors relate.

A :class:`Structure` is the one description of a questionnaire from which every
invariance level is built (see :mod:`invariance.model.levels`). It knows nothing about
groups or estimation.

Families
--------
``single``
    One factor over all items (the factors mapping has exactly one entry).
``correlated``
    Several factors with free covariances.
``second_order``
    First-order factors whose covariances are explained by one higher-order factor
    (named by ``general``); the higher-order loadings are regression entries (B).
    Over exactly two first-order factors the two higher-order loadings share one
    label (held equal), which identifies the model; at the configural and metric levels
    it then fits exactly as the two correlated factors with a non-negative correlation
    (same chi-square and df).
``bifactor``
    A general factor (``general``) over all items plus orthogonal specific factors.

Structural regressions among factors (``regressions``) and correlated residuals
(``residual_covariances``) can be added to any family.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping, Sequence

from ..errors import SpecificationError

__all__ = ["Structure", "FAMILIES"]

FAMILIES = ("single", "correlated", "second_order", "bifactor")


@dataclass(frozen=True)
class Structure:
    """A measurement structure shared by all groups.

    Parameters
    ----------
    factors
        Factor name -> item names (the first-order or specific factors).
    family
        One of :data:`FAMILIES`.
    general
        Name of the general factor (bifactor) or of the higher-order factor
        (second-order). Must be ``None`` for the other families.
    regressions
        ``(outcome, predictor)`` factor pairs: the outcome factor is regressed on the
        predictor factor (a structural path).
    residual_covariances
        ``(item, item)`` pairs whose residuals covary.
    """

    factors: Mapping[str, tuple[str, ...]]
    family: str = "correlated"
    general: str | None = None
    regressions: tuple[tuple[str, str], ...] = ()
    residual_covariances: tuple[tuple[str, str], ...] = ()
    _items: tuple[str, ...] = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        factors = {str(k): tuple(str(i) for i in v) for k, v in dict(self.factors).items()}
        object.__setattr__(self, "factors", factors)
        object.__setattr__(self, "regressions", tuple((str(a), str(b)) for a, b in self.regressions))
        object.__setattr__(
            self, "residual_covariances", tuple((str(a), str(b)) for a, b in self.residual_covariances)
        )
        if self.family not in FAMILIES:
            raise SpecificationError(
                f"The model family must be one of {', '.join(FAMILIES)}; got {self.family!r}."
            )
        if not factors:
            raise SpecificationError("The structure needs at least one factor with items.")
        items: list[str] = []
        for name, its in factors.items():
            if not its:
                raise SpecificationError(f"Factor {name!r} has no items; give it at least one item.")
            # cross-loadings are allowed in every family; keep first-seen order
            for it in its:
                if it not in items:
                    items.append(it)
        object.__setattr__(self, "_items", tuple(items))
        self._check_family()
        self._check_regressions()
        self._check_residual_covariances()

    def _check_family(self) -> None:
        """The family's demands on the number of factors and on the general factor."""
        factors = self.factors
        if self.family == "single" and len(factors) != 1:
            raise SpecificationError(
                f"A single-factor structure has exactly one factor; got {len(factors)} "
                "(use family 'correlated' for several factors)."
            )
        if self.family in ("bifactor", "second_order"):
            if not self.general:
                raise SpecificationError(
                    f"The {self.family} family needs the name of its "
                    f"{'general' if self.family == 'bifactor' else 'higher-order'} factor."
                )
            if self.general in factors:
                raise SpecificationError(
                    f"The general factor {self.general!r} has the name of a specific factor; rename one."
                )
        elif self.general is not None:
            raise SpecificationError(
                f"A general factor is only used by the bifactor and second_order families, not {self.family!r}."
            )
        if self.family == "second_order":
            if len(factors) < 2:
                raise SpecificationError(
                    "A second-order factor needs at least two first-order factors."
                )

    def _check_regressions(self) -> None:
        """Every regression names two different known factors."""
        known = set(self.factor_names)
        for out, pred in self.regressions:
            for f in (out, pred):
                if f not in known:
                    raise SpecificationError(
                        f"The regression {out} on {pred} names an unknown factor {f!r}; "
                        f"known factors: {', '.join(self.factor_names)}."
                    )
            if out == pred:
                raise SpecificationError(f"Factor {out!r} cannot be regressed on itself.")

    def _check_residual_covariances(self) -> None:
        """Every residual covariance names two different items of the structure."""
        for a, b in self.residual_covariances:
            for it in (a, b):
                if it not in self._items:
                    raise SpecificationError(
                        f"The residual covariance {a} with {b} names {it!r}, which is not an item of the model."
                    )
            if a == b:
                raise SpecificationError(f"A residual covariance needs two different items; got {a} twice.")

    @property
    def items(self) -> tuple[str, ...]:
        """All items, in first-seen order."""
        return self._items

    @property
    def factor_names(self) -> tuple[str, ...]:
        """All latent variables: the listed factors, then the general / higher-order one."""
        names = tuple(self.factors)
        return names + ((self.general,) if self.general else ())

    @property
    def measured_by(self) -> dict[str, tuple[str, ...]]:
        """Factor -> the items that load on it directly (the general factor of a
        bifactor model loads on all items; a higher-order factor on none)."""
        out = dict(self.factors)
        if self.family == "bifactor":
            out[self.general] = self.items
        return out

    @property
    def endogenous(self) -> tuple[str, ...]:
        """Factors that are regressed on other factors."""
        outs = [o for o, _ in self.regressions]
        if self.family == "second_order":
            outs = list(self.factors) + outs
        return tuple(dict.fromkeys(outs))

    def higher_order_label(self, factor: str) -> str:
        """Label of the higher-order loading of ``factor`` on the ``general`` factor.

        Over exactly two first-order factors both loadings get one shared label, so
        they are held equal: that constraint identifies the second-order part.
        """
        if len(self.factors) == 2:
            first, second = self.factors
            return f"path:{first}={second}<-{self.general}"
        return f"path:{factor}<-{self.general}"

    def with_items(self, order: Sequence[str]) -> "Structure":
        """The same structure with the item order of every factor following ``order``."""
        rank = {it: k for k, it in enumerate(order)}
        return Structure(
            factors={f: tuple(sorted(v, key=rank.__getitem__)) for f, v in self.factors.items()},
            family=self.family,
            general=self.general,
            regressions=self.regressions,
            residual_covariances=self.residual_covariances,
        )

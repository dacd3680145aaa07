"""Typed options: pipeline sections validated once, at load time, into frozen objects.

:func:`~invariance.spec.load.build_spec` calls these; stages read the resulting
attributes of :class:`~invariance.spec.load.PipelineSpec` and never the raw document.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Mapping

from ..errors import SpecificationError
from ..model.structural import STRUCTURAL_STEPS
from ..partial.search import CORRECTIONS, RELEASE_MODES, UNTIL

__all__ = ["PartialSettings", "check_alignment_section", "partial_settings", "structural_settings"]


@dataclass(frozen=True)
class PartialSettings:
    """Options of the ``partial:`` pipeline section (see schema.json)."""

    enabled: bool = False
    alpha: float = 0.05
    correction: str = "holm"
    max_releases: int = 10
    release_in: str = "all"
    verify: bool = False
    verify_top: int = 3
    min_invariant_items: int = 2
    until: str = "holds"

    def search_options(self) -> dict:
        return {"alpha": self.alpha, "correction": self.correction, "max_releases": self.max_releases,
                "release_in": self.release_in, "verify": self.verify, "verify_top": self.verify_top,
                "until": self.until}

    def searches(self, decision: str) -> bool:
        """Whether a level with this decision is searched."""
        return self.enabled and (decision != "holds" or self.until == "clean")

    def to_dict(self) -> dict:
        return dict(self.__dict__)


_ALLOWED = tuple(PartialSettings.__dataclass_fields__)


def partial_settings(section: Mapping[str, Any] | None) -> PartialSettings:
    """Validate the ``partial:`` section. A missing section disables the search; a
    present one enables it unless ``enabled: false``."""
    if section is None:
        return PartialSettings()
    section = dict(section)
    unknown = [k for k in section if k not in _ALLOWED]
    if unknown:
        raise SpecificationError(
            f"partial: unknown key {unknown[0]!r}; the allowed keys are {', '.join(_ALLOWED)}."
        )
    s = PartialSettings(**{"enabled": True, **section})
    if s.correction not in CORRECTIONS:
        raise SpecificationError(f"partial.correction must be one of {', '.join(CORRECTIONS)}; got {s.correction!r}.")
    if s.release_in not in RELEASE_MODES:
        raise SpecificationError(f"partial.release_in must be one of {', '.join(RELEASE_MODES)}; got {s.release_in!r}.")
    if s.until not in UNTIL:
        raise SpecificationError(f"partial.until must be one of {', '.join(UNTIL)}; got {s.until!r}.")
    if not 0 < float(s.alpha) < 1:
        raise SpecificationError(f"partial.alpha must be between 0 and 1; got {s.alpha!r}.")
    if int(s.max_releases) < 0 or int(s.verify_top) < 1 or int(s.min_invariant_items) < 1:
        raise SpecificationError("partial.max_releases must be >= 0, verify_top and min_invariant_items >= 1.")
    return s


def structural_settings(section: Mapping[str, Any] | None) -> tuple[str, ...]:
    """Validate the ``structural:`` section: ``{levels: [variances, covariances, means, paths]}``."""
    if section is None:
        return ()
    section = dict(section)
    unknown = [k for k in section if k != "levels"]
    if unknown:
        raise SpecificationError(f"structural: unknown key {unknown[0]!r}; the allowed key is levels.")
    steps = tuple(section.get("levels", ()))
    for s in steps:
        if s not in STRUCTURAL_STEPS:
            raise SpecificationError(
                f"structural.levels: unknown level {s!r}; use any of {', '.join(STRUCTURAL_STEPS)}."
            )
    order = [STRUCTURAL_STEPS.index(s) for s in steps]
    if order != sorted(order) or len(set(steps)) != len(steps):
        raise SpecificationError(
            f"structural.levels must be in the order {', '.join(STRUCTURAL_STEPS)} without repeats."
        )
    return steps


def check_alignment_section(doc, structure) -> None:
    """Refuse, when the pipeline is loaded, an alignment the model cannot have.

    Alignment works factor by factor, so it needs single-factor or correlated-factor
    models whose items each load on one factor.
    """
    opts = doc.get("alignment") or {}
    if not opts.get("enabled", False):
        return
    family = structure.family
    if family not in ("single", "correlated"):
        raise SpecificationError(
            f"alignment.enabled needs a single-factor or correlated-factor model, not {family}: an item's "
            "intercept there depends on several factor means; set alignment.enabled to false."
        )
    seen: dict[str, str] = {}
    for f, its in structure.factors.items():
        for it in its:
            if it in seen:
                raise SpecificationError(
                    f"alignment.enabled needs each item on one factor; {it} loads on {seen[it]} and {f}: "
                    "drop the cross-loading or set alignment.enabled to false."
                )
            seen[it] = f

"""Result types of the alignment: per-parameter agreement and the aligned factor moments."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

__all__ = ["AlignmentResult", "ParameterAgreement"]


@dataclass(frozen=True)
class ParameterAgreement:
    """How far one item parameter agrees across groups after alignment.

    Attributes
    ----------
    factor, item, parameter
        Where the parameter sits; ``parameter`` is ``loading`` or ``intercept``.
    aligned, se
        Group -> aligned value and its standard error.
    invariant, noninvariant
        Groups inside / outside the invariant set.
    value
        N-weighted mean of the aligned values in the invariant set.
    r2
        Share of the across-group variance of the configural parameter explained by
        the aligned factor means and variances with one common item parameter
        (1 = fully invariant); ``nan`` when the configural values do not vary.
    loss
        This parameter's part of the total alignment loss.
    """

    factor: str
    item: str
    parameter: str
    aligned: dict
    se: dict
    invariant: tuple[str, ...]
    noninvariant: tuple[str, ...]
    value: float
    r2: float
    loss: float

    def to_dict(self) -> dict:
        return {
            "factor": self.factor,
            "item": self.item,
            "parameter": self.parameter,
            "value": _num(self.value),
            "r2": _num(self.r2),
            "loss": _num(self.loss),
            "invariant": list(self.invariant),
            "noninvariant": list(self.noninvariant),
            "aligned": {g: _num(v) for g, v in self.aligned.items()},
            "se": {g: _num(v) for g, v in self.se.items()},
        }


@dataclass(frozen=True)
class AlignmentResult:
    """Aligned factor means and variances of every group, with item agreement.

    ``means`` and ``variances`` map factor -> group -> value (reference group 0 and 1);
    ``means_se`` and ``variances_se`` the same for standard errors (0 in the reference
    group, which is fixed).
    """

    groups: tuple[str, ...]
    reference: str
    factors: tuple[str, ...]
    means: dict
    variances: dict
    means_se: dict
    variances_se: dict
    loss: dict
    converged: dict
    parameters: tuple[ParameterAgreement, ...]
    notes: tuple[str, ...] = ()
    settings: dict = field(default_factory=dict)

    def flagged(self, parameter: str | None = None) -> list[tuple[str, str, str, str]]:
        """(factor, item, parameter, group) of every noninvariant group of a parameter."""
        return [
            (p.factor, p.item, p.parameter, g)
            for p in self.parameters
            if parameter is None or p.parameter == parameter
            for g in p.noninvariant
        ]

    def table(self):
        """Aligned means and variances as a pandas DataFrame (factor, group, ...)."""

        rows = [
            {
                "factor": f,
                "group": g,
                "mean": self.means[f][g],
                "mean_se": self.means_se[f][g],
                "variance": self.variances[f][g],
                "variance_se": self.variances_se[f][g],
            }
            for f in self.factors
            for g in self.groups
        ]
        return pd.DataFrame(rows)

    def parameter_table(self):
        """One row per factor, item parameter and group: aligned value, SE, in the invariant set."""

        rows = [
            {
                "factor": p.factor,
                "item": p.item,
                "parameter": p.parameter,
                "group": g,
                "aligned": p.aligned[g],
                "se": p.se[g],
                "invariant": g in p.invariant,
                "set_value": p.value,
                "r2": p.r2,
            }
            for p in self.parameters
            for g in self.groups
        ]
        return pd.DataFrame(rows)

    def to_dict(self) -> dict:
        """Plain types for results.json (section ``alignment``)."""
        conv = lambda d: {f: {g: _num(v) for g, v in dd.items()} for f, dd in d.items()}
        return {
            "reference": self.reference,
            "groups": list(self.groups),
            "means": conv(self.means),
            "variances": conv(self.variances),
            "means_se": conv(self.means_se),
            "variances_se": conv(self.variances_se),
            "loss": {f: _num(v) for f, v in self.loss.items()},
            "converged": dict(self.converged),
            "parameters": [p.to_dict() for p in self.parameters],
            "notes": list(self.notes),
            "settings": dict(self.settings),
        }


def _num(v) -> float | None:
    v = float(v)
    return v if np.isfinite(v) else None

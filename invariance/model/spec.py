"""The multi-group model specification: a table of matrix entries, fixed or free.

Every group has the six matrices of the all-indicator model (METHODS section 1)::

    Sigma_g = Lambda A Psi A' Lambda' + Theta,   A = (I - B)^-1
    mu_g    = nu + Lambda A alpha

A :class:`ModelSpec` is one flat table whose rows are the matrix entries that are free or
fixed to a non-zero value; everything absent is a fixed zero. A free entry carries a
label; a label used by entries in several groups is one parameter, i.e. an equality
constraint across those groups. Releasing a constraint therefore only rewrites labels
(:meth:`ModelSpec.release`), which is cheap enough for a search that does it thousands
of times.

Matrix codes (column ``matrix`` of the table): see :data:`MATRICES`.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Iterable, Sequence

import numpy as np

import pandas as pd

from ..errors import SpecificationError

__all__ = ["ModelSpec", "Release", "level_position", "MATRICES", "PARAMETER_KINDS", "LAMBDA", "BETA", "PSI", "THETA", "NU", "ALPHA", "TAU"]

#: Matrix codes in the entry table.
LAMBDA, BETA, PSI, THETA, NU, ALPHA = range(6)
#: Thresholds of ordered items (row = item, col = threshold index 0 .. K_i - 2). Only
#: ordinal models (:mod:`invariance.ordinal.levels`) use it; the continuous kernels skip it.
TAU = 6
MATRICES = ("lambda", "beta", "psi", "theta", "nu", "alpha", "tau")

#: Names of the parameter kinds an entry can be (what a reader calls it).
PARAMETER_KINDS = (
    "loading",      # Lambda[item, factor]
    "path",         # B[outcome, predictor]: structural path or second-order loading
    "variance",     # Psi[f, f]: factor (disturbance) variance
    "covariance",   # Psi[f, h]
    "residual",     # Theta[i, i]
    "residual_cov", # Theta[i, j]
    "intercept",    # nu[i]
    "mean",         # alpha[f]: factor mean or intercept
    "threshold",    # tau[i, k]: threshold k of an ordered item
)


def level_position(level: str, levels: Sequence[str], *, kind: str = "") -> int:
    """Position of ``level`` in the ordered ``levels``; one line naming the choices when
    it is unknown (``kind``: a word before "invariance level", e.g. "ordinal")."""
    try:
        return tuple(levels).index(level)
    except ValueError:
        words = f"{kind} invariance level" if kind else "invariance level"
        raise SpecificationError(
            f"Unknown {words} {level!r}; use one of {', '.join(levels)}."
        ) from None


@dataclass(frozen=True)
class Release:
    """A constraint released on purpose: one item parameter made group-specific.

    Parameters
    ----------
    parameter
        ``loading``, ``intercept``, ``residual`` (or any of :data:`PARAMETER_KINDS`).
    item
        The item (or, for ``path``/``variance``/``mean``, the outcome factor).
    factor
        The factor of a loading (the predictor of a path); ``None`` otherwise.
    groups
        Groups that get their own parameter; ``None`` means every group.
    """

    parameter: str
    item: str
    factor: str | None = None
    groups: tuple[str, ...] | None = None

    def to_dict(self) -> dict:
        return {
            "parameter": self.parameter,
            "item": self.item,
            "factor": self.factor,
            "groups": list(self.groups) if self.groups is not None else None,
        }


@dataclass(frozen=True, eq=False)
class ModelSpec:
    """Entry table of a multi-group model.

    Attributes
    ----------
    items, factors, groups
        Row/column names: observed items (p), latent variables (m), group names (G).
    group, matrix, row, col
        Integer arrays, one element per entry. Symmetric matrices (Psi, Theta) store
        each off-diagonal entry once, with ``row > col``.
    free
        Boolean array: the entry is estimated.
    label
        Object array of parameter labels (``""`` for fixed entries).
    value
        Fixed value, or a starting value for free entries (``nan`` = choose one).
    level
        Name of the invariance level the spec was built for (informational).
    reference
        Name of the reference group (informational; identification is in the table).
    released
        The :class:`Release` records applied so far.
    moment_count
        Number of observed statistics when they are not G p(p+3)/2 covariances and
        means (ordinal models: thresholds and polychoric correlations); ``None`` for
        the continuous count.
    """

    items: tuple[str, ...]
    factors: tuple[str, ...]
    groups: tuple[str, ...]
    group: np.ndarray
    matrix: np.ndarray
    row: np.ndarray
    col: np.ndarray
    free: np.ndarray
    label: np.ndarray
    value: np.ndarray
    level: str = ""
    reference: str = ""
    released: tuple[Release, ...] = ()
    moment_count: int | None = None
    _param: np.ndarray = field(init=False, repr=False)
    _labels: tuple[str, ...] = field(init=False, repr=False)

    def __post_init__(self) -> None:
        for name in ("group", "matrix", "row", "col"):
            object.__setattr__(self, name, np.asarray(getattr(self, name), dtype=np.int64))
        object.__setattr__(self, "free", np.asarray(self.free, dtype=bool))
        object.__setattr__(self, "value", np.asarray(self.value, dtype=float))
        object.__setattr__(self, "label", np.asarray(self.label, dtype=object))
        param = np.full(self.group.size, -1, dtype=np.int64)
        free_labels = self.label[self.free]
        if not all(free_labels):
            raise SpecificationError("Every free entry needs a label.")
        # parameters numbered in order of first appearance of their labels
        uniq, first, inverse = np.unique(free_labels.astype(str), return_index=True, return_inverse=True)
        order = np.argsort(first, kind="stable")
        rank = np.empty(order.size, dtype=np.int64)
        rank[order] = np.arange(order.size)
        param[self.free] = rank[inverse.ravel()]
        object.__setattr__(self, "_param", param)
        object.__setattr__(self, "_labels", tuple(str(x) for x in uniq[order]))
        for arr in (self.group, self.matrix, self.row, self.col, self.free, self.label, self.value, param):
            arr.setflags(write=False)

    @classmethod
    def from_rows(cls, rows, **names) -> "ModelSpec":
        """Build a spec from ``(group, matrix, row, col, free, label, value)`` tuples;
        ``names`` are the remaining fields (items, factors, groups, level, reference, ...)."""
        g_, m_, r_, c_, fr_, lb_, v_ = zip(*rows)
        return cls(
            group=np.array(g_),
            matrix=np.array(m_),
            row=np.array(r_),
            col=np.array(c_),
            free=np.array(fr_),
            label=np.array(lb_, dtype=object),
            value=np.array(v_, dtype=float),
            **names,
        )

    # ----------------------------------------------------------------- basics
    @property
    def n_params(self) -> int:
        """Number of distinct free parameters."""
        return len(self._labels)

    @property
    def param_labels(self) -> tuple[str, ...]:
        """Parameter labels in parameter-vector order."""
        return self._labels

    @property
    def param_index(self) -> np.ndarray:
        """Entry -> parameter index (-1 for fixed entries)."""
        return self._param

    @property
    def n_moments(self) -> int:
        """Observed moments: G * p(p+3)/2 (covariances and means), or ``moment_count``."""
        if self.moment_count is not None:
            return int(self.moment_count)
        p = len(self.items)
        return len(self.groups) * p * (p + 3) // 2

    @property
    def df(self) -> int:
        """Degrees of freedom of the model test: moments minus distinct free parameters."""
        return self.n_moments - self.n_params

    def kinds(self) -> np.ndarray:
        """Parameter kind of every entry (see :data:`PARAMETER_KINDS`)."""
        diag = self.row == self.col
        # matrix code -> kind, with the symmetric matrices split by diagonal
        table = np.array(["loading", "path", "covariance", "residual_cov", "intercept", "mean", "threshold"], dtype=object)
        out = table[self.matrix]
        out[(self.matrix == PSI) & diag] = "variance"
        out[(self.matrix == THETA) & diag] = "residual"
        return out

    def entry_names(self) -> tuple[np.ndarray, np.ndarray]:
        """(variable, other) names of every entry: item and factor for loadings, outcome and
        predictor for paths, the two variables of a covariance, ``None`` where absent."""
        items = np.array(self.items + (None,), dtype=object)
        facs = np.array(self.factors + (None,), dtype=object)
        m, r, c = self.matrix, self.row, self.col
        item_row = np.isin(m, (LAMBDA, THETA, NU, TAU))
        lhs = np.where(item_row, items[np.where(item_row, r, -1)], facs[np.where(item_row, -1, r)])
        rhs = np.full(m.size, None, dtype=object)
        sel = m == LAMBDA
        rhs[sel] = facs[c[sel]]
        sel = (m == BETA) | ((m == PSI) & (r != c))
        rhs[sel] = facs[c[sel]]
        sel = (m == THETA) & (r != c)
        rhs[sel] = items[c[sel]]
        for k in np.flatnonzero(m == TAU):
            rhs[k] = f"t{c[k] + 1}"
        return lhs.astype(object), rhs

    def group_entries(self, g: int) -> np.ndarray:
        """Indices of the entries of group ``g``."""
        return np.flatnonzero(self.group == g)

    # --------------------------------------------------------------- editing
    def _select(
        self, parameter: str, item: str, factor: str | None, groups: Sequence[str] | None
    ) -> tuple[np.ndarray, str | None]:
        if parameter not in PARAMETER_KINDS:
            raise SpecificationError(
                f"Unknown parameter kind {parameter!r}; use one of {', '.join(PARAMETER_KINDS)}."
            )
        kinds = self.kinds()
        lhs, rhs = self.entry_names()
        mask = (kinds == parameter) & (lhs == item) & self.free
        if parameter in ("loading", "path", "covariance", "residual_cov"):
            if factor is None and parameter in ("loading", "path"):
                cand = sorted({str(r) for r in rhs[mask]})
                if len(cand) == 1:
                    factor = cand[0]
                else:
                    raise SpecificationError(
                        f"Item {item!r} has {parameter}s on several factors ({', '.join(cand)}); name the factor."
                    )
            mask &= rhs == factor
        if groups is not None:
            unknown = [g for g in groups if g not in self.groups]
            if unknown:
                raise SpecificationError(
                    f"Unknown group {unknown[0]!r}; the groups are {', '.join(self.groups)}."
                )
            gi = [self.groups.index(g) for g in groups]
            mask &= np.isin(self.group, gi)
        if not mask.any():
            where = f" on {factor}" if factor else ""
            raise SpecificationError(
                f"There is no free {parameter} of {item!r}{where} in this model to release; "
                "check the item, factor and parameter names."
            )
        return np.flatnonzero(mask), factor

    def release(
        self,
        parameter: str,
        item: str,
        factor: str | None = None,
        groups: Sequence[str] | None = None,
    ) -> "ModelSpec":
        """Return a copy in which one equality constraint is released.

        The chosen entries get group-specific labels, so the parameter is estimated
        separately in each named group (``groups=None``: in every group), while the
        other groups keep sharing their common label.
        """
        idx, factor = self._select(parameter, item, factor, None if groups is None else tuple(groups))
        label = self.label.copy()
        for k in idx:
            base = label[k].split("|", 1)[0]
            label[k] = f"{base}|{self.groups[self.group[k]]}"
        rel = Release(parameter, item, factor if parameter in ("loading", "path") else None,
                      None if groups is None else tuple(groups))
        return replace(self, label=label, released=self.released + (rel,))

    def release_all(self, releases: Iterable[Release]) -> "ModelSpec":
        """Apply several :class:`Release` records in turn."""
        spec = self
        for r in releases:
            spec = spec.release(r.parameter, r.item, r.factor, r.groups)
        return spec

    def with_values(self, value: np.ndarray) -> "ModelSpec":
        """A copy with a new value column (fixed values and starting values)."""
        return replace(self, value=np.asarray(value, dtype=float).copy())

    def equality_sets(self) -> list[np.ndarray]:
        """Entry index sets that share a label across two or more groups.

        Each set is one parameter held equal across the groups in which it appears; the
        partial-invariance search tests these constraints.
        """
        out = []
        param = self._param
        for j in range(self.n_params):
            ent = np.flatnonzero(param == j)
            if np.unique(self.group[ent]).size > 1:
                out.append(ent)
        return out

    def table(self):
        """The entry table as a pandas DataFrame (for reading, not for computing)."""

        lhs, rhs = self.entry_names()
        return pd.DataFrame(
            {
                "group": [self.groups[g] for g in self.group],
                "parameter": self.kinds(),
                "variable": lhs,
                "other": rhs,
                "free": self.free,
                "label": self.label,
                "value": self.value,
            }
        )

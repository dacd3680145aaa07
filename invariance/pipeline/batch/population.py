"""Population models for Monte Carlo planning: every group's six matrices.

A :class:`Population` is built from a fitted model (:meth:`Population.from_fit`), an
estimates table (:meth:`Population.from_estimates`, e.g. a run's estimates.csv), item
values shared by all groups (:meth:`Population.from_values`) or plain matrices
(:meth:`Population.from_dict`). A :class:`Shift` plants one noninvariant parameter.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Mapping, Sequence

import numpy as np

import pandas as pd

from ...data.simulate import draw_group
from ...errors import SpecificationError
from ...estimate.kernels import implied_moments
from ...model.levels import LEVELS
from ...model.structure import Structure
from ...estimate.result import FitResult

__all__ = ["Population", "Shift", "STEP_OF", "simulate_groups", "group_sizes"]

#: The step (level) at which each shiftable parameter is first held equal.
STEP_OF = {"loading": "metric", "intercept": "scalar", "residual": "strict"}
_MATS = ("lambda", "beta", "psi", "theta", "nu", "alpha")


@dataclass(frozen=True)
class Shift:
    """A planted noninvariance: ``parameter`` of ``item`` moved by ``size`` in ``groups``.

    ``parameter`` is ``loading`` (on ``factor``; needed only when the item loads on
    several factors), ``intercept`` or ``residual`` (variance). ``groups=None`` shifts
    every group but the first.
    """

    parameter: str
    item: str
    size: float
    factor: str | None = None
    groups: tuple[str, ...] | None = None

    def to_dict(self) -> dict:
        return {"parameter": self.parameter, "item": self.item, "size": self.size, "factor": self.factor,
                "groups": None if self.groups is None else list(self.groups)}


@dataclass(frozen=True)
class Population:
    """Population matrices of every group (Lambda, B, Psi, Theta, nu, alpha)."""

    structure: Structure
    groups: tuple[str, ...]
    matrices: tuple[tuple[np.ndarray, ...], ...]

    def __post_init__(self) -> None:
        p, m = len(self.structure.items), len(self.structure.factor_names)
        shapes = ((p, m), (m, m), (m, m), (p, p), (p,), (m,))
        if len(self.matrices) != len(self.groups):
            raise SpecificationError(
                f"The population has {len(self.groups)} groups but {len(self.matrices)} sets of matrices; give one set per group."
            )
        mats = []
        for g, ms in zip(self.groups, self.matrices):
            ms = tuple(np.asarray(x, dtype=float) for x in ms)
            for name, x, shp in zip(_MATS, ms, shapes):
                if x.shape != shp:
                    raise SpecificationError(
                        f"Population matrix {name} of group {g!r} has shape {x.shape}; it must be {shp}."
                    )
            mats.append(ms)
        object.__setattr__(self, "matrices", tuple(mats))
        object.__setattr__(self, "groups", tuple(str(g) for g in self.groups))

    @classmethod
    def from_fit(cls, result: FitResult, structure: Structure) -> "Population":
        """The estimates of a fitted model taken as the population (any level)."""
        if tuple(structure.items) != tuple(result.spec.items):
            structure = structure.with_items(result.spec.items)
        return cls(structure, tuple(result.groups), result.matrices)

    @classmethod
    def from_estimates(cls, table, structure: Structure, *, level: str | None = None) -> "Population":
        """From an estimates table: ``FitResult.estimates()`` or a run's estimates.csv.

        ``table`` is a DataFrame or a CSV path with the columns group, parameter, variable,
        other and estimate (and ``level`` when several levels are stacked: ``level``
        picks one, default the highest level present).
        """

        frame = pd.read_csv(table, keep_default_na=False, na_values=[""]) if not isinstance(table, pd.DataFrame) else table
        need = {"group", "parameter", "variable", "other", "estimate"}
        if not need <= set(frame.columns):
            raise SpecificationError(
                f"The estimates table needs the columns {', '.join(sorted(need))}; it has {', '.join(map(str, frame.columns))}."
            )
        if "level" in frame.columns:
            present = [lv for lv in LEVELS if lv in set(frame["level"])]
            level = level or (present[-1] if present else None)
            if level not in present:
                raise SpecificationError(
                    f"The estimates table has no level {level!r}; it has {', '.join(present) or 'none'}."
                )
            frame = frame[frame["level"] == level]
        items, facs = structure.items, structure.factor_names
        p, m = len(items), len(facs)
        groups = list(dict.fromkeys(str(g) for g in frame["group"]))
        mats = {g: [np.zeros((p, m)), np.zeros((m, m)), np.zeros((m, m)), np.zeros((p, p)), np.zeros(p), np.zeros(m)]
                for g in groups}
        where = {
            "loading": (0, items, facs), "path": (1, facs, facs), "variance": (2, facs, None),
            "covariance": (2, facs, facs), "residual": (3, items, None), "residual_cov": (3, items, items),
            "intercept": (4, items, None), "mean": (5, facs, None),
        }
        for row in frame.itertuples(index=False):
            kind = str(row.parameter)
            if kind not in where:
                continue
            k, rows, cols = where[kind]
            lhs, rhs = str(row.variable), (None if pd.isna(row.other) else str(row.other))
            if lhs not in rows or (cols is not None and rhs not in cols):
                raise SpecificationError(
                    f"The estimates table names {lhs!r}/{rhs!r}, which the model structure does not have; "
                    "give the structure the table was fitted with."
                )
            M, i, val = mats[str(row.group)][k], rows.index(lhs), float(row.estimate)
            if kind in ("intercept", "mean"):
                M[i] = val
            elif kind in ("variance", "residual"):
                M[i, i] = val
            else:
                j = cols.index(rhs)
                M[i, j] = val
                if kind in ("covariance", "residual_cov"):
                    M[j, i] = val
        return cls(structure, tuple(groups), tuple(tuple(mats[g]) for g in groups))

    @classmethod
    def from_dict(cls, data: Mapping, structure: Structure) -> "Population":
        """From plain types: ``{group: {lambda: [[...]], psi: ..., theta: ..., nu: ..., alpha: ..., beta: ...}}``.

        ``beta`` may be left out (no factor regressions); ``alpha`` defaults to zeros.
        """
        p, m = len(structure.items), len(structure.factor_names)
        allowed = set(_MATS)
        mats = []
        for g, d in data.items():
            unknown = set(d) - allowed
            if unknown:
                raise SpecificationError(
                    f"Unknown population matrix {sorted(unknown)[0]!r} in group {g!r}; allowed: {', '.join(_MATS)}."
                )
            missing = [k for k in ("lambda", "psi", "theta", "nu") if k not in d]
            if missing:
                raise SpecificationError(f"Population group {g!r} needs matrix {missing[0]!r}.")
            mats.append((d["lambda"], d.get("beta", np.zeros((m, m))), d["psi"], d["theta"], d["nu"],
                         d.get("alpha", np.zeros(m))))
        return cls(structure, tuple(data), tuple(mats))

    @classmethod
    def from_values(
        cls,
        structure: Structure,
        groups: Sequence[str],
        *,
        loadings: Mapping[str, Mapping[str, float]],
        intercepts: Mapping[str, float],
        residuals: Mapping[str, float],
        means: Mapping[str, Mapping[str, float]] | None = None,
        variances: Mapping[str, Mapping[str, float]] | None = None,
        covariances: Mapping[str, float] | None = None,
        paths: Mapping[str, float] | None = None,
    ) -> "Population":
        """An exactly invariant population from item values shared by all groups.

        Parameters
        ----------
        structure, groups
            The model and the group names.
        loadings
            factor -> item -> loading (every loading of the structure).
        intercepts, residuals
            item -> intercept / residual variance.
        means, variances
            group -> factor -> factor mean (default 0) / (disturbance) variance (default 1).
        covariances
            ``"A~B"`` -> factor covariance, the same in every group (default 0).
        paths
            ``"outcome<-predictor"`` -> B entry (second-order loadings, regressions).
        """
        items, facs = structure.items, structure.factor_names
        lam = _loading_matrix(structure, loadings)
        nu, th = _item_vector(items, intercepts, "intercepts"), _item_vector(items, residuals, "residuals")
        beta, psi0 = _factor_matrices(facs, paths or {}, covariances or {})
        groups = tuple(str(g) for g in groups)
        for what, d in (("means", means or {}), ("variances", variances or {})):
            for g, fs in d.items():
                if g not in groups:
                    raise SpecificationError(f"Unknown group {g!r} in the population {what}; groups: {', '.join(groups)}.")
                bad = set(fs) - set(facs)
                if bad:
                    raise SpecificationError(f"Unknown factor {sorted(bad)[0]!r} in the population {what} of {g!r}.")
        mats = []
        for g in groups:
            alpha = np.array([float((means or {}).get(g, {}).get(f, 0.0)) for f in facs])
            var = np.array([float((variances or {}).get(g, {}).get(f, 1.0)) for f in facs])
            sd = np.sqrt(var)
            psi = psi0 * np.outer(sd, sd)
            mats.append((lam, beta, psi, np.diag(th), nu, alpha))
        return cls(structure, groups, tuple(mats))

    def to_dict(self) -> dict:
        """Plain types (the inverse of :meth:`from_dict`)."""
        return {g: {n: np.asarray(x).tolist() for n, x in zip(_MATS, ms)} for g, ms in zip(self.groups, self.matrices)}

    def invariant(self) -> dict[str, bool]:
        """Whether loadings, intercepts and residual variances are equal in every group."""
        first = self.matrices[0]
        same = lambda k: all(np.allclose(ms[k], first[k], rtol=0, atol=1e-10) for ms in self.matrices[1:])
        return {"loading": same(0), "intercept": same(4), "residual": bool(
            all(np.allclose(np.diag(ms[3]), np.diag(first[3]), rtol=0, atol=1e-10) for ms in self.matrices[1:]))}

    def moments(self) -> list[tuple[np.ndarray, np.ndarray]]:
        """Population (Sigma, mu) of every group."""
        return [implied_moments(ms)[:2] for ms in self.matrices]

    def shifted(self, shift: Shift) -> "Population":
        """A copy with the planted noninvariance applied."""
        s = self.structure
        if shift.parameter not in STEP_OF:
            raise SpecificationError(
                f"The planted parameter must be one of {', '.join(STEP_OF)}; got {shift.parameter!r}."
            )
        if shift.item not in s.items:
            raise SpecificationError(f"The planted item {shift.item!r} is not an item of the model.")
        groups = self.groups[1:] if shift.groups is None else tuple(shift.groups)
        bad = [g for g in groups if g not in self.groups]
        if bad:
            raise SpecificationError(f"The planted group {bad[0]!r} is not a population group ({', '.join(self.groups)}).")
        i = s.items.index(shift.item)
        col = None
        if shift.parameter == "loading":
            fs = [f for f, its in s.measured_by.items() if shift.item in its]
            if shift.factor is None and len(fs) != 1:
                raise SpecificationError(
                    f"Item {shift.item!r} loads on {', '.join(fs)}; name the factor of the planted loading."
                )
            fac = shift.factor or fs[0]
            if fac not in fs:
                raise SpecificationError(f"Item {shift.item!r} does not load on {fac!r}.")
            col = s.factor_names.index(fac)
        mats = []
        for g, ms in zip(self.groups, self.matrices):
            ms = [x.copy() for x in ms]
            if g in groups:
                if shift.parameter == "loading":
                    ms[0][i, col] += shift.size
                elif shift.parameter == "intercept":
                    ms[4][i] += shift.size
                else:
                    ms[3][i, i] += shift.size
                    if ms[3][i, i] <= 0:
                        raise SpecificationError(
                            f"The planted residual shift makes the residual variance of {shift.item!r} non-positive; use a smaller size."
                        )
            mats.append(tuple(ms))
        return replace(self, matrices=tuple(mats))


def group_sizes(population: Population, sizes) -> tuple[int, ...]:
    G = len(population.groups)
    if isinstance(sizes, Mapping):
        missing = [g for g in population.groups if g not in sizes]
        if missing:
            raise SpecificationError(f"No sample size for group {missing[0]!r}; give one for every group.")
        out = [sizes[g] for g in population.groups]
    elif np.isscalar(sizes):
        out = [sizes] * G
    else:
        out = list(sizes)
        if len(out) != G:
            raise SpecificationError(f"Give {G} group sizes (one per group); got {len(out)}.")
    p = len(population.structure.items)
    for g, n in zip(population.groups, out):
        if int(n) != n or n <= p + 1:
            raise SpecificationError(
                f"The size of group {g!r} must be a whole number above {p + 1} (items + 1); got {n!r}."
            )
    return tuple(int(n) for n in out)


def simulate_groups(population: Population, sizes: Sequence[int], seed: int) -> list[np.ndarray]:
    """Normal data of every group, (n_g, p) arrays, from one seed."""
    rng = np.random.default_rng(seed)
    return [draw_group(n, sigma, mu, rng) for (sigma, mu), n in zip(population.moments(), sizes)]


def _loading_matrix(structure: Structure, loadings: Mapping[str, Mapping[str, float]]) -> np.ndarray:
    """The (items, factors) loading matrix; every loading of the structure given, no other."""
    items, facs = structure.items, structure.factor_names
    lam = np.zeros((len(items), len(facs)))
    for f, its in structure.measured_by.items():
        given = dict(loadings.get(f, {}))
        for it in its:
            if it not in given:
                raise SpecificationError(f"The population needs the loading of item {it!r} on factor {f!r}.")
            lam[items.index(it), facs.index(f)] = float(given.pop(it))
        if given:
            raise SpecificationError(f"Item {next(iter(given))!r} does not load on factor {f!r} in the structure.")
    extra = set(loadings) - set(structure.measured_by)
    if extra:
        raise SpecificationError(f"Unknown factor {sorted(extra)[0]!r} in the population loadings.")
    return lam


def _item_vector(items: Sequence[str], values: Mapping[str, float], what: str) -> np.ndarray:
    """One value per item, in item order; refuses unknown and missing items."""
    unknown = set(values) - set(items)
    if unknown:
        raise SpecificationError(f"Unknown item {sorted(unknown)[0]!r} in the population {what}.")
    missing = [it for it in items if it not in values]
    if missing:
        raise SpecificationError(f"The population needs the {what[:-1]} of item {missing[0]!r}.")
    return np.array([float(values[it]) for it in items])


def _factor_matrices(
    facs: Sequence[str], paths: Mapping[str, float], covariances: Mapping[str, float]
) -> tuple[np.ndarray, np.ndarray]:
    """B from ``"outcome<-predictor"`` paths and the unit-variance factor covariance from ``"A~B"``."""
    m = len(facs)
    beta = np.zeros((m, m))
    for key, val in paths.items():
        out, _, pred = key.partition("<-")
        if out not in facs or pred not in facs:
            raise SpecificationError(f"The population path {key!r} must read 'outcome<-predictor' with known factors.")
        beta[facs.index(out), facs.index(pred)] = float(val)
    psi0 = np.eye(m)
    for key, val in covariances.items():
        a, _, b = key.partition("~")
        if a not in facs or b not in facs or a == b:
            raise SpecificationError(f"The population covariance {key!r} must read 'A~B' with two known factors.")
        psi0[facs.index(a), facs.index(b)] = psi0[facs.index(b), facs.index(a)] = float(val)
    return beta, psi0

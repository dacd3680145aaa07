"""Score (Lagrange multiplier) tests for the equality constraints of a fitted level.

METHODS section 8 (Sorbom 1989; Bentler's LM test). The restricted model is the fitted
level; its *unconstrained parameterization* gives every label shared across groups one
copy per group (and frees every fixed entry that carries a label: an equality with a
fixed reference value, as the structural levels of :mod:`invariance.model.structural`
write equal variances and means). At the restricted estimates, with T = sum_g N_g F_g,
``g`` the gradient of T and ``H`` its expected Hessian in the unconstrained
parameterization and ``M`` the map theta_U = M theta_R, freeing a set D of copies adds
free deviations delta_D, and

    C      = H_DD - H_DR H_RR^-1 H_RD           (H_RR = M' H M, H_DR = (H M)_D)
    s      = g_D - H_DR H_RR^-1 g_R             (g_R = M' g, ~0 at convergence)
    LM     = s' C^-1 s / 2                       chi-square on |D| df
    EPC    = -C^-1 s                             expected change of each freed copy

(T = -2 logL + const, so the logL score is -g/2 and its information H/2.) One copy gives
the univariate test (one group's parameter against the rest, df 1); all copies but one of
an item parameter give the multivariate test across groups (df = groups sharing it - 1).
Nothing is refitted.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
from scipy import special as _sp

import pandas as pd

from ..data.moments import SampleStats
from ..errors import SpecificationError
from ..estimate.fiml import FIMLObjective
from ..estimate.objective import MLObjective
from ..model.spec import ALPHA, BETA, LAMBDA, NU, PSI, THETA, ModelSpec, Release
from ..estimate.result import FitResult

__all__ = [
    "Constraint",
    "CopyTest",
    "SetTest",
    "ScoreTests",
    "constraints",
    "score_tests",
    "release_constraint",
    "map_theta",
]

_SEP = "@@"  # separator of group copies in the unconstrained parameterization


@dataclass(frozen=True)
class Constraint:
    """One cross-group equality: entries that share a label in several groups.

    Attributes
    ----------
    label
        The shared label.
    parameter, item, factor
        Parameter kind, its left-hand name (item, or factor for variances, means and
        paths) and right-hand name (factor of a loading, predictor of a path, the
        other variable of a covariance; ``None`` otherwise).
    groups
        Groups that share the label.
    fixed
        ``True`` when the entries are fixed at a common value (the reference group's
        identification value) rather than one free parameter.
    entries
        Entry indices in the spec.
    anchor
        For a fixed equality, the group whose fixed entry stays (the reference group
        when it shares the label); ``None`` otherwise.
    """

    label: str
    parameter: str
    item: str
    factor: str | None
    groups: tuple[str, ...]
    fixed: bool
    entries: tuple[int, ...]
    anchor: str | None = None

    @property
    def testable_groups(self) -> tuple[str, ...]:
        """Groups whose copy can be released on its own (for a fixed equality, all but
        the ``anchor`` group, the reference, whose entry sets the scale)."""
        return tuple(g for g in self.groups if g != self.anchor) if self.fixed else self.groups

    def describe(self) -> dict:
        """What the constraint is, as plain types (the leading keys of every test record)."""
        return {"label": self.label, "parameter": self.parameter, "item": self.item, "factor": self.factor}

    def release(self, groups: tuple[str, ...] | None = None) -> Release:
        """The :class:`Release` record that frees this constraint (in ``groups``)."""
        return Release(self.parameter, self.item, self.factor, None if groups is None else tuple(groups))


@dataclass(frozen=True)
class CopyTest:
    """Univariate score test: one group's copy of a constraint set free (df 1)."""

    constraint: Constraint
    group: str
    statistic: float
    pvalue: float
    epc: float
    epc_std: float

    df: int = 1

    def to_dict(self) -> dict:
        return {
            **self.constraint.describe(),
            "group": self.group,
            "statistic": self.statistic,
            "df": self.df,
            "pvalue": self.pvalue,
            "epc": self.epc,
            "epc_std": self.epc_std,
        }


@dataclass(frozen=True)
class SetTest:
    """Multivariate score test: the parameter free in every group that shares it.

    ``epc`` lists the expected change of each freed copy; for a shared free parameter
    the first group's copy keeps the common value, so the changes are the other
    groups' expected deviations from it (for a fixed equality: from the fixed value).
    """

    constraint: Constraint
    statistic: float
    df: int
    pvalue: float
    epc: tuple[tuple[str, float, float], ...]  # (group, epc, epc_std), groups freed

    def to_dict(self) -> dict:
        return {
            **self.constraint.describe(),
            "groups": list(self.constraint.groups),
            "statistic": self.statistic,
            "df": self.df,
            "pvalue": self.pvalue,
            "epc": [{"group": g, "epc": e, "epc_std": s} for g, e, s in self.epc],
        }


@dataclass(frozen=True)
class ScoreTests:
    """All score tests of one fitted level.

    Attributes
    ----------
    level
        The level's name.
    univariate
        One :class:`CopyTest` per group copy of every tested constraint.
    multivariate
        One :class:`SetTest` per tested constraint.
    restricted_gradient
        Largest absolute gradient of T in the restricted parameterization at the
        estimates (about 0 at convergence; the tests assume it is).
    """

    level: str
    univariate: tuple[CopyTest, ...]
    multivariate: tuple[SetTest, ...]
    restricted_gradient: float

    def to_dict(self) -> dict:
        return {
            "level": self.level,
            "restricted_gradient": self.restricted_gradient,
            "univariate": [t.to_dict() for t in self.univariate],
            "multivariate": [t.to_dict() for t in self.multivariate],
        }

    def frame(self, which: str = "univariate"):
        """The tests as a pandas DataFrame (``which``: univariate or multivariate)."""

        if which not in ("univariate", "multivariate"):
            raise SpecificationError(f"'which' must be 'univariate' or 'multivariate'; got {which!r}.")
        rows = [t.to_dict() for t in getattr(self, which)]
        return pd.DataFrame(rows)


# ------------------------------------------------------------------ constraints
def constraints(spec: ModelSpec, *, parameters: tuple[str, ...] | None = None) -> tuple[Constraint, ...]:
    """The cross-group equality constraints of a spec.

    Free entries sharing a label across groups, and fixed entries sharing a (non-empty)
    label across groups. ``parameters`` keeps only those kinds.
    """
    kinds = spec.kinds()
    lhs, rhs = spec.entry_names()
    out = []
    by_label: dict[tuple[bool, str], list[int]] = {}
    for k in range(spec.group.size):
        lab = spec.label[k]
        if lab:
            by_label.setdefault((bool(spec.free[k]), lab), []).append(k)
    for (free, lab), ents in by_label.items():
        gs = sorted({int(spec.group[k]) for k in ents})
        if len(gs) < 2:
            continue
        k0 = ents[0]
        if parameters is not None and kinds[k0] not in parameters:
            continue
        groups = [spec.groups[g] for g in gs]
        anchor = None
        if not free:
            anchor = spec.reference if spec.reference in groups else groups[0]
            groups.remove(anchor)
            groups.insert(0, anchor)
        out.append(
            Constraint(
                label=lab,
                parameter=str(kinds[k0]),
                item=str(lhs[k0]),
                factor=None if rhs[k0] is None else str(rhs[k0]),
                groups=tuple(groups),
                fixed=not free,
                entries=tuple(ents),
                anchor=anchor,
            )
        )
    return tuple(out)


def map_theta(old_spec: ModelSpec, old_theta: np.ndarray, new_spec: ModelSpec) -> np.ndarray:
    """Carry estimates to a relabelled spec (starting values for a refit).

    Each new parameter takes the old value of its first entry (the old estimate when the
    entry was free, its fixed value otherwise).
    """
    out = np.empty(new_spec.n_params)
    seen = np.zeros(new_spec.n_params, dtype=bool)
    op, npar = old_spec.param_index, new_spec.param_index
    for k in np.flatnonzero(npar >= 0):
        j = npar[k]
        if not seen[j]:
            out[j] = old_theta[op[k]] if op[k] >= 0 else old_spec.value[k]
            seen[j] = True
    return out


def release_constraint(spec: ModelSpec, constraint: Constraint, groups: tuple[str, ...] | None = None) -> ModelSpec:
    """Release one constraint: the entries of ``groups`` (default: every group that can
    be freed) get group-specific free parameters; a :class:`Release` is recorded."""
    free_groups = constraint.testable_groups if groups is None else tuple(groups)
    unknown = [g for g in free_groups if g not in constraint.groups]
    if unknown:
        raise SpecificationError(
            f"Group {unknown[0]!r} does not share {constraint.label!r}; choose among {', '.join(constraint.groups)}."
        )
    label = spec.label.copy()
    free = spec.free.copy()
    gi = {spec.groups.index(g) for g in free_groups}
    for k in constraint.entries:
        if spec.group[k] in gi:
            base = label[k].split("|", 1)[0]
            label[k] = f"{base}|{spec.groups[spec.group[k]]}"
            free[k] = True
    rec = constraint.release(None if groups is None and not constraint.fixed else free_groups)
    return replace(spec, label=label, free=free, released=spec.released + (rec,))


# ----------------------------------------------------------------- the tests
def _unconstrained(spec: ModelSpec, cons: tuple[Constraint, ...]) -> tuple[ModelSpec, dict]:
    """Relabel: every constraint entry gets a per-group copy. Returns the spec and
    (constraint index, group) -> the entries of that copy."""
    label = spec.label.copy()
    free = spec.free.copy()
    copies: dict[tuple[int, str], list[int]] = {}
    for c_i, c in enumerate(cons):
        for k in c.entries:
            g = spec.groups[spec.group[k]]
            if c.fixed and g not in c.testable_groups:
                continue
            label[k] = f"{c.label}{_SEP}{g}"
            free[k] = True
            copies.setdefault((c_i, g), []).append(k)
    return replace(spec, label=label, free=free), copies


def _std_factor(mats: tuple[np.ndarray, ...], matrix: int, r: int, c: int) -> float:
    """Multiplier that puts a raw parameter of one group on the standardized scale."""
    lam, beta, psi, theta, *_ = mats
    m = beta.shape[0]
    A = np.linalg.inv(np.eye(m) - beta)
    phi = A @ psi @ A.T
    sx = np.sqrt(np.diag(lam @ phi @ lam.T + theta))
    sf = np.sqrt(np.clip(np.diag(phi), 1e-300, None))
    if matrix == LAMBDA:
        return sf[c] / sx[r]
    if matrix == BETA:
        return sf[c] / sf[r]
    if matrix == PSI:
        return 1.0 / (sf[r] * sf[c])
    if matrix == THETA:
        return 1.0 / (sx[r] * sx[c])
    if matrix == NU:
        return 1.0 / sx[r]
    if matrix == ALPHA:
        return 1.0 / sf[r]
    raise ValueError(matrix)


def _align(fit: FitResult, stats: SampleStats) -> SampleStats:
    spec = fit.spec
    if tuple(stats.names) != tuple(spec.groups):
        stats = stats.subset(spec.groups)
    if tuple(stats.items) != tuple(spec.items):
        stats = stats.reorder_items(spec.items)
    return stats


def score_tests(
    fit: FitResult,
    stats: SampleStats,
    *,
    parameters: tuple[str, ...] | None = None,
) -> ScoreTests:
    """Score tests for every cross-group equality constraint of a fitted level.

    Parameters
    ----------
    fit
        The fitted (restricted) level.
    stats
        The sample statistics it was fitted to.
    parameters
        Parameter kinds to test (for example ``("intercept",)``); all by default.

    Returns
    -------
    ScoreTests
    """
    if not str(fit.estimator).startswith("ml"):
        raise SpecificationError(
            f"Score tests use the normal-theory ML information; this fit used {fit.estimator!r}: "
            "refit the level with ML to locate noninvariance."
        )
    spec = fit.spec
    stats = _align(fit, stats)
    cons = constraints(spec, parameters=parameters)
    uspec, copies = _unconstrained(spec, cons)
    score = _ProjectedScore.at(fit, stats, uspec)
    cu = {key: int(uspec.param_index[ents[0]]) for key, ents in copies.items()}
    std = {
        key: _std_factor(fit.matrices[spec.group[ents[0]]], spec.matrix[ents[0]], spec.row[ents[0]], spec.col[ents[0]])
        for key, ents in copies.items()
    }
    uni, multi = [], []
    for c_i, c in enumerate(cons):
        gs = [g_ for g_ in c.testable_groups if (c_i, g_) in cu]
        uni.extend(_copy_test(score, c, g_, cu[(c_i, g_)], std[(c_i, g_)]) for g_ in gs)
        free_set = gs if c.fixed else gs[1:]
        if free_set:
            multi.append(_set_test(score, c, free_set, [cu[(c_i, g_)] for g_ in free_set],
                                   [std[(c_i, g_)] for g_ in free_set]))
    g_r = score.restricted_gradient
    return ScoreTests(
        level=spec.level,
        univariate=tuple(uni),
        multivariate=tuple(multi),
        restricted_gradient=float(np.max(np.abs(g_r))) if g_r.size else 0.0,
    )


@dataclass(frozen=True)
class _ProjectedScore:
    """Gradient and information of the unconstrained model at the restricted optimum.

    Attributes
    ----------
    H
        Second derivatives of the unconstrained objective (``q_u x q_u``).
    HM
        ``H`` times the map ``M`` from restricted to unconstrained parameters.
    P
        ``HM (M' H M)^-1``: projects out the restricted parameters' directions.
    score
        The unconstrained gradient with the restricted directions projected out.
    restricted_gradient
        ``M' g``: the gradient in the restricted parameters (0 at a converged fit).
    """

    H: np.ndarray
    HM: np.ndarray
    P: np.ndarray
    score: np.ndarray
    restricted_gradient: np.ndarray

    @classmethod
    def at(cls, fit: FitResult, stats: SampleStats, uspec: ModelSpec) -> "_ProjectedScore":
        """Derivatives at ``fit`` mapped into ``uspec`` (the model with every tested copy free)."""
        spec = fit.spec
        upar, rpar = uspec.param_index, spec.param_index
        theta_u = map_theta(spec, fit.theta, uspec)
        M = np.zeros((uspec.n_params, spec.n_params))
        for k in np.flatnonzero(upar >= 0):
            if rpar[k] >= 0:
                M[upar[k], rpar[k]] = 1.0
        # incomplete cases: the casewise (full-information) likelihood, whose gradient is 0 at the fit
        objective = FIMLObjective if any(gs.has_missing for gs in stats.groups) else MLObjective
        _, g, H = objective(uspec, stats).derivatives(theta_u)
        HM = H @ M
        Hrr = M.T @ HM
        g_r = M.T @ g
        try:
            Hrr_inv = np.linalg.inv(Hrr)
        except np.linalg.LinAlgError:
            Hrr_inv = np.linalg.pinv(Hrr)
        P = HM @ Hrr_inv                # (q_u, q_r)
        return cls(H=H, HM=HM, P=P, score=g - P @ g_r, restricted_gradient=g_r)

    def block(self, D: list[int]) -> tuple[float, np.ndarray | None]:
        """Score statistic and expected parameter changes for freeing the copies ``D``
        (``nan, None`` when releasing them would not be identified)."""
        C = self.H[np.ix_(D, D)] - self.P[D] @ self.HM[D].T
        s = self.score[D]
        try:
            w, v = np.linalg.eigh((C + C.T) / 2)
        except np.linalg.LinAlgError:
            return np.nan, None
        scale = max(abs(w).max(), 1e-300)
        if w.min() <= 1e-9 * scale:
            return np.nan, None  # releasing this set would not be identified
        Cinv = (v / w) @ v.T
        return float(s @ Cinv @ s / 2.0), -(Cinv @ s)


def _copy_test(score: _ProjectedScore, c: Constraint, group: str, copy: int, std: float) -> CopyTest:
    """Univariate test: free the constraint's copy in one group."""
    lm, epc = score.block([copy])
    e = float(epc[0]) if epc is not None else np.nan
    pv = float(_sp.chdtrc(1, lm)) if np.isfinite(lm) else np.nan
    return CopyTest(c, group, lm, pv, e, float(e * std))


def _set_test(score: _ProjectedScore, c: Constraint, groups: list[str], copies: list[int],
              stds: list[float]) -> SetTest:
    """Multivariate test: free the constraint in every group of ``groups`` at once."""
    lm, epc = score.block(copies)
    df = len(groups)
    if epc is None:
        epcs = tuple((g_, np.nan, np.nan) for g_ in groups)
    else:
        epcs = tuple((g_, float(e), float(e) * sd) for g_, e, sd in zip(groups, epc, stds))
    return SetTest(c, lm, df, float(_sp.chdtrc(df, lm)) if np.isfinite(lm) else np.nan, epcs)

"""Alignment of many groups (Asparouhov & Muthen 2014; METHODS section 11).

Starting from the configural model, fitted with factor mean 0 and variance 1 in every
group (loadings ``l0_ig``, intercepts ``n0_ig``), the alignment chooses group factor
means ``a_g`` and variances ``v_g`` (``a = 0`` and ``v = 1`` in the reference group)
that minimize the total loss

    sum_i sum_{g<h} sqrt(N_g N_h) [f(l_ig - l_ih) + f(n_ig - n_ih)],
    l_ig = l0_ig / sqrt(v_g),   n_ig = n0_ig - a_g l0_ig / sqrt(v_g),
    f(x) = sqrt(sqrt(x^2 + eps)),  eps = 0.01,

one factor at a time. The configural fit is unchanged (every aligned solution fits the
data exactly as well); alignment only picks the solution in which most item parameters
agree across groups, so a few large differences are preferred to many small ones.

Standard errors (our method). The aligned solution ``x = (a, log v)`` is an implicit
function of the configural estimates ``c = (l0, n0)``: ``grad_x F(x, c) = 0``. By the
implicit function theorem ``dx/dc = -H_xx^-1 H_xc``, where both blocks are central
differences of the analytic gradient. The delta method then gives
``acov(x) = J acov(c) J'`` from the configural ``FitResult.acov``, and the same Jacobian
chained through the aligned item parameters gives their covariance.

Approximate invariance of each item parameter (our rule, following the idea of the
original paper's invariant-set search, whose exact steps we recall from memory only):

1. pairwise z tests of the aligned parameter between all groups at ``alpha_pairwise``
   (default .01);
2. an initial set, built greedily: groups ordered by their number of non-significant
   partners; a group joins when it agrees with every member so far;
3. refinement: the set value is the N-weighted mean of its members; a group belongs to
   the set when its difference from that value is not significant at ``alpha_set``
   (default .001, the covariance of the difference from the delta method); repeated
   until the set stops changing.

Groups outside the final set are reported as noninvariant for that parameter.

Scope: single-factor and correlated-factor structures whose items each load on one
factor. Bifactor, second-order and cross-loading structures are refused with a
:class:`~invariance.errors.SpecificationError`: there an intercept depends on several
factor means at once, which the factor-by-factor loss cannot separate.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import optimize as _sopt
from scipy import stats as _st

from ..errors import SpecificationError
from ..model.spec import ALPHA, BETA, LAMBDA, NU, PSI
from ..estimate.result import FitResult

__all__ = [
    "AlignmentResult",
    "ParameterAgreement",
    "align",
    "simplicity",
    "alignment_loss",
    "aligned_parameters",
    "solve_alignment",
    "implicit_jacobian",
]

EPSILON = 0.01


# --------------------------------------------------------------------------- kernels
def simplicity(x: np.ndarray, eps: float = EPSILON) -> tuple[np.ndarray, np.ndarray]:
    """The component loss f(x) = (x^2 + eps)^(1/4) and its derivative."""
    q = x * x + eps
    val = np.sqrt(np.sqrt(q))
    return val, x / (2.0 * q**0.75)


def _unpack(x: np.ndarray, n_groups: int, ref: int) -> tuple[np.ndarray, np.ndarray]:
    others = np.delete(np.arange(n_groups), ref)
    a = np.zeros(n_groups)
    u = np.zeros(n_groups)
    k = others.size
    a[others] = x[:k]
    u[others] = x[k:]
    return a, u


def aligned_parameters(lam0: np.ndarray, nu0: np.ndarray, a: np.ndarray, v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Aligned loadings and intercepts (G, k) for group means ``a`` and variances ``v``."""
    s = 1.0 / np.sqrt(v)
    lam = lam0 * s[:, None]
    return lam, nu0 - a[:, None] * lam


def alignment_loss(
    x: np.ndarray, lam0: np.ndarray, nu0: np.ndarray, weights: np.ndarray, ref: int, eps: float = EPSILON
) -> tuple[float, np.ndarray]:
    """Total alignment loss and its analytic gradient.

    Parameters
    ----------
    x
        Means then log variances of the non-reference groups (length 2(G-1)).
    lam0, nu0
        Configural loadings and intercepts, shape (G, k).
    weights
        Symmetric (G, G) pair weights with a zero diagonal.
    ref
        Index of the reference group (mean 0, variance 1).
    """
    G = lam0.shape[0]
    a, u = _unpack(x, G, ref)
    lam, nu = aligned_parameters(lam0, nu0, a, np.exp(u))
    total = 0.0
    grads = []
    for P in (lam, nu):
        D = P[:, None, :] - P[None, :, :]
        val, der = simplicity(D, eps)
        total += 0.5 * float(np.sum(weights[:, :, None] * val))
        grads.append(np.einsum("gh,ghi->gi", weights, der))
    gL, gN = grads
    grad_a = -np.sum(gN * lam, axis=1)
    grad_u = np.sum(-0.5 * gL * lam + 0.5 * gN * a[:, None] * lam, axis=1)
    others = np.delete(np.arange(G), ref)
    return total, np.concatenate([grad_a[others], grad_u[others]])


def _heuristic_start(lam0: np.ndarray, nu0: np.ndarray, ref: int) -> np.ndarray:
    G = lam0.shape[0]
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.abs(lam0) / np.abs(lam0[ref])[None, :]
        sd = np.nanmedian(np.where(np.isfinite(ratio) & (ratio > 0), ratio, np.nan), axis=1)
        sd = np.where(np.isfinite(sd), sd, 1.0)
        lam = lam0 / sd[:, None]
        a = np.nanmedian(np.where(np.abs(lam) > 1e-8, (nu0 - nu0[ref][None, :]) / lam, np.nan), axis=1)
    a = np.where(np.isfinite(a), a, 0.0)
    others = np.delete(np.arange(G), ref)
    return np.concatenate([a[others], 2.0 * np.log(sd[others])])


def solve_alignment(
    lam0: np.ndarray,
    nu0: np.ndarray,
    weights: np.ndarray,
    ref: int,
    *,
    eps: float = EPSILON,
    random_starts: int = 4,
    seed: int = 0,
) -> tuple[np.ndarray, float, bool]:
    """Minimize the alignment loss from several starts; returns ``(x, loss, converged)``.

    Starts: equal means and variances; a median-ratio guess; ``random_starts``
    seeded perturbations of the guess. The best converged solution wins.
    """
    G = lam0.shape[0]
    rng = np.random.default_rng(seed)
    guess = _heuristic_start(lam0, nu0, ref)
    starts = [np.zeros(2 * (G - 1)), guess]
    starts += [guess + rng.normal(scale=0.3, size=guess.size) for _ in range(random_starts)]
    # the weights are rescaled to sum 1 over pairs: the same minimizer, and gradients of
    # order one, so the optimizer's tolerances mean the same for 2 groups or 80
    scale = 2.0 / max(float(weights.sum()), 1e-300)
    w = weights * scale
    best = None
    for x0 in starts:
        res = _sopt.minimize(
            alignment_loss, x0, args=(lam0, nu0, w, ref, eps), jac=True, method="BFGS",
            options={"gtol": 1e-8, "maxiter": 2000},
        )
        # "precision loss" stops at the floating-point limit: accept a small gradient
        ok = bool(res.success) or float(np.max(np.abs(res.jac))) < 1e-6
        key = (not ok, float(res.fun))
        if best is None or key < best[0]:
            best = (key, res.x, float(res.fun) / scale, ok)
    return best[1], best[2], best[3]


def _fd_jacobian(fun, x: np.ndarray, h: float = 1e-5) -> np.ndarray:
    """Central-difference Jacobian of a vector function."""
    cols = []
    for j in range(x.size):
        e = np.zeros_like(x)
        step = h * max(1.0, abs(x[j]))
        e[j] = step
        cols.append((fun(x + e) - fun(x - e)) / (2 * step))
    return np.column_stack(cols)


def implicit_jacobian(
    x: np.ndarray, lam0: np.ndarray, nu0: np.ndarray, weights: np.ndarray, ref: int, *, eps: float = EPSILON
) -> np.ndarray:
    """Derivative of the aligned solution with respect to the configural estimates.

    At a minimum ``grad_x F(x, c) = 0``, so ``dx/dc = -H_xx^-1 H_xc`` (implicit function
    theorem); both blocks are central differences of the analytic gradient. ``c`` is
    ``(lam0.ravel(), nu0.ravel())``. Returns a (2(G-1), 2Gk) array (nan if H_xx is singular).
    """
    G, k = lam0.shape
    c0 = np.concatenate([lam0.ravel(), nu0.ravel()])
    H = _fd_jacobian(lambda xx: alignment_loss(xx, lam0, nu0, weights, ref, eps)[1], x)
    H = (H + H.T) / 2
    Hc = _fd_jacobian(
        lambda cc: alignment_loss(x, cc[: G * k].reshape(G, k), cc[G * k :].reshape(G, k), weights, ref, eps)[1], c0
    )
    try:
        return -np.linalg.solve(H, Hc)
    except np.linalg.LinAlgError:
        return np.full((x.size, c0.size), np.nan)


# --------------------------------------------------------------------------- results
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
        import pandas as pd

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
        import pandas as pd

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


# --------------------------------------------------------------------------- front door
def _factor_layout(result: FitResult) -> dict[int, list[int]]:
    """Factor index -> item indices; checks the configural identification and scope."""
    spec = result.spec
    G, m, p = len(spec.groups), len(spec.factors), len(spec.items)
    if np.any(spec.free & (spec.matrix == BETA)):
        raise SpecificationError(
            "Alignment needs a measurement model without factor regressions or second-order "
            "factors; align the first-order factors of a correlated-factor model instead."
        )
    loads = spec.free & (spec.matrix == LAMBDA)
    per_item: dict[int, set[int]] = {}
    for r, c in zip(spec.row[loads], spec.col[loads]):
        per_item.setdefault(int(r), set()).add(int(c))
    cross = [i for i, fs in per_item.items() if len(fs) > 1]
    if cross:
        by_f = {f: [i for i, fs in per_item.items() if f in fs] for f in range(m)}
        if any(len(v) == p for v in by_f.values()) and m > 1:
            raise SpecificationError(
                "Alignment of bifactor models is not supported (every intercept depends on the "
                "general and a specific factor mean); align a single-factor model of the items instead."
            )
        raise SpecificationError(
            f"Item {spec.items[cross[0]]!r} loads on several factors; alignment works factor by "
            "factor and needs each item on one factor: drop the cross-loading or align without it."
        )
    for g in range(G):
        for f in range(m):
            sel = (spec.group == g) & (spec.matrix == PSI) & (spec.row == f) & (spec.col == f)
            mean = (spec.group == g) & (spec.matrix == ALPHA) & (spec.row == f)
            if (
                sel.sum() != 1
                or spec.free[sel].any()
                or not np.allclose(spec.value[sel], 1.0)
                or spec.free[mean].any()
                or not np.allclose(spec.value[mean], 0.0)
            ):
                raise SpecificationError(
                    "Alignment starts from the configural model with factor mean 0 and variance 1 in "
                    f"every group; got a {spec.level or 'different'} model: fit level 'configural' first."
                )
    layout: dict[int, list[int]] = {}
    for i, fs in sorted(per_item.items()):
        layout.setdefault(next(iter(fs)), []).append(i)
    return layout


def _param_of(spec, g: int, matrix: int, row: int, col: int) -> int:
    k = np.flatnonzero((spec.group == g) & (spec.matrix == matrix) & (spec.row == row) & (spec.col == col))
    if k.size != 1 or spec.param_index[k[0]] < 0:
        raise SpecificationError(
            f"The configural model has no free {'loading' if matrix == LAMBDA else 'intercept'} of item "
            f"{spec.items[row]!r} in group {spec.groups[g]!r}; alignment needs every item parameter free."
        )
    return int(spec.param_index[k[0]])


def _invariant_set(values: np.ndarray, cov: np.ndarray, n: np.ndarray, a_pair: float, a_set: float) -> np.ndarray:
    """Boolean mask of the invariant set (rule in the module docstring)."""
    G = values.size
    var = np.diag(cov)
    dvar = var[:, None] + var[None, :] - 2 * cov
    with np.errstate(divide="ignore", invalid="ignore"):
        z = np.abs(values[:, None] - values[None, :]) / np.sqrt(np.clip(dvar, 1e-300, None))
    crit_pair = _st.norm.isf(a_pair / 2)
    agree = z <= crit_pair
    np.fill_diagonal(agree, True)
    order = np.lexsort((np.arange(G), -agree.sum(axis=1)))
    member = np.zeros(G, dtype=bool)
    for g in order:
        if agree[g, member].all():
            member[g] = True
    crit_set = _st.norm.isf(a_set / 2)
    seen = set()
    for _ in range(100):
        w = np.where(member, n, 0.0)
        w = w / w.sum()
        diff_var = var - 2 * cov @ w + w @ cov @ w
        zz = np.abs(values - w @ values) / np.sqrt(np.clip(diff_var, 1e-300, None))
        new = zz <= crit_set
        if not new.any():
            break
        key = new.tobytes()
        if np.array_equal(new, member) or key in seen:
            member = new
            break
        seen.add(key)
        member = new
    return member


def align(
    result: FitResult,
    *,
    reference: str | None = None,
    epsilon: float = EPSILON,
    alpha_pairwise: float = 0.01,
    alpha_set: float = 0.001,
    random_starts: int = 4,
    seed: int = 0,
) -> AlignmentResult:
    """Align the groups of a configural fit, factor by factor.

    Parameters
    ----------
    result
        A configural :class:`~invariance.results.FitResult` (factor means 0 and
        variances 1 in every group).
    reference
        Group whose mean is 0 and variance 1 (default: the model's reference group).
    epsilon
        The small constant of the simplicity function (0.01 in the original method).
    alpha_pairwise, alpha_set
        Significance levels of the pairwise tests and of the invariant-set refinement.
    random_starts, seed
        Extra seeded starts of the optimizer (the loss can have local minima).

    Returns
    -------
    AlignmentResult
    """
    spec = result.spec
    groups = tuple(spec.groups)
    ref_name = reference if reference is not None else (spec.reference or groups[0])
    if ref_name not in groups:
        raise SpecificationError(
            f"The alignment reference group {ref_name!r} is not among the groups ({', '.join(groups)})."
        )
    if len(groups) < 2:
        raise SpecificationError("Alignment compares groups; the model has only one group.")
    layout = _factor_layout(result)
    ref = groups.index(ref_name)
    G = len(groups)
    n = np.asarray(result.group_n, dtype=float)
    weights = np.sqrt(np.outer(n, n))
    np.fill_diagonal(weights, 0.0)
    acov = result.acov
    notes: list[str] = []
    if acov is None:
        notes.append("the configural model has no covariance of its estimates: standard errors and tests are missing")
    out = {k: {} for k in ("means", "variances", "means_se", "variances_se")}
    loss, converged, params = {}, {}, []
    for f, items in layout.items():
        fname = spec.factors[f]
        k = len(items)
        lam_ix = np.array([[_param_of(spec, g, LAMBDA, i, f) for i in items] for g in range(G)])
        nu_ix = np.array([[_param_of(spec, g, NU, i, 0) for i in items] for g in range(G)])
        lam0 = result.theta[lam_ix]
        nu0 = result.theta[nu_ix]
        sign = np.where(lam0.sum(axis=1) < 0, -1.0, 1.0)
        for g in np.flatnonzero(sign < 0):
            notes.append(f"factor {fname} reflected in group {groups[g]} (its loadings were mostly negative)")
        lam0 = lam0 * sign[:, None]
        x, fx, ok = solve_alignment(lam0, nu0, weights, ref, eps=epsilon, random_starts=random_starts, seed=seed)
        if not ok:
            notes.append(f"the alignment of factor {fname} did not converge")
        a, u = _unpack(x, G, ref)
        v = np.exp(u)
        lam, nu = aligned_parameters(lam0, nu0, a, v)
        # delta method through the implicit solution x(c), c = (lam0, nu0)
        c0 = np.concatenate([lam0.ravel(), nu0.ravel()])
        split = lambda c: (c[: G * k].reshape(G, k), c[G * k :].reshape(G, k))
        J = implicit_jacobian(x, lam0, nu0, weights, ref, eps=epsilon)
        if not np.all(np.isfinite(J)):
            notes.append(f"the alignment loss of factor {fname} is flat at its minimum: no standard errors")

        def params_of(cc, xx):
            aa, uu = _unpack(xx, G, ref)
            ll, nn = aligned_parameters(*split(cc), aa, np.exp(uu))
            return np.concatenate([ll.ravel(), nn.ravel()])

        Pc = _fd_jacobian(lambda cc: params_of(cc, x), c0)
        Px = _fd_jacobian(lambda xx: params_of(c0, xx), x)
        if acov is not None:
            cix = np.concatenate([lam_ix.ravel(), nu_ix.ravel()])
            csign = np.concatenate([np.repeat(sign, k), np.ones(G * k)])
            Vc = acov[np.ix_(cix, cix)] * np.outer(csign, csign)
            Vx = J @ Vc @ J.T
            D = Pc + Px @ J
            VP = D @ Vc @ D.T
        else:
            Vx = np.full((x.size, x.size), np.nan)
            VP = np.full((2 * G * k, 2 * G * k), np.nan)
        se_x = np.sqrt(np.clip(np.diag(Vx), 0, None))
        se_a, se_u = _unpack(se_x, G, ref)
        out["means"][fname] = {g: float(a[j]) for j, g in enumerate(groups)}
        out["variances"][fname] = {g: float(v[j]) for j, g in enumerate(groups)}
        out["means_se"][fname] = {g: float(se_a[j]) for j, g in enumerate(groups)}
        out["variances_se"][fname] = {g: float(v[j] * se_u[j]) for j, g in enumerate(groups)}
        loss[fname], converged[fname] = fx, ok
        sd_ = np.sqrt(v)
        for kind, P, P0, off in (("loading", lam, lam0, 0), ("intercept", nu, nu0, G * k)):
            for j, i in enumerate(items):
                idx = off + np.arange(G) * k + j
                vals, cov = P[:, j], VP[np.ix_(idx, idx)]
                if np.all(np.isfinite(cov)):
                    member = _invariant_set(vals, cov, n, alpha_pairwise, alpha_set)
                else:
                    member = np.ones(G, dtype=bool)
                w = np.where(member, n, 0.0)
                value = float(w @ vals / w.sum())
                # configural value predicted with one common parameter (value)
                if kind == "loading":
                    pred = value * sd_
                else:
                    pred = value + a * lam[:, j]
                var0 = np.var(P0[:, j])
                r2 = 1.0 - np.var(P0[:, j] - pred) / var0 if var0 > 1e-14 else np.nan
                D = vals[:, None] - vals[None, :]
                part = 0.5 * float(np.sum(weights * simplicity(D, epsilon)[0]))
                params.append(
                    ParameterAgreement(
                        factor=fname,
                        item=spec.items[i],
                        parameter=kind,
                        aligned={g: float(vals[h]) for h, g in enumerate(groups)},
                        se={g: float(np.sqrt(max(cov[h, h], 0.0))) for h, g in enumerate(groups)},
                        invariant=tuple(g for h, g in enumerate(groups) if member[h]),
                        noninvariant=tuple(g for h, g in enumerate(groups) if not member[h]),
                        value=value,
                        r2=float(r2),
                        loss=part,
                    )
                )
    return AlignmentResult(
        groups=groups,
        reference=ref_name,
        factors=tuple(spec.factors[f] for f in layout),
        means=out["means"],
        variances=out["variances"],
        means_se=out["means_se"],
        variances_se=out["variances_se"],
        loss=loss,
        converged=converged,
        parameters=tuple(params),
        notes=tuple(notes),
        settings={
            "epsilon": epsilon,
            "weights": "sqrt(N_g N_h)",
            "alpha_pairwise": alpha_pairwise,
            "alpha_set": alpha_set,
            "standard_errors": "delta method through the implicit solution (finite-difference Hessians)",
        },
    )

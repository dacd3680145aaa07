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

from dataclasses import dataclass

import numpy as np
from scipy import stats as _st

from ..errors import SpecificationError
from ..model.spec import ALPHA, BETA, LAMBDA, NU, PSI
from ..estimate.result import FitResult
from .alignment_results import AlignmentResult, ParameterAgreement
from .alignment_kernels import (
    EPSILON,
    fd_jacobian,
    unpack_solution,
    aligned_parameters,
    alignment_loss,
    implicit_jacobian,
    simplicity,
    solve_alignment,
)

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


def _settings(epsilon: float, alpha_pairwise: float, alpha_set: float) -> dict:
    """The alignment's settings as recorded in its result."""
    return {
        "epsilon": epsilon,
        "weights": "sqrt(N_g N_h)",
        "alpha_pairwise": alpha_pairwise,
        "alpha_set": alpha_set,
        "standard_errors": "delta method through the implicit solution (finite-difference Hessians)",
    }


def _reference_index(spec, reference: str | None) -> tuple[tuple[str, ...], str, int]:
    """Group names, the reference group's name and its index; refuses a bad reference."""
    groups = tuple(spec.groups)
    ref_name = reference if reference is not None else (spec.reference or groups[0])
    if ref_name not in groups:
        raise SpecificationError(
            f"The alignment reference group {ref_name!r} is not among the groups ({', '.join(groups)})."
        )
    if len(groups) < 2:
        raise SpecificationError("Alignment compares groups; the model has only one group.")
    return groups, ref_name, groups.index(ref_name)


@dataclass(frozen=True)
class _FactorBlock:
    """Configural loadings and intercepts of one factor's items, reflected to positive.

    ``lam_ix`` and ``nu_ix`` are (G, k) indices into the configural estimates; ``sign``
    is -1 in the groups whose loadings were reflected.
    """

    lam_ix: np.ndarray
    nu_ix: np.ndarray
    lam0: np.ndarray
    nu0: np.ndarray
    sign: np.ndarray


def _factor_block(result: FitResult, f: int, items: list[int]) -> _FactorBlock:
    """Collect one factor's configural loadings and intercepts, reflecting negative groups."""
    spec = result.spec
    G = len(spec.groups)
    lam_ix = np.array([[_param_of(spec, g, LAMBDA, i, f) for i in items] for g in range(G)])
    nu_ix = np.array([[_param_of(spec, g, NU, i, 0) for i in items] for g in range(G)])
    lam0 = result.theta[lam_ix]
    sign = np.where(lam0.sum(axis=1) < 0, -1.0, 1.0)
    return _FactorBlock(lam_ix, nu_ix, lam0 * sign[:, None], result.theta[nu_ix], sign)


def _delta_covariances(
    x: np.ndarray, block: _FactorBlock, weights: np.ndarray, ref: int, epsilon: float, acov: np.ndarray | None
) -> tuple[np.ndarray, np.ndarray, bool]:
    """Covariances of the solution ``x`` and of the aligned item parameters (delta method).

    The Jacobian runs through the implicit solution ``x(c)``, ``c = (lam0, nu0)``.
    Returns ``(Vx, VP, flat)``: VP is ordered loadings then intercepts, group-major;
    ``flat`` is true when the loss is flat at its minimum (no finite Jacobian).
    """
    lam0, nu0 = block.lam0, block.nu0
    G, k = lam0.shape
    c0 = np.concatenate([lam0.ravel(), nu0.ravel()])
    J = implicit_jacobian(x, lam0, nu0, weights, ref, eps=epsilon)
    flat = not np.all(np.isfinite(J))

    def params_of(cc, xx):
        aa, uu = unpack_solution(xx, G, ref)
        ll, nn = aligned_parameters(cc[: G * k].reshape(G, k), cc[G * k :].reshape(G, k), aa, np.exp(uu))
        return np.concatenate([ll.ravel(), nn.ravel()])

    Pc = fd_jacobian(lambda cc: params_of(cc, x), c0)
    Px = fd_jacobian(lambda xx: params_of(c0, xx), x)
    if acov is None:
        return np.full((x.size, x.size), np.nan), np.full((2 * G * k, 2 * G * k), np.nan), flat
    cix = np.concatenate([block.lam_ix.ravel(), block.nu_ix.ravel()])
    csign = np.concatenate([np.repeat(block.sign, k), np.ones(G * k)])
    Vc = acov[np.ix_(cix, cix)] * np.outer(csign, csign)
    D = Pc + Px @ J
    return J @ Vc @ J.T, D @ Vc @ D.T, flat


def _agreement(
    *,
    fname: str,
    item: str,
    kind: str,
    vals: np.ndarray,
    cov: np.ndarray,
    configural: np.ndarray,
    predicted,
    groups: tuple[str, ...],
    n: np.ndarray,
    weights: np.ndarray,
    epsilon: float,
    alphas: tuple[float, float],
) -> ParameterAgreement:
    """Invariant set, set value, R-squared and loss share of one aligned item parameter.

    ``predicted`` maps the set value to the configural values it implies.
    """
    G = vals.size
    if np.all(np.isfinite(cov)):
        member = _invariant_set(vals, cov, n, *alphas)
    else:
        member = np.ones(G, dtype=bool)
    w = np.where(member, n, 0.0)
    value = float(w @ vals / w.sum())
    var0 = np.var(configural)
    r2 = 1.0 - np.var(configural - predicted(value)) / var0 if var0 > 1e-14 else np.nan
    D = vals[:, None] - vals[None, :]
    part = 0.5 * float(np.sum(weights * simplicity(D, epsilon)[0]))
    return ParameterAgreement(
        factor=fname,
        item=item,
        parameter=kind,
        aligned={g: float(vals[h]) for h, g in enumerate(groups)},
        se={g: float(np.sqrt(max(cov[h, h], 0.0))) for h, g in enumerate(groups)},
        invariant=tuple(g for h, g in enumerate(groups) if member[h]),
        noninvariant=tuple(g for h, g in enumerate(groups) if not member[h]),
        value=value,
        r2=float(r2),
        loss=part,
    )


def _factor_agreements(
    *, fname: str, items: list[int], spec, block: _FactorBlock, a: np.ndarray, v: np.ndarray,
    VP: np.ndarray, n: np.ndarray, weights: np.ndarray, epsilon: float, alphas: tuple[float, float],
) -> list[ParameterAgreement]:
    """Agreement of every loading and intercept of one factor's items."""
    lam, nu = aligned_parameters(block.lam0, block.nu0, a, v)
    G, k = lam.shape
    sd_ = np.sqrt(v)
    out = []
    for kind, P, P0, off in (("loading", lam, block.lam0, 0), ("intercept", nu, block.nu0, G * k)):
        for j, i in enumerate(items):
            idx = off + np.arange(G) * k + j
            # configural value predicted with one common parameter (value)
            if kind == "loading":
                predicted = lambda value: value * sd_
            else:
                predicted = lambda value, j=j: value + a * lam[:, j]
            out.append(
                _agreement(
                    fname=fname, item=spec.items[i], kind=kind, vals=P[:, j], cov=VP[np.ix_(idx, idx)],
                    configural=P0[:, j], predicted=predicted, groups=tuple(spec.groups), n=n,
                    weights=weights, epsilon=epsilon, alphas=alphas,
                )
            )
    return out


def _align_factor(
    result: FitResult, f: int, items: list[int], *, ref: int, weights: np.ndarray, epsilon: float,
    out: dict, notes: list[str], alphas: tuple[float, float], random_starts: int, seed: int,
) -> list[ParameterAgreement]:
    """Align one factor: fills its entries of ``out``, appends to ``notes``, returns its agreements."""
    spec = result.spec
    groups = tuple(spec.groups)
    G = len(groups)
    fname = spec.factors[f]
    block = _factor_block(result, f, items)
    for g in np.flatnonzero(block.sign < 0):
        notes.append(f"factor {fname} reflected in group {groups[g]} (its loadings were mostly negative)")
    x, fx, ok = solve_alignment(
        block.lam0, block.nu0, weights, ref, eps=epsilon, random_starts=random_starts, seed=seed
    )
    if not ok:
        notes.append(f"the alignment of factor {fname} did not converge")
    a, u = unpack_solution(x, G, ref)
    v = np.exp(u)
    Vx, VP, flat = _delta_covariances(x, block, weights, ref, epsilon, result.acov)
    if flat:
        notes.append(f"the alignment loss of factor {fname} is flat at its minimum: no standard errors")
    se_a, se_u = unpack_solution(np.sqrt(np.clip(np.diag(Vx), 0, None)), G, ref)
    out["means"][fname] = {g: float(a[j]) for j, g in enumerate(groups)}
    out["variances"][fname] = {g: float(v[j]) for j, g in enumerate(groups)}
    out["means_se"][fname] = {g: float(se_a[j]) for j, g in enumerate(groups)}
    out["variances_se"][fname] = {g: float(v[j] * se_u[j]) for j, g in enumerate(groups)}
    out["loss"][fname], out["converged"][fname] = fx, ok
    n = np.asarray(result.group_n, dtype=float)
    return _factor_agreements(
        fname=fname, items=items, spec=spec, block=block, a=a, v=v, VP=VP, n=n,
        weights=weights, epsilon=epsilon, alphas=alphas,
    )


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
    groups, ref_name, ref = _reference_index(spec, reference)
    layout = _factor_layout(result)
    n = np.asarray(result.group_n, dtype=float)
    weights = np.sqrt(np.outer(n, n))
    np.fill_diagonal(weights, 0.0)
    notes: list[str] = []
    if result.acov is None:
        notes.append("the configural model has no covariance of its estimates: standard errors and tests are missing")
    out = {k: {} for k in ("means", "variances", "means_se", "variances_se", "loss", "converged")}
    params: list[ParameterAgreement] = []
    for f, items in layout.items():
        params += _align_factor(
            result, f, items, ref=ref, weights=weights, epsilon=epsilon, out=out, notes=notes,
            alphas=(alpha_pairwise, alpha_set), random_starts=random_starts, seed=seed,
        )
    return AlignmentResult(
        groups=groups,
        reference=ref_name,
        factors=tuple(spec.factors[f] for f in layout),
        means=out["means"],
        variances=out["variances"],
        means_se=out["means_se"],
        variances_se=out["variances_se"],
        loss=out["loss"],
        converged=out["converged"],
        parameters=tuple(params),
        notes=tuple(notes),
        settings=_settings(epsilon, alpha_pairwise, alpha_set),
    )

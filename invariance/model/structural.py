"""Structural invariance levels: equal factor variances, covariances, means and paths.

They follow the measurement levels (METHODS section 3: after strict or partial scalar
invariance). Each step adds equality constraints to a measurement-level
:class:`~invariance.model.ModelSpec` by relabelling its entries (the spec is immutable:
a new spec is made with :func:`dataclasses.replace`):

``variances``
    Factor (disturbance) variances equal to the reference group's. The reference value
    is fixed (it sets the scale), so the other groups' entries are fixed at it too; they
    keep the shared label, which marks them as one equality with a fixed value (the
    score tests of :mod:`invariance.partial.score` free such entries).
``covariances``
    Factor covariances held equal (one shared free label).
``means``
    Factor means (intercepts of endogenous factors) fixed at the reference value (0).
``paths``
    Structural regression paths (B entries that are not second-order loadings) held
    equal (one shared free label per path).

Steps are cumulative in the order given. Released constraints (``released``) are left
out: a :class:`~invariance.model.Release` of kind ``variance``, ``covariance``, ``mean``
or ``path`` keeps that parameter group-specific in the named groups.
"""

from __future__ import annotations

from dataclasses import replace
from typing import Iterable, Sequence

import numpy as np

from ..errors import SpecificationError
from .spec import ALPHA, BETA, PSI, ModelSpec, Release

__all__ = ["STRUCTURAL_STEPS", "build_structural", "structural_parameter"]

STRUCTURAL_STEPS = ("variances", "covariances", "means", "paths")

_KIND = {"variances": "variance", "covariances": "covariance", "means": "mean", "paths": "path"}


def structural_parameter(step: str) -> str:
    """The parameter kind a structural step constrains (``variances`` -> ``variance``)."""
    try:
        return _KIND[step]
    except KeyError:
        raise SpecificationError(
            f"Unknown structural step {step!r}; use one of {', '.join(STRUCTURAL_STEPS)}."
        ) from None


def _released_mask(spec: ModelSpec, released: Sequence[Release]) -> np.ndarray:
    kinds = spec.kinds()
    lhs, rhs = spec.entry_names()
    out = np.zeros(spec.group.size, dtype=bool)
    for r in released:
        m = (kinds == r.parameter) & (lhs == r.item)
        if r.factor is not None:
            m &= rhs == r.factor
        if r.groups is not None:
            m &= np.isin(spec.group, [spec.groups.index(g) for g in r.groups if g in spec.groups])
        out |= m
    return out


def _with_reference_means(spec: ModelSpec, r: int) -> ModelSpec:
    """Add explicit fixed-zero mean entries to the reference group where other groups
    have a mean entry (so the equality has a reference member)."""
    have = {int(spec.row[k]) for k in np.flatnonzero((spec.matrix == ALPHA) & (spec.group == r))}
    need = sorted({int(spec.row[k]) for k in np.flatnonzero(spec.matrix == ALPHA)} - have)
    if not need:
        return spec
    n = len(need)
    return replace(
        spec,
        group=np.concatenate([spec.group, np.full(n, r)]),
        matrix=np.concatenate([spec.matrix, np.full(n, ALPHA)]),
        row=np.concatenate([spec.row, np.array(need)]),
        col=np.concatenate([spec.col, np.zeros(n, dtype=np.int64)]),
        free=np.concatenate([spec.free, np.zeros(n, dtype=bool)]),
        label=np.concatenate([spec.label, np.array([""] * n, dtype=object)]),
        value=np.concatenate([spec.value, np.zeros(n)]),
    )


def _equal_to_reference(
    spec: ModelSpec, kind: str, r: int, skip: np.ndarray, *, label: np.ndarray, free: np.ndarray, value: np.ndarray
) -> None:
    """Variances or means of every factor equal across groups (``label``, ``free``, ``value`` changed in place).

    A parameter free in the reference group gets one shared free label; one fixed there
    (identification) fixes the other groups at the reference value under a shared label.
    """
    matrix, row, col, group = spec.matrix, spec.row, spec.col, spec.group
    mat = PSI if kind == "variance" else ALPHA
    for f_i, f in enumerate(spec.factors):
        sel = (matrix == mat) & (row == f_i) & ((col == f_i) if mat == PSI else True)
        ref_ent = np.flatnonzero(sel & (group == r))
        if ref_ent.size and spec.free[ref_ent[0]]:
            # free in the reference (not an identification entry): share a label
            lab = f"{kind}:{f}"
            for k in np.flatnonzero(sel & ~skip):
                label[k], free[k] = lab, True
            continue
        ref_val = value[ref_ent[0]] if ref_ent.size else 0.0
        lab = f"{kind}:{f}"
        ents = np.flatnonzero(sel & ~skip & (group != r))
        if not ents.size:
            continue
        if ref_ent.size:
            label[ref_ent[0]] = lab
        for k in ents:
            label[k], free[k], value[k] = lab, False, ref_val


def _share_labels(spec: ModelSpec, kind: str, skip: np.ndarray, so: set, *, label: np.ndarray) -> None:
    """Factor covariances or structural paths held equal by one shared label each (in place).

    Second-order loadings (``so``, (row, column) B positions) are left to the measurement levels.
    """
    kinds = spec.kinds()
    lhs, rhs = spec.entry_names()
    mat = PSI if kind == "covariance" else BETA
    sel = (spec.matrix == mat) & (kinds == kind) & spec.free & ~skip
    if kind == "path":
        sel &= ~np.array([(a, b) in so for a, b in zip(spec.row, spec.col)], dtype=bool)
    for k in np.flatnonzero(sel):
        if kind == "path":
            label[k] = f"path:{lhs[k]}<-{rhs[k]}"
        else:
            label[k] = f"covariance:{lhs[k]}~{rhs[k]}"


def build_structural(
    spec: ModelSpec,
    steps: Iterable[str],
    *,
    released: Iterable[Release] = (),
    second_order_paths: Sequence[tuple[str, str]] = (),
) -> ModelSpec:
    """Add structural equality constraints to a measurement-level spec.

    Parameters
    ----------
    spec
        The accepted measurement level (with its releases).
    steps
        Structural steps among :data:`STRUCTURAL_STEPS`, applied cumulatively.
    released
        Structural constraints to leave free (from an earlier partial search).
    second_order_paths
        ``(outcome, predictor)`` B entries that are second-order loadings (already
        constrained by the measurement levels); they are not touched by ``paths``.

    Returns
    -------
    ModelSpec
        Level name ``"<measurement level>+<last step>"``; ``released`` appended.
    """
    steps = tuple(steps)
    for s in steps:
        structural_parameter(s)
    released = tuple(released)
    ref = spec.reference or spec.groups[0]
    r = spec.groups.index(ref)
    if "means" in steps:
        spec = _with_reference_means(spec, r)
    skip = _released_mask(spec, released)
    label = spec.label.copy()
    free = spec.free.copy()
    value = spec.value.copy()
    so = {(spec.factors.index(a), spec.factors.index(b)) for a, b in second_order_paths}
    for step in steps:
        kind = structural_parameter(step)
        if kind in ("variance", "mean"):
            _equal_to_reference(spec, kind, r, skip, label=label, free=free, value=value)
        else:
            _share_labels(spec, kind, skip, so, label=label)
    base = spec.level.split("+", 1)[0] or "model"
    name = f"{base}+{steps[-1]}" if steps else spec.level
    new = tuple(r_ for r_ in released if r_ not in spec.released)
    return replace(spec, label=label, free=free, value=value, level=name, released=spec.released + new)

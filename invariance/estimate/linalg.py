"""Linear algebra on the arrow-shaped information matrix of multi-group models.

Parameters are either *shared* (a label used in several groups: an equality constraint)
or *local* to one group. Local parameters of different groups never meet in the
information matrix, so it is an arrowhead::

    [ A    B_1  B_2 ... ]
    [ B_1' D_1  0       ]
    [ B_2' 0    D_2     ]

and solving or inverting it costs time linear in the number of groups (Schur complement
on the shared block) instead of cubic in the total parameter count.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np
from scipy.linalg import lapack as _lapack

__all__ = ["ArrowPartition", "partition", "pd_solve", "pd_factor", "factor_solve", "factor_inverse", "pd_inverse_logdet", "arrow_solve", "arrow_inverse", "arrow_min_eigen", "all_above", "lower_triangle"]


@dataclass(frozen=True, eq=False)
class ArrowPartition:
    """Shared parameter indices and, per group, the indices local to that group."""

    q: int
    shared: np.ndarray
    local: tuple[np.ndarray, ...]


def partition(group_params, q: int) -> ArrowPartition:
    """Partition parameters given the global indices used by each group."""
    count = np.zeros(q, dtype=int)
    for u in group_params:
        count[u] += 1
    shared = np.flatnonzero(count != 1)
    local = tuple(np.asarray([j for j in u if count[j] == 1], dtype=np.int64) for u in group_params)
    return ArrowPartition(q, shared, local)


def _cho_factor(M: np.ndarray) -> np.ndarray:
    """Lower Cholesky factor (LAPACK potrf, no input checks); LinAlgError if not PD."""
    c, info = _lapack.dpotrf(M, lower=1, clean=1)
    if info != 0:
        raise np.linalg.LinAlgError("matrix not positive definite")
    return c


def _cho_solve(c: np.ndarray, b: np.ndarray) -> np.ndarray:
    x, info = _lapack.dpotrs(c, b, lower=1)
    if info != 0:
        raise np.linalg.LinAlgError("invalid Cholesky solve")
    return x


def pd_solve(M: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Solve M x = b for a positive-definite M by LAPACK Cholesky; LinAlgError otherwise."""
    return _cho_solve(_cho_factor(M), b)


@functools.lru_cache(maxsize=64)
def lower_triangle(n: int) -> tuple[np.ndarray, np.ndarray]:
    """Row and column indices of the lower triangle (diagonal included) of an n x n
    matrix, in ``numpy.tril_indices`` order; cached and read-only."""
    rows, cols = np.tril_indices(n)
    rows.setflags(write=False)
    cols.setflags(write=False)
    return rows, cols


def all_above(M: np.ndarray, level: float) -> bool:
    """Are all eigenvalues of the symmetric ``M`` above ``level``? (One Cholesky of
    M - level I instead of an eigendecomposition: a check, not a measurement.)"""
    shifted = M - level * np.eye(M.shape[0]) if level else M
    _, info = _lapack.dpotrf(shifted, lower=1, clean=0)
    return info == 0


def pd_factor(M: np.ndarray) -> tuple[np.ndarray, float]:
    """Lower Cholesky factor (upper triangle zero) and log-determinant of a
    positive-definite M (LAPACK potrf); LinAlgError when M is not positive definite."""
    c = _cho_factor(M)
    return c, 2.0 * float(np.log(np.diagonal(c)).sum())


def factor_solve(c: np.ndarray, b: np.ndarray) -> np.ndarray:
    """M^-1 b from the factor ``c`` of :func:`pd_factor` (LAPACK potrs)."""
    return _cho_solve(c, b)


def factor_inverse(c: np.ndarray) -> np.ndarray:
    """M^-1 from the factor ``c`` of :func:`pd_factor` (LAPACK potri)."""
    inv, info = _lapack.dpotri(c, lower=1)
    if info != 0:
        raise np.linalg.LinAlgError("matrix not positive definite")
    # potri fills the lower triangle; the upper one is the zeros of the cleaned factor
    return inv + inv.T - np.diag(np.diagonal(inv))


def pd_inverse_logdet(M: np.ndarray) -> tuple[np.ndarray, float]:
    """Inverse and log-determinant of a positive-definite M (LAPACK potrf and potri, one
    factorization); LinAlgError when M is not positive definite."""
    c, logdet = pd_factor(M)
    return factor_inverse(c), logdet


def _eliminate(H: np.ndarray, part: ArrowPartition, rhs: np.ndarray | None):
    s = part.shared
    schur = H[np.ix_(s, s)].copy()
    r = None if rhs is None else rhs[s].copy()
    blocks = []
    for loc in part.local:
        if not loc.size:
            continue
        c = _cho_factor(H[np.ix_(loc, loc)])
        B = H[np.ix_(s, loc)]
        DiBt = _cho_solve(c, B.T)
        Dib = None
        if rhs is not None:
            Dib = _cho_solve(c, rhs[loc])
            r -= B @ Dib
        schur -= B @ DiBt
        blocks.append((loc, c, DiBt, Dib))
    return schur, r, blocks


def arrow_solve(H: np.ndarray, b: np.ndarray, part: ArrowPartition) -> np.ndarray:
    """Solve H x = b for a positive-definite arrow matrix; raises LinAlgError otherwise."""
    schur, r, blocks = _eliminate(H, part, b)
    x = np.empty(part.q)
    xs = _cho_solve(_cho_factor(schur), r) if part.shared.size else np.empty(0)
    x[part.shared] = xs
    for loc, _, DiBt, Dib in blocks:
        x[loc] = Dib - DiBt @ xs
    return x


def arrow_inverse(H: np.ndarray, part: ArrowPartition) -> np.ndarray:
    """Full inverse of a positive-definite arrow matrix; raises LinAlgError otherwise."""
    schur, _, blocks = _eliminate(H, part, None)
    s = part.shared
    q = part.q
    out = np.zeros((q, q))
    sinv = _cho_solve(_cho_factor(schur), np.eye(s.size)) if s.size else np.zeros((0, 0))
    out[np.ix_(s, s)] = sinv
    if not blocks:
        return out
    L = np.concatenate([loc for loc, *_ in blocks])
    M = np.vstack([DiBt for _, _, DiBt, _ in blocks])  # (L, s) = D^-1 B'
    out[np.ix_(s, L)] = -sinv @ M.T
    out[np.ix_(L, s)] = -(M @ sinv)
    LL = M @ sinv @ M.T
    off = 0
    for loc, c, _, _ in blocks:
        n = loc.size
        LL[off : off + n, off : off + n] += _cho_solve(c, np.eye(n))
        off += n
    out[np.ix_(L, L)] = LL
    return (out + out.T) / 2


def arrow_min_eigen(H: np.ndarray, part: ArrowPartition) -> float:
    """Smallest eigenvalue among the diagonal blocks and the Schur complement of the
    diagonally scaled matrix: zero (or negative) exactly when H is singular (or indefinite)."""
    d = np.sqrt(np.clip(np.abs(np.diag(H)), 1e-300, None))
    Hs = H / np.outer(d, d)
    worst = np.inf
    for loc in part.local:
        if loc.size:
            worst = min(worst, float(np.linalg.eigvalsh(Hs[np.ix_(loc, loc)])[0]))
    if worst <= 1e-12:
        return worst
    try:
        schur, _, _ = _eliminate(Hs, part, None)
    except np.linalg.LinAlgError:
        return 0.0
    if part.shared.size:
        worst = min(worst, float(np.linalg.eigvalsh(schur)[0]))
    return worst

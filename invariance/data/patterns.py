"""Missingness patterns and their sufficient statistics: pure array functions.

Cases are grouped by the items they observe; per pattern the counts, means and
covariances are all that the normal likelihood of incomplete data needs (METHODS
section 14). :data:`CACHE` keeps these statistics, and the saturated-model estimates of
:mod:`invariance.data.em`, by the content of a group's data, so levels, refits and the
MCAR test share one computation.
"""

from __future__ import annotations

import hashlib
from collections import OrderedDict
from dataclasses import dataclass
from functools import cached_property

import numpy as np

__all__ = [
    "Patterns",
    "missing_patterns",
    "PatternMoments",
    "pattern_moments",
    "pattern_moments_by_key",
    "pattern_terms",
    "ContentCache",
    "CACHE",
]



@dataclass(frozen=True, eq=False)
class Patterns:
    """Missingness patterns of an (n, p) array.

    Attributes
    ----------
    observed
        (K, p) boolean, True where the pattern observes the item; patterns are sorted
        by decreasing number of observed items, then by first appearance.
    case_pattern
        (n,) pattern index of every case.
    counts
        (K,) cases per pattern.
    rows
        Per pattern, the row indices of its cases.
    """

    observed: np.ndarray
    case_pattern: np.ndarray
    counts: np.ndarray
    rows: tuple[np.ndarray, ...]

    @property
    def n_patterns(self) -> int:
        return int(self.observed.shape[0])


def missing_patterns(x: np.ndarray) -> Patterns:
    """Group the rows of ``x`` (NaN = missing) by their pattern of observed items."""
    observed, case, counts, sort = _pattern_order(x)
    return Patterns(observed, case, counts, tuple(np.split(sort, np.cumsum(counts)[:-1])))


def _pattern_order(x: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """(observed, case_pattern, counts) of :class:`Patterns` and the rows sorted by pattern
    (stable: data order within a pattern; the concatenation of ``Patterns.rows``)."""
    x = np.asarray(x, dtype=float)
    obs = ~np.isnan(x)
    if obs.shape[1] <= 62:
        # one integer code per row: unique on a 1-d array is far cheaper than on rows
        codes = obs.astype(np.int64) @ (np.int64(1) << np.arange(obs.shape[1], dtype=np.int64))
        _, first, inv = np.unique(codes, return_index=True, return_inverse=True)
        uniq = obs[first]
    else:
        uniq, first, inv = np.unique(obs, axis=0, return_index=True, return_inverse=True)
    inv = np.asarray(inv).reshape(-1)
    order = np.lexsort((first, -uniq.sum(axis=1)))
    rank = np.empty_like(order)
    rank[order] = np.arange(order.size)
    case = rank[inv]
    counts = np.bincount(case, minlength=order.size)
    return uniq[order], case, counts, np.argsort(case, kind="stable")


@dataclass(frozen=True, eq=False)
class PatternMoments:
    """Sufficient statistics of incomplete data, one block per missingness pattern.

    Arrays are padded to all ``p`` items: entries of items a pattern does not observe
    are 0, so every pattern is one slice of a stack and the patterns are processed in
    one batched call (METHODS section 14).

    Attributes
    ----------
    observed
        (K, p) boolean: the items each pattern observes (patterns with none dropped).
    counts
        (K,) cases per pattern, as floats.
    means
        (K, p) pattern means over the observed items.
    covs
        (K, p, p) pattern covariances (divisor n_k) over the observed items.
    """

    observed: np.ndarray
    counts: np.ndarray
    means: np.ndarray
    covs: np.ndarray

    @property
    def n(self) -> float:
        return float(self.counts.sum())

    @cached_property
    def blocks(self) -> "_Blocks":
        """Index arrays and masks of :func:`pattern_terms` (computed once)."""
        return _Blocks.of(self.observed)

    def reorder(self, ix) -> "PatternMoments":
        """The same statistics with items in the order ``ix`` (new item i = old ix[i])."""
        ix = np.asarray(ix)
        return PatternMoments(self.observed[:, ix], self.counts, self.means[:, ix], self.covs[:, ix][:, :, ix])


@dataclass(frozen=True, eq=False)
class _Blocks:
    """The split of :func:`pattern_terms`: ``order`` lists the items every pattern
    observes (``n_always`` of them, set A) before the others (set R); ``back`` undoes
    that order; ``oo`` and ``oo_rest`` mask the padded blocks over all items and over R
    (in ``order``). ``schur`` says whether the split pays (A and R both nonempty,
    several patterns)."""

    order: np.ndarray
    back: np.ndarray
    n_always: int
    oo: np.ndarray
    oo_rest: np.ndarray
    schur: bool

    @classmethod
    def of(cls, observed: np.ndarray) -> "_Blocks":
        every = observed.all(axis=0)
        order = np.concatenate([np.flatnonzero(every), np.flatnonzero(~every)])
        na = int(every.sum())
        o = observed[:, order[na:]]
        return cls(order, np.argsort(order), na, observed[:, :, None] & observed[:, None, :],
                   o[:, :, None] & o[:, None, :], bool(0 < na < every.size and observed.shape[0] > 1))


def _pattern_moments(x: np.ndarray) -> PatternMoments:
    """Pattern statistics from the cases sorted by pattern: means by segment sums, then
    the centred cross products of each contiguous segment (missing entries zero)."""
    pattern, _, count, order = _pattern_order(x)
    bounds = np.r_[0, np.cumsum(count)]
    xo = x[order]
    observed = ~np.isnan(xo)
    xs = np.where(observed, xo, 0.0)
    counts = count.astype(float)
    means = np.add.reduceat(xs, bounds[:-1], axis=0) / counts[:, None]
    e = (xs - np.repeat(means, count, axis=0)) * observed
    covs = np.zeros((count.size, x.shape[1], x.shape[1]))
    for k in np.flatnonzero(count > 1):  # a single case has covariance 0
        seg = e[bounds[k]:bounds[k + 1]]
        np.matmul(seg.T, seg, out=covs[k])
    covs /= counts[:, None, None]
    keep = pattern.any(axis=1)
    return PatternMoments(pattern[keep], counts[keep], means[keep], covs[keep])


class ContentCache:
    """Results of pure functions of a data array, keyed by the array's content.

    The key does not depend on the order of the columns: a result is computed once in
    a canonical column order and handed out reordered (``result.reorder(ix)``), so
    statistics whose items were reordered (levels, refits, the MCAR test) still hit.
    Holds at most ``size`` results (oldest dropped first).
    """

    def __init__(self, size: int = 512) -> None:
        self.size = size
        self._store: "OrderedDict[tuple, object]" = OrderedDict()

    @staticmethod
    def key(x: np.ndarray) -> tuple[tuple, np.ndarray]:
        """(content key, canonical column order) of ``x``: one SHA-256 digest per column
        (the hardware-accelerated hash of :mod:`hashlib`), the columns ordered by digest."""
        x = np.asarray(x, dtype=float)
        xt = np.ascontiguousarray(x.T)
        cols = [hashlib.sha256(col).digest() for col in xt]
        order = np.array(sorted(range(x.shape[1]), key=cols.__getitem__), dtype=np.int64)
        return (x.shape, b"".join(cols[j] for j in order)), order

    def get(self, kind: str, x: np.ndarray, compute, *, key: tuple[tuple, np.ndarray] | None = None):
        """``compute(x)`` through the cache; ``compute`` must return an object with ``reorder``.
        ``key`` is :meth:`key` of ``x`` when the caller has it already (no second hashing)."""
        x = np.asarray(x, dtype=float)
        key, order = self.key(x) if key is None else key
        full = (kind, key)
        hit = self._store.get(full)
        if hit is None:
            hit = compute(x[:, order])
            self._store[full] = hit
            if len(self._store) > self.size:
                self._store.popitem(last=False)
        else:
            self._store.move_to_end(full)
        return hit.reorder(np.argsort(order))

    def clear(self) -> None:
        self._store.clear()


#: the one cache of per-group statistics computed from raw data (patterns, EM, H1 information)
CACHE = ContentCache()


def pattern_moments(x: np.ndarray) -> PatternMoments:
    """Per-pattern counts, means and covariances of ``x`` (NaN = missing), cached by content."""
    return CACHE.get("patterns", x, _pattern_moments)


def pattern_moments_by_key(x: np.ndarray, key: tuple[tuple, np.ndarray]) -> PatternMoments:
    """:func:`pattern_moments` of ``x`` whose :meth:`ContentCache.key` the caller holds."""
    return CACHE.get("patterns", x, _pattern_moments, key=key)


def pattern_terms(pm: PatternMoments, mean: np.ndarray, cov: np.ndarray):
    """Batched inverse, log-determinant and mean residual of every pattern's block.

    Items every pattern observes (set A) are factored once: with the Schur complement
    Z = Sigma_RR - Sigma_RA Sigma_AA^-1 Sigma_AR of the other items R, each pattern's
    block needs only the inverse of Z restricted to its observed items of R
    (:func:`_schur_terms`; the block inverse, e.g. Harville 1997, section 8.5). Without
    such a split each Sigma_oo is padded to p x p with the identity on the unobserved
    items, so one stacked Cholesky factorization covers all patterns; the inverse is
    zeroed outside the observed block.

    Returns
    -------
    W : (K, p, p)
        Sigma_oo^-1, zero outside the observed block.
    logdet : (K,)
        log|Sigma_oo|.
    d : (K, p)
        m_k - mu_o, zero on unobserved items.

    Raises
    ------
    numpy.linalg.LinAlgError
        When a block is not positive definite.
    """
    d = (pm.means - mean[None]) * pm.observed
    b = pm.blocks
    if b.schur:
        W, logdet = _schur_terms(b, cov)
        return W, logdet, d
    pad = np.where(b.oo, cov[None], np.eye(cov.shape[0])[None])
    R = np.linalg.cholesky(pad)
    logdet = 2.0 * np.log(np.diagonal(R, axis1=1, axis2=2)).sum(axis=1)
    W = np.linalg.inv(pad) * b.oo
    return W, logdet, d


def _schur_terms(b: _Blocks, cov: np.ndarray):
    """(W, logdet) of :func:`pattern_terms` through the items every pattern observes.

    With A the items every pattern observes, R the others, P = Sigma_AA^-1,
    G = P Sigma_AR, Z = Sigma_RR - Sigma_RA G and Y_k the padded inverse of Z over
    pattern k's observed items of R: W_k = [[P + G Y_k G', -G Y_k], [-Y_k G', Y_k]] and
    log|Sigma_oo| = log|Sigma_AA| + log|Z_oo|. Sigma_oo is positive definite exactly
    when Sigma_AA and Z_oo are, so the same blocks fail as in the direct computation.
    """
    na = b.n_always
    c = cov[b.order[:, None], b.order]
    saa, sar = c[:na, :na], c[:na, na:]
    la = np.linalg.cholesky(saa)
    P = np.linalg.inv(saa)
    G = P @ sar
    Z = c[na:, na:] - sar.T @ G
    pad = np.where(b.oo_rest, ((Z + Z.T) / 2)[None], np.eye(Z.shape[0])[None])
    lz = np.linalg.cholesky(pad)
    Y = np.linalg.inv(pad) * b.oo_rest
    logdet = 2.0 * (np.log(np.diag(la)).sum() + np.log(np.diagonal(lz, axis1=1, axis2=2)).sum(axis=1))
    YG = Y @ G.T                                                     # (K, |R|, |A|)
    W = np.empty(b.oo.shape)
    W[:, :na, :na] = P + G @ YG
    W[:, na:, :na] = -YG
    W[:, :na, na:] = -YG.transpose(0, 2, 1)
    W[:, na:, na:] = Y
    return W[:, b.back[:, None], b.back], logdet

"""Factor scores per case from a fitted multi-group model (harmonized scores).

Two methods, per group g, with eta the vector of all latent variables, Phi = A Psi A'
their covariance, kappa = A alpha their means, Lambda the loadings, Theta the residual
covariance and Sigma, mu the implied moments (METHODS section 1):

``regression`` (Thurstone 1935)
    eta_hat = kappa + Phi Lambda' Sigma^-1 (x - mu): the conditional mean of the factors
    given the items; shrunk towards the group mean, maximal correlation with the factor.
``bartlett`` (Bartlett 1937)
    eta_hat = kappa + (Lambda' Theta^-1 Lambda)^-1 Lambda' Theta^-1 (x - mu): weighted
    least squares; conditionally unbiased, E[eta_hat | eta] = eta. Higher-order factors
    (no item loads on them directly) get the one-factor form with loadings
    l = Lambda Phi e_f / phi_f and error covariance Sigma - l l' phi_f, which is
    conditionally unbiased for that factor.

Factor determinacy (Grice 2001): rho_f = sqrt[(Phi Lambda' Sigma^-1 Lambda Phi)_ff / phi_ff],
the correlation of the regression score with its factor. For any linear score
W (x - mu) the model-implied correlation with the factor is
(W Lambda Phi)_ff / sqrt[(W Sigma W')_ff phi_ff] (reported as ``validity``).

Cases with missing items are scored, on request, from their observed items (the same
formulas on the observed rows of Lambda, Theta, Sigma, mu).

What the scores mean across groups depends on the level of the model they come from:
configural scores are on each group's own metric; metric scores share units but not
origins; scalar (and strict) scores share both, so group means of the scores compare.
Released constraints (partial invariance) are honoured: the released items carry their
group-specific parameters, and the common metric rests on the items still held equal.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Sequence

import numpy as np

import pandas as pd

from ..errors import DataError, EstimationError, SpecificationError
from ..escape import write_csv
from ..estimate.result import FitResult

__all__ = ["SCORE_METHODS", "score_weights", "score_cases", "determinacy", "FactorScores", "factor_scores"]

SCORE_METHODS = ("regression", "bartlett")


# ---------------------------------------------------------------------------
# Pure array kernels
# ---------------------------------------------------------------------------


def _moments(mats):
    lam, beta, psi, theta, nu, alpha = mats
    m = beta.shape[0]
    A = np.linalg.inv(np.eye(m) - beta)
    phi = A @ psi @ A.T
    kappa = A @ alpha
    sigma = lam @ phi @ lam.T + theta
    mu = nu + lam @ kappa
    return lam, theta, phi, kappa, sigma, mu


def score_weights(
    lam: np.ndarray, theta: np.ndarray, phi: np.ndarray, sigma: np.ndarray, *, method: str
) -> np.ndarray:
    """Score weights W (m x p): scores are kappa + W (x - mu).

    Parameters
    ----------
    lam, theta, phi, sigma
        Loadings (p x m), residual covariance, factor covariance (m x m), implied
        covariance, all of one group (possibly restricted to observed items).
    method
        ``regression`` or ``bartlett``.
    """
    C = lam @ phi  # cov(x, eta), p x m
    if method == "regression":
        return np.linalg.solve(sigma, C).T
    if method != "bartlett":
        raise SpecificationError(f"The score method must be one of {', '.join(SCORE_METHODS)}; got {method!r}.")
    if np.any(np.diag(theta) <= 0):
        raise EstimationError(
            "Bartlett scores need positive residual variances and the solution has a zero or "
            "negative one (an improper solution); use the regression method or revise the model."
        )
    m = lam.shape[1]
    W = np.zeros((m, lam.shape[0]))
    direct = np.flatnonzero(np.abs(lam).sum(axis=0) > 0)
    if direct.size:
        L = lam[:, direct]
        TiL = np.linalg.solve(theta, L)
        M = L.T @ TiL
        if np.linalg.matrix_rank(M) < direct.size:
            raise DataError(
                "Bartlett scores need loadings of full column rank on the observed items; "
                "use the regression method for these cases."
            )
        W[direct] = np.linalg.solve(M, TiL.T)
    for f in np.setdiff1d(np.arange(m), direct):
        l = C[:, f] / phi[f, f]
        E = sigma - np.outer(l, l) * phi[f, f]
        Eil = np.linalg.solve(E, l)
        W[f] = Eil / (l @ Eil)
    return W


def score_cases(mats: Sequence[np.ndarray], x: np.ndarray, *, method: str) -> np.ndarray:
    """Factor scores of the rows of ``x`` (n x p, NaN = missing) for one group.

    Rows are scored from their observed items; rows with no observed item get NaN.
    """
    lam, theta, phi, kappa, sigma, mu = _moments(tuple(mats))
    x = np.asarray(x, dtype=float)
    out = np.full((x.shape[0], lam.shape[1]), np.nan)
    obs = ~np.isnan(x)
    patterns, inverse = np.unique(obs, axis=0, return_inverse=True)
    inverse = np.asarray(inverse).reshape(-1)
    for k, pat in enumerate(patterns):
        if not pat.any():
            continue
        rows = np.flatnonzero(inverse == k)
        o = np.flatnonzero(pat)
        W = score_weights(lam[o], theta[np.ix_(o, o)], phi, sigma[np.ix_(o, o)], method=method)
        out[rows] = kappa + (x[np.ix_(rows, o)] - mu[o]) @ W.T
    return out


def determinacy(mats: Sequence[np.ndarray], *, method: str = "regression") -> tuple[np.ndarray, np.ndarray]:
    """Factor determinacy and the validity of the chosen scores, per factor of one group.

    Returns
    -------
    rho, validity
        ``rho`` the determinacy (Grice 2001), ``validity`` the model-implied correlation
        of the ``method`` scores with their factor (equal to ``rho`` for regression).
    """
    lam, theta, phi, kappa, sigma, mu = _moments(tuple(mats))
    d = np.clip(np.diag(phi), 1e-300, None)
    Wr = score_weights(lam, theta, phi, sigma, method="regression")
    rho = np.sqrt(np.clip(np.diag(Wr @ lam @ phi), 0, None) / d)
    W = Wr if method == "regression" else score_weights(lam, theta, phi, sigma, method=method)
    num = np.diag(W @ lam @ phi)
    var = np.diag(W @ sigma @ W.T)
    return rho, num / np.sqrt(np.clip(var, 1e-300, None) * d)


# ---------------------------------------------------------------------------
# pandas edge
# ---------------------------------------------------------------------------


_MEANING = {
    "configural": (
        "configural model: every group has factor mean 0 and variance 1 on its own metric, "
        "so score levels and spreads do not compare across groups"
    ),
    "metric": (
        "metric model: loadings are equal, so score units (variances, covariances, "
        "relations) compare across groups, but score means do not"
    ),
    "scalar": "scalar model: loadings and intercepts are equal, so score means and spreads compare across groups",
    "strict": (
        "strict model: loadings, intercepts and residual variances are equal, so score means "
        "and spreads compare across groups"
    ),
}


@dataclass(frozen=True, eq=False)
class FactorScores:
    """Factor scores of every case used, with their meaning.

    Attributes
    ----------
    table
        DataFrame: id column, ``group``, one column per factor.
    method
        ``regression`` or ``bartlett``.
    level
        The invariance level of the model the scores come from.
    released
        The released constraints of that model (partial invariance), as dicts.
    determinacy, validity
        Per group, factor -> determinacy (Grice 2001) and the correlation of the
        chosen scores with their factor.
    statement
        Which level the scores rest on and how far they compare groups.
    """

    table: object
    method: str
    level: str
    released: tuple[dict, ...]
    determinacy: dict
    validity: dict
    statement: str
    id_column: str
    notes: tuple[str, ...] = field(default_factory=tuple)

    def to_csv(self, path) -> None:
        """Write the per-case scores (id, group, factors) to a CSV file (text cells such
        as case ids and group names made safe for spreadsheets, as every CSV the tool
        writes)."""
        write_csv(self.table, path)

    def to_dict(self) -> dict:
        """Plain-type summary for results.json (without the per-case scores)."""
        return {
            "method": self.method,
            "level": self.level,
            "released": list(self.released),
            "n_cases": int(len(self.table)),
            "id": self.id_column,
            "factors": [c for c in self.table.columns if c not in (self.id_column, "group")],
            "determinacy": self.determinacy,
            "validity": self.validity,
            "statement": self.statement,
            "notes": list(self.notes),
        }


def _statement(level: str, released: Sequence[dict], method: str) -> str:
    base = _MEANING.get(level, f"{level or 'unnamed'} model")
    s = f"The {method} scores rest on the {base}."
    if released:
        names = ", ".join(
            f"{r['parameter']} of {r['item']}" + (f" on {r['factor']}" if r.get("factor") else "") for r in released
        )
        s += (
            f" The model is partial: {len(released)} constraint(s) released ({names}); the scores "
            "compare groups only as far as that partial model holds, with the common metric "
            "carried by the items still held equal."
        )
    if method == "regression":
        s += (
            " Regression scores are shrunk towards each group's mean by that group's own "
            "determinacy; Bartlett scores are conditionally unbiased and suit comparisons of "
            "score levels where the level permits them."
        )
    return s


def factor_scores(
    result: FitResult,
    frame,
    *,
    group: str | None = None,
    method: str = "regression",
    id: str | None = None,
    incomplete: bool = False,
) -> FactorScores:
    """Factor scores per case for every factor of a fitted model.

    Parameters
    ----------
    result
        The fitted model (the final accepted one, released parameters included).
    frame
        The data the model was fitted to (pandas DataFrame).
    group
        Grouping column (``None`` for a single-group model, whose group is ``all``).
    method
        ``regression`` (Thurstone 1935) or ``bartlett`` (Bartlett 1937).
    id
        Column that identifies cases; the row number of ``frame`` (from 0) otherwise,
        in a column called ``row``.
    incomplete
        Also score cases with some items missing, from their observed items. By default
        only complete cases are scored: those a complete-case fit used.

    Returns
    -------
    FactorScores
    """
    if method not in SCORE_METHODS:
        raise SpecificationError(f"The score method must be one of {', '.join(SCORE_METHODS)}; got {method!r}.")
    spec = result.spec
    ids, id_col, keys = _case_keys(frame, spec, group=group, id=id)
    X = frame[list(spec.items)].to_numpy(dtype=float)
    table, dets, vals = _score_groups(result, X, keys, ids, id_col, method=method, incomplete=incomplete)
    released = tuple(r.to_dict() for r in spec.released)
    return FactorScores(
        table=table,
        method=method,
        level=spec.level,
        released=released,
        determinacy=dets,
        validity=vals,
        statement=_statement(spec.level, released, method),
        id_column=id_col,
        notes=_score_notes(result, len(table), dets, incomplete=incomplete),
    )


def _case_keys(frame, spec, *, group: str | None, id: str | None) -> tuple[np.ndarray, str, np.ndarray]:
    """Case ids, the id column's name and each case's group name (``None`` when missing).

    Refuses absent columns, repeated ids and a multi-group model without a group column.
    """
    items = list(spec.items)
    need = items + [c for c in (group, id) if c]
    miss = [c for c in need if c not in frame.columns]
    if miss:
        raise DataError(f"Column {miss[0]!r} is not in the data; check the spelling or the data file.")
    if id is not None and frame[id].duplicated().any():
        dup = frame[id][frame[id].duplicated()].iloc[0]
        raise DataError(f"The id column {id!r} repeats the value {dup!r}; give every case its own id.")
    id_col = id if id is not None else "row"
    if id is None and "row" in items:
        id_col = "case_row"
    ids = frame[id].to_numpy() if id is not None else np.arange(len(frame))
    if group is None:
        if len(spec.groups) != 1:
            raise SpecificationError(
                f"The model has {len(spec.groups)} groups; name the grouping column to score its cases."
            )
        keys = np.array([spec.groups[0]] * len(frame), dtype=object)
    else:
        keys = frame[group].astype(str).to_numpy(dtype=object)
        keys[frame[group].isna().to_numpy()] = None
    return ids, id_col, keys


def _score_groups(
    result: FitResult, X: np.ndarray, keys: np.ndarray, ids: np.ndarray, id_col: str, *, method: str, incomplete: bool
):
    """Score every group's cases; returns the table (data row order), determinacies and validities."""

    spec = result.spec
    factors = list(spec.factors)
    parts, dets, vals = [], {}, {}
    for g, gname in enumerate(spec.groups):
        rows = np.flatnonzero(keys == gname)
        x = X[rows]
        keep = ~np.isnan(x).any(axis=1) if not incomplete else ~np.isnan(x).all(axis=1)
        rows, x = rows[keep], x[keep]
        mats = result.matrices[g]
        sc = score_cases(mats, x, method=method)
        rho, val = determinacy(mats, method=method)
        dets[gname] = {f: float(v) for f, v in zip(factors, rho)}
        vals[gname] = {f: float(v) for f, v in zip(factors, val)}
        part = pd.DataFrame(sc, columns=factors)
        part.insert(0, "group", gname)
        part.insert(0, id_col, ids[rows])
        part.index = rows
        parts.append(part)
    table = pd.concat(parts).sort_index().reset_index(drop=True)
    if not len(table):
        raise DataError("No case could be scored: no group of the model appears in the data.")
    return table, dets, vals


def _score_notes(result: FitResult, n_scored: int, dets: dict, *, incomplete: bool) -> tuple[str, ...]:
    """Notes on a case count that differs from the fit's and on low factor determinacy."""
    notes = []
    if not incomplete:
        n_model = int(sum(result.group_n))
        if n_model != n_scored:
            notes.append(
                f"{n_scored} complete cases were scored but the model used {n_model}; "
                "check that the data are the ones the model was fitted to."
            )
    low = [f"{f} in group {g} ({v:.2f})" for g, d in dets.items() for f, v in d.items() if v < 0.80]
    if low:
        # common practice: determinacy under about .80 makes scores poor stand-ins for the factor
        notes.append("Factor determinacy under .80 (scores are poor stand-ins for the factor): " + ", ".join(low) + ".")
    return tuple(notes)

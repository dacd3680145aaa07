"""Rival structures and per-group fit: the checks before the invariance sequence.

From one set of factors and items, :func:`compare_structures` fits every requested
family (``single``, ``correlated``, ``second_order``, ``bifactor``) in every group on its
own and as a configural multi-group model, and tabulates chi-square, df, CFI, TLI,
RMSEA with its 90% interval, SRMR, AIC, BIC and sample-size adjusted BIC, marking the
best structure by each information criterion within each group (lowest value among
clean solutions: converged, nothing improper; among converged ones if none is clean;
equivalent structures that tie are all marked).

Two structures can be equivalent rather than competing: they imply the same moments
and fit identically. A second-order factor over exactly three first-order factors is
just-identified in its second-order part (three loadings for three factor
covariances), so it fits exactly as the correlated three-factor model; a single
factor given as one factor is the correlated model. These are named, and any other
pair that fits identically (same df, same chi-square) is named as observed.
A second-order factor over two first-order factors is identified only with an extra
constraint: its two higher-order loadings are held equal (one shared label, see
:meth:`~invariance.model.Structure.higher_order_label`). It then has as many free
parameters as the one factor covariance it replaces and fits exactly as the two
correlated factors whenever their correlation is non-negative; this is named too.

:func:`group_fit` fits the chosen structure in each group separately, before the
configural model, and warns by name about any group that does not fit acceptably.
Default rule: CFI below .90 or RMSEA above .10 (common practice; Hu & Bentler 1999
propose stricter cut-offs near .95 and .06), a solution that did not converge, or an
improper solution.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from typing import Callable, Mapping, Sequence

import numpy as np

import pandas as pd

from ..data.moments import SampleStats, sample_stats
from ..errors import EstimationError, InvarianceWarning, SpecificationError
from ..estimate.ml import fit
from ..model.levels import build_level
from ..model.structure import FAMILIES, Structure
from ..estimate.result import FitResult

__all__ = [
    "DEFAULT_GENERAL",
    "CRITERIA",
    "build_structure",
    "equivalences",
    "compare_structures",
    "StructureComparison",
    "group_fit",
    "GroupFit",
]

#: Name given to the general, higher-order or single factor when none is given.
DEFAULT_GENERAL = "general"
#: Information criteria by which the best structure is marked.
CRITERIA = ("aic", "bic", "bic_adjusted")
_STATS = ("chi2", "df", "pvalue", "cfi", "tli", "rmsea", "srmr", "aic", "bic", "bic_adjusted", "n", "n_params")


def build_structure(
    factors: Mapping[str, Sequence[str]],
    family: str,
    *,
    general: str | None = None,
    residual_covariances: Sequence[tuple[str, str]] = (),
) -> Structure:
    """The structure of one family from one set of factors and items.

    ``single`` merges every item into one factor (named ``general``, default
    :data:`DEFAULT_GENERAL`, or the only factor's name when one factor is given);
    ``second_order`` and ``bifactor`` add the general factor (same default name).
    """
    factors = {str(k): tuple(str(i) for i in v) for k, v in dict(factors).items()}
    if family not in FAMILIES:
        raise SpecificationError(
            f"The structure family must be one of {', '.join(FAMILIES)}; got {family!r}."
        )
    if not factors:
        raise SpecificationError("Rival structures need at least one factor with items.")
    gen = str(general) if general else DEFAULT_GENERAL
    rc = tuple(tuple(p) for p in residual_covariances)
    if family == "single":
        items = list(dict.fromkeys(i for its in factors.values() for i in its))
        name = next(iter(factors)) if len(factors) == 1 else gen
        return Structure(factors={name: tuple(items)}, family="single", residual_covariances=rc)
    if family == "correlated":
        return Structure(factors=factors, family="correlated", residual_covariances=rc)
    if family == "bifactor" and len(factors) < 2:
        raise SpecificationError(
            "A bifactor structure over one specific factor is not identified (general and specific "
            "factor load on the same items); give at least two specific factors or compare 'single' instead."
        )
    return Structure(factors=factors, family=family, general=gen, residual_covariances=rc)


# Second-order structures known to fit exactly as the correlated one, by the number of
# first-order factors: (reason, source).
_SECOND_ORDER_IDENTITIES = {
    2: (
        "a second-order factor over two first-order factors, with its two loadings held "
        "equal, has one free parameter for the one factor covariance, so it fits exactly "
        "as the two correlated factors (when their correlation is not negative)",
        "known identity (Kline 2016, from memory)",
    ),
    3: (
        "a second-order factor over three first-order factors is just-identified in its "
        "second-order part (three loadings for three factor covariances), so it fits "
        "exactly as the correlated three-factor model",
        "known identity (Rindskopf & Rose 1988, from memory)",
    ),
}


def equivalences(structures: Mapping[str, Structure]) -> list[dict]:
    """Pairs of requested structures known to be equivalent (same implied moments)."""
    out = []
    cor = structures.get("correlated")
    so = structures.get("second_order")
    if cor is not None and so is not None and len(so.factors) in _SECOND_ORDER_IDENTITIES:
        reason, source = _SECOND_ORDER_IDENTITIES[len(so.factors)]
        out.append({"structures": ["second_order", "correlated"], "reason": reason, "source": source})
    single = structures.get("single")
    if cor is not None and single is not None and len(cor.factors) == 1:
        out.append(
            {
                "structures": ["single", "correlated"],
                "reason": "with one factor, the correlated structure is the single-factor structure",
                "source": "definition",
            }
        )
    return out


def _quiet_fit(structure: Structure, stats: SampleStats, fitter: Callable | None = None) -> tuple[FitResult | None, list[str]]:
    """Configural fit with warnings collected instead of emitted."""
    fitter = fit if fitter is None else fitter
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            spec = build_level(structure, stats.names, "configural")
            res = fitter(spec, stats)
        except (EstimationError, np.linalg.LinAlgError) as exc:
            return None, [str(exc)]
    problems = list(res.problems)
    for w in caught:
        msg = str(w.message).split(": ", 1)[-1]  # drop the "level: " prefix
        if not any(msg in p for p in problems):
            problems.append(msg)
    return res, problems


def _row(structure: str, group: str, res: FitResult | None, problems: list[str]) -> dict:
    row: dict = {"structure": structure, "group": group}
    if res is None:
        row.update({k: None for k in _STATS})
        row.update(rmsea_lower=None, rmsea_upper=None, converged=False, clean=False)
    else:
        d = res.fit.to_dict()
        row.update({k: (None if d[k] is None else (int(d[k]) if k in ("df", "n", "n_params") else float(d[k]))) for k in _STATS})
        lo, hi = d["rmsea_ci90"]
        row.update(rmsea_lower=lo, rmsea_upper=hi, converged=bool(res.converged))
        row["clean"] = bool(res.converged and not res.problems)
    row["problems"] = problems
    for c in CRITERIA:
        row[f"best_{c}"] = False
    return row


def _mark_best(rows: list[dict]) -> None:
    for g in dict.fromkeys(r["group"] for r in rows):
        mine = [r for r in rows if r["group"] == g]
        pool = [r for r in mine if r["clean"]] or [r for r in mine if r["converged"]]
        for c in CRITERIA:
            cand = [r for r in pool if r[c] is not None]
            if cand:
                low = min(r[c] for r in cand)
                for r in cand:  # equivalent structures tie: mark each
                    if r[c] - low <= 1e-6 * max(1.0, abs(low)):
                        r[f"best_{c}"] = True


@dataclass(frozen=True, eq=False)
class StructureComparison:
    """Fit of rival structures, per group and as configural multi-group models.

    Attributes
    ----------
    rows
        One dict per structure and group (``group`` is a group name or ``all``).
    structures
        Family -> the :class:`Structure` fitted.
    equivalent
        Known equivalences among the requested structures, and observed ones.
    results
        (family, group) -> :class:`FitResult` (``None`` where estimation failed).
    notes
        Plain sentences for the report.
    """

    rows: tuple[dict, ...]
    structures: dict
    equivalent: tuple[dict, ...]
    results: dict = field(repr=False)
    notes: tuple[str, ...] = ()

    def table(self):
        """The rows as a DataFrame (without the problem lists)."""

        return pd.DataFrame([{k: v for k, v in r.items() if k != "problems"} for r in self.rows])

    def best(self, criterion: str = "bic", group: str = "all") -> str | None:
        """The family marked best by ``criterion`` (``aic``, ``bic``, ``bic_adjusted``) in ``group``."""
        if criterion not in CRITERIA:
            raise SpecificationError(
                f"The criterion must be one of {', '.join(CRITERIA)}; got {criterion!r}."
            )
        for r in self.rows:
            if r["group"] == group and r[f"best_{criterion}"]:
                return r["structure"]
        return None

    def to_records(self) -> list[dict]:
        """Plain rows for results.json (``structures``)."""
        return [dict(r) for r in self.rows]

    def to_dict(self) -> dict:
        return {"rows": self.to_records(), "equivalent": list(self.equivalent), "notes": list(self.notes)}


def _stats_for(data, items: Sequence[str], group: str | None) -> SampleStats:
    if isinstance(data, SampleStats):
        missing = [i for i in items if i not in data.items]
        if missing:
            raise SpecificationError(f"Item {missing[0]!r} is not in the sample statistics.")
        return data.reorder_items(list(items))
    return sample_stats(data, list(items), group)


def compare_structures(
    data,
    factors: Mapping[str, Sequence[str]],
    structures: Sequence[str] = FAMILIES,
    *,
    group: str | None = None,
    general: str | None = None,
    residual_covariances: Sequence[tuple[str, str]] = (),
    per_group: bool = True,
    fitter: Callable | None = None,
) -> StructureComparison:
    """Fit rival structures from one set of factors and items.

    Parameters
    ----------
    data
        A pandas DataFrame (with ``group`` the grouping column) or
        :class:`~invariance.data.SampleStats`.
    factors
        Factor name -> items: the first-order (or specific) factors.
    structures
        Families to compare, from :data:`~invariance.model.structure.FAMILIES`.
    group
        Grouping column of a DataFrame (``None``: one group, ``all``).
    general
        Name of the general / higher-order / merged factor (default ``general``).
    residual_covariances
        Correlated residuals added to every structure.
    per_group
        Also fit each structure in each group separately (several groups only).
    fitter
        Estimation function ``(ModelSpec, SampleStats) -> FitResult``; default ML
        (:func:`invariance.estimate.fit`).

    Returns
    -------
    StructureComparison
    """
    fams = [str(s) for s in structures]
    if not fams:
        raise SpecificationError(f"List at least one structure to compare ({', '.join(FAMILIES)}).")
    dup = [s for s in fams if fams.count(s) > 1]
    if dup:
        raise SpecificationError(f"The structure {dup[0]!r} is listed twice; list each family once.")
    # build (and validate) every structure before fitting any
    built = {s: build_structure(factors, s, general=general, residual_covariances=residual_covariances) for s in fams}
    stats = _stats_for(data, built[fams[0]].items, group)
    rows, results = _fit_all(built, stats, per_group=per_group, fitter=fitter)
    _mark_best(rows)
    known = equivalences(built)
    equiv = known + _observed_equivalences(fams, results, known)
    return StructureComparison(
        rows=tuple(rows), structures=built, equivalent=tuple(equiv), results=results,
        notes=_comparison_notes(built, rows, equiv),
    )


def _fit_all(
    built: Mapping[str, Structure], stats: SampleStats, *, per_group: bool, fitter: Callable | None
) -> tuple[list[dict], dict]:
    """Fit every structure to all groups (and, with several groups, to each group alone)."""
    names = stats.names
    multi = len(names) > 1
    rows, results = [], {}
    for s, st in built.items():
        if multi and per_group:
            for g in names:
                res, probs = _quiet_fit(st, stats.subset([g]), fitter)
                results[(s, g)] = res
                rows.append(_row(s, g, res, probs))
        res, probs = _quiet_fit(st, stats, fitter)
        results[(s, "all")] = res
        rows.append(_row(s, "all", res, probs))
    return rows, results


def _observed_equivalences(fams: Sequence[str], results: Mapping, known_equiv: list[dict]) -> list[dict]:
    """Pairs not known to be equivalent that fit identically (same chi-square on the same df)."""
    known = {frozenset(e["structures"]) for e in known_equiv}
    out = []
    for a in range(len(fams)):
        for b in range(a):
            pa, pb = fams[a], fams[b]
            if frozenset((pa, pb)) in known:
                continue
            ra, rb = results[(pa, "all")], results[(pb, "all")]
            if ra is None or rb is None or ra.fit.df != rb.fit.df:
                continue
            if abs(ra.fit.chi2 - rb.fit.chi2) <= 1e-6 * max(1.0, ra.fit.chi2):
                out.append(
                    {
                        "structures": [pa, pb],
                        "reason": "observed: both fit identically (same chi-square on the same df)",
                        "source": "this fit",
                    }
                )
    return out


def _comparison_notes(built: Mapping[str, Structure], rows: list[dict], equiv: list[dict]) -> tuple[str, ...]:
    """Notes on equivalent pairs, a thin bifactor structure and fits with problems."""
    notes = []
    for e in equiv:
        a, b = e["structures"]
        notes.append(f"{a} and {b} are equivalent, not competing: {e['reason']}.")
    if "bifactor" in built and len(built["bifactor"].factors) < 3:
        # common practice: bifactor models with two specific factors are often empirically under-identified
        notes.append(
            "A bifactor structure with fewer than three specific factors is often empirically under-identified; "
            "read its fit with care."
        )
    for r in rows:
        if r["problems"]:
            notes.append(f"{r['structure']} in group {r['group']}: " + "; ".join(r["problems"]) + ".")
    return tuple(notes)


@dataclass(frozen=True, eq=False)
class GroupFit:
    """Fit of one structure in each group on its own.

    Attributes
    ----------
    rows
        Per group: ``group``, the fit statistics, ``acceptable`` and ``reasons``.
    rule
        The rule applied (thresholds and source).
    results
        Group -> :class:`FitResult` (``None`` where estimation failed).
    messages
        One warning sentence per failing group, naming it.
    """

    rows: tuple[dict, ...]
    rule: dict
    results: dict = field(repr=False)
    messages: tuple[str, ...] = ()

    @property
    def failing(self) -> tuple[str, ...]:
        """Groups that do not fit acceptably."""
        return tuple(r["group"] for r in self.rows if not r["acceptable"])

    def to_dict(self) -> dict:
        return {
            "rule": dict(self.rule),
            "groups": [dict(r) for r in self.rows],
            "failing": list(self.failing),
            "messages": list(self.messages),
        }


def _fit_reasons(res: FitResult | None, row: Mapping, cfi_min: float, rmsea_max: float) -> list[str]:
    """Why one group's fit is not acceptable (empty when it is)."""
    if res is None:
        return ["the model could not be estimated"]
    reasons = []
    if not res.converged:
        reasons.append("the solution did not converge")
    improper = [p for p in res.problems if not p.startswith("not converged")]
    if improper:
        reasons.append("the solution is improper (" + "; ".join(improper) + ")")
    if row["cfi"] is not None and row["cfi"] < cfi_min:
        reasons.append(f"CFI {row['cfi']:.3f} < {cfi_min:.2f}")
    if row["rmsea"] is not None and row["rmsea"] > rmsea_max:
        reasons.append(f"RMSEA {row['rmsea']:.3f} > {rmsea_max:.2f}")
    return reasons


def group_fit(
    data,
    structure: Structure,
    *,
    group: str | None = None,
    cfi_min: float = 0.90,
    rmsea_max: float = 0.10,
    warn: bool = True,
    fitter: Callable | None = None,
    fits: Mapping[str, FitResult] | None = None,
) -> GroupFit:
    """Fit ``structure`` in every group separately and judge each fit.

    A group fits acceptably when its solution converged, nothing is improper, CFI is
    at least ``cfi_min`` and RMSEA at most ``rmsea_max`` (defaults .90 and .10, common
    practice). Each failing group gets an :class:`~invariance.errors.InvarianceWarning`
    naming it, unless ``warn`` is false. ``fitter`` is the estimation function
    ``(ModelSpec, SampleStats) -> FitResult`` (default ML). ``fits`` (group -> the
    single-group fit of ``structure`` already made, such as the configural model's own
    group fits) are judged as they are: nothing is built or fitted again.
    """
    for name, v in (("cfi_min", cfi_min), ("rmsea_max", rmsea_max)):
        if not (isinstance(v, (int, float)) and 0 <= v <= 1):
            raise SpecificationError(f"The {name!r} parameter of group_fit must be a number in [0, 1]; got {v!r}.")
    stats = _stats_for(data, structure.items, group)
    rows, results, messages = [], {}, []
    for g in stats.names:
        res, probs = (fits[g], list(fits[g].problems)) if fits is not None else _quiet_fit(
            structure, stats.subset([g]), fitter)
        results[g] = res
        row = _row(structure.family, g, res, probs)
        for c in CRITERIA:
            row.pop(f"best_{c}")
        reasons = _fit_reasons(res, row, cfi_min, rmsea_max)
        row["acceptable"] = not reasons
        row["reasons"] = reasons
        rows.append(row)
        if reasons:
            messages.append(
                f"The {structure.family} structure does not fit acceptably in group {g}: "
                + "; ".join(reasons)
                + "; revise the structure before testing invariance, or drop the group."
            )
            if warn:
                warnings.warn(messages[-1], InvarianceWarning, stacklevel=2)
    rule = {
        "cfi_min": cfi_min,
        "rmsea_max": rmsea_max,
        "also": "converged and no improper estimate",
        "source": "common practice (Hu & Bentler 1999 propose stricter cut-offs)",
    }
    return GroupFit(rows=tuple(rows), rule=rule, results=results, messages=tuple(messages))

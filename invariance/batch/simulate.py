"""Monte Carlo planning: power, false alarms and empirical cutoffs for one model.

From a population model (every group's six matrices), group sizes and a planted
noninvariance (:class:`Shift`), each replication draws normal data per group (seeded),
fits the levels from configural up to the level that constrains the shifted parameter,
and records the change of every step (chi-square difference, dCFI, dRMSEA, dSRMR).
The same replication seeds serve the invariant population and the shifted one (common
random numbers), so power and false-alarm rates are compared on the same samples.

:func:`plan` reports

* the power of each decision rule (:mod:`invariance.batch.rules`) at the step that
  tests the shifted parameter,
* the false-alarm rate of each rule at every step under exact invariance,
* empirical cutoffs under invariance: the 5th percentile of dCFI and the 95th
  percentiles of dRMSEA, dSRMR and the chi-square difference,

with Clopper-Pearson 95% intervals for the rates. Replications run on the batch runner
(:func:`invariance.batch.run_batch`), so on Dask, with progress on stderr.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field, replace
from typing import Mapping, Sequence

import numpy as np
from scipy import stats as _st

from ..data.moments import stats_from_arrays
from ..errors import EstimationError, SpecificationError
from ..estimate.kernels import implied_moments
from ..estimate.ml import fit
from ..model.levels import LEVELS, build_level
from ..model.structure import Structure
from ..results import FitResult
from .rules import Rule, default_rules, finite
from .runner import Task, _one_line, run_batch, task_seed

__all__ = ["Population", "Shift", "PlanResult", "plan", "replicate", "replicate_chunk", "simulate_groups", "STEP_OF"]

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
        p, m = len(items), len(facs)
        lam = np.zeros((p, m))
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

        def vec(values: Mapping[str, float], what: str) -> np.ndarray:
            unknown = set(values) - set(items)
            if unknown:
                raise SpecificationError(f"Unknown item {sorted(unknown)[0]!r} in the population {what}.")
            missing = [it for it in items if it not in values]
            if missing:
                raise SpecificationError(f"The population needs the {what[:-1]} of item {missing[0]!r}.")
            return np.array([float(values[it]) for it in items])

        nu, th = vec(intercepts, "intercepts"), vec(residuals, "residuals")
        beta = np.zeros((m, m))
        for key, val in (paths or {}).items():
            out, _, pred = key.partition("<-")
            if out not in facs or pred not in facs:
                raise SpecificationError(f"The population path {key!r} must read 'outcome<-predictor' with known factors.")
            beta[facs.index(out), facs.index(pred)] = float(val)
        psi0 = np.eye(m)
        for key, val in (covariances or {}).items():
            a, _, b = key.partition("~")
            if a not in facs or b not in facs or a == b:
                raise SpecificationError(f"The population covariance {key!r} must read 'A~B' with two known factors.")
            psi0[facs.index(a), facs.index(b)] = psi0[facs.index(b), facs.index(a)] = float(val)
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


def _sizes(population: Population, sizes) -> tuple[int, ...]:
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
    out = []
    for (sigma, mu), n in zip(population.moments(), sizes):
        L = np.linalg.cholesky(sigma)
        out.append(mu + rng.standard_normal((n, mu.size)) @ L.T)
    return out


def _fit_row(res: FitResult) -> dict:
    f = res.fit
    return {"chi2": f.chi2, "df": f.df, "cfi": f.cfi, "rmsea": f.rmsea, "srmr": f.srmr, "converged": res.converged}


def replicate(*, population: Population, sizes: Sequence[int], levels: Sequence[str], data_seed: int,
              seed: int = 0) -> dict:
    """One replication: simulate, fit ``levels`` in order, return each step's changes.

    A batch task (``seed`` from the runner is unused: ``data_seed`` carries the
    replication's seed so that conditions share samples).
    """
    data = simulate_groups(population, sizes, data_seed)
    stats = stats_from_arrays(data, population.groups, population.structure.items)
    fits = {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for lv in levels:
            spec = build_level(population.structure, stats.names, lv)
            try:
                fits[lv] = _fit_row(fit(spec, stats))
            except EstimationError:
                fits[lv] = {"chi2": np.nan, "df": spec.df, "cfi": np.nan, "rmsea": np.nan, "srmr": np.nan,
                            "converged": False}
    steps = {}
    for free, lv in zip(levels[:-1], levels[1:]):
        a, b = fits[lv], fits[free]
        dchi2, ddf = a["chi2"] - b["chi2"], a["df"] - b["df"]
        steps[lv] = {
            "dchi2": dchi2,
            "ddf": ddf,
            "p": float(_st.chi2.sf(dchi2, ddf)) if np.isfinite(dchi2) else np.nan,
            "dcfi": a["cfi"] - b["cfi"],
            "drmsea": a["rmsea"] - b["rmsea"],
            "dsrmr": a["srmr"] - b["srmr"],
            "converged": bool(a["converged"] and b["converged"]),
        }
    return {"fits": fits, "steps": steps}


def replicate_chunk(*, population: Population, sizes: Sequence[int], levels: Sequence[str],
                    data_seeds: Sequence[int], seed: int = 0) -> list[dict]:
    """Several replications in one task; a failing one gives ``{"error": one line}``."""
    out = []
    for s in data_seeds:
        try:
            out.append(replicate(population=population, sizes=sizes, levels=levels, data_seed=s))
        except Exception as exc:  # noqa: BLE001 - one bad sample must not lose the chunk
            out.append({"error": _one_line(exc)})
    return out


def _rate(k: int, n: int) -> dict:
    if n == 0:
        return {"rate": None, "count": 0, "n": 0, "ci95": [None, None]}
    ci = _st.binomtest(k, n).proportion_ci(confidence_level=0.95, method="exact")
    return {"rate": k / n, "count": int(k), "n": int(n), "ci95": [float(ci.low), float(ci.high)]}


@dataclass(frozen=True)
class PlanResult:
    """Outcome of a Monte Carlo plan.

    ``replications``: DataFrame with a row per condition, replication and step;
    ``power`` and ``false_alarm``: rule -> step -> rate record (rate, count, n, ci95);
    ``cutoffs``: step -> empirical cutoffs under invariance.
    """

    replications: object
    power: dict
    false_alarm: dict
    cutoffs: dict
    target_step: str | None
    settings: dict = field(default_factory=dict)
    failed: tuple[str, ...] = ()

    def to_dict(self) -> dict:
        return {"settings": self.settings, "target_step": self.target_step, "power": self.power,
                "false_alarm": self.false_alarm, "cutoffs": self.cutoffs, "failed": list(self.failed)}

    def table(self):
        """Rates of every rule (rows) by condition and step, as a DataFrame."""
        import pandas as pd

        rows = []
        for cond, block in (("invariant", self.false_alarm), ("shifted", self.power)):
            for rule, by in block.items():
                for step, r in by.items():
                    rows.append({"condition": cond, "rule": rule, "step": step, "rate": r["rate"],
                                 "ci_low": r["ci95"][0], "ci_high": r["ci95"][1], "n": r["n"]})
        return pd.DataFrame(rows)


def _rates(frame, condition: str, rules: Mapping[str, Rule], steps: Sequence[str]) -> dict:
    out: dict = {}
    sub = frame[(frame["condition"] == condition) & frame["converged"]]
    for name, rule in rules.items():
        out[name] = {}
        for st in steps:
            rows = sub[sub["step"] == st]
            flags = [rule(r, st) for r in rows.to_dict("records") if finite(r)]
            out[name][st] = _rate(int(sum(flags)), len(flags))
    return out


def _cutoffs(frame, steps: Sequence[str]) -> dict:
    sub = frame[(frame["condition"] == "invariant") & frame["converged"]]
    out = {}
    for st in steps:
        rows = sub[sub["step"] == st]
        q = lambda col, pr: float(np.nanpercentile(rows[col], pr)) if len(rows) else None
        out[st] = {"dcfi_p05": q("dcfi", 5), "drmsea_p95": q("drmsea", 95), "dsrmr_p95": q("dsrmr", 95),
                   "dchi2_p95": q("dchi2", 95), "n": int(len(rows))}
    return out


def plan(
    population: Population,
    *,
    sizes,
    shift: Shift | None = None,
    replications: int = 200,
    alpha: float = 0.05,
    rules: Mapping[str, Rule] | None = None,
    levels: Sequence[str] | None = None,
    seed: int = 0,
    scheduler: str | None = None,
    workers: int = 2,
    processes: bool = False,
    quiet: bool = False,
    chunk: int | None = None,
) -> PlanResult:
    """Monte Carlo power, false alarms and empirical cutoffs.

    Parameters
    ----------
    population
        The invariant population (:class:`Population`).
    sizes
        One size for every group, a list in group order, or a group -> size mapping.
    shift
        The planted noninvariance; ``None`` runs the invariant condition only.
    replications
        Replications per condition.
    alpha
        Level of the chi-square difference rule (default rules only).
    rules
        Name -> rule; default :func:`invariance.batch.rules.default_rules`.
    levels
        Levels to fit; default configural up to the step of the shift (strict without one).
    seed, scheduler, workers, processes, quiet
        Passed to :func:`invariance.batch.run_batch`.
    chunk
        Replications per Dask task (default: about eight tasks per worker and
        condition, to spread the scheduling overhead); a failing replication is
        recorded on its own either way.
    """
    if int(replications) != replications or replications < 1:
        raise SpecificationError(f"The number of replications must be a whole number >= 1; got {replications!r}.")
    n = _sizes(population, sizes)
    target = STEP_OF.get(shift.parameter) if shift is not None else None
    shifted = population.shifted(shift) if shift is not None else None
    if levels is None:
        top = target or "strict"
        levels = LEVELS[: LEVELS.index(top) + 1]
    levels = tuple(levels)
    for lv in levels:
        if lv not in LEVELS:
            raise SpecificationError(f"Unknown level {lv!r}; use some of {', '.join(LEVELS)}.")
    rules = default_rules(alpha) if rules is None else dict(rules)
    exact = population.invariant()
    notes = [
        f"the population's {kind}s differ across groups, so the invariant-condition rates at the "
        f"{STEP_OF[kind]} step are not false alarms: start from a population fitted at that level"
        for kind in STEP_OF
        if not exact[kind] and STEP_OF[kind] in levels
    ]
    conds = [("invariant", population)] + ([("shifted", shifted)] if shifted is not None else [])
    R = int(replications)
    if chunk is None:
        chunk = 1 if (workers == 0 and scheduler is None) else max(1, -(-R // (8 * max(int(workers), 1))))
    if int(chunk) != chunk or chunk < 1:
        raise SpecificationError(f"The chunk size must be a whole number >= 1; got {chunk!r}.")
    tasks = []
    for cond, pop in conds:
        for start in range(0, R, int(chunk)):
            reps = list(range(start, min(R, start + int(chunk))))
            tasks.append(Task(f"{cond}-{start}", replicate_chunk,
                              {"population": pop, "sizes": n, "levels": levels,
                               "data_seeds": [task_seed(seed, r) for r in reps]}))
    batch = run_batch(tasks, seed=seed, scheduler=scheduler, workers=workers, processes=processes, quiet=quiet,
                      label="plan")
    import pandas as pd

    rows, failed = [], []
    for o in batch.outcomes:
        cond, start = o.name.rsplit("-", 1)
        if not o.ok:
            failed.append(f"{o.name}: {o.error}")
            continue
        for j, value in enumerate(o.value):
            rep = int(start) + j
            if "error" in value:
                failed.append(f"{cond}-{rep}: {value['error']}")
                continue
            for st, d in value["steps"].items():
                rows.append({"condition": cond, "replication": rep, "step": st, **d})
    cols = ["condition", "replication", "step", "dchi2", "ddf", "p", "dcfi", "drmsea", "dsrmr", "converged"]
    frame = pd.DataFrame(rows, columns=cols)
    steps = list(levels[1:])
    return PlanResult(
        replications=frame,
        power=_rates(frame, "shifted", rules, [target]) if target in steps else {},
        false_alarm=_rates(frame, "invariant", rules, steps),
        cutoffs=_cutoffs(frame, steps),
        target_step=target,
        settings={"replications": int(replications), "sizes": dict(zip(population.groups, n)), "alpha": alpha,
                  "levels": list(levels), "seed": int(seed), "shift": None if shift is None else shift.to_dict(),
                  "backend": batch.backend, "chunk": int(chunk), "rules": list(rules),
                  "population_invariant": exact, "notes": notes},
        failed=tuple(failed),
    )

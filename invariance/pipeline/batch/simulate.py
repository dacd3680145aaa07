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
from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np
import pandas as pd
from scipy import stats as _st

from ...data.moments import stats_from_arrays
from ...decide.compare import level_delta
from ...errors import EstimationError, SpecificationError
from ...estimate.ml import fit
from ...model.levels import LEVELS, build_level
from ...estimate.result import FitResult
from .population import STEP_OF, Population, Shift, group_sizes, simulate_groups
from .rules import Rule, default_rules, finite
from .runner import Task, _one_line, run_batch, task_seed

__all__ = ["PlanResult", "plan", "replicate", "replicate_chunk"]

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
        d = level_delta(a, b)  # the run's own change computation
        steps[lv] = {
            "dchi2": d["chi2"],
            "ddf": d["df"],
            "p": d["pvalue"] if np.isfinite(d["chi2"]) and d["pvalue"] is not None else np.nan,
            "dcfi": d["cfi"],
            "drmsea": d["rmsea"],
            "dsrmr": d["srmr"],
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
    sizes, shift: Shift | None = None,
    replications: int = 200, alpha: float = 0.05,
    rules: Mapping[str, Rule] | None = None,
    levels: Sequence[str] | None = None,
    seed: int = 0, scheduler: str | None = None, workers: int = 2,
    processes: bool = False, quiet: bool = False, chunk: int | None = None,
) -> PlanResult:
    """Monte Carlo power, false alarms and empirical cutoffs.

    Parameters
    ----------
    population, shift
        The invariant population (:class:`Population`) and the planted noninvariance
        (:class:`Shift`; ``None`` runs the invariant condition only).
    sizes
        One size for every group, a list in group order, or a group -> size mapping.
    replications
        Replications per condition.
    alpha, rules
        Level of the chi-square difference rule (default rules only); name -> rule,
        default :func:`invariance.batch.rules.default_rules`.
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
    n = group_sizes(population, sizes)
    target = STEP_OF.get(shift.parameter) if shift is not None else None
    levels = _plan_levels(levels, target)
    rules = default_rules(alpha) if rules is None else dict(rules)
    exact = population.invariant()
    conds = [("invariant", population)] + ([("shifted", population.shifted(shift))] if shift is not None else [])
    R = int(replications)
    chunk = _chunk_size(chunk, R, workers=workers, scheduler=scheduler)
    tasks = _tasks(conds, R, chunk, sizes=n, levels=levels, seed=seed)
    batch = run_batch(tasks, seed=seed, scheduler=scheduler, workers=workers, processes=processes, quiet=quiet,
                      label="plan")
    frame, failed = _collect(batch.outcomes)
    steps = list(levels[1:])
    return PlanResult(
        replications=frame,
        power=_rates(frame, "shifted", rules, [target]) if target in steps else {},
        false_alarm=_rates(frame, "invariant", rules, steps),
        cutoffs=_cutoffs(frame, steps),
        target_step=target,
        settings={"replications": R, "sizes": dict(zip(population.groups, n)), "alpha": alpha,
                  "levels": list(levels), "seed": int(seed), "shift": None if shift is None else shift.to_dict(),
                  "backend": batch.backend, "chunk": chunk, "rules": list(rules),
                  "population_invariant": exact, "notes": _population_notes(exact, levels)},
        failed=tuple(failed),
    )


def _tasks(conds, replications: int, chunk: int, *, sizes, levels, seed: int) -> list[Task]:
    """One batch task per condition and chunk of replication seeds (the same seeds in each condition)."""
    return [
        Task(f"{cond}-{start}", replicate_chunk,
             {"population": pop, "sizes": sizes, "levels": levels,
              "data_seeds": [task_seed(seed, r) for r in range(start, min(replications, start + chunk))]})
        for cond, pop in conds
        for start in range(0, replications, chunk)
    ]


def _plan_levels(levels: Sequence[str] | None, target: str | None) -> tuple[str, ...]:
    """The levels to fit: as given (checked), or configural up to the shift's step (strict without one)."""
    if levels is None:
        top = target or "strict"
        levels = LEVELS[: LEVELS.index(top) + 1]
    levels = tuple(levels)
    for lv in levels:
        if lv not in LEVELS:
            raise SpecificationError(f"Unknown level {lv!r}; use some of {', '.join(LEVELS)}.")
    return levels


def _population_notes(exact: Mapping[str, bool], levels: Sequence[str]) -> list[str]:
    """Warnings for fitted steps whose parameters already differ in the population."""
    return [
        f"the population's {kind}s differ across groups, so the invariant-condition rates at the "
        f"{STEP_OF[kind]} step are not false alarms: start from a population fitted at that level"
        for kind in STEP_OF
        if not exact[kind] and STEP_OF[kind] in levels
    ]


def _chunk_size(chunk: int | None, replications: int, *, workers: int, scheduler: str | None) -> int:
    """Replications per task: checked, or by default one when serial and about eight
    tasks per worker and condition otherwise."""
    if chunk is None:
        serial = workers == 0 and scheduler is None
        chunk = 1 if serial else max(1, -(-replications // (8 * max(int(workers), 1))))
    if int(chunk) != chunk or chunk < 1:
        raise SpecificationError(f"The chunk size must be a whole number >= 1; got {chunk!r}.")
    return int(chunk)


def _collect(outcomes) -> tuple[pd.DataFrame, list[str]]:
    """One row per replication and step from the batch outcomes, and the failures by name."""
    rows, failed = [], []
    for o in outcomes:
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
    return pd.DataFrame(rows, columns=cols), failed

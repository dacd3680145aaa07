"""Speed benchmark of issue 12 (a script, not a test): ratios measured side by side in one run.

All times are CPU seconds (time.process_time) with one BLAS thread (threadpoolctl),
medians over --repeat runs, measured in this one process after one warm-up call (the
Holzinger & Swineford contenders, and the full-information and complete-case runs, in
interleaved rounds, so that load from other jobs hits them alike). The
issue's targets are printed beside the measured ratios.

1. Holzinger & Swineford (1939, data shipped with semopy) configural model by school:
   semopy's two per-school ML fits vs our estimation call (statistics and fit) and vs our
   whole in-process pipeline run (every stage, no outputs written).
2. A 12-item bifactor model (general + two specific factors), 3 groups of 800 simulated
   cases with about 20% of values missing at random on six items: semopy's per-group
   full-information fits (semopy.Model(...).fit(obj="FIML")) vs our full-information
   configural run, and ours on the complete cases of the same data.
3. Scaling: the whole in-process run (configural to strict, per stage) at 2, 8, 16, 32 and
   64 groups, and at 12, 24 and 48 items.

Run:  python tests/benchmarks/bench_speed.py [--repeat N] [--semopy-fiml-repeat N] [--skip-semopy-fiml]
"""

from __future__ import annotations

import argparse
import os
import pathlib
import sys
import statistics
import tempfile
import time
import warnings

import numpy as np
import pandas as pd
from threadpoolctl import threadpool_limits

import invariance as inv
from invariance.data.patterns import CACHE
from invariance.data.simulate import draw_group, implied_from_matrices
from invariance.pipeline import stages as _stages
from invariance.pipeline.runner import run_stages
from invariance.spec.load import load_pipeline

TMP = tempfile.mkdtemp(prefix="invariance-bench-")


def cpu(fn, repeat: int, *, fresh: bool = True):
    """Median CPU time of ``fn()`` over ``repeat`` calls after one warm-up; its last value.

    ``fresh`` empties the statistics cache before every call, so cached work is counted.
    """
    return cpu_interleaved({"fn": fn}, repeat, fresh=fresh)["fn"]


def cpu_interleaved(fns: dict, repeat: int, *, fresh: bool = True) -> dict:
    """Median CPU time and last value of each of ``fns`` (name -> callable), measured in
    interleaved rounds (one call of each per round, after one warm-up round), so that a
    change in the machine's load during the run hits every contender alike; ``fresh`` as
    in :func:`cpu`."""
    for fn in fns.values():
        fn()
    times: dict = {k: [] for k in fns}
    out: dict = {}
    for _ in range(repeat):
        for k, fn in fns.items():
            if fresh:
                CACHE.clear()
            t = time.process_time()
            out[k] = fn()
            times[k].append(time.process_time() - t)
    return {k: (statistics.median(times[k]), out[k]) for k in fns}


def pipeline(frame: pd.DataFrame, name: str, model: dict, levels, **data) -> dict:
    path = os.path.join(TMP, f"{name}.csv")
    frame.to_csv(path, index=False)
    return {"data": {"path": path, "group": "grp", **data}, "model": model, "levels": list(levels)}


def run_inprocess(doc: dict, timings: dict | None = None) -> dict:
    """Every registered stage of a run, in process, nothing written; per-stage CPU time."""
    spec = load_pipeline(doc)
    stages = []
    for name, fn in list(_stages.STAGES):
        def timed(s, st, fn=fn, name=name):
            t = time.process_time()
            out = fn(s, st)
            if timings is not None:
                timings[name] = timings.get(name, 0.0) + time.process_time() - t
            return out
        stages.append((name, timed))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return run_stages(spec, stages)[0]


# -- 1. Holzinger & Swineford ---------------------------------------------------------------

def bench_holzinger(repeat: int) -> None:
    import semopy

    hs = semopy.examples.holzinger39.get_data().rename(columns={"school": "grp"})
    factors = {"visual": ["x1", "x2", "x3"], "textual": ["x4", "x5", "x6"], "speed": ["x7", "x8", "x9"]}
    desc = "\n".join(f"{f} =~ {' + '.join(v)}" for f, v in factors.items())
    parts = [sub for _, sub in hs.groupby("grp")]

    def semopy_fits():
        chi2 = 0.0
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            for sub in parts:
                m = semopy.Model(desc)
                m.fit(sub)
                chi2 += float(semopy.calc_stats(m)["chi2"].iloc[0])
        return chi2

    st = inv.Structure(factors, family="correlated")
    items = st.items

    def estimation():
        stats = inv.sample_stats(hs, items, "grp")
        return inv.fit(inv.build_level(st, stats.names, "configural"), stats).fit.chi2

    doc = pipeline(hs, "hs", {"factors": factors}, ["configural"])

    def whole():
        return run_inprocess(doc)["levels"][0]["chi2"]

    got = cpu_interleaved({"semopy": semopy_fits, "estimation": estimation, "whole": whole}, repeat)
    (t_s, c_s), (t_e, c_e), (t_w, c_w) = got["semopy"], got["estimation"], got["whole"]
    print("1. Holzinger & Swineford configural model by school (2 groups, 9 items)")
    print(f"   semopy, two per-school ML fits      {t_s * 1e3:9.1f} ms   chi2 {c_s:.3f}")
    print(f"   ours, estimation call               {t_e * 1e3:9.1f} ms   chi2 {c_e:.3f}")
    print(f"   ours, whole in-process run          {t_w * 1e3:9.1f} ms   chi2 {c_w:.3f}")
    print(f"   semopy / estimation call            {t_s / t_e:9.2f} x   (target >= 5)")
    print(f"   semopy / whole run                  {t_s / t_w:9.2f} x   (target >= 1.5)")


# -- simulated bifactor data -------------------------------------------------------------------

def bifactor_population(p: int, n_specific: int, rng, *, specific=(0.3, 0.55)):
    lam = np.zeros((p, n_specific + 1))
    lam[:, 0] = rng.uniform(0.5, 0.7, p)
    block = p // n_specific
    for s in range(n_specific):
        lam[s * block:(s + 1) * block, s + 1] = rng.uniform(*specific, block)
    theta = np.diag(1.0 - (lam**2).sum(axis=1))
    nu = rng.uniform(2.5, 3.5, p)
    return lam, theta, nu


def bifactor_frame(p, n_specific, groups, n, rng, *, missing_items=(), rate=0.0, specific=(0.3, 0.55)):
    lam, theta, nu = bifactor_population(p, n_specific, rng, specific=specific)
    items = [f"i{k:02d}" for k in range(1, p + 1)]
    frames = []
    for g in range(groups):
        m = lam.shape[1]
        psi = np.eye(m) if g == 0 else np.diag(rng.uniform(0.8, 1.2, m))
        alpha = np.zeros(m) if g == 0 else rng.normal(0, 0.2, m)
        sigma, mu = implied_from_matrices(lam, psi, theta, nu, alpha)
        X = draw_group(n, sigma, mu, rng)
        for j in missing_items:
            X[rng.random(n) < rate, j] = np.nan
        f = pd.DataFrame(X, columns=items)
        f["grp"] = f"g{g:02d}"
        frames.append(f)
    block = p // n_specific
    factors = {f"s{s + 1}": items[s * block:(s + 1) * block] for s in range(n_specific)}
    return items, factors, pd.concat(frames, ignore_index=True)


# -- 2. full-information ML ----------------------------------------------------------------------

def _runaway_frame() -> tuple[list, dict, pd.DataFrame]:
    """tests/optimum_sim.py, seed 3 with weak crew loadings (a group whose specific factor
    collapses onto one item), 20% of values missing at random on six items."""
    sys.path.insert(0, str(pathlib.Path(__file__).resolve().parents[1]))
    import optimum_sim as sim

    frame = sim.bifactor_frame(seed=3, specific=sim.SPECIFIC * np.r_[np.full(6, 0.6), np.ones(6)], missing=0.2)
    frame = frame.rename(columns={"site": "grp"})
    items = list(sim.ITEMS)
    return items, {"crew": items[:6], "tools": items[6:]}, frame


def _semopy_fiml(data: pd.DataFrame, items, factors: dict, repeat: int):
    import semopy

    names = ["gen", *factors]
    lines = [f"gen =~ {' + '.join(items)}"] + [f"{f} =~ {' + '.join(v)}" for f, v in factors.items()]
    desc = "\n".join(lines + [f"{a} ~~ 0*{b}" for i, a in enumerate(names) for b in names[i + 1:]])

    def fits():
        funs = []
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            for _, sub in data.groupby("grp"):
                funs.append(float(semopy.Model(desc).fit(sub[items], obj="FIML").fun))
        return funs

    return cpu(fits, repeat, fresh=False)


def bench_fiml_case(label: str, items, factors: dict, data: pd.DataFrame, repeat: int,
                    semopy_repeat: int, skip_semopy: bool) -> None:
    model = {"family": "bifactor", "general": "gen", "factors": factors}
    doc_fi = pipeline(data, "fiml", model, ["configural"], incomplete="full_information")
    complete = data.dropna()
    doc_cc = pipeline(complete, "complete", model, ["configural"], incomplete="listwise")
    got = cpu_interleaved({"fi": lambda: run_inprocess(doc_fi), "cc": lambda: run_inprocess(doc_cc)}, repeat)
    (t_fi, r_fi), (t_cc, r_cc) = got["fi"], got["cc"]
    lv_fi, lv_cc = r_fi["levels"][0], r_cc["levels"][0]
    print(f"2. Full-information ML, configural bifactor: {label}")
    print(f"   ours, whole run, full information   {t_fi * 1e3:9.1f} ms   chi2 {lv_fi['chi2']:.3f}  "
          f"converged {lv_fi['converged']}  ({len(data)} cases)")
    print(f"   ours, whole run, complete cases     {t_cc * 1e3:9.1f} ms   chi2 {lv_cc['chi2']:.3f}  "
          f"converged {lv_cc['converged']}  ({len(complete)} cases)")
    print(f"   full information / complete cases   {t_fi / t_cc:9.2f} x   (target <= 2)")
    if skip_semopy:
        print("   semopy full-information fits skipped (--skip-semopy-fiml)")
        return
    t_s, funs = _semopy_fiml(data, items, factors, semopy_repeat)
    print(f"   semopy, per-group FIML fits         {t_s * 1e3:9.1f} ms   (objective values "
          f"{', '.join(f'{f:.1f}' for f in funs)}; median of {semopy_repeat})")
    print(f"   semopy / ours (full information)    {t_s / t_fi:9.2f} x   (target >= 10)")


def bench_fiml(repeat: int, semopy_repeat: int, skip_semopy: bool) -> None:
    rng = np.random.default_rng(20261202)
    items, factors, data = bifactor_frame(12, 2, 3, 800, rng, missing_items=(1, 3, 5, 7, 9, 11), rate=0.2)
    bench_fiml_case("12 items (general + 2 specific), 3 groups x 800, ~20% missing on 6 items",
                    items, factors, data, repeat, semopy_repeat, skip_semopy)
    items, factors, data = _runaway_frame()
    bench_fiml_case("run-away data (tests/optimum_sim.py seed 3, weak crew loadings), 3 x 800, 20% missing on 6 items",
                    items, factors, data, repeat, semopy_repeat, skip_semopy)


# -- 3. scaling ------------------------------------------------------------------------------------

LEVELS = ["configural", "metric", "scalar", "strict"]


def _stage_line(timings: dict, repeat: int, result: dict) -> str:
    top = sorted(timings.items(), key=lambda kv: -kv[1])[:4]
    ok = sum(bool(r.get("converged")) for r in result["levels"])
    return f"levels converged {ok}/{len(result['levels'])}; ms by stage: " + ", ".join(
        f"{k} {v / repeat * 1e3:.0f}" for k, v in top)


def bench_groups(repeat: int, sizes=(2, 8, 16, 32, 64)) -> None:
    print("3a. Whole in-process run, configural to strict, 12-item bifactor (general + 3 specific), N = 400 per group")
    base = None
    for G in sizes:
        rng = np.random.default_rng(G)
        items, factors, data = bifactor_frame(12, 3, G, 400, rng, specific=(0.45, 0.65))
        doc = pipeline(data, f"groups{G}", {"family": "bifactor", "general": "gen", "factors": factors}, LEVELS)
        timings: dict = {}
        t, res = cpu(lambda: run_inprocess(doc, timings), repeat)
        per = t / G
        base = base or per
        print(f"   {G:3d} groups {t:8.2f} s   {per * 1e3:7.1f} ms per group  ({per / base:4.2f} x the 2-group rate; "
              f"linear = 1.00)   {_stage_line(timings, repeat + 1, res)}")


def bench_items(repeat: int, sizes=(12, 24, 48)) -> None:
    print("3b. Whole in-process run, configural to strict, bifactor (general + 3 specific), 4 groups x 500")
    base = None
    for p in sizes:
        rng = np.random.default_rng(p)
        items, factors, data = bifactor_frame(p, 3, 4, 500, rng, specific=(0.45, 0.65))
        doc = pipeline(data, f"items{p}", {"family": "bifactor", "general": "gen", "factors": factors}, LEVELS)
        timings: dict = {}
        t, res = cpu(lambda: run_inprocess(doc, timings), repeat)
        base = base or t
        print(f"   {p:3d} items  {t:8.2f} s   {t / base:5.2f} x the 12-item run (target for 48 items <= 8)   "
              f"{_stage_line(timings, repeat + 1, res)}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--semopy-fiml-repeat", type=int, default=1)
    ap.add_argument("--skip-semopy-fiml", action="store_true")
    ap.add_argument("--only", choices=["hs", "fiml", "groups", "items"], default=None)
    a = ap.parse_args()
    with threadpool_limits(limits=1):
        if a.only in (None, "hs"):
            bench_holzinger(a.repeat)
        if a.only in (None, "fiml"):
            bench_fiml(a.repeat, a.semopy_fiml_repeat, a.skip_semopy_fiml)
        if a.only in (None, "groups"):
            bench_groups(max(1, a.repeat // 2))
        if a.only in (None, "items"):
            bench_items(max(1, a.repeat // 2))


if __name__ == "__main__":
    main()

"""Realistic report inputs built with the engine on the Holzinger & Swineford (1939) data.

The data ship with semopy (semopy.examples.holzinger39); the levels are fitted by school
with invariance.estimate.api.fit_levels. The results dict follows the results.json layout the
pipeline writes; deltas and decisions are computed here simply (Chen 2007 cutoffs for
N > 300: loadings dCFI -.010 with dRMSEA .015 or dSRMR .030; intercepts and residuals
dCFI -.010 with dRMSEA .015 or dSRMR .010; METHODS section 5). dMACS follows Nye &
Drasgow (2011) (METHODS section 9) and the bifactor indices Rodriguez, Reise & Haviland
(2016) (METHODS section 10). None of these numbers is checked by the report tests: they
are inputs to render.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
from scipy import stats

from invariance import Structure, fit_levels
from invariance.estimate import fit
from invariance.model import Release, build_level
from invariance.data import sample_stats

THREE = {"visual": ["x1", "x2", "x3"], "textual": ["x4", "x5", "x6"], "speed": ["x7", "x8", "x9"]}
# A bifactor layout of the same nine tests that the engine estimates cleanly.
BIFACTOR = {"visual_textual": ["x1", "x2", "x3", "x4", "x5", "x6"], "speed": ["x7", "x8", "x9"]}

CHEN = {
    "name": "Chen (2007)",
    "criteria": ["cfi", "rmsea", "srmr"],
    "cutoffs": {
        "metric": {"cfi": -0.010, "rmsea": 0.015, "srmr": 0.030},
        "scalar": {"cfi": -0.010, "rmsea": 0.015, "srmr": 0.010},
        "strict": {"cfi": -0.010, "rmsea": 0.015, "srmr": 0.010},
    },
}


def hs_data(rename: dict[str, str] | None = None, group_names: dict[str, str] | None = None) -> pd.DataFrame:
    from semopy.examples import holzinger39

    d = holzinger39.get_data()
    if group_names:
        d["school"] = d["school"].map(lambda g: group_names.get(g, g))
    if rename:
        d = d.rename(columns=rename)
    return d


def _delta(free, restricted) -> dict:
    a, b = free.fit, restricted.fit
    dchi, ddf = b.chi2 - a.chi2, b.df - a.df
    return {
        "chi2": dchi, "df": ddf, "pvalue": float(stats.chi2.sf(dchi, ddf)) if ddf > 0 else None,
        "cfi": float(b.cfi - a.cfi), "rmsea": float(b.rmsea - a.rmsea), "srmr": float(b.srmr - a.srmr),
    }


def _decide(level: str, delta: dict | None) -> str:
    if delta is None:
        return "holds"
    cut = CHEN["cutoffs"][level]
    bad = delta["cfi"] <= cut["cfi"] and (delta["rmsea"] >= cut["rmsea"] or delta["srmr"] >= cut["srmr"])
    return "fails" if bad else "holds"


def _entry(level: str, res, delta, decision, released=()) -> dict:
    f = res.fit
    return {
        "level": level, "converged": bool(res.converged), "chi2": f.chi2, "df": f.df, "pvalue": f.pvalue,
        "cfi": float(f.cfi), "tli": float(f.tli), "rmsea": f.rmsea, "rmsea_ci90": list(f.rmsea_ci90),
        "srmr": f.srmr, "aic": f.aic, "bic": f.bic, "delta": delta, "decision": decision,
        "released": [r.to_dict() for r in released], "problems": list(res.problems),
    }


def _pooled_sd(data, item, group):
    g = data.groupby(group)[item]
    n, v = g.count(), g.var()
    return float(np.sqrt(((n - 1) * v).sum() / (n.sum() - len(n))))


def _dmacs(res, data, group, item, factor_cols, reference):
    """Nye & Drasgow (2011) closed form for linear items (METHODS section 9)."""
    ref = res.group_matrices(reference)
    it = res.spec.items.index(item)
    out = {}
    for g in res.groups:
        if g == reference:
            continue
        m = res.group_matrices(g)
        dnu = ref["nu"][it] - m["nu"][it]
        dlam = ref["lambda"][it] - m["lambda"][it]
        alpha, psi = m["alpha"], res.factor_covariance(g)
        val = (dnu + dlam @ alpha) ** 2 + dlam @ psi @ dlam
        out[g] = float(np.sqrt(max(val, 0.0)) / _pooled_sd(data, item, group))
    return out


def _bifactor_quality(res, general: str, specifics: dict[str, list[str]]) -> dict:
    """omega, omegaH, ECV, PUC, H per group (Rodriguez, Reise & Haviland 2016)."""
    out = {}
    items = list(res.spec.items)
    fi = {f: k for k, f in enumerate(res.spec.factors)}
    for g in res.groups:
        std = res.standardized(g)
        lam, theta = std["lambda"], np.diag(std["theta"])
        lg = lam[:, fi[general]]
        spec_sums = sum(lam[[items.index(i) for i in its], fi[f]].sum() ** 2 for f, its in specifics.items())
        total = lg.sum() ** 2 + spec_sums + theta.sum()
        ecv = (lg**2).sum() / ((lg**2).sum() + sum((lam[[items.index(i) for i in its], fi[f]] ** 2).sum()
                                                 for f, its in specifics.items()))
        n = len(items)
        puc = 1 - sum(len(v) * (len(v) - 1) / 2 for v in specifics.values()) / (n * (n - 1) / 2)
        h = {}
        for f in [general, *specifics]:
            l = lam[:, fi[f]]
            l = l[np.abs(l) > 0]
            h[f] = float(1 / (1 + 1 / np.sum(l**2 / (1 - l**2))))
        out[g] = {"omega": float((lg.sum() ** 2 + spec_sums) / total), "omega_h": float(lg.sum() ** 2 / total),
                  "ecv": float(ecv), "puc": float(puc), "H": h}
    return out


def _estimates(fits: dict) -> pd.DataFrame:
    return pd.concat([r.estimates().assign(level=lv) for lv, r in fits.items()], ignore_index=True)


def hs_case(*, rename=None, group_names=None, factor_names=None, bifactor=False, pipeline_text=None):
    """(results, estimates, context) for a stepwise run on the H&S data by school.

    The three-factor case releases the intercepts of x3 and x7 (the two the scalar
    step flags in this example) to reach partial scalar invariance; the bifactor
    case stops where the steps stop holding.
    """
    rename = dict(rename or {})
    factor_names = dict(factor_names or {})
    data = hs_data(rename, group_names)
    item = lambda x: rename.get(x, x)  # noqa: E731
    fac = lambda f: factor_names.get(f, f)  # noqa: E731
    layout = BIFACTOR if bifactor else THREE
    factors = {fac(f): [item(i) for i in its] for f, its in layout.items()}
    general = fac("general") if bifactor else None
    structure = Structure(factors=factors, family="bifactor" if bifactor else "correlated", general=general)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fits = fit_levels(data, structure, group="school")
        stats_ = sample_stats(data, structure.items, "school")
        groups = stats_.names
        reference = groups[0]
        entries, used = [], {}
        prev = None
        chosen_release: tuple = ()
        for level in ("configural", "metric", "scalar", "strict"):
            res = fits[level]
            if chosen_release:
                res = fit(build_level(structure, groups, level, released=chosen_release), stats_)
            delta = None if prev is None else _delta(prev, res)
            decision = _decide(level, delta) if level != "configural" else "holds"
            released: tuple = chosen_release
            if decision == "fails" and level == "scalar" and not bifactor:
                released = (Release("intercept", item("x3")), Release("intercept", item("x7")))
                res = fit(build_level(structure, groups, level, released=released), stats_)
                delta = _delta(prev, res)
                decision = "holds_partially" if _decide(level, delta) == "holds" else "fails"
                chosen_release = released
            entries.append(_entry(level, res, delta, decision, released))
            used[level] = res
            prev = res
        flagged = []
        if not bifactor:
            full = fits["scalar"]
            for x in ("x3", "x7"):
                one = fit(build_level(structure, groups, "scalar", released=(Release("intercept", item(x)),)), stats_)
                lr = full.fit.chi2 - one.fit.chi2
                flagged.append({
                    "item": item(x), "parameter": "intercept", "factor": None, "groups": list(groups),
                    "level": "scalar", "statistic": float(lr), "df": 1, "pvalue": float(stats.chi2.sf(lr, 1)),
                    "dmacs": _dmacs(used["scalar"], data, "school", item(x), None, reference),
                })
    results = {
        "estimator": "ML",
        "groups": {g.name: int(g.n) for g in stats_.groups},
        "reference_group": reference,
        "decision_rule": CHEN,
        "levels": entries,
        "flagged": flagged,
    }
    if bifactor:
        results["bifactor"] = _bifactor_quality(used["configural"], general, factors)
    else:
        sc = used["scalar"].estimates()
        means = sc[(sc["parameter"] == "mean") & sc["free"]]
        results["latent_means"] = [
            {"factor": r.variable, "group": r.group, "reference": reference, "estimate": r.estimate, "se": r.se,
             "ci95": [r.estimate - 1.96 * r.se, r.estimate + 1.96 * r.se], "pvalue": r.pvalue}
            for r in means.itertuples()
        ]
    context = {
        "pipeline_text": pipeline_text or "data: holzinger39.csv\ngroup: school\nmodel:\n  visual: [x1, x2, x3]\n",
        "data_file": "holzinger39.csv",
        "data_sha256": "0" * 64,
        "seed": 20261201,
        "structure": {"factors": factors, "general": general, "family": structure.family,
                      "regressions": [], "residual_covariances": []},
        "created": "2026-12-01T23:00:00+00:00",
        "quiet": True,
    }
    return results, _estimates(used), context


_CACHE: dict = {}

#: Names full of markup (and a mathtext dollar) for the escaping tests.
HOSTILE = {
    "rename": {"x1": "x1<script>alert(1)</script>", "x5": "x5 & <b>bold</b>"},
    "factor_names": {"visual": "<img src=x onerror=alert(2)>", "speed": "speed $x$ _under_"},
    "group_names": {"Pasteur": '<script>alert("g")</script>'},
    "pipeline_text": "title: test\n</code></pre><script>alert(4)</script>\n",
}


def cached_case(kind: str):
    """The inputs of one case, fitted once per test session: ``three``, ``bifactor``, ``hostile``."""
    if kind not in _CACHE:
        if kind == "three":
            _CACHE[kind] = hs_case()
        elif kind == "bifactor":
            _CACHE[kind] = hs_case(bifactor=True)
        elif kind == "hostile":
            _CACHE[kind] = hs_case(**HOSTILE)
        else:
            raise KeyError(kind)
    return _CACHE[kind]

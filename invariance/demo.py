"""The demo scenario: an invented questionnaire with planted noninvariance.

The *Shift Outlook Survey* (invented for this project) has twelve five-point items
about working in shifts. One general factor (``outlook``) runs through all items; two
specific factors split them: ``recovery`` (so01-so06: rest, sleep, switching off after a
shift) and ``crew`` (so07-so12: help and fairness within the shift crew). Responses were
"collected" at four study sites (harbor, ridge, valley, mesa) from three occupations
(nursing, logistics, maintenance). Everything is simulated; no real people are involved.

Planted effects (on the continuous response scale, before cutting into five categories):

* site ridge: the general-factor loading of so04 is 0.22 instead of 0.62;
* site mesa: the intercepts of so03 and so09 are shifted up by 0.50;
* occupation maintenance: the intercept of so11 is shifted up by 0.80.

Sites also differ in the mean and variance of the general factor (true differences,
which invariance testing must not mistake for bias). About 0.5% of the answers are the
missing code -9.
"""

from __future__ import annotations

import pathlib

import numpy as np
import pandas as pd

__all__ = ["ITEMS", "SITES", "OCCUPATIONS", "PLANTED", "simulate", "write_demo", "pipeline_text"]

ITEMS = tuple(f"so{k:02d}" for k in range(1, 13))
SPECIFIC = {"recovery": ITEMS[:6], "crew": ITEMS[6:]}
GENERAL = "outlook"
SITES = ("harbor", "ridge", "valley", "mesa")
OCCUPATIONS = ("nursing", "logistics", "maintenance")
MISSING_CODE = -9

# general and specific loadings deliberately far from proportional within each specific
# factor: a bifactor model with two specific factors is only weakly identified otherwise
_LOAD_G = np.array([0.70, 0.55, 0.75, 0.62, 0.50, 0.68, 0.66, 0.52, 0.74, 0.58, 0.70, 0.55])
_LOAD_S = np.array([0.60, 0.30, 0.50, 0.25, 0.55, 0.35, 0.30, 0.60, 0.35, 0.55, 0.25, 0.50])
_SITE_MEAN = {"harbor": 0.0, "ridge": 0.20, "valley": -0.15, "mesa": 0.30}
_SITE_VAR = {"harbor": 1.0, "ridge": 1.2, "valley": 0.9, "mesa": 1.1}
_CUTS = np.array([-1.4, -0.5, 0.4, 1.3])

#: The planted effects, as (grouping, group, parameter, item, factor, size).
PLANTED = (
    ("site", "ridge", "loading", "so04", GENERAL, -0.40),
    ("site", "mesa", "intercept", "so03", None, 0.50),
    ("site", "mesa", "intercept", "so09", None, 0.50),
    ("occupation", "maintenance", "intercept", "so11", None, 0.80),
)


def simulate(*, seed: int = 20261201, n_per_site: int = 400, missing_rate: float = 0.005):
    """Simulate the demo data.

    Parameters
    ----------
    seed
        Seed of the random generator (the same seed gives the same data).
    n_per_site
        Respondents per site.
    missing_rate
        Share of answers replaced by the missing code -9.

    Returns
    -------
    pandas.DataFrame
        Columns ``respondent``, ``site``, ``occupation``, ``so01`` ... ``so12``.
    """

    rng = np.random.default_rng(seed)
    n = n_per_site * len(SITES)
    site = np.repeat(np.array(SITES), n_per_site)
    occupation = rng.choice(np.array(OCCUPATIONS), size=n, p=[0.36, 0.34, 0.30])
    mean = np.array([_SITE_MEAN[s] for s in site])
    sd = np.sqrt([_SITE_VAR[s] for s in site])
    g = mean + sd * rng.standard_normal(n)
    s = rng.standard_normal((n, 2))
    lam_g = np.tile(_LOAD_G, (n, 1))
    nu = np.zeros((n, len(ITEMS)))
    ix = {it: k for k, it in enumerate(ITEMS)}
    for grouping, grp, param, item, _factor, size in PLANTED:
        rows = (site if grouping == "site" else occupation) == grp
        if param == "loading":
            lam_g[rows, ix[item]] += size
        else:
            nu[rows, ix[item]] += size
    spec_col = np.array([0] * 6 + [1] * 6)
    resid_sd = np.sqrt(1.0 - _LOAD_G**2 - _LOAD_S**2)
    ystar = nu + lam_g * g[:, None] + _LOAD_S * s[:, spec_col] + resid_sd * rng.standard_normal((n, len(ITEMS)))
    y = 1 + (ystar[:, :, None] > _CUTS).sum(axis=2)
    y = y.astype(int)
    miss = rng.random(y.shape) < missing_rate
    y[miss] = MISSING_CODE
    frame = pd.DataFrame(y, columns=list(ITEMS))
    frame.insert(0, "occupation", occupation)
    frame.insert(0, "site", site)
    frame.insert(0, "respondent", np.arange(1, n + 1))
    return frame


def pipeline_text(*, data: str, group: str, title: str, reference: str, out: str) -> str:
    """YAML of a demo pipeline."""
    return f"""# Demo pipeline (invented scenario): Shift Outlook Survey by {group}.
title: {title}
data:
  path: {data}
  group: {group}
  reference: {reference}
  missing: [{MISSING_CODE}]
model:
  factors:
    recovery: [{', '.join(SPECIFIC['recovery'])}]
    crew: [{', '.join(SPECIFIC['crew'])}]
  general: {GENERAL}          # a general factor over all items: bifactor model
estimator: ml
levels: [configural, metric, scalar, strict]
decision:
  criteria: [cfi, rmsea]    # a level holds when every listed criterion passes
  cutoffs: chen2007         # Chen (2007): dCFI 0.010, dRMSEA 0.015 (dSRMR 0.030 / 0.010)
  alpha: 0.05
  stop_at_failure: true
output:
  folder: {out}
seed: 20261201
"""


def write_demo(folder: str | pathlib.Path, *, seed: int = 20261201, n_per_site: int = 400) -> list[pathlib.Path]:
    """Write the demo data and its two pipelines (by site, by occupation) into ``folder``."""
    folder = pathlib.Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    data = folder / "shift_outlook.csv"
    simulate(seed=seed, n_per_site=n_per_site).to_csv(data, index=False)
    paths = [data]
    for group, ref in (("site", "harbor"), ("occupation", "nursing")):
        p = folder / f"shift_outlook_by_{group}.yaml"
        p.write_text(
            pipeline_text(
                data=data.name,
                group=group,
                title=f"Shift Outlook Survey by {group}",
                reference=ref,
                out=f"results/by_{group}",
            ),
            encoding="utf-8",
        )
        paths.append(p)
    return paths

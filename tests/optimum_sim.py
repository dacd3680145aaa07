"""Simulated bifactor data for the optimization tests (invented, with planted effects).

Twelve items, one general factor and two specific factors of six items each, three
groups. Planted (when ``planted=True``): the loading of item so03 on the general factor is
lower in group ``ridge`` and the intercept of item so10 is higher in group ``ridge``.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from invariance.data.simulate import draw_group, implied_from_matrices
from invariance.model.structure import Structure

ITEMS = tuple(f"so{k:02d}" for k in range(1, 13))
GROUPS = ("harbor", "ridge", "valley")
STRUCTURE = Structure(
    {"crew": ITEMS[:6], "tools": ITEMS[6:]}, family="bifactor", general="outlook"
)
GENERAL = np.array([0.70, 0.60, 0.65, 0.55, 0.70, 0.60, 0.50, 0.65, 0.60, 0.70, 0.55, 0.60])
SPECIFIC = np.array([0.55, 0.30, 0.45, 0.20, 0.40, 0.50, 0.25, 0.50, 0.35, 0.45, 0.55, 0.30])


def group_matrices(g: int, *, planted: bool = True, general=GENERAL, specific=SPECIFIC):
    """Population matrices (lambda, psi, theta, nu, alpha) of group ``g``; factors are
    general, crew, tools."""
    lam = np.zeros((12, 3))
    lam[:, 0] = general
    lam[:6, 1] = specific[:6]
    lam[6:, 2] = specific[6:]
    nu = np.linspace(2.8, 3.6, 12)
    if planted and GROUPS[g] == "ridge":
        lam[2, 0] = 0.25
        nu[9] += 0.45
    psi = np.diag([1.0 + 0.2 * g, 1.0, 1.0])
    alpha = np.array([0.15 * g, 0.0, 0.0])
    theta = np.diag(np.clip(1.0 - (lam**2).sum(axis=1), 0.15, None))
    return lam, psi, theta, nu, alpha


def bifactor_frame(*, n: int = 800, seed: int = 1, planted: bool = True, missing: float = 0.0,
                   missing_items: int = 6, **kw) -> pd.DataFrame:
    """Data frame with columns ``site`` and the twelve items; ``missing`` is the share of
    values deleted completely at random in the first ``missing_items`` items."""
    rng = np.random.default_rng(seed)
    parts = []
    for g, name in enumerate(GROUPS):
        lam, psi, theta, nu, alpha = group_matrices(g, planted=planted, **kw)
        sigma, mu = implied_from_matrices(lam, psi, theta, nu, alpha)
        x = draw_group(n, sigma, mu, rng)
        if missing:
            hole = rng.random((n, missing_items)) < missing
            x[:, :missing_items][hole] = np.nan
        df = pd.DataFrame(x, columns=ITEMS)
        df.insert(0, "site", name)
        parts.append(df)
    return pd.concat(parts, ignore_index=True)

"""Invented ordinal populations for recovery tests (simulated, planted effects)."""

from __future__ import annotations

import numpy as np


def simulate_bifactor(rng, n, *, loads_g, loads_s, blocks, cuts, mean=0.0, var=1.0, shift=None):
    """Ordinal responses 1..K of a bifactor latent-response model.

    ``blocks`` gives the specific factor of every item; ``cuts`` (p, K-1) the thresholds
    of the latent responses (unit unique variance scale); ``shift`` = (item, delta)
    adds delta to that item's thresholds in this group.
    """
    p = len(loads_g)
    g = rng.normal(mean, np.sqrt(var), n)
    s = rng.normal(size=(n, max(blocks) + 1))
    e = rng.normal(size=(n, p)) * np.sqrt(1 - loads_g**2 - loads_s**2)
    y = loads_g * g[:, None] + loads_s * s[:, blocks] + e
    c = np.array(cuts, dtype=float).copy()
    if shift is not None:
        c[shift[0]] += shift[1]
    return (y[:, :, None] > c[None]).sum(2) + 1


def simulate_one_factor(rng, n, loads, cuts, *, mean=0.0):
    p = len(loads)
    f = rng.normal(mean, 1.0, n)
    y = loads * f[:, None] + rng.normal(size=(n, p)) * np.sqrt(1 - loads**2)
    return np.stack([(y[:, i, None] > np.asarray(c, float)[None, :]).sum(1) for i, c in enumerate(cuts)], 1) + 1

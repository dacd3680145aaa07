"""Improper solutions, identification problems and bad data are named, not hidden.

The Heywood case uses a textbook construction (common practice): for a one-factor model
of three items the loadings are identified from the correlations as
lambda_1^2 = r12 r13 / r23; with r12 = r13 = .8 and r23 = .4 this is 1.6 > 1, so the
residual variance of item 1 must be negative (1 - 1.6 = -0.6) at the ML solution.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

import invariance as inv
from invariance.data.moments import GroupStats, SampleStats


def _stats(cov, n=500, name="all", items=None):
    cov = np.asarray(cov, float)
    p = cov.shape[0]
    items = items or tuple(f"y{i}" for i in range(1, p + 1))
    return SampleStats(tuple(items), (GroupStats(name, n, np.zeros(p), cov),))


def test_heywood_case_is_reported():
    R = [[1, 0.8, 0.8], [0.8, 1, 0.4], [0.8, 0.4, 1]]
    stats = _stats(R)
    st = inv.Structure({"f": ["y1", "y2", "y3"]}, family="single")
    spec = inv.build_level(st, stats.names, "configural")
    with pytest.warns(inv.ImproperSolutionWarning, match="negative residual variance of item y1"):
        r = inv.fit(spec, stats)
    assert any("negative residual variance of item y1 in group all" in p for p in r.problems)
    theta = r.group_matrices("all")["theta"]
    assert theta[0, 0] == pytest.approx(1 - 1.6, abs=1e-4)  # the construction above


def test_unidentified_model_names_parameters():
    # two items on one factor with its variance fixed: 4 parameters for 3 covariances
    R = [[1, 0.5], [0.5, 1]]
    stats = _stats(R)
    st = inv.Structure({"f": ["y1", "y2"]}, family="single")
    spec = inv.build_level(st, stats.names, "configural")
    assert spec.df == -1
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        r = inv.fit(spec, stats)
    msg = [p for p in r.problems if p.startswith("singular information")]
    assert msg and "loading:y1<-f" in msg[0]
    assert r.acov is None and np.isnan(r.se).all()


def test_singular_group_is_named():
    rng = np.random.default_rng(0)
    x = rng.normal(size=(300, 3))
    x = np.column_stack([x, x[:, 0] + x[:, 1]])  # item 4 is a linear combination
    with pytest.raises(inv.DataError, match="group 'site_b' is singular"):
        inv.data.stats_from_arrays([rng.normal(size=(300, 4)), x], ["site_a", "site_b"], ["a", "b", "c", "d"])


def test_group_smaller_than_items_is_named():
    rng = np.random.default_rng(1)
    with pytest.raises(inv.DataError, match="Group 'tiny' has 3 complete cases for 4 items"):
        inv.data.stats_from_arrays([rng.normal(size=(50, 4)), rng.normal(size=(3, 4))], ["big", "tiny"], list("abcd"))


def test_constant_item_is_named():
    rng = np.random.default_rng(2)
    x = rng.normal(size=(40, 3))
    x[:, 2] = 4.0
    with pytest.raises(inv.DataError, match="Item 'c' is constant in group 'g'"):
        inv.data.stats_from_arrays([x], ["g"], list("abc"))


def test_release_is_one_call_and_changes_df():
    st = inv.Structure({"f": ["y1", "y2", "y3", "y4"]}, family="single")
    spec = inv.build_level(st, ["a", "b", "c"], "scalar")
    rel = spec.release("intercept", "y2")
    assert rel.n_params == spec.n_params + 2  # one intercept per group instead of one shared
    one = spec.release("loading", "y3", groups=["c"])
    assert one.n_params == spec.n_params + 1
    assert one.released[-1] == inv.Release("loading", "y3", "f", ("c",))
    with pytest.raises(inv.SpecificationError, match="no free residual_cov"):
        spec.release("residual_cov", "y1", "y2")
    with pytest.raises(inv.SpecificationError, match="Unknown group 'zz'"):
        spec.release("intercept", "y1", groups=["zz"])


def test_bad_structures_are_refused():
    with pytest.raises(inv.SpecificationError, match="at least two first-order factors"):
        inv.Structure({"a": ["x1", "x2"]}, family="second_order", general="g")
    # over two first-order factors the two higher-order loadings are one parameter, so the
    # model has as many free parameters as the correlated one at configural and metric (counting
    # identity); from scalar on it has one mean per group fewer, as its first-order factor
    # intercepts are held at 0 (Chen, Sousa & West 2005; METHODS section 3)
    two = {"a": ["x1", "x2", "x3"], "b": ["x4", "x5", "x6"]}
    so = inv.Structure(two, family="second_order", general="g")
    cor = inv.Structure(two, family="correlated")
    for level, fewer in (("configural", 0), ("metric", 0), ("scalar", 1), ("strict", 1)):
        n_so, n_cor = (inv.build_level(s, ["p", "q"], level).n_params for s in (so, cor))
        assert n_so == n_cor - fewer
    with pytest.raises(inv.SpecificationError, match="unknown factor"):
        inv.Structure({"a": ["x1", "x2"]}, regressions=(("a", "zz"),))
    with pytest.raises(inv.SpecificationError, match="needs the name"):
        inv.Structure({"a": ["x1", "x2"], "b": ["x3"]}, family="bifactor")

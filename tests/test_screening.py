"""Item screening: univariate moments, Mardia's statistics, recommendation."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from invariance.errors import DataError, SpecificationError
from invariance.data.screening import item_moments, item_total_correlations, mardia, screen


def _mardia_direct(x):
    """Mardia (1970), formulas written out term by term (double loop)."""
    n, p = x.shape
    m = x.mean(axis=0)
    S = (x - m).T @ (x - m) / n
    Si = np.linalg.inv(S)
    b1 = 0.0
    for i in range(n):
        for j in range(n):
            b1 += ((x[i] - m) @ Si @ (x[j] - m)) ** 3
    b1 /= n**2
    b2 = sum(((x[i] - m) @ Si @ (x[i] - m)) ** 2 for i in range(n)) / n
    return b1, b2


def test_mardia_matches_direct_formulas():
    # Mardia (1970): b1p, b2p and tests, against a term-by-term implementation
    rng = np.random.default_rng(1)
    x = rng.exponential(size=(25, 3))
    b1, b2 = _mardia_direct(x)
    out = mardia(x, block=7)  # blocks smaller than n exercise the chunked sum
    assert out["skewness"] == pytest.approx(b1, rel=1e-10)
    assert out["kurtosis"] == pytest.approx(b2, rel=1e-10)
    n, p = x.shape
    assert out["skewness_df"] == p * (p + 1) * (p + 2) // 6
    assert out["skewness_p"] == pytest.approx(stats.chi2.sf(n * b1 / 6, 10))
    z = (b2 - p * (p + 2)) / np.sqrt(8 * p * (p + 2) / n)
    assert out["kurtosis_z"] == pytest.approx(z)


def test_mardia_skewness_routes_agree():
    # sum_ij (z_i'z_j)^3 = sum_abc (sum_i z_ia z_ib z_ic)^2 (algebraic identity)
    from invariance.data.screening import _cube_sum

    z = np.random.default_rng(8).normal(size=(300, 4))
    assert _cube_sum(z, route="tensor", block=64) == pytest.approx(_cube_sum(z, route="pairs", block=64), rel=1e-10)


def test_mardia_normal_sample_property():
    # Mardia (1970): under multivariate normality E[b2p] -> p(p+2) and b1p -> 0
    rng = np.random.default_rng(2)
    p = 4
    A = rng.normal(size=(p, p))
    x = rng.multivariate_normal(np.zeros(p), A @ A.T + np.eye(p), size=2000)
    out = mardia(x)
    # sd of b2p is about sqrt(8 p (p+2) / n) = 0.31 here (Mardia 1970): 4% is over 3 sd
    assert out["kurtosis"] == pytest.approx(p * (p + 2), rel=0.04)
    # n b1p / 6 ~ chi2 on p(p+1)(p+2)/6 df (Mardia 1970): E[b1p] = 6 df / n = 0.06 here
    assert out["skewness"] < 2 * 6 * out["skewness_df"] / 2000
    assert out["skewness_p"] > 0.001 and out["kurtosis_p"] > 0.001
    # a heavy-tailed sample (multivariate t, 5 df) is clearly flagged
    t = x / np.sqrt(rng.chisquare(5, size=(2000, 1)) / 5)
    assert mardia(t)["kurtosis_p"] < 1e-6


def test_mardia_one_variable_reduces_to_univariate():
    # with p = 1, b2p is the moment kurtosis m4/m2^2 and b1p the squared skewness (Mardia 1970)
    rng = np.random.default_rng(3)
    x = rng.gamma(2.0, size=(200, 1))
    out = mardia(x)
    assert out["kurtosis"] == pytest.approx(stats.kurtosis(x[:, 0], fisher=False))
    assert out["skewness"] == pytest.approx(stats.skew(x[:, 0]) ** 2)


def test_item_moments_match_scipy():
    # scipy.stats.skew / kurtosis (bias=True defaults), numpy std ddof=1
    rng = np.random.default_rng(4)
    x = rng.gamma(2.0, size=(50, 3))
    x[[3, 7], 1] = np.nan
    mom = item_moments(x)
    col = x[~np.isnan(x[:, 1]), 1]
    assert mom["n"][1] == 48 and mom["missing"][1] == pytest.approx(2 / 50)
    assert mom["sd"][1] == pytest.approx(np.std(col, ddof=1))
    assert mom["skewness"][1] == pytest.approx(stats.skew(col))
    assert mom["kurtosis"][1] == pytest.approx(stats.kurtosis(col))


def test_item_total_correlation_direct():
    # corrected item-total correlation: item with the sum of the other items (definition)
    rng = np.random.default_rng(5)
    x = rng.normal(size=(80, 4)) + rng.normal(size=(80, 1))
    r = item_total_correlations(x)
    for j in range(4):
        rest = np.delete(x, j, axis=1).sum(axis=1)
        assert r[j] == pytest.approx(np.corrcoef(x[:, j], rest)[0, 1])


def _frame(seed=6):
    rng = np.random.default_rng(seed)
    n = 300
    f = rng.normal(size=n)
    d = pd.DataFrame({f"c{k}": f + rng.normal(size=n) for k in range(3)})
    # a three-category item, absent top category in group b
    d["o1"] = np.digitize(f + rng.normal(size=n), [-0.5, 0.8])
    d["grp"] = np.where(np.arange(n) < 150, "a", "b")
    d.loc[(d.grp == "b") & (d.o1 == 2), "o1"] = 1
    d.loc[5, "c1"] = np.nan
    return d


def test_screen_records_and_recommendation():
    d = _frame()
    out = screen(d, ["c0", "c1", "c2", "o1"], "grp", scales={"s": ["c0", "c1", "c2", "o1"]})
    json.dumps(out)  # plain types only
    a, b = out["groups"]
    assert (a["group"], a["n"], a["n_complete"]) == ("a", 150, 149)
    o1 = b["items"][3]
    assert o1["categories"] == {"0": int((d[d.grp == "b"].o1 == 0).sum()), "1": int((d[d.grp == "b"].o1 == 1).sum()), "2": 0}
    assert o1["absent_categories"] == ["2"]
    assert a["items"][0]["categories"] is None  # continuous item: no category table
    # floor share at the pooled minimum: o1 == 0 in group a
    assert a["items"][3]["floor"] == pytest.approx((d[d.grp == "a"].o1 == 0).mean())
    rec = out["recommendation"]
    assert rec["ordinal_items"] == ["o1"]
    assert rec["missing"] == "full_information"
    assert any("category 2" in n and "group b" in n for n in rec["notes"])
    assert any("under 200" in n for n in rec["notes"])


def test_screen_flags_kurtosis():
    rng = np.random.default_rng(7)
    x = rng.standard_t(3, size=(1000, 4))
    d = pd.DataFrame(x, columns=list("abcd"))
    out = screen(d, list("abcd"))
    assert out["recommendation"]["estimator"] == "ml_robust"
    y = pd.DataFrame(rng.normal(size=(1000, 4)), columns=list("abcd"))
    assert screen(y, list("abcd"))["recommendation"]["estimator"] == "ml"


def test_screen_bad_inputs():
    d = _frame()
    with pytest.raises(DataError, match="not in the data"):
        screen(d, ["c0", "zz"], "grp")
    with pytest.raises(SpecificationError, match="Unknown screening rule"):
        screen(d, ["c0", "c1"], "grp", rules={"nope": 1})
    with pytest.raises(DataError, match="more complete cases than items"):
        mardia(np.ones((2, 3)))

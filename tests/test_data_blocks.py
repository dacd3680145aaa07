"""The checked data's per-group arrays and the array routes the pipeline takes through them.

The pipeline splits the data by group once (``CheckedData.blocks``) and hands those arrays
to screening, the statistics and the missing-data section. Each array route is checked
against the DataFrame route it replaces, on Holzinger & Swineford (1939; the data shipped
with semopy, ``semopy.examples.holzinger39``), and the small kernels against numpy.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from invariance.data.checks import check_data, column_quartiles, far_out_columns, far_out_values
from invariance.data.read import read_table
from invariance.data.screening import distinct_counts, screen, screen_groups
from invariance.estimate.interface import DiagonallyWeighted, MaximumLikelihood

semopy = pytest.importorskip("semopy")

ITEMS = [f"x{i}" for i in range(1, 10)]


@pytest.fixture(scope="module")
def hs() -> pd.DataFrame:
    """Holzinger & Swineford (1939) with a few holes: missing values, a row without a school."""
    d = semopy.examples.holzinger39.get_data()[["school", *ITEMS]].copy()
    rng = np.random.default_rng(12)
    for c in ("x2", "x5", "x8"):
        d.loc[rng.random(len(d)) < 0.1, c] = np.nan
    d.loc[7, "school"] = np.nan
    return d


def test_blocks_are_each_groups_rows_in_data_order(hs):
    checked = check_data(hs, items=ITEMS, group="school", complete_cases_needed=False)
    keep = hs["school"].notna()
    for g in ("Grant-White", "Pasteur"):
        # reference: pandas boolean indexing of the input frame
        expected = hs.loc[keep & (hs["school"] == g), ITEMS].to_numpy(dtype=float)
        assert np.array_equal(checked.blocks[g], expected, equal_nan=True)
        assert not checked.blocks[g].flags.writeable
    frame = hs.loc[keep, ["school", *ITEMS]].astype({c: float for c in ITEMS})
    pd.testing.assert_frame_equal(checked.frame, frame, check_dtype=False)
    assert checked.rows == {"Grant-White": 145, "Pasteur": 155}  # 301 schoolchildren, one row left without a school


def test_blocks_follow_the_selected_groups(hs):
    d = hs.copy()
    d.loc[d.index[:40], "school"] = "Third"
    checked = check_data(d, items=ITEMS, group="school", groups=["Pasteur", "Third"])
    assert checked.groups == ("Pasteur", "Third")
    assert set(checked.blocks) == {"Pasteur", "Third"}
    expected = d.loc[d["school"] == "Third", ITEMS].to_numpy(dtype=float)  # reference: pandas
    assert np.array_equal(checked.blocks["Third"], expected, equal_nan=True)
    assert set(checked.frame["school"]) == {"Pasteur", "Third"}


def test_distinct_counts_equal_numpy_unique():
    rng = np.random.default_rng(3)
    for _ in range(200):
        x = rng.choice([0.0, -0.0, 1.0, 2.5, np.nan, np.inf, -np.inf], size=(int(rng.integers(0, 30)), 3))
        # reference: numpy.unique of each column's observed values
        ref = [np.unique(x[~np.isnan(x[:, j]), j]).size for j in range(3)]
        assert distinct_counts(x).tolist() == ref


def test_far_out_codes_found_column_by_column_and_all_at_once():
    rng = np.random.default_rng(4)
    x = rng.integers(1, 6, size=(200, 3)).astype(float)  # a 1-5 scale
    x[[3, 50], 0] = -9.0  # missing-value codes written as numbers
    x[10, 1] = 99.0
    x[rng.random(200) < 0.2, 2] = np.nan
    # Tukey (1977) "far out" fences, 3 interquartile ranges beyond the quartiles
    assert far_out_values(x[:, 0]) == [-9.0]
    assert far_out_values(x[:, 1]) == [99.0]
    assert far_out_columns(x) == [far_out_values(x[:, j]) for j in range(3)] == [[-9.0], [99.0], []]


def test_screening_of_the_blocks_equals_screening_of_the_frame(hs):
    checked = check_data(hs, items=ITEMS, group="school", complete_cases_needed=False)
    scales = {"visual": ITEMS[:3], "textual": ITEMS[3:6], "speed": ITEMS[6:]}
    by_frame = screen(checked.frame, ITEMS, "school", groups=list(checked.groups), scales=scales)
    by_blocks = screen_groups(list(zip(checked.groups, checked.arrays())), ITEMS, scales=scales)
    assert by_blocks == by_frame


@pytest.mark.parametrize("holes", [False, True])
def test_statistics_from_the_blocks_equal_those_from_the_frame(hs, holes):
    d = hs if holes else hs.dropna()
    checked = check_data(d, items=ITEMS, group="school", complete_cases_needed=False)
    est = MaximumLikelihood()
    a = est.statistics(checked.frame, ITEMS, "school", groups=checked.groups)
    b = est.group_statistics(checked.arrays(), checked.groups, ITEMS)
    assert a.names == b.names == ("Grant-White", "Pasteur")
    for ga, gb in zip(a.groups, b.groups):
        assert ga.n == gb.n and ga.missing.method == gb.missing.method == ("fiml" if holes else "listwise")
        assert np.array_equal(ga.mean, gb.mean) and np.array_equal(ga.cov, gb.cov)


def test_ordinal_statistics_from_the_blocks_equal_those_from_the_frame(hs):
    d = hs.dropna().copy()
    for c in ITEMS:  # four ordered categories per item, cut at its quartiles
        d[c] = np.digitize(d[c], np.quantile(d[c], [0.25, 0.5, 0.75])).astype(float)
    checked = check_data(d, items=ITEMS, group="school")
    est = DiagonallyWeighted()
    a = est.statistics(checked.frame, ITEMS, "school", groups=checked.groups)
    b = est.group_statistics(checked.arrays(), checked.groups, ITEMS)
    for fa, fb in zip(a.fits, b.fits):
        assert np.array_equal(fa.thresholds, fb.thresholds, equal_nan=True) and np.array_equal(fa.acov, fb.acov)
        assert np.array_equal(fa.corr, fb.corr)


def test_text_column_keeps_missing_like_labels(tmp_path):
    p = tmp_path / "d.csv"
    p.write_text("grp,a,b\nNA,1,2\nNone,3,NA\n,4,n/a\nx,NULL,5\n", encoding="utf-8")
    d = read_table(p, text_columns=("grp",))
    # the group column: only an empty cell is missing; the items: pandas' default missing texts
    assert d["grp"].tolist()[:2] == ["NA", "None"] and pd.isna(d["grp"].iloc[2]) and d["grp"].iloc[3] == "x"
    assert d["a"].isna().tolist() == [False, False, False, True]
    assert d["b"].isna().tolist() == [False, True, True, False]


def test_column_quartiles_equal_numpy_nanpercentile():
    # numpy.nanpercentile (linear interpolation, Hyndman & Fan 1996 definition 7) is the
    # reference: the one-sort version must give the very same numbers, NaN or not
    rng = np.random.default_rng(12)
    for n in (10, 11, 12, 13, 97, 400):
        x = np.round(rng.normal(3, 2, (n, 6)), rng.integers(0, 3))
        x[rng.random(x.shape) < 0.2] = np.nan
        x[:, 5] = rng.normal(size=n)  # one complete column
        q1, q3 = column_quartiles(x, (~np.isnan(x)).sum(axis=0))
        ref = np.nanpercentile(x, [25, 75], axis=0)
        assert np.array_equal(q1, ref[0]) and np.array_equal(q3, ref[1])


def _far_out_by_definition(col):
    """Tukey (1977) far-out fences with numpy.nanpercentile quartiles (IQR at least 1), then
    the gap rule of far_out_values, column by column: the plain reading of the docstring."""
    obs = col[~np.isnan(col)]
    if obs.size < 10:
        return []
    q1, q3 = np.percentile(obs, [25, 75])
    iqr = max(q3 - q1, 1.0)
    cand = np.unique(obs[((obs < q1 - 3 * iqr) | (obs > q3 + 3 * iqr)) & (obs == np.round(obs))])
    rest = obs[~np.isin(obs, cand)]
    if cand.size == 0 or rest.size == 0:
        return []
    lo, hi = rest.min(), rest.max()
    return [float(v) for v in cand if (lo - v if v < lo else v - hi) >= max(hi - lo, 1.0)]


def test_far_out_columns_skip_only_columns_that_cannot_hold_far_values():
    # columns without whole numbers, or spanning 3 or less, are not sorted: the result
    # must still equal the definition on every kind of column
    rng = np.random.default_rng(8)
    for _ in range(40):
        n = int(rng.integers(5, 120))
        cols = [
            rng.normal(0, 1, n),                               # continuous, no whole numbers
            np.where(rng.random(n) < 0.05, -9.0, rng.normal(3, 1, n)),  # continuous with a code
            rng.integers(0, 4, n).astype(float),               # 0-3 scale: range 3
            np.where(rng.random(n) < 0.05, 9.0, rng.integers(0, 4, n)),  # 0-3 scale with 9
            rng.integers(1, 6, n) + np.where(rng.random(n) < 0.03, 95.0, 0.0),  # 1-5 with 96-100
            np.round(rng.normal(0, 5, n)),                     # wide whole numbers
            np.where(rng.random(n) < 0.05, 5.0, rng.choice([0.0, 1.0, 2.0], n, p=[0.1, 0.8, 0.1])),  # range 5 by a code
        ]
        x = np.column_stack(cols)
        x[rng.random(x.shape) < 0.15] = np.nan
        assert far_out_columns(x) == [_far_out_by_definition(x[:, j]) for j in range(x.shape[1])]

"""Category checks per item and group, and explicit merging (METHODS section 7)."""

import numpy as np
import pandas as pd
import pytest

from invariance.errors import DataError, SpecificationError
from invariance.data.categories import category_maps, encode
from invariance.data.ordinal_stats import ordinal_stats


def _frame():
    rng = np.random.default_rng(1)
    z = rng.normal(size=(400, 3))
    x = np.digitize(z, [-1.0, 0.0, 1.0]) + 1          # values 1..4
    df = pd.DataFrame(x, columns=["a", "b", "c"])
    df["grp"] = np.repeat(["north", "south"], 200)
    return df


def test_missing_category_names_item_group_and_category():
    df = _frame()
    df.loc[(df.grp == "south") & (df.b == 4), "b"] = 3     # south never uses category 4 of b
    with pytest.raises(DataError, match=r"Item 'b' has no responses in category 4 in group 'south'; merge"):
        ordinal_stats(df, ["a", "b", "c"], "grp")


def test_merge_adjacent_categories_fixes_it():
    df = _frame()
    df.loc[(df.grp == "south") & (df.b == 4), "b"] = 3
    st = ordinal_stats(df, ["a", "b", "c"], "grp", merge={"b": [[3, 4]]})
    assert st.categories[1].labels == ("1", "2", "3+4")
    assert list(st.n_categories) == [4, 3, 4]
    # the merged item's thresholds: two per group
    assert np.isnan(st.fits[1].thresholds[1, 2]) and np.isfinite(st.fits[1].thresholds[1, 1])


def test_merge_must_be_adjacent_and_known():
    df = _frame()
    with pytest.raises(SpecificationError, match="adjacent"):
        ordinal_stats(df, ["a", "b", "c"], "grp", merge={"b": [[1, 3]]})
    with pytest.raises(SpecificationError, match="not observed"):
        ordinal_stats(df, ["a", "b", "c"], "grp", merge={"b": [[4, 5]]})
    with pytest.raises(SpecificationError, match="not an ordinal item"):
        ordinal_stats(df, ["a", "b", "c"], "grp", merge={"zz": [[1, 2]]})


def test_single_category_and_noninteger_rejected():
    x = np.ones((50, 1))
    with pytest.raises(DataError, match="single category"):
        category_maps([x], ["g"], ["q"])
    with pytest.raises(DataError, match="non-integer"):
        category_maps([x + 0.5 * (np.arange(50)[:, None] % 2)], ["g"], ["q"])


def test_encode_codes_in_order():
    x = np.array([[2.0], [7.0], [5.0], [7.0]])
    maps = category_maps([x], ["g"], ["q"])
    assert encode(x, maps).ravel().tolist() == [0, 2, 1, 2]

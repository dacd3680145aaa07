"""Reading data files, missing codes, and the checks run before fitting."""

import numpy as np
import pandas as pd
import pytest

from invariance.data import apply_missing, check_data, read_table
from invariance.errors import DataError

ITEMS = ["a", "b", "c", "d"]


def frame(n=60, groups=("g1", "g2"), seed=1):
    rng = np.random.default_rng(seed)
    rows = []
    for g in groups:
        f = rng.standard_normal((n, 1))
        x = f + 0.8 * rng.standard_normal((n, 4))
        d = pd.DataFrame(np.round(x * 2 + 3), columns=ITEMS)
        d.insert(0, "grp", g)
        rows.append(d)
    return pd.concat(rows, ignore_index=True)


@pytest.mark.parametrize("suffix, writer", [
    (".csv", lambda d, p: d.to_csv(p, index=False)),
    (".tsv", lambda d, p: d.to_csv(p, sep="\t", index=False)),
    (".dta", lambda d, p: d.to_stata(p, write_index=False)),
])
def test_read_formats_round_trip(tmp_path, suffix, writer):
    d = frame()
    p = tmp_path / f"data{suffix}"
    writer(d, p)
    back = read_table(p)
    assert list(back.columns) == list(d.columns)
    np.testing.assert_allclose(back[ITEMS].to_numpy(float), d[ITEMS].to_numpy(float))


def test_read_spss_when_extra_installed(tmp_path):
    pyreadstat = pytest.importorskip("pyreadstat")
    d = frame()
    p = tmp_path / "data.sav"
    pyreadstat.write_sav(d, str(p))
    back = read_table(p)
    np.testing.assert_allclose(back[ITEMS].to_numpy(float), d[ITEMS].to_numpy(float))


def test_unknown_suffix_and_missing_file(tmp_path):
    (tmp_path / "x.xls").write_text("a")  # the old binary workbook format is not read
    with pytest.raises(Exception, match="data.format"):
        read_table(tmp_path / "x.xls")
    (tmp_path / "broken.xlsx").write_text("a")  # not a workbook: one line naming the file
    with pytest.raises(DataError, match="Cannot read data file 'broken.xlsx' as excel"):
        read_table(tmp_path / "broken.xlsx")
    with pytest.raises(DataError, match="does not exist"):
        read_table(tmp_path / "nope.csv")


def test_missing_codes_global_and_per_column():
    d = pd.DataFrame({"a": [1, -9, 3, 99], "b": [-9, 2, 99, 4]})
    g = apply_missing(d, [-9])
    assert g["a"].isna().tolist() == [False, True, False, False]
    assert g["b"].isna().tolist() == [True, False, False, False]
    c = apply_missing(d, {"a": [99], "b": [-9, 99]})
    assert c["a"].isna().tolist() == [False, False, False, True]
    assert c["b"].isna().tolist() == [True, False, True, False]
    with pytest.raises(DataError, match="'zz'"):
        apply_missing(d, {"zz": [1]})


def test_checks_pass_and_report_counts():
    d = frame()
    d.loc[3, "a"] = np.nan
    out = check_data(d, items=ITEMS, group="grp", reference="g2")
    assert out.groups == ("g1", "g2")
    assert out.rows == {"g1": 60, "g2": 60}
    assert out.complete == {"g1": 59, "g2": 60}
    assert out.missing["g1"]["a"] == 1
    assert any("under about 200" in w for w in out.warnings)  # common practice


@pytest.mark.parametrize("mutate, kwargs, message", [
    (lambda d: d.drop(columns="c"), {}, "Column 'c' is not in the data"),
    (lambda d: d.assign(b=d["b"].astype(object).where(d.index != 5, "n/a")), {}, "Item 'b' holds non-numeric values such as 'n/a'"),
    (lambda d: d.assign(a=d["a"].where(d["grp"] != "g2", np.nan)), {}, "Item 'a' is entirely missing in group 'g2'"),
    (lambda d: d.assign(c=d["c"].where(d["grp"] != "g1", 3.0)), {}, "Item 'c' is constant (3) in group 'g1'"),
    (lambda d: d.assign(grp="g1"), {}, "at least two groups"),
    (lambda d: d, {"reference": "g9"}, "Reference group 'g9' is not in column 'grp'"),
    (lambda d: d.iloc[list(range(60)) + [60, 61, 62, 63]], {}, "Group 'g2' has 4 complete cases for 4 items"),
])
def test_checks_raise_one_line(mutate, kwargs, message):
    d = mutate(frame())
    with pytest.raises(DataError) as err:
        check_data(d, items=ITEMS, group="grp", **kwargs)
    assert message in str(err.value)
    assert "\n" not in str(err.value)

"""Excel workbooks (.xlsx through pandas with openpyxl) read as the same data as CSV.

Data: Holzinger & Swineford (1939), shipped with semopy (semopy.examples.holzinger39).
"""

from __future__ import annotations

import pandas as pd
import pytest

import invariance
from _report_cases import hs_data
from invariance.data import read_table
from invariance.errors import DataError, SpecificationError

ITEMS = ["x1", "x2", "x3", "x4", "x5", "x6", "x7", "x8", "x9"]


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("excel")
    data = hs_data()[["school", *ITEMS]]
    data.to_csv(d / "hs.csv", index=False)
    with pd.ExcelWriter(d / "hs.xlsx", engine="openpyxl") as xw:
        data.to_excel(xw, sheet_name="pupils", index=False)
        data.head(10).to_excel(xw, sheet_name="first ten", index=False)
    return d


def test_first_sheet_equals_the_csv(files):
    csv = read_table(files / "hs.csv")
    xlsx = read_table(files / "hs.xlsx")
    pd.testing.assert_frame_equal(csv, xlsx, check_dtype=False)


def test_sheet_by_name_or_position_and_one_line_errors(files):
    assert len(read_table(files / "hs.xlsx", sheet="first ten")) == 10
    assert len(read_table(files / "hs.xlsx", sheet=1)) == 10
    with pytest.raises(DataError, match="no sheet 'people'.*pupils, first ten"):
        read_table(files / "hs.xlsx", sheet="people")
    with pytest.raises(DataError, match="no sheet 5"):
        read_table(files / "hs.xlsx", sheet=5)
    with pytest.raises(SpecificationError, match="Excel workbooks only"):
        read_table(files / "hs.csv", sheet="pupils")


def _pipeline(path, **data):
    return {
        "data": {"path": str(path), "group": "school", **data},
        "model": {"factors": {"visual": ITEMS[:3], "textual": ITEMS[3:6], "speed": ITEMS[6:]}},
        "levels": ["configural"],
    }


def test_pipeline_reads_a_workbook_like_its_csv(files):
    # configural chi-square of the H&S example by school (METHODS 12: the two single-school fits
    # added); here only the equality of the two runs matters
    a = invariance.run(_pipeline(files / "hs.csv"), quiet=True)
    b = invariance.run(_pipeline(files / "hs.xlsx", sheet="pupils"), quiet=True)
    assert a.results["levels"][0]["chi2"] == pytest.approx(b.results["levels"][0]["chi2"], rel=1e-10)
    assert a.results["groups"] == b.results["groups"]


def test_sheet_on_a_csv_is_refused_at_load_time(files):
    with pytest.raises(SpecificationError, match="data.sheet applies to Excel"):
        invariance.check(_pipeline(files / "hs.csv", sheet="pupils"))

"""Publication tables, number formatting and the defensive readers of results.json."""

from __future__ import annotations

import csv
import io
import math

import pytest

from _report_cases import cached_case
from invariance.report import inputs as I
from invariance.report.formatting import fmt_bounded, fmt_delta, fmt_p, level_label
from invariance.report.tables import (
    DISPLAY_COLUMNS,
    level_table_csv,
    level_table_latex,
    level_table_markdown,
    _md_cell,
    latex_escape,
    write_level_tables,
)
from invariance.pipeline.output import level_table


def test_journal_number_style():
    # common practice (APA style): no leading zero for values bounded by 1, p below .001 as "< .001"
    assert fmt_bounded(0.92339) == ".923"
    assert fmt_bounded(1.0) == "1.000"
    assert fmt_delta(-0.0024749) == "\u2212.002"
    assert fmt_delta(0.0037) == "+.004"
    assert fmt_delta(0.0001) == ".000"
    assert fmt_p(1.5e-7) == "< .001" and fmt_p(0.2244) == ".224"
    assert fmt_bounded(None) == "" and fmt_bounded(float("nan")) == ""
    assert level_label({"level": "scalar", "released": [{"item": "x3"}]}) == "Partial scalar"
    # a configural row is never partial, even when it lists up-front releases (issue 13)
    assert level_label({"level": "configural", "released": [{"item": "x3", "parameter": "intercept"}]}) == "Configural"
    # an up-front residual release does not make the scalar level partial (residuals are equal only at strict)
    assert level_label({"level": "scalar", "released": [{"item": "x3", "parameter": "residual"}]}) == "Scalar"
    assert level_label({"level": "metric"}) == "Metric"


def test_machine_and_paper_level_tables():
    # levels.csv is the machine table (full precision); table_levels.csv the paper table:
    # exactly the cells of table_levels.md, with a plain hyphen for minus
    results, _, _ = cached_case("three")
    machine = level_table(results)
    assert list(machine["level"]) == ["configural", "metric", "scalar", "strict"]
    for (_, r), e in zip(machine.iterrows(), results["levels"]):
        assert r["chi2"] == e["chi2"] and r["rmsea_lo"] == e["rmsea_ci90"][0]
    rows = list(csv.reader(io.StringIO(level_table_csv(results))))
    assert tuple(rows[0]) == DISPLAY_COLUMNS
    md = [l for l in level_table_markdown(results).splitlines()[2:] if l.startswith("|")]
    for cells, line in zip(rows[1:], md):
        shown = [c.strip() for c in line.strip("|").split(" | ")]
        assert [c.replace("-", "\u2212") for c in cells] == [c.replace("-", "\u2212") for c in shown]
    assert "Partial scalar" == rows[3][0]


def test_markdown_cells_keep_less_than_signs():
    # "< .001" must read as printed; only a "<" that could open an HTML tag is escaped (CommonMark)
    results, _, _ = cached_case("three")
    md = level_table_markdown(results)
    assert "&lt;" not in md and "&gt;" not in md and "< .001" in md
    assert _md_cell("<b>x</b> | y") == "\\<b>x\\</b> \\| y"


def test_markdown_table_layout():
    results, _, _ = cached_case("three")
    md = level_table_markdown(results).splitlines()
    assert md[0].count("|") == len(DISPLAY_COLUMNS) + 1
    body = [l for l in md[2:] if l.startswith("|")]
    assert [b.split("|")[1].strip() for b in body] == ["Configural", "Metric", "Partial scalar", "Partial strict"]
    # chi-square 115.851 on 48 df and RMSEA interval of the configural model (engine, METHODS 12)
    assert "| 115.85 | 48 |" in body[0] and "[.075, .120]" in body[0]
    assert any(l.startswith("*Note.*") and "N = 301" in l for l in md)


def test_latex_table_is_balanced_and_escaped():
    results, _, _ = cached_case("three")
    tex = level_table_latex(results)
    assert tex.count("\\begin{tabular}") == tex.count("\\end{tabular}") == 1
    assert "\\toprule" in tex and "\\bottomrule" in tex
    rows = [l for l in tex.splitlines() if l.endswith("\\\\")]
    ncol = len(DISPLAY_COLUMNS)
    assert all(l.count(" & ") == ncol - 1 for l in rows)
    assert "$-$.002" in tex and "$<$ .001" in tex
    assert latex_escape("a_b & 50% #1 {x} ~ ^ \\") == (
        "a\\_b \\& 50\\% \\#1 \\{x\\} \\textasciitilde{} \\textasciicircum{} \\textbackslash{}"
    )


def test_write_level_tables(tmp_path):
    results, _, _ = cached_case("bifactor")
    paths = write_level_tables(tmp_path, results)
    assert [p.name for p in paths] == ["table_levels.csv", "table_levels.md", "table_levels.tex"]
    assert all(p.read_text(encoding="utf-8") for p in paths)


@pytest.mark.parametrize(
    "cutoffs,level,expected",
    [
        ({"cfi": 0.01, "rmsea": 0.015, "srmr": 0.03}, "scalar", {"cfi": -0.01, "rmsea": 0.015, "srmr": 0.03}),
        ({"delta_cfi": -0.005, "dRMSEA": 0.01}, "metric", {"cfi": -0.005, "rmsea": 0.01, "srmr": None}),
        ({"loadings": {"srmr": 0.03}, "intercepts": {"srmr": 0.01}}, "scalar", {"srmr": 0.01, "cfi": None}),
        ({"loadings": {"srmr": 0.03}, "intercepts": {"srmr": 0.01}}, "metric", {"srmr": 0.03}),
        ({"srmr": {"metric": 0.03, "scalar": 0.01}, "cfi": 0.01}, "scalar", {"srmr": 0.01, "cfi": -0.01}),
        ({"metric": {"cfi": -0.01}}, "strict", {"cfi": None}),
    ],
)
def test_cutoffs_in_several_shapes(cutoffs, level, expected):
    results = {"decision_rule": {"name": "test", "cutoffs": cutoffs}}
    for ix, want in expected.items():
        got = I.cutoff(results, ix, {"level": level})
        assert got == (None if want is None else pytest.approx(want)), (ix, got)


def test_cutoff_on_the_level_entry_wins_and_criteria_lists():
    results = {"decision_rule": {"cutoffs": {"cfi": 0.01}, "criteria": [{"index": "delta_cfi"}, "dSRMR"]}}
    assert I.cutoff(results, "cfi", {"level": "metric", "cutoffs": {"cfi": 0.002}}) == pytest.approx(-0.002)
    assert I.criteria_names(results) == ["cfi", "srmr"]
    assert I.criteria_names({}) == []
    assert I.meets("cfi", -0.012, -0.01) is False and I.meets("rmsea", 0.004, 0.015) is True
    assert I.meets("chi2", None, 0.05, pvalue=0.2) is True and I.meets("srmr", None, 0.01) is None


def test_accepted_level_and_new_releases():
    results, _, _ = cached_case("three")
    assert I.accepted_entry(results)["level"] == "strict"
    assert [(e["level"], r["item"]) for e, r in I.new_releases(results)] == [("scalar", "x3"), ("scalar", "x7")]
    failing = {"levels": [{"level": "configural", "decision": "holds"}, {"level": "metric", "decision": "fails"}]}
    assert I.accepted_entry(failing)["level"] == "configural"
    assert I.accepted_entry({"levels": [{"level": "configural", "decision": "fails"}]})["level"] == "configural"
    assert I.accepted_entry({}) is None
    # nested levels: strict "holding" after a failed scalar step is not accepted
    chain = {"levels": [{"level": "configural", "decision": "holds"}, {"level": "metric", "decision": "holds"},
                        {"level": "scalar", "decision": "fails"}, {"level": "strict", "decision": "holds"}]}
    assert I.accepted_entry(chain)["level"] == "metric"


def test_robust_statistics_replace_the_normal_ones():
    # results.json under estimator ml_robust carries scaled and robust values beside the others
    results, _, _ = cached_case("three")
    robust = {**results, "estimator": "ml_robust", "levels": []}
    for k, e in enumerate(results["levels"]):
        e = dict(e, chi2_scaled=e["chi2"] / 1.25, pvalue_scaled=0.5, cfi_robust=0.95, tli_robust=0.94, rmsea_robust=0.05)
        if e["delta"]:
            e["delta"] = dict(e["delta"], chi2_scaled=3.21, test="satorra_bentler_2001")
        robust["levels"].append(e)
    md = level_table_markdown(I.display_results(robust))
    assert f"| {results['levels'][0]['chi2'] / 1.25:.2f} |" in md and "| .950 |" in md and "| 3.21 |" in md
    assert "Robust ML" in md and "Satorra & Bentler 2001" in md
    assert "[.075, .120]" not in md  # no interval for the robust RMSEA
    # normal-theory results pass through unchanged
    assert I.display_results(results)["levels"] == results["levels"]

"""The paper tables (table_<name>.csv/.md/.tex) against the estimates that produced them.

Data: Holzinger & Swineford (1939), shipped with semopy (semopy.examples.holzinger39).
Every value in a table is recomputed here from the raw estimates by the textbook formula
and compared at the table's rounding.
"""

from __future__ import annotations

import csv
import re
import warnings

import numpy as np
import pytest

from _report_cases import THREE, cached_case, hs_data
from invariance import Structure
from invariance.decide.structures import compare_structures
from invariance.estimate.api import fit_level
from invariance.model import Release
from invariance.report.paper_tables import SALIENT_LOADING, latent_table, loadings_table, paths_table
from invariance.report.result_tables import flagged_table, structures_table
from invariance.report.tables import write_table

CELL = re.compile(r"^(\u2212?-?\d*\.\d+)(?: \((\d*\.\d+)\))?([*\u2020\u2021]*)$")


def _num(text: str) -> float:
    return float(text.replace("\u2212", "-"))


def _parse(cell: str) -> tuple[float, float | None, str]:
    m = CELL.match(cell)
    assert m, cell
    return _num(m.group(1)), (None if m.group(2) is None else _num(m.group(2))), m.group(3)


def _read_csv(path) -> list[list[str]]:
    with open(path, encoding="utf-8", newline="") as fh:
        return list(csv.reader(fh))


def _fit(level="configural", released=(), regressions=()):
    data = hs_data()
    st = Structure(factors=THREE, family="correlated", regressions=regressions)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = fit_level(data, st, level, group="school", released=released)
    return res, res.estimates().assign(level=level)


def _results(res, level, released=()):
    return {
        "groups": {g: 1 for g in res.groups},
        "reference_group": res.groups[0],
        "supported_level": level,
        "levels": [{"level": level, "decision": "holds", "released": [r.to_dict() for r in released]}],
    }


@pytest.fixture(scope="module")
def metric_with_release():
    rel = (Release("loading", "x2", factor="visual"),)
    res, est = _fit("metric", rel)
    return res, est, _results(res, "metric", rel)


def test_standardized_loadings_follow_the_textbook_formula(metric_with_release, tmp_path):
    # standardized loading = lambda * sqrt(psi) / sqrt(sigma_ii), sigma_ii = lambda^2 psi + theta_ii
    # for an item loading on one factor (textbook definition, e.g. Bollen 1989 ch. 7)
    res, est, results = metric_with_release
    table = loadings_table(results, est)
    paths = write_table(tmp_path, table)
    assert [p.name for p in paths] == ["table_loadings.csv", "table_loadings.md", "table_loadings.tex"]
    rows = _read_csv(paths[0])
    head, body = rows[0], rows[1:]
    assert head[:2] == ["Group", "Item"] and head[2:] == list(THREE)
    group, checked = None, 0
    for r in body:
        group = r[0] or group
        item = r[1]
        for f, text in zip(head[2:], r[2:]):
            if item not in THREE[f]:
                assert text == ""
                continue
            g = est[est["group"] == group]
            lam = g[(g.parameter == "loading") & (g.variable == item) & (g.other == f)].iloc[0]
            psi = g[(g.parameter == "variance") & (g.variable == f) & g.other.isna()].estimate.iloc[0]
            theta = g[(g.parameter == "residual") & (g.variable == item) & g.other.isna()].estimate.iloc[0]
            want = lam.estimate * np.sqrt(psi) / np.sqrt(lam.estimate**2 * psi + theta)
            value, se, marks = _parse(text)
            assert value == pytest.approx(want, abs=0.005), (group, item, f)
            if lam.free:
                assert se == pytest.approx(lam.se * want / lam.estimate, abs=0.005)
            assert ("*" in marks) == bool(lam.free and lam.pvalue < 0.05)
            assert ("\u2020" in marks) == (item == "x2" and f == "visual")
            # common practice: loadings under .35 in absolute value are marked
            assert ("\u2021" in marks) == (abs(want) < SALIENT_LOADING)
            checked += 1
    assert checked == 2 * 9


def test_loadings_table_shows_an_item_without_its_general_loading():
    # bifactor layout of the H&S tests: every cell is the estimates' standardized value
    results, est, _ = cached_case("bifactor")
    table = loadings_table(results, est)
    level = table.note.split(" of the ")[1].split(" model")[0]
    sub = est[(est.level == level) & (est.parameter == "loading")]
    group = None
    for r in table.rows:
        group = r[0] or group
        for f, text in zip(table.columns[2:], r[2:]):
            hit = sub[(sub.group == group) & (sub.variable == r[1]) & (sub.other == f)]
            assert (text == "") == hit.empty
            if not hit.empty:
                value, _, marks = _parse(text)
                assert value == pytest.approx(hit["std"].iloc[0], abs=0.005)
                assert ("\u2021" in marks) == (abs(hit["std"].iloc[0]) < SALIENT_LOADING)


def test_structural_paths_and_r_squared(tmp_path):
    # R^2 of an outcome factor = 1 - psi_oo / var(eta_o), var(eta) = A Psi A' (A = (I - B)^-1);
    # standardized path = b * sd(predictor) / sd(outcome)
    regs = (("textual", "visual"), ("speed", "visual"))
    res, est = _fit(regressions=regs)
    table = paths_table(_results(res, "configural"), est)
    rows = _read_csv(write_table(tmp_path, table)[0])
    assert rows[0] == ["Path", *res.groups]
    fac = list(res.spec.factors)
    by_name = {r[0]: r[1:] for r in rows[1:]}
    for k, g in enumerate(res.groups):
        m = res.group_matrices(g)
        phi = res.factor_covariance(g)
        for out, pred in regs:
            o, p = fac.index(out), fac.index(pred)
            want = m["beta"][o, p] * np.sqrt(phi[p, p]) / np.sqrt(phi[o, o])
            assert _parse(by_name[f"{out} \u2190 {pred}"][k])[0] == pytest.approx(want, abs=0.005)
            r2 = 1 - m["psi"][o, o] / phi[o, o]
            assert _num(by_name[f"R\u00b2 of {out}"][k]) == pytest.approx(r2, abs=0.005)


def test_latent_table_against_the_estimates():
    results, est, _ = cached_case("three")
    table = latent_table(results, est)
    level = table.note.split(" of the ")[1].split(" model")[0]
    group = None
    for r in table.rows:
        group = r[0] or group
        kind, _, factor = r[1].partition(" of ")
        hit = est[(est.level == level) & (est.group == group) & (est.variable == factor)
                  & (est.parameter == ("mean" if kind == "Mean" else "variance")) & est.other.isna()].iloc[0]
        assert _num(r[2].replace(" (fixed)", "")) == pytest.approx(hit.estimate, abs=0.0005)
        if hit.free:
            assert _num(r[3]) == pytest.approx(hit.se, abs=0.0005)
        assert _num(r[5]) == pytest.approx(hit["std"], abs=0.0005)


def test_flagged_table_against_the_flag_records(tmp_path):
    results, _, _ = cached_case("three")
    table = flagged_table(results)
    rows = _read_csv(write_table(tmp_path, table)[0])
    groups = [c.removeprefix("dMACS ") for c in rows[0] if c.startswith("dMACS ")]
    for r, f in zip(rows[1:], results["flagged"]):
        assert r[0] == f["item"] and r[4] == f"{f['statistic']:.2f} ({f['df']})"
        assert r[2] == ", ".join(f.get("differs_in") or [])
        for g, text in zip(groups, r[6:]):
            assert _num(text) == pytest.approx(f["dmacs"][g], abs=0.005)


def test_rival_structures_name_equivalent_models():
    # Holzinger & Swineford, one group: the second-order model over three factors is
    # just-identified in its second-order part and fits exactly as the correlated
    # three-factor model: chi-square 85.306 on 24 df (METHODS 12; widely published)
    cmp_ = compare_structures(hs_data(), THREE, ("correlated", "second_order"))
    results = cmp_.to_dict()
    results = {"structures": results["rows"], "structure_notes": {"equivalent": results["equivalent"]}}
    table = structures_table(results)
    rows = {r[0]: r for r in table.rows if r[1] == "pooled"}
    for name, other in (("correlated", "second_order"), ("second_order", "correlated")):
        r = rows[name]
        assert r[2] == "85.31" and r[3] == "24"
        assert r[-1] == other
    assert "equivalent models" in table.note
    assert list(table.columns[2:11]) == ["\u03c7\u00b2", "df", "CFI", "TLI", "RMSEA", "SRMR", "AIC", "BIC", "BIC adj."]

"""Common checks, run for every estimator x item type (as scikit-learn runs one set of
checks over every estimator, sklearn/utils/estimator_checks.py).

Cases: ml, ml_robust, full-information ml with missing data, dwls with ordered items,
dwls with mixed ordered and continuous items. Each case runs the pipeline on small
simulated data (invented: a one-factor questionnaire in three sites with a planted
intercept shift of item q3 in site "c") and checks that

* the partial search runs and flags the planted effect;
* structural levels are fitted with the chosen estimator (refitted here with the
  estimator and compared), or refused at load time where they do not apply;
* the level rows agree with the fits;
* group order does not change any statistic.
"""

import numpy as np
import pandas as pd
import pytest

import invariance
from invariance.errors import SpecificationError
from invariance.estimate.interface import quiet_fit
from invariance.model.structural import build_structural

ITEMS = ("q1", "q2", "q3", "q4", "q5", "q6")
LOADINGS = np.array([0.8, 0.75, 0.7, 0.8, 0.7, 0.75])
CUTS = (-1.0, 0.0, 1.0)  # four categories

CASES = {
    "ml": {"estimator": "ml", "missing": 0.0, "ordinal": None},
    "ml_robust": {"estimator": "ml_robust", "missing": 0.0, "ordinal": None},
    "fiml": {"estimator": "ml", "missing": 0.08, "ordinal": None},
    "dwls_ordinal": {"estimator": "dwls", "missing": 0.0, "ordinal": "all"},
    "dwls_mixed": {"estimator": "dwls", "missing": 0.0, "ordinal": ["q1", "q2", "q3"]},
}


def _simulate(case: dict, seed: int = 7) -> pd.DataFrame:
    """Invented data: one factor, three sites; q3's intercept is 0.9 higher in site c."""
    rng = np.random.default_rng(seed)
    frames = []
    for site, n, mean in (("a", 500, 0.0), ("b", 450, 0.2), ("c", 480, -0.1)):
        eta = rng.normal(mean, 1.0, n)
        ystar = eta[:, None] * LOADINGS + rng.normal(0, np.sqrt(1 - LOADINGS**2), (n, len(ITEMS)))
        if site == "c":
            ystar[:, 2] += 0.9
        frame = pd.DataFrame(ystar, columns=ITEMS)
        ordinal = ITEMS if case["ordinal"] == "all" else tuple(case["ordinal"] or ())
        for it in ordinal:
            frame[it] = np.digitize(frame[it], CUTS) + 1
        if case["missing"]:
            holes = rng.random(frame.shape) < case["missing"]
            frame = frame.mask(holes)
        frame.insert(0, "site", site)
        frames.append(frame)
    return pd.concat(frames, ignore_index=True)


def _doc(path, case: dict, groups=("a", "b", "c")) -> dict:
    doc = {
        "data": {"path": str(path), "group": "site", "reference": "a", "groups": list(groups)},
        "model": {"factors": {"f": list(ITEMS)}},
        "estimator": case["estimator"],
        "levels": ["configural", "metric", "scalar"] if case["ordinal"] is None
        else ["configural", "thresholds", "metric", "scalar"],
        # 'clean': the search keeps releasing while a constraint is significant, so it runs
        # whatever the approximate-fit criteria say
        "partial": {"until": "clean", "max_releases": 2},
    }
    if case["ordinal"] is not None:
        doc["data"]["ordinal"] = case["ordinal"]
    else:
        doc["structural"] = {"levels": ["variances"]}
    return doc


@pytest.fixture(scope="module", params=list(CASES))
def runs(request, tmp_path_factory):
    case = CASES[request.param]
    folder = tmp_path_factory.mktemp(request.param)
    path = folder / "survey.csv"
    _simulate(case).to_csv(path, index=False)
    first = invariance.run(_doc(path, case), quiet=True, write=False)
    shuffled = invariance.run(_doc(path, case, groups=("c", "a", "b")), quiet=True, write=False)
    return request.param, case, path, first, shuffled


def test_partial_search_runs_and_flags_the_planted_item(runs):
    name, case, _, res, _ = runs
    d = res.to_dict()
    scalar = next(lv for lv in d["levels"] if lv["level"] == "scalar")
    assert scalar["partial"]["stop_reason"] in ("no_significant", "max_releases"), scalar["partial"]
    first = d["flagged"][0]
    # the planted shift: q3's intercept in site c (Holm-corrected tests, the most significant first)
    assert (first["item"], first["parameter"], first["level"]) == ("q3", "intercept", "scalar")
    assert "c" in first["groups"]
    assert first["pvalue"] < 1e-6
    released = [(r["item"], r["parameter"], r["source"]) for r in scalar["released"]]
    assert ("q3", "intercept", "search") in released
    assert res.fits["scalar"].estimator == case["estimator"]


def test_structural_levels_use_the_chosen_estimator(runs):
    name, case, path, res, _ = runs
    if case["ordinal"] is not None:
        doc = _doc(path, case)
        doc["structural"] = {"levels": ["variances"]}
        with pytest.raises(SpecificationError, match="structural levels are not available for ordinal"):
            invariance.load_pipeline(doc)
        return
    row = res.to_dict()["structural"][0]
    assert row["level"] == "variances"
    # refit the structural model with the pipeline's own estimator and statistics
    spec = invariance.load_pipeline(_doc(path, case))
    est = spec.make_estimator()
    frame = pd.read_csv(path)
    stats = est.statistics(frame, ITEMS, "site", groups=("a", "b", "c"))
    ref, _ = quiet_fit(est, build_structural(res.fits["scalar"].spec, ("variances",)), stats)
    assert row["chi2"] == pytest.approx(ref.fit.chi2, rel=1e-6)
    assert row["df"] == ref.spec.df
    if case["estimator"] == "ml_robust":
        assert row["chi2_scaled"] == pytest.approx(ref.extra["chi2_scaled"], rel=1e-6)
        assert row["delta"]["test"].startswith("satorra_bentler")
    else:
        assert row["chi2_scaled"] is None
    if case["missing"]:
        assert ref.extra.get("likelihood") == "full_information"


def test_level_rows_agree_with_the_fits(runs):
    name, case, _, res, _ = runs
    d = res.to_dict()
    for row in d["levels"]:
        fit = res.fits[row["level"]]
        assert row["df"] == fit.spec.df == fit.fit.df
        assert row["converged"] == fit.converged
        assert [(r["item"], r["parameter"]) for r in row["released"]] == [
            (r.item, r.parameter) for r in fit.spec.released
        ]
        if case["estimator"] == "dwls":
            # the adjusted statistic and robust indices (invariance.estimate.dwls_robust)
            assert row["chi2"] == pytest.approx(fit.extra["robust"]["chi2_scaled_shifted"], rel=1e-9)
            assert row["dwls"]["chi2_unadjusted"] == pytest.approx(fit.fit.chi2, rel=1e-9)
        else:
            assert row["chi2"] == pytest.approx(fit.fit.chi2, rel=1e-9)
            assert row["cfi"] == pytest.approx(fit.fit.cfi, rel=1e-9)
    held = [r["level"] for r in d["levels"] if r["decision"] in ("holds", "holds_partially")]
    top = None
    for r in d["levels"]:
        if r["level"] not in held:
            break
        top = r["level"]
    assert d["supported_level"] == top


def test_group_order_does_not_change_any_statistic(runs):
    name, case, _, a, b = runs
    da, db = a.to_dict(), b.to_dict()
    assert list(db["groups"]) == ["c", "a", "b"]
    for ra, rb in zip(da["levels"], db["levels"]):
        assert ra["level"] == rb["level"] and ra["decision"] == rb["decision"]
        for k in ("chi2", "df", "cfi", "tli", "rmsea", "srmr"):
            if ra[k] is None:
                assert rb[k] is None
            else:
                assert rb[k] == pytest.approx(ra[k], rel=1e-5, abs=1e-8), (ra["level"], k)
    assert [(f["item"], f["parameter"], sorted(f["groups"])) for f in da["flagged"]] == [
        (f["item"], f["parameter"], sorted(f["groups"])) for f in db["flagged"]
    ]
    assert [f["statistic"] for f in db["flagged"]] == pytest.approx([f["statistic"] for f in da["flagged"]], rel=1e-4)
    for sa, sb in zip(da.get("structural") or [], db.get("structural") or []):
        assert sb["chi2"] == pytest.approx(sa["chi2"], rel=1e-5)


@pytest.mark.parametrize("name", ["dwls_ordinal", "fiml"])
def test_cases_used_says_what_happened(tmp_path, name):
    # ordinal items are fitted from complete cases: the run must say rows were dropped,
    # never "full-information ML"; continuous items with missing values use every case
    case = {**CASES[name], "missing": 0.03}
    path = tmp_path / "survey.csv"
    frame = _simulate(case)
    frame.to_csv(path, index=False)
    out = invariance.check(_doc(path, case))
    dropped = int(frame[list(ITEMS)].isna().any(axis=1).sum())
    if case["ordinal"] is not None:
        assert out["cases_used"] == (
            f"complete cases ({dropped} rows with a missing item dropped listwise; dwls uses complete cases)"
        )
        assert sum(out["groups"].values()) == len(frame) - dropped
    else:
        assert "full-information ML" in out["cases_used"]
        assert sum(out["groups"].values()) == len(frame)


@pytest.mark.parametrize("section, value", [
    ("scores", {"method": "regression"}),
    ("alignment", {"enabled": True}),
    ("compare", {"structures": ["single"]}),
    ("structural", {"levels": ["means"]}),
])
def test_continuous_only_sections_are_refused_for_ordinal_items(tmp_path, section, value):
    # nothing silent: an option that cannot apply to ordinal items is refused at load time
    doc = _doc(tmp_path / "survey.csv", CASES["dwls_ordinal"])
    doc[section] = value
    with pytest.raises(SpecificationError, match="not available for ordinal items"):
        invariance.load_pipeline(doc)

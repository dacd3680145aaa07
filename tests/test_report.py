"""report.html, report.md and the figures for realistic runs (Holzinger & Swineford 1939,
by school, fitted with the engine; inputs built in tests/_report_cases.py)."""

from __future__ import annotations

import base64
import copy
import io
import re

import pandas as pd
import pytest
from PIL import Image

from _report_cases import HOSTILE, cached_case
from invariance.errors import InvarianceWarning
from invariance.report import registry, write_reports
from invariance.report.plots import DPI, PAGE_WIDTH

THREE_SECTIONS = ["summary", "data", "model", "levels", "changes", "loadings", "flagged", "profiles", "effects",
                  "latent_means", "cautions", "provenance"]
BIFACTOR_SECTIONS = ["summary", "data", "model", "levels", "changes", "loadings", "profiles", "bifactor", "cautions",
                     "provenance"]


@pytest.fixture(scope="module")
def three(tmp_path_factory):
    out = tmp_path_factory.mktemp("three")
    return out, write_reports(out, *cached_case("three"))


@pytest.fixture(scope="module")
def bifactor(tmp_path_factory):
    out = tmp_path_factory.mktemp("bifactor")
    return out, write_reports(out, *cached_case("bifactor"))


def section_ids(html: str) -> list[str]:
    return re.findall(r'<section id="([A-Za-z_]+)">', html)


def html_titles(html: str) -> list[str]:
    return [t for t in re.findall(r"<h2>\d+\. (.*?)</h2>", html)]


def md_titles(md: str) -> list[str]:
    return re.findall(r"^## \d+\\?\. (.*)$", md, flags=re.M)


def decode_all(html: str) -> list[Image.Image]:
    imgs = []
    for b64 in re.findall(r'src="data:image/png;base64,([A-Za-z0-9+/=]+)"', html):
        im = Image.open(io.BytesIO(base64.b64decode(b64, validate=True)))
        im.load()
        imgs.append(im)
    return imgs


@pytest.mark.parametrize("case,expected", [("three", THREE_SECTIONS), ("bifactor", BIFACTOR_SECTIONS)])
def test_every_section_present_in_order(case, expected, request):
    out, paths = request.getfixturevalue(case)
    html = (out / "report.html").read_text(encoding="utf-8")
    md = (out / "report.md").read_text(encoding="utf-8")
    assert section_ids(html) == expected
    # the Markdown report has the same sections, in the same order, with the same titles
    assert md_titles(md) == html_titles(html)
    assert "could not be drawn" not in html


def test_files_written_and_returned(three):
    out, paths = three
    names = {p.relative_to(out).as_posix() for p in paths}
    assert {"report.html", "report.md", "table_levels.csv", "table_levels.md", "table_levels.tex"} <= names
    assert {"figures/model.png", "figures/fit-changes.png", "figures/profile-intercept.png",
            "figures/dmacs.png", "figures/latent-means.png"} <= names
    # loadings are equal in both schools at the (partial) strict level: no profile of them
    assert "figures/profile-loading.png" not in names
    assert all(p.exists() and p.stat().st_size > 0 for p in paths)


@pytest.mark.parametrize("case", ["three", "bifactor"])
def test_every_image_decodes(case, request):
    out, paths = request.getfixturevalue(case)
    html = (out / "report.html").read_text(encoding="utf-8")
    imgs = decode_all(html)
    figs = [p for p in paths if p.suffix == ".png"]
    assert len(imgs) == len(figs) >= 4
    for im in imgs:
        assert im.format == "PNG" and im.width >= 300 and im.height >= 150
        # a page-width figure at most: 6.5 in at the figures' dpi (margins are fixed, nothing trimmed)
        assert im.width <= PAGE_WIDTH * DPI + 1
    md = (out / "report.md").read_text(encoding="utf-8")
    for link in re.findall(r"!\[[^\]]*\]\(([^)]+)\)", md):
        im = Image.open(out / link)
        im.load()
        assert im.format == "PNG"
    assert len(re.findall(r"!\[[^\]]*\]\(([^)]+)\)", md)) == len(figs)


def test_html_is_self_contained(three):
    out, _ = three
    html = (out / "report.html").read_text(encoding="utf-8")
    # nothing fetched: no external URLs in src/href, no scripts, no stylesheets by link
    assert not re.search(r'(src|href)="(?!data:|#)', html)
    assert "<script" not in html.lower() and "<link" not in html.lower()
    assert "default-src 'none'" in html


def test_content_of_the_three_factor_report(three):
    out, _ = three
    html = (out / "report.html").read_text(encoding="utf-8")
    # chi-square of the configural model by school: 115.851 on 48 df (METHODS section 12)
    assert "115.85" in html and ">48<" in html
    assert "Chen (2007)" in html
    assert "holds partially" in html
    assert "intercept of x3 (all groups)" in html
    # cutoffs shown beside each criterion (read from the decision rule: .030 loadings, .010 intercepts),
    # with the inequality under which the criterion passes (invariance.decide.compare: dCFI > -cutoff,
    # dRMSEA and dSRMR < cutoff; Cheung & Rensvold 2002: dCFI <= -.01 signals noninvariance)
    assert "&lt; +.030" in html and "&lt; +.010" in html and "&gt; \u2212.010" in html
    # the cautions and provenance
    assert "AERA" in html and "ITC Guidelines" in html and "200" in html
    assert "0" * 64 in html and "20261201" in html and "data: holzinger39.csv" in html
    md = (out / "report.md").read_text(encoding="utf-8")
    assert "AERA" in md and "0" * 64 in md and "115.85" in md


def test_bifactor_section_shows_indices(bifactor):
    out, _ = bifactor
    html = (out / "report.html").read_text(encoding="utf-8")
    sec = html.split('<section id="bifactor">')[1].split("</section>")[0]
    for col in ("\u03c9H", "ECV", "PUC", "H (general)"):
        assert col in sec
    assert "Pasteur" in sec and "Grant-White" in sec


def test_hostile_names_are_escaped(tmp_path):
    write_reports(tmp_path, *cached_case("hostile"))
    html = (tmp_path / "report.html").read_text(encoding="utf-8")
    md = (tmp_path / "report.md").read_text(encoding="utf-8")
    assert "<script" not in html.lower()
    assert "<img src=x" not in html and "<b>bold" not in html
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert "&lt;img src=x onerror=alert(2)&gt;" in html
    assert "&lt;/code&gt;&lt;/pre&gt;&lt;script&gt;alert(4)" in html  # the pipeline text, escaped
    # in Markdown, text outside code blocks is escaped; the pipeline file sits verbatim in a
    # fenced code block, which Markdown viewers show as literal text
    fences = re.findall(r"^(`{3,})yaml\n(.*?)\n\1$", md, flags=re.M | re.S)
    assert [body for _, body in fences] == [HOSTILE["pipeline_text"].rstrip("\n")]
    prose = re.sub(r"^(`{3,})yaml\n.*?\n\1$", "", md, flags=re.M | re.S)
    assert "<script" not in prose.lower() and "<img src=x" not in prose and "<b>" not in prose
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in prose
    assert section_ids(html) == THREE_SECTIONS
    tex = (tmp_path / "table_levels.tex").read_text(encoding="utf-8")
    assert "\\textless{}script\\textgreater{}" in tex or "script" not in tex


def test_minimal_results_skip_optional_sections(tmp_path):
    results, _, _ = cached_case("three")
    minimal = {"levels": [copy.deepcopy(results["levels"][0])]}
    paths = write_reports(tmp_path, minimal, pd.DataFrame(), {})
    html = (tmp_path / "report.html").read_text(encoding="utf-8")
    assert section_ids(html) == ["summary", "levels", "cautions", "provenance"]
    assert "could not be drawn" not in html
    assert len(decode_all(html)) == 0
    assert (tmp_path / "table_levels.csv").read_text().count("\n") == 2
    assert {p.name for p in paths} >= {"report.html", "report.md"}


def test_unknown_results_keys_go_to_further_results(tmp_path):
    results, est, ctx = cached_case("bifactor")
    extra = dict(results, robust={"scaling": 1.08, "method": "sandwich"}, notes=["first", "second"])
    write_reports(tmp_path, extra, est, ctx)
    html = (tmp_path / "report.html").read_text(encoding="utf-8")
    assert "further" in section_ids(html)
    sec = html.split('<section id="further">')[1]
    assert "sandwich" in sec and "1.080" in sec and "second" in sec


def test_optional_sections_in_other_layouts(tmp_path):
    results, est, ctx = cached_case("three")
    alt = copy.deepcopy(results)
    # dMACS as an effects list, latent means keyed by group then factor, missingness per group
    alt["effects"] = [{"item": "x3", "group": "Grant-White", "dmacs": 0.5}, {"item": "x1", "group": "Grant-White", "dmacs": 0.05}]
    alt["flagged"] = []
    alt["latent_means"] = {"Grant-White": {"textual": {"estimate": 0.6, "lower": 0.3, "upper": 0.9}}}
    alt["missing"] = {"Pasteur": {"cases_dropped": 0, "share_missing": 0.0}, "Grant-White": {"cases_dropped": 2, "share_missing": 0.01}}
    alt["alignment"] = {"Grant-White": {"mean": 0.2, "variance": 1.1}}
    write_reports(tmp_path, alt, est, ctx)
    html = (tmp_path / "report.html").read_text(encoding="utf-8")
    ids = section_ids(html)
    assert {"effects", "latent_means", "alignment"} <= set(ids) and "flagged" not in ids
    assert "cases_dropped" in html and "[0.300, 0.900]" in html
    assert "could not be drawn" not in html


def test_a_failing_section_does_not_lose_the_report(tmp_path, monkeypatch):
    def broken(inp):
        raise KeyError("surprise")

    sections = tuple((sid, broken if sid == "model" else fn) for sid, fn in registry.SECTIONS)
    monkeypatch.setattr(registry, "SECTIONS", sections)
    with pytest.warns(InvarianceWarning, match="model"):
        write_reports(tmp_path, *cached_case("bifactor"))
    html = (tmp_path / "report.html").read_text(encoding="utf-8")
    assert "could not be drawn" in html and "cautions" in section_ids(html)


def test_quiet_context_writes_no_progress(tmp_path, capfd):
    results, est, ctx = cached_case("bifactor")
    write_reports(tmp_path, results, est, dict(ctx, quiet=True))
    assert capfd.readouterr().err == ""


def test_screening_section_from_the_screening_module(tmp_path):
    from invariance.data.screening import screen

    from _report_cases import hs_data

    results, est, ctx = cached_case("bifactor")
    items = [f"x{k}" for k in range(1, 10)]
    scr = screen(hs_data(), items, "school", scales={"all": items})
    write_reports(tmp_path, dict(results, screening=scr), est, ctx)
    html = (tmp_path / "report.html").read_text(encoding="utf-8")
    ids = section_ids(html)
    assert ids.index("screening") == ids.index("data") + 1
    sec = html.split('<section id="screening">')[1].split("</section>")[0]
    assert "Mardia" in sec and "Item-total (all)" in sec and "Grant-White" in sec
    for note in scr["recommendation"]["notes"]:
        assert note.split(";")[0][:40].replace("&", "&amp;") in sec or note[:30] in sec


def test_summary_when_configural_fails(tmp_path):
    results = {"groups": {"a": 300, "b": 300},
               "levels": [{"level": "configural", "chi2": 900.0, "df": 40, "cfi": 0.71, "decision": "fails"}]}
    write_reports(tmp_path, results, pd.DataFrame(), {})
    html = (tmp_path / "report.html").read_text(encoding="utf-8")
    assert "Not even the configural model is supported" in html


def test_sparse_and_odd_values_render(tmp_path):
    # values a results.json may hold: nulls, NaN, strings for numbers, groups as a list,
    # unknown decisions, a level that did not converge, no estimates at all
    results = {
        "estimator": "MLR",
        "groups": ["a", "b"],
        "levels": [
            {"level": "configural", "converged": True, "chi2": 50.0, "df": 20, "pvalue": None, "cfi": float("nan"),
             "rmsea": "0.05", "rmsea_ci90": None, "srmr": 0.04, "delta": None, "decision": None, "released": None},
            {"level": "metric", "converged": False, "chi2": None, "df": 25, "delta": {"chi2": None, "cfi": -0.02},
             "decision": "inconclusive_for_now", "problems": ["negative residual variance of item q1 in group b"]},
        ],
        "decision_rule": {"name": "custom", "criteria": [{"index": "cfi", "cutoff": 0.02}], "cutoffs": None},
        "flagged": [{"item": "q1", "parameter": "loading", "groups": None, "dmacs": None}],
        "latent_means": [],
        "bifactor": "not computed for this family",
    }
    write_reports(tmp_path, results, None, {"structure": {"factors": {"F": ["q1", "q2", "q3"]}}})
    html = (tmp_path / "report.html").read_text(encoding="utf-8")
    assert "could not be drawn" not in html
    assert "No decision was recorded" in html
    assert "inconclusive for now" in html and "did not converge" in html and "negative residual variance" in html
    assert "&gt; \u2212.020" in html  # the cutoff given on the criterion itself, read as a decrease (dCFI > cutoff passes)
    ids = section_ids(html)
    assert "latent_means" not in ids and "effects" not in ids and "bifactor" in ids


class _Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


@pytest.mark.parametrize("quiet", [False, True])
def test_progress_on_a_terminal_unless_quiet(tmp_path, monkeypatch, quiet):
    term = _Terminal()
    monkeypatch.setattr("sys.stderr", term)
    results, est, ctx = cached_case("bifactor")
    write_reports(tmp_path, results, est, dict(ctx, quiet=quiet))
    if quiet:
        assert term.getvalue() == ""
    else:
        last = term.getvalue().strip().split("\r")[-1]
        assert last.startswith("report") and "tables" in last


def test_latent_means_read_from_estimates_once_scalar_holds(tmp_path):
    results, est, ctx = cached_case("three")
    bare = {k: v for k, v in results.items() if k != "latent_means"}
    write_reports(tmp_path, bare, est, ctx)
    html = (tmp_path / "report.html").read_text(encoding="utf-8")
    sec = html.split('<section id="latent_means">')[1].split("</section>")[0]
    # the accepted model is the (partial) strict one: its free means in the focal group
    means = est[(est["level"] == "strict") & (est["parameter"] == "mean") & est["free"]]
    assert len(means) == 3
    for r in means.itertuples():
        assert f"{r.estimate:.3f}".replace("-", "\u2212") in sec
    assert "Read from the estimates of the strict model" in sec
    # no latent means while scalar invariance is not supported
    failing = copy.deepcopy(bare)
    failing["levels"][2]["decision"] = "fails"
    out = tmp_path / "failing"
    write_reports(out, failing, est, ctx)
    assert "latent_means" not in section_ids((out / "report.html").read_text(encoding="utf-8"))


def test_pipeline_layouts_of_effects_sections(tmp_path):
    # the layouts the effects stage writes: latent {means: [...ci_low, ci_high]}, scale_bias
    # records, flagged records with per-group expected changes (epc), reliability per group
    results, est, ctx = cached_case("bifactor")
    res = copy.deepcopy(results)
    del res["bifactor"]
    res["latent"] = {"level": "scalar", "reference": "Pasteur", "means": [
        {"factor": "speed", "group": "Grant-White", "difference": -0.25, "se": 0.1, "pvalue": 0.012,
         "ci_low": -0.45, "ci_high": -0.05}]}
    res["scale_bias"] = [{"scale": "speed", "items": ["x7", "x8", "x9"], "group": "Grant-White",
                          "reference": "Pasteur", "bias": 0.123}]
    res["flagged"] = [{"item": "x7", "parameter": "intercept", "factor": None, "groups": ["Pasteur", "Grant-White"],
                       "level": "scalar", "test": "score", "statistic": 12.3, "df": 1, "pvalue": 0.00045,
                       "adjusted_pvalue": 0.004, "epc": [{"group": "Grant-White", "epc": 0.3, "epc_std": 0.25}],
                       "dmacs": {"Grant-White": 0.31}, "dmacs_max": 0.31}]
    res["reliability"] = {"level": "metric", "family": "bifactor", "groups": {
        g: {"overall": {"omega": 0.9, "omega_h": 0.7, "ecv": 0.6, "puc": 0.5},
            "factors": {"general": {"ecv": 0.6, "H": 0.85, "determinacy": 0.9},
                        "speed": {"omega_s": 0.8, "omega_hs": 0.3, "H": 0.6}}} for g in ("Pasteur", "Grant-White")}}
    paths = write_reports(tmp_path, res, est, ctx)
    html = (tmp_path / "report.html").read_text(encoding="utf-8")
    ids = section_ids(html)
    assert {"latent_means", "effects", "flagged", "bifactor"} <= set(ids) and "further" not in ids
    assert "[\u22120.450, \u22120.050]" in html and "0.123" in html and "p (adjusted)" in html and ".004" in html
    assert "epc_std" not in html  # the per-group lists stay out of the flagged table
    bif = html.split('<section id="bifactor">')[1].split("</section>")[0]
    assert "\u03c9HS" in bif and "FD" in bif and "under the metric model" in bif
    assert "figures/bifactor-quality.png" in {p.relative_to(tmp_path).as_posix() for p in paths}


def test_alignment_section_from_the_alignment_module(tmp_path):
    # alignment of the configural H&S model by school (invariance.partial.alignment, Asparouhov & Muthen 2014)
    import json as _json
    import warnings as _w

    from invariance.partial.alignment import align
    from invariance import Structure, fit_level
    from _report_cases import THREE, hs_data

    with _w.catch_warnings():
        _w.simplefilter("ignore")
        conf = fit_level(hs_data(), Structure(factors=THREE), "configural", group="school")
        al = _json.loads(_json.dumps(align(conf, random_starts=1).to_dict(), default=str))
    results, est, ctx = cached_case("three")
    write_reports(tmp_path, dict(results, alignment={"enabled": True, **al}), est, ctx)
    html = (tmp_path / "report.html").read_text(encoding="utf-8")
    sec = html.split('<section id="alignment">')[1].split("</section>")[0]
    assert "Aligned factor means and variances" in sec and "approximately invariant" in sec
    assert f"{al['means']['textual']['Grant-White']:.3f}" in sec
    assert "alignment-means" in html or "data:image/png" in sec

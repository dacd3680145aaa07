"""Optional and closing sections: bifactor quality, latent means, alignment, further
results, cautions and provenance."""

from __future__ import annotations

import platform
import sys
from datetime import datetime, timezone
from importlib import metadata
from typing import Any, Mapping

from . import inputs as I
from .formatting import fmt_p, fnum
from .parts import Bullets, Code, Figure, Section, Table, Text, cell, generic_parts, records_table
from .plots import forest_chart, guide_chart
from .sections import ReportInput

__all__ = [
    "KNOWN_KEYS",
    "package_versions",
    "section_alignment",
    "section_bifactor",
    "section_cautions",
    "section_further",
    "section_latent_means",
    "section_provenance",
]

#: Top-level results keys that some section reads (anything else goes to "Further results").
KNOWN_KEYS = {
    "estimator", "groups", "reference_group", "levels", "flagged", "decision_rule", "warnings",
    "problems", "version", "created", "schema_version", "pipeline", "data", "seed", "title", "verdict",
    "invariance_version", "n_total", "model", "free_parameters", "supported_level", "permits",
    "stop_at_failure", "supported_partially", "released_constraints", "cutoff_calibration", "next_step",
    I.ROBUST_NOTE_KEY,
} | {k for keys in I.OPTIONAL_KEYS.values() for k in keys}

PACKAGES = ("invariance", "numpy", "scipy", "pandas", "matplotlib", "jinja2", "semopy", "PyYAML", "jsonschema")

_BIF_NAMES = {
    "omega": "\u03c9", "omega_h": "\u03c9H", "omegah": "\u03c9H", "omega_hierarchical": "\u03c9H",
    "omega_s": "\u03c9S", "omegas": "\u03c9S", "omega_hs": "\u03c9HS", "omegahs": "\u03c9HS",
    "ecv": "ECV", "puc": "PUC", "h": "H", "fd": "FD", "determinacy": "FD",
    "factor_determinacy": "FD", "group": "Group",
}


def _pretty(col: str) -> str:
    head, _, rest = col.partition(" (")
    name = _BIF_NAMES.get(head.lower(), head)
    return f"{name} ({rest}" if rest else name


def _records(obj: Any, key_name: str) -> list[dict] | None:
    """A list of records from a list of dicts or a dict keyed by ``key_name`` values."""
    if isinstance(obj, (list, tuple)) and all(isinstance(x, Mapping) for x in obj):
        return [dict(x) for x in obj]
    if isinstance(obj, Mapping) and obj and all(isinstance(v, Mapping) for v in obj.values()):
        return [{key_name: k, **v} for k, v in obj.items()]
    return None


def section_bifactor(inp: ReportInput) -> Section | None:
    """Bifactor quality indices (omega, omegaH, ECV, PUC, H, FD) per group."""
    obj = I.first_key(inp.results, I.OPTIONAL_KEYS["bifactor"])
    if obj is None:
        return None
    top = obj if isinstance(obj, Mapping) else {}
    if isinstance(obj, Mapping) and isinstance(obj.get("groups"), (Mapping, list)):
        obj = obj["groups"]
    parts: list = []
    if isinstance(obj, Mapping) and obj and all(
        isinstance(v, Mapping) and ("overall" in v or "factors" in v) for v in obj.values()
    ):
        parts += _reliability_parts(obj, inp, top)
        title = "Bifactor quality indices" if top.get("family", inp.structure.get("family")) == "bifactor" else "Reliability"
        return Section("bifactor", title, tuple(parts))
    recs = _records(obj, "group")
    if recs:
        png = _bifactor_chart(recs, inp)
        if png is not None:
            parts.append(Figure("bifactor-quality", png, alt="Bifactor quality indices per group",
                                caption="Bifactor quality per group; dashed lines: the common-practice guides "
                                        "(\u03c9H .80; ECV, PUC and H .70)."))
        tab = records_table(recs, first="group", caption="Bifactor quality per group (standardized solution)")
        parts.append(Table(tuple(_pretty(c) for c in tab.columns), tab.rows, caption=tab.caption, numeric=tab.numeric))
    else:
        parts += generic_parts(obj, key_name="group")
    parts.append(Text(
        "Formulas: Rodriguez, Reise & Haviland (2016); H: Hancock & Mueller (2001); FD: Grice (2001). "
        "Common practice: ECV and PUC above .70 suggest an essentially unidimensional scale; "
        "\u03c9H above .80 and H above .70 suggest a well-defined factor.", style="note"))
    return Section("bifactor", "Bifactor quality indices", tuple(parts))


_GUIDES = {"\u03c9H": 0.80, "ECV": 0.70, "PUC": 0.70, "H": 0.70}


def _bifactor_chart(recs: list[dict], inp: ReportInput) -> bytes | None:
    """omegaH, ECV, PUC and H of the general factor per group against their guides."""
    general = str(inp.structure.get("general") or "")
    values: dict[tuple[str, str], float] = {}
    groups = []
    for r in recs:
        g = str(r.get("group", ""))
        groups.append(g)
        for key, val in r.items():
            if isinstance(val, Mapping):  # per-factor index: keep the general factor's
                val = val.get(general) if general else None
                label = _pretty(str(key)) + (f" ({general})" if general else "")
                guide_key = _pretty(str(key))
            else:
                label = guide_key = _pretty(str(key))
            if guide_key in _GUIDES and fnum(val) is not None:
                values[(label, g)] = fnum(val)
    order = [k for k in dict.fromkeys(ix for ix, _ in values)]
    guides = {ix: _GUIDES[ix.split(" (")[0]] for ix in order}
    return guide_chart(order, groups, values, guides=guides, ylabel="index")


_FACTOR_COLUMNS = ("omega", "omega_s", "omega_hs", "ecv", "ecv_subscale", "H", "determinacy")


def _reliability_parts(groups: Mapping[str, Any], inp: ReportInput, top: Mapping[str, Any]) -> list:
    """The effects stage's layout: per group ``overall`` {omega, omega_h, ecv, puc} and
    ``factors`` {factor: {omega_s, omega_hs, ecv, ecv_subscale, H, determinacy, omega}}."""
    parts: list = []
    level = top.get("level")
    where = f" under the {level} model" if level else ""
    general = str(inp.structure.get("general") or "")
    recs = []
    for g, v in groups.items():
        rec = {"group": g, **dict(v.get("overall") or {})}
        fac = v.get("factors") or {}
        if general and isinstance(fac.get(general), Mapping) and fac[general].get("H") is not None:
            rec["H"] = {general: fac[general]["H"]}
        recs.append(rec)
    png = _bifactor_chart(recs, inp)
    if png is not None:
        parts.append(Figure("bifactor-quality", png, alt="Bifactor quality indices per group",
                            caption=f"Bifactor quality per group{where}; dashed lines: the common-practice guides "
                                    "(\u03c9H .80; ECV, PUC and H .70)."))
    overall = [{"group": g, **dict(v.get("overall") or {})} for g, v in groups.items() if v.get("overall")]
    if overall:
        tab = records_table(overall, first="group", caption=f"Whole scale per group{where} (standardized solution)")
        parts.append(Table(tuple(_pretty(c) for c in tab.columns), tab.rows, caption=tab.caption, numeric=tab.numeric))
    rows = []
    seen = [c for v in groups.values() for f in (v.get("factors") or {}).values() if isinstance(f, Mapping) for c in f]
    cols = [c for c in _FACTOR_COLUMNS if c in seen] + [c for c in dict.fromkeys(seen) if c not in _FACTOR_COLUMNS]
    for g, v in groups.items():
        for f, vals in (v.get("factors") or {}).items():
            if isinstance(vals, Mapping):
                rows.append((str(g), str(f), *(cell(vals.get(c)) for c in cols)))
    if rows:
        names = {"ecv_subscale": "ECV (within factor)", "determinacy": "FD"}
        parts.append(Table(("Group", "Factor", *(names.get(c, _pretty(c)) for c in cols)), tuple(rows),
                           caption=f"Each factor per group{where}", numeric=(False, False) + (True,) * len(cols)))
    parts.append(Text(
        "Formulas: Rodriguez, Reise & Haviland (2016); H: Hancock & Mueller (2001); FD: factor determinacy, "
        "Grice (2001). Common practice: ECV and PUC above .70 suggest an essentially unidimensional scale; "
        "\u03c9H above .80 and H above .70 suggest a well-defined factor.", style="note"))
    return parts


def _interval(rec: Mapping[str, Any]) -> tuple[float | None, float | None, str]:
    for key, label in (("ci95", "95%"), ("ci", "95%"), ("interval", "95%"), ("ci90", "90%")):
        v = rec.get(key)
        if isinstance(v, (list, tuple)) and len(v) == 2:
            return fnum(v[0]), fnum(v[1]), label
    lo = I.first_key(rec, ("lower", "ci_lower", "ci_low", "lo"))
    hi = I.first_key(rec, ("upper", "ci_upper", "ci_high", "hi"))
    if fnum(lo) is not None and fnum(hi) is not None:
        return fnum(lo), fnum(hi), str(rec.get("level_ci", "95%"))
    est, se = fnum(I.first_key(rec, ("estimate", "difference", "value", "d"))), fnum(rec.get("se"))
    if est is not None and se is not None:
        return est - 1.959964 * se, est + 1.959964 * se, "95%"
    return None, None, ""


def _mean_records(obj: Any, groups: Mapping[str, Any]) -> list[dict]:
    if isinstance(obj, Mapping):
        for key in ("differences", "means"):
            if isinstance(obj.get(key), (list, Mapping)):
                obj = obj[key]
                break
    if isinstance(obj, (list, tuple)):
        return [dict(x) for x in obj if isinstance(x, Mapping)]
    out = []
    if isinstance(obj, Mapping):
        for k, v in obj.items():
            if not isinstance(v, Mapping):
                continue
            outer = "group" if k in groups else "factor"
            inner = "factor" if outer == "group" else "group"
            if all(isinstance(x, Mapping) for x in v.values()):
                out += [{outer: k, inner: k2, **x} for k2, x in v.items()]
            else:
                out.append({outer: k, **v})
    return out


def _means_from_estimates(inp: ReportInput) -> list[dict]:
    """Free factor means of the accepted scalar or strict model, read from the estimates.

    The reference group's means are fixed at 0 and its variances at 1 (METHODS section 3),
    so each free mean is the difference from the reference group in its factor SD units.
    """
    acc = inp.accepted or {}
    if acc.get("level") not in ("scalar", "strict"):
        return []
    est = inp.estimates_at(acc.get("level"))
    if est.empty or "parameter" not in est:
        return []
    sub = est[(est["parameter"] == "mean") & (est["group"].astype(str) != str(inp.reference))]
    if "free" in sub:
        sub = sub[sub["free"].astype(bool)]
    return [
        {"factor": str(r["variable"]), "group": str(r["group"]), "estimate": fnum(r.get("estimate")),
         "se": fnum(r.get("se")), "pvalue": fnum(r.get("pvalue"))}
        for _, r in sub.iterrows()
    ]


def section_latent_means(inp: ReportInput) -> Section | None:
    """Latent mean differences from the reference group, with intervals.

    Reads ``latent_means`` (or ``latent_mean_differences``): records with ``factor``,
    ``group``, ``estimate`` (or ``difference``), an interval (``ci95``/``ci``/``ci90`` or
    ``lower``/``upper``) or ``se``, and ``pvalue``. Without that key, and once scalar
    invariance holds (fully or partially), the free factor means of the accepted model
    are read from the estimates.
    """
    obj = I.first_key(inp.results, I.OPTIONAL_KEYS["latent_means"])
    recs = _mean_records(obj, inp.groups)
    source = ""
    if not recs:
        recs = _means_from_estimates(inp)
        source = (f" Read from the estimates of the {str((inp.accepted or {}).get('level'))} model, where the "
                  "reference group's factor means are 0 and its variances 1.")
    if not recs:
        return None
    rows, plot_rows, labels = [], [], set()
    for r in recs:
        est = fnum(I.first_key(r, ("estimate", "difference", "value", "d")))
        lo, hi, lab = _interval(r)
        labels.add(lab)
        name = f"{r.get('factor', '')}: {r.get('group', '')} \u2212 {r.get('reference', inp.reference)}"
        rows.append((str(r.get("factor", "")), str(r.get("group", "")), cell(est),
                     "" if lo is None else f"[{cell(lo)}, {cell(hi)}]", cell(fnum(r.get("se"))),
                     fmt_p(r.get("pvalue", r.get("p")))))
        plot_rows.append((name, est, lo, hi))
    ci = "/".join(sorted(x for x in labels if x)) or "95%"
    parts: list = []
    acc = inp.accepted or {}
    if acc.get("level") not in ("scalar", "strict"):
        parts.append(Text("Scalar invariance (full or partial) is not supported by the decision rule, so these "
                          "latent mean differences may reflect item bias as well as real differences.", style="caution"))
    png = forest_chart(plot_rows, xlabel="difference from the reference group (in its factor SD)")
    if png is not None:
        parts.append(Figure("latent-means", png, alt="Latent mean differences with intervals",
                            caption=f"Each group's latent mean minus the reference group's ({inp.reference}), "
                                    f"with {ci} intervals.{source}"))
    parts.append(Table(("Factor", "Group", "Difference", f"{ci} interval", "SE", "p"), tuple(rows),
                       caption="Latent mean differences", numeric=(False, False, True, True, True, True)))
    return Section("latent_means", "Latent mean differences", tuple(parts))


def _alignment_parts(obj: Mapping[str, Any], inp: ReportInput) -> list:
    """The alignment stage's layout: ``means``/``variances`` (factor -> group -> value) with
    ``means_se``/``variances_se``, ``parameters`` (per item parameter: ``invariant`` and
    ``noninvariant`` groups, ``r2``), ``notes``, ``settings``, ``reference``."""
    means, var = obj["means"], obj.get("variances") or {}
    mse, vse = obj.get("means_se") or {}, obj.get("variances_se") or {}
    ref = str(obj.get("reference") or inp.reference)
    parts: list = []
    rows, plot_rows = [], []
    for f, by in means.items():
        if not isinstance(by, Mapping):
            continue
        for g, m in by.items():
            se = fnum((mse.get(f) or {}).get(g))
            v, vs = (var.get(f) or {}).get(g), fnum((vse.get(f) or {}).get(g))
            rows.append((str(f), str(g), cell(m), "" if not se else cell(se), cell(v), "" if not vs else cell(vs),
                         "reference" if str(g) == ref else ""))
            if str(g) != ref and fnum(m) is not None:
                lo = hi = None
                if se:
                    lo, hi = fnum(m) - 1.959964 * se, fnum(m) + 1.959964 * se
                plot_rows.append((f"{f}: {g}", fnum(m), lo, hi))
    png = forest_chart(plot_rows, xlabel="aligned mean (reference group 0, variance 1)")
    if png is not None:
        parts.append(Figure("alignment-means", png, alt="Aligned factor means with intervals",
                            caption=f"Aligned factor means with 95% intervals; the reference group ({ref}) has mean 0 "
                                    "and variance 1."))
    parts.append(Table(("Factor", "Group", "Mean", "SE", "Variance", "SE", ""), tuple(rows),
                       caption="Aligned factor means and variances", numeric=(False, False, True, True, True, True, False)))
    params = [p for p in obj.get("parameters") or [] if isinstance(p, Mapping)]
    if params:
        nonin = [p for p in params if p.get("noninvariant")]
        parts.append(Text(
            f"{len(params) - len(nonin)} of {len(params)} loadings and intercepts are approximately invariant in every "
            f"group ({100 * len(nonin) / len(params):.0f}% noninvariant somewhere; common practice treats the aligned "
            "means as trustworthy below about 25%, Asparouhov & Muth\u00e9n 2014).", style="note"))
        parts.append(Table(("Factor", "Item", "Parameter", "Invariant in", "Noninvariant in", "R\u00b2"), tuple(
            (str(p.get("factor", "")), str(p.get("item", "")), str(p.get("parameter", "")),
             ", ".join(map(str, p.get("invariant") or [])), ", ".join(map(str, p.get("noninvariant") or [])),
             cell(p.get("r2")))
            for p in params), caption="Approximate invariance of each parameter",
            numeric=(False, False, False, False, False, True)))
    if obj.get("notes"):
        parts.append(Bullets(tuple(str(n) for n in obj["notes"])))
    if isinstance(obj.get("settings"), Mapping):
        parts.append(Table(("Setting", "Value"), tuple((str(k), cell(v)) for k, v in obj["settings"].items()),
                           caption="Alignment settings"))
    return parts


def section_alignment(inp: ReportInput) -> Section | None:
    """Alignment results (approximate invariance for many groups)."""
    obj = inp.results.get("alignment")
    if isinstance(obj, Mapping) and isinstance(obj.get("means"), Mapping):
        parts = _alignment_parts(obj, inp)
    elif isinstance(obj, Mapping) and obj.get("error"):
        parts = [Text(f"Alignment was not run: {obj['error']}.", style="caution")]
    else:
        parts = generic_parts(obj, key_name="group")
    if not parts:
        return None
    parts.append(Text("Alignment: Asparouhov & Muth\u00e9n (2014).", style="note"))
    return Section("alignment", "Alignment", tuple(parts))


def section_further(inp: ReportInput) -> Section | None:
    """Any further top-level results the report has no dedicated section for."""
    parts: list = []
    for k, v in inp.results.items():
        if k in KNOWN_KEYS:
            continue
        sub = generic_parts(v)
        if sub:
            parts.append(Text(str(k).replace("_", " "), style="note"))
            parts += sub
    if not parts:
        return None
    return Section("further", "Further results", tuple(parts))


def section_cautions(inp: ReportInput) -> Section | None:
    """What the results can and cannot support (always shown)."""
    bullets = [
        "These results are evidence for a decision about comparing groups, not the decision itself, "
        "and not a verdict on whether a test is fair.",
        "Fairness of a test used for high-stakes purposes (hiring, admission, clinical or legal decisions) is "
        "judged under professional testing standards (AERA/APA/NCME Standards for Educational and "
        "Psychological Testing, 2014; ITC Guidelines for Translating and Adapting Tests, 2nd ed., 2017) and local law.",
        "Small groups (under about 200 cases per group; common practice) make every test here weak: "
        "a level that \u201cholds\u201d may only mean that differences could not be detected.",
        "The chi-square difference test rejects trivial differences in large samples; changes in approximate "
        "fit have their own limits (cutoffs come from simulations of particular conditions).",
    ]
    small = [f"{g} ({int(fnum(n))})" for g, n in inp.groups.items() if fnum(n) is not None and fnum(n) < 200]
    if small:
        bullets.append("Groups with fewer than 200 cases here: " + ", ".join(small) + ".")
    if len(inp.groups) >= 10:
        bullets.append("With 10 or more groups the usual cutoffs are too strict for loadings "
                       "(Rutkowski & Svetina 2014 suggest looser ones); alignment may serve better.")
    return Section("cautions", "Cautions", (Bullets(tuple(bullets)),))


def package_versions() -> dict[str, str]:
    """Python, platform and the versions of the packages the results depend on."""
    out = {"python": sys.version.split()[0], "platform": platform.platform()}
    for name in PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "not installed"
    if out.get("invariance") == "not installed":
        from .. import __version__

        out["invariance"] = f"{__version__} (not installed; from source)"
    return out


def section_provenance(inp: ReportInput) -> Section | None:
    """The pipeline file as run, the data file's SHA-256, package versions, seed, time."""
    ctx = inp.context
    data = inp.results.get("data") if isinstance(inp.results.get("data"), Mapping) else {}
    seed = ctx.get("seed", inp.results.get("seed"))
    facts = [
        ("Data file", str(ctx.get("data_file") or "not recorded")),
        ("Data SHA-256", str(ctx.get("data_sha256") or data.get("sha256") or "not recorded")),
        ("Seed", "none" if seed is None else str(seed)),
        ("Run started", str(ctx.get("created") or "not recorded")),
        ("Report written", datetime.now(timezone.utc).isoformat(timespec="seconds")),
    ]
    vers = package_versions()
    parts: list = [
        Table(("What", "Value"), tuple(facts), caption="Run"),
        Table(("Package", "Version"), tuple(vers.items()), caption="Software"),
    ]
    text = ctx.get("pipeline_text")
    if text:
        parts.append(Text("The pipeline file as run:", style="note"))
        parts.append(Code(str(text), language="yaml"))
    else:
        parts.append(Text("The pipeline text was not recorded.", style="note"))
    return Section("provenance", "Provenance", tuple(parts))

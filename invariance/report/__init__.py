"""Reports of a run (minimal version: report.md).

:func:`write_reports` is the one entry point the pipeline runner calls; it only reads
the results it is given.
"""

from __future__ import annotations

import pathlib

__all__ = ["write_reports", "CAUTIONS"]

#: Cautions shown with every report (METHODS section 13).
CAUTIONS = (
    "Invariance results are evidence for a decision about comparing groups, not the decision itself.",
    "Fairness of a test used for hiring, admission, clinical or legal purposes is judged under "
    "professional testing standards (AERA/APA/NCME Standards for Educational and Psychological "
    "Testing, 2014; ITC Guidelines for Translating and Adapting Tests, 2nd ed., 2017) and local law.",
    "Small groups (under about 200 cases per group; common practice) make every test here weak.",
)


def _f(v, fmt: str) -> str:
    return "" if v is None else format(v, fmt)


def _table(results: dict) -> list[str]:
    lines = [
        "| level | chi2 | df | p | CFI | TLI | RMSEA [90% CI] | SRMR | dchi2 (ddf) | p | dCFI | dRMSEA | dSRMR | decision |",
        "|---|---:|---:|---:|---:|---:|---|---:|---|---:|---:|---:|---:|---|",
    ]
    for lv in results["levels"]:
        d = lv.get("delta") or {}
        ci = lv.get("rmsea_ci90") or [None, None]
        rm = "" if lv["rmsea"] is None else f"{lv['rmsea']:.3f} [{_f(ci[0], '.3f')}, {_f(ci[1], '.3f')}]"
        dd = "" if not d else f"{d['chi2']:.2f} ({d['df']})"
        lines.append(
            f"| {lv['level']} | {_f(lv['chi2'], '.2f')} | {_f(lv['df'], 'd')} | {_f(lv['pvalue'], '.3f')} | "
            f"{_f(lv['cfi'], '.3f')} | {_f(lv['tli'], '.3f')} | {rm} | {_f(lv['srmr'], '.3f')} | {dd} | "
            f"{_f(d.get('pvalue'), '.3f')} | {_f(d.get('cfi'), '+.4f')} | {_f(d.get('rmsea'), '+.4f')} | "
            f"{_f(d.get('srmr'), '+.4f')} | {lv['decision']} |"
        )
    return lines


def write_reports(out_dir: pathlib.Path, results: dict, estimates, context: dict) -> list[pathlib.Path]:
    """Write the report files of a run into ``out_dir``.

    Parameters
    ----------
    out_dir
        The (temporary) output folder of the run.
    results
        The content of results.json.
    estimates
        Every estimate by level and group (DataFrame).
    context
        ``pipeline_text``, ``data_file``, ``data_sha256``, ``seed``, ``structure``,
        ``created``, ``quiet``.

    Returns
    -------
    list of pathlib.Path
        The files written.
    """
    out_dir = pathlib.Path(out_dir)
    st = context["structure"]
    groups = ", ".join(f"{g} (N = {n})" for g, n in results["groups"].items())
    lines = [
        f"# {results.get('title', 'Measurement invariance')}",
        "",
        f"Created {context['created']}. Data: `{pathlib.Path(context['data_file']).name}` "
        f"(SHA-256 `{context['data_sha256'][:16]}...`). Estimator: {results['estimator']} on complete cases.",
        "",
        f"Groups: {groups}; reference group {results['reference_group']}.",
        f"Model: {st['family']} with factors "
        + "; ".join(f"{f}: {', '.join(v)}" for f, v in st["factors"].items())
        + (f"; general factor {st['general']} over all items" if st["general"] and st["family"] == "bifactor" else "")
        + ".",
        "",
        "## Stepwise results",
        "",
        *_table(results),
        "",
        f"Decision rule: {results['decision_rule']['rule']}.",
        "",
        "## Decisions",
        "",
    ]
    for lv in results["levels"]:
        comp = f" (compared with {lv['compared_with']})" if lv.get("compared_with") else ""
        lines.append(f"- **{lv['level']}**{comp}: {lv['decision']}: {lv['reason']}.")
        for p in lv.get("problems", []):
            lines.append(f"  - problem: {p}")
    lines += ["", "## Conclusion", "", results["verdict"], ""]
    if results.get("warnings"):
        lines += ["## Notes", ""] + [f"- {w}" for w in results["warnings"]] + [""]
    lines += ["## Cautions", ""] + [f"- {c}" for c in CAUTIONS] + [""]
    lines += ["## Pipeline as run", "", "```yaml", context["pipeline_text"].rstrip(), "```", ""]
    path = out_dir / "report.md"
    path.write_text("\n".join(lines), encoding="utf-8")
    return [path]

"""The order of the report's sections: one entry per section.

Adding a section takes one function and one line here: write
``build(inp: ReportInput) -> Section | None`` (return ``None`` when its data are absent)
from the parts of :mod:`invariance.report.parts`, and list it below. The generic
templates render any section in HTML and Markdown; for a special layout add one
template block, ``templates/sections/<id>.html.j2`` (and ``.md.j2``), which is used in
place of the generic one.
"""

from __future__ import annotations

import warnings
from typing import Callable

from ..errors import InvarianceWarning

from .item_sections import section_effects, section_flagged, section_profiles
from .other_sections import (
    section_alignment,
    section_bifactor,
    section_cautions,
    section_further,
    section_latent_means,
    section_provenance,
)
from .parts import Section, Text
from .screening_section import section_group_fit, section_screening
from .table_sections import section_loadings, section_paths, section_structural, section_structures
from .sections import (
    ReportInput,
    section_changes,
    section_data,
    section_levels,
    section_model,
    section_summary,
)

__all__ = ["SECTIONS", "build_sections"]

#: (id, builder) in report order.
SECTIONS: tuple[tuple[str, Callable[[ReportInput], Section | None]], ...] = (
    ("summary", section_summary),
    ("data", section_data),
    ("screening", section_screening),
    ("group_fit", section_group_fit),
    ("structures", section_structures),
    ("model", section_model),
    ("levels", section_levels),
    ("changes", section_changes),
    ("loadings", section_loadings),
    ("flagged", section_flagged),
    ("profiles", section_profiles),
    ("effects", section_effects),
    ("bifactor", section_bifactor),
    ("latent_means", section_latent_means),
    ("structural", section_structural),
    ("paths", section_paths),
    ("alignment", section_alignment),
    ("further", section_further),
    ("cautions", section_cautions),
    ("provenance", section_provenance),
)


def build_sections(inp: ReportInput, *, progress=None) -> list[Section]:
    """Run every builder in :data:`SECTIONS`; skipped sections are left out.

    A builder that fails on an unexpected results layout does not sink the report: its
    section says it could not be drawn and why, and an :class:`InvarianceWarning` is
    issued.
    """
    out = []
    for sid, build in SECTIONS:
        try:
            sec = build(inp)
        except Exception as exc:  # noqa: BLE001 - one bad section must not lose the report
            msg = f"The report section {sid!r} could not be drawn ({type(exc).__name__}: {exc}); the other sections are complete."
            warnings.warn(msg, InvarianceWarning, stacklevel=2)
            sec = Section(sid, sid.replace("_", " ").capitalize(), (Text(msg, style="caution"),))
        if progress is not None:
            progress.update(note=sid)
        if sec is not None:
            out.append(sec)
    return out

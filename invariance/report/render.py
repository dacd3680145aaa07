"""Render sections to one self-contained HTML file and to Markdown, with Jinja2.

HTML is rendered with autoescaping on, so every name that came from the user's data or
pipeline (items, factors, groups, file names) is escaped; images are inlined as base64
PNG data URIs and the page loads nothing from the network and runs no script.
Markdown escapes every value through the environment's ``finalize`` hook (HTML
special characters become entities, Markdown punctuation is backslash-escaped); the
few fragments built on purpose are wrapped in :class:`MdRaw`.
"""

from __future__ import annotations

import base64
import re
from typing import Any, Mapping, Sequence

from jinja2 import Environment, PackageLoader, StrictUndefined
from markupsafe import Markup

from ..escape import terminal_text, visible
from .parts import Section

__all__ = ["MdRaw", "md_escape", "render_html", "render_markdown"]

_MD_SPECIAL = re.compile(r"([\\`*_\[\]|~])")


class MdRaw(str):
    """Markdown that is inserted as is (built by the renderer, not from user data)."""


def md_escape(value: Any) -> str:
    """Escape a value for Markdown (and for the HTML a Markdown viewer produces)."""
    if value is None:
        return ""
    if isinstance(value, MdRaw):
        return str(value)
    s = visible(str(value).replace("\n", " "))
    s = s.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")
    s = _MD_SPECIAL.sub(r"\\\1", s)
    return s.replace("\n", " ")


def _html_finalize(value: Any) -> Any:
    """Control characters shown as escapes before autoescaping (markup built on purpose stays);
    line breaks and tabs stay."""
    if isinstance(value, Markup):
        return Markup(terminal_text(value))
    return terminal_text(value) if isinstance(value, str) else value


def _fence(text: str) -> MdRaw:
    longest = max((len(m) for m in re.findall(r"`+", text)), default=0)
    return MdRaw("`" * max(3, longest + 1))


def _b64(data: bytes) -> str:
    return base64.b64encode(data).decode("ascii")


def _env(*, html: bool) -> Environment:
    env = Environment(
        loader=PackageLoader("invariance.report", "templates"),
        autoescape=html,
        undefined=StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
        keep_trailing_newline=True,
        finalize=_html_finalize if html else md_escape,
    )
    env.filters["b64"] = _b64
    env.globals["raw"] = MdRaw
    env.globals["fence"] = _fence
    return env


_HTML_ENV = None
_MD_ENV = None


def render_html(sections: Sequence[Section], meta: Mapping[str, Any]) -> str:
    """The full report page (``report.html.j2``)."""
    global _HTML_ENV
    if _HTML_ENV is None:
        _HTML_ENV = _env(html=True)
    return _HTML_ENV.get_template("report.html.j2").render(sections=list(sections), meta=dict(meta))


def render_markdown(sections: Sequence[Section], meta: Mapping[str, Any], figure_paths: Mapping[str, str]) -> str:
    """The Markdown report (``report.md.j2``); figures are linked from ``figure_paths``."""
    global _MD_ENV
    if _MD_ENV is None:
        _MD_ENV = _env(html=False)
    return _MD_ENV.get_template("report.md.j2").render(
        sections=list(sections), meta=dict(meta), figure_paths=dict(figure_paths)
    )

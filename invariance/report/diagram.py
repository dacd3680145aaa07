"""Path diagram of the measurement model, drawn from the specification with matplotlib.

Layout is vertical so that long questionnaires stay legible: items in one column,
specific (first-order) factors beside them, and the general or higher-order factor
beyond those. Arrow width follows the size of the standardized loading and negative
loadings are dashed, so the diagram reads without colour.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Mapping

import matplotlib
from matplotlib.patches import Ellipse, FancyArrowPatch, FancyBboxPatch

from .plots import PAGE_WIDTH, mpl_text, new_figure, png_bytes

__all__ = ["model_diagram"]

ROW = 0.36  # inches between items
ITEM_FILL, FACTOR_FILL, GENERAL_FILL = "#ffffff", "#d9e8f5", "#f6dfb7"


def _short(s: str, n: int = 18) -> str:
    s = str(s)
    return s if len(s) <= n else s[: n - 1] + "\u2026"


def _fmt(v: float | None) -> str:
    if v is None:
        return ""
    s = f"{v:.2f}"
    s = s.replace("0.", ".", 1) if abs(v) < 1 else s
    return s.replace("-", "\u2212")


def model_diagram(
    structure: Mapping[str, Any],
    *,
    loadings: Mapping[tuple[str, str], float] | None = None,
    paths: Mapping[tuple[str, str], float] | None = None,
    correlations: Mapping[tuple[str, str], float] | None = None,
) -> bytes | None:
    """Draw the model of ``structure`` with the given standardized values.

    Parameters
    ----------
    structure
        ``factors`` {factor: [items]}, ``general`` (name or None), ``family``,
        ``regressions`` [(outcome, predictor)], ``residual_covariances`` [(item, item)].
    loadings
        ``(item, factor) -> standardized loading`` (labels on the item arrows).
    paths
        ``(outcome, predictor) -> standardized path`` (second-order loadings, regressions).
    correlations
        ``(factor, factor) -> correlation`` (drawn as curved two-headed arrows when
        there are at most four factors).

    Returns
    -------
    PNG bytes, or ``None`` when the structure has no factors.
    """
    factors = {str(f): [str(i) for i in its] for f, its in dict(structure.get("factors") or {}).items()}
    if not factors:
        return None
    general = structure.get("general")
    general = None if general in (None, "") else str(general)
    family = str(structure.get("family") or ("bifactor" if general else "correlated"))
    loadings = dict(loadings or {})
    paths = dict(paths or {})
    lay = _layout(factors, general, family)
    with matplotlib.rc_context({"font.size": 8}):
        fig = new_figure(lay.height, width=lay.width)
        fig.set_layout_engine(None)
        ax = fig.add_axes((0, 0, 1, 1))
        ax.set_xlim(0, lay.width)
        ax.set_ylim(0, lay.height)
        ax.set_axis_off()
        ax.set_aspect("equal")
        _draw_measurement(ax, lay, factors, loadings)
        if general:
            _draw_general(ax, lay, factors, general, loadings, paths)
        if not general and 1 < len(factors) <= 4:
            _draw_correlations(ax, lay, list(factors), dict(correlations or {}))
        _draw_regressions(ax, lay, general, structure.get("regressions") or [], paths)
        _draw_residual_covariances(ax, lay, structure.get("residual_covariances") or [])
        return png_bytes(fig)


@dataclass(frozen=True)
class _Layout:
    """Where everything sits, in inches: columns, item and factor heights, box sizes.

    ``bif`` puts the specific factors right of the items and the general factor left;
    otherwise the first-order factors are left of the items.
    """

    height: float
    width: float
    x_item: float
    x_spec: float
    x_gen: float
    y_item: dict[str, float]
    y_fac: dict[str, float]
    box_w: float
    box_h: float
    fw: float
    fh: float
    bif: bool


def _layout(factors: dict[str, list[str]], general: str | None, family: str) -> _Layout:
    """Column positions and sizes from the number and name lengths of items and factors."""
    items: list[str] = []
    for its in factors.values():
        for it in its:
            if it not in items:
                items.append(it)
    n = len(items)
    height = max(2.2, ROW * n + 0.7)
    width = PAGE_WIDTH
    top = (height + (n - 1) * ROW) / 2
    y_item = {it: top - k * ROW for k, it in enumerate(items)}
    bif = bool(family == "bifactor" and general)
    second = family == "second_order" and general
    longest_item = max(len(str(i)) for i in items)
    longest_factor = max(len(str(f)) for f in [*factors, general or ""])
    fh = 0.5
    y_fac = {}
    for f, its in factors.items():
        ys = [y_item[i] for i in its]
        y_fac[f] = sum(ys) / len(ys)
    _spread(y_fac, min_gap=fh + 0.15)
    return _Layout(
        height=height,
        width=width,
        x_item=width * (0.50 if bif else 0.72),
        x_spec=width * (0.84 if bif else (0.40 if second else 0.32)),
        x_gen=width * (0.13 if bif else 0.10),
        y_item=y_item,
        y_fac=y_fac,
        box_w=min(max(0.2 + 0.072 * longest_item, 0.7), 1.9),
        box_h=ROW * 0.72,
        fw=min(max(0.35 + 0.08 * longest_factor, 1.0), 1.9),
        fh=fh,
        bif=bif,
    )


def _draw_measurement(ax, lay: _Layout, factors: dict[str, list[str]], loadings: Mapping) -> None:
    """Item boxes, first-order (or specific) factors and their loading arrows."""
    for it, y in lay.y_item.items():
        ax.add_patch(FancyBboxPatch((lay.x_item - lay.box_w / 2, y - lay.box_h / 2), lay.box_w, lay.box_h,
                                    boxstyle="round,pad=0.01,rounding_size=0.04",
                                    facecolor=ITEM_FILL, edgecolor="black", linewidth=0.8))
        ax.text(lay.x_item, y, mpl_text(_short(it, 24)), ha="center", va="center", fontsize=7.5)
    for f, y in lay.y_fac.items():
        _factor(ax, lay.x_spec, y, lay.fw, lay.fh, f, FACTOR_FILL)
    side = 1 if lay.bif else -1  # specific factors right of items (bifactor) or left
    for f, its in factors.items():
        for it in its:
            start = (lay.x_spec - side * lay.fw / 2, lay.y_fac[f])
            end = (lay.x_item + side * lay.box_w / 2, lay.y_item[it])
            _arrow(ax, start, end, loadings.get((it, f)))


def _draw_general(ax, lay: _Layout, factors, general: str, loadings: Mapping, paths: Mapping) -> None:
    """The general (bifactor) or higher-order factor and its arrows to items or factors."""
    y_g = lay.height / 2
    _factor(ax, lay.x_gen, y_g, lay.fw, lay.fh + 0.1, general, GENERAL_FILL)
    if lay.bif:
        for it, y in lay.y_item.items():
            _arrow(ax, (lay.x_gen + lay.fw / 2, y_g), (lay.x_item - lay.box_w / 2, y), loadings.get((it, general)))
    else:
        for f in factors:
            _arrow(ax, (lay.x_gen + lay.fw / 2, y_g), (lay.x_spec - lay.fw / 2, lay.y_fac[f]),
                   paths.get((f, general)), at=0.55)


def _draw_correlations(ax, lay: _Layout, names: list[str], correlations: Mapping) -> None:
    """Curved two-headed arrows between the factors, labelled with their correlation."""
    for a in range(len(names)):
        for b in range(a + 1, len(names)):
            fa, fb = names[a], names[b]
            r = correlations.get((fa, fb), correlations.get((fb, fa)))
            pa, pb = (lay.x_spec - lay.fw / 2, lay.y_fac[fa]), (lay.x_spec - lay.fw / 2, lay.y_fac[fb])
            rad = 0.35 + 0.12 * (b - a - 1)
            ax.add_patch(FancyArrowPatch(pa, pb, connectionstyle=f"arc3,rad={rad}", arrowstyle="<|-|>",
                                         mutation_scale=7, linewidth=0.7, color="#444444"))
            if r is not None:
                xm = pa[0] - rad * abs(pa[1] - pb[1]) / 2 - 0.05
                ax.text(xm, (pa[1] + pb[1]) / 2, _fmt(r), ha="right", va="center", fontsize=7,
                        bbox=dict(boxstyle="round,pad=0.1", facecolor="white", edgecolor="none"))


def _draw_regressions(ax, lay: _Layout, general: str | None, regressions, paths: Mapping) -> None:
    """Structural regressions among factors as curved arrows."""
    pos = {**{f: (lay.x_spec, y) for f, y in lay.y_fac.items()}, **({general: (lay.x_gen, lay.height / 2)} if general else {})}
    for out, pred in regressions:
        out, pred = str(out), str(pred)
        if out in pos and pred in pos:
            _arrow(ax, pos[pred], pos[out], paths.get((out, pred)), curve=0.6, shrink=22, at=0.5)


def _draw_residual_covariances(ax, lay: _Layout, pairs) -> None:
    """Dashed two-headed arrows between items with a residual covariance."""
    for a, b in pairs:
        a, b = str(a), str(b)
        if a in lay.y_item and b in lay.y_item:
            x = lay.x_item + lay.box_w / 2
            pa, pb = (x, lay.y_item[a]), (x, lay.y_item[b])
            if lay.bif:
                x = lay.x_item - lay.box_w / 2 + 0.02
                pa, pb = (x, lay.y_item[a] + lay.box_h / 2), (x, lay.y_item[b] + lay.box_h / 2)
            ax.add_patch(FancyArrowPatch(pa, pb, connectionstyle="arc3,rad=-0.5", arrowstyle="<|-|>",
                                         mutation_scale=6, linewidth=0.7, linestyle="--", color="#444444"))


def _spread(pos: dict[str, float], *, min_gap: float) -> None:
    """Move factor centres apart (in order) so their ellipses do not overlap."""
    names = sorted(pos, key=pos.get, reverse=True)
    for k in range(1, len(names)):
        prev, cur = names[k - 1], names[k]
        if pos[prev] - pos[cur] < min_gap:
            pos[cur] = pos[prev] - min_gap


def _factor(ax, x: float, y: float, w: float, h: float, name: str, fill: str) -> None:
    ax.add_patch(Ellipse((x, y), w, h, facecolor=fill, edgecolor="black", linewidth=1.0))
    ax.text(x, y, mpl_text(_short(name, 20)), ha="center", va="center", fontsize=8, fontweight="bold")


def _arrow(ax, start, end, value: float | None, *, at: float = 0.72, curve: float = 0.0, shrink: float = 0) -> None:
    lw = 0.6 if value is None else 0.5 + 2.2 * min(abs(value), 1.0)
    ax.add_patch(FancyArrowPatch(start, end, arrowstyle="-|>", mutation_scale=8, linewidth=lw,
                                 linestyle="--" if (value is not None and value < 0) else "-",
                                 color="#333333", shrinkA=shrink, shrinkB=shrink,
                                 connectionstyle=f"arc3,rad={curve}"))
    if value is not None:
        dx, dy = end[0] - start[0], end[1] - start[1]
        x = start[0] + at * dx
        y = start[1] + at * dy
        if curve:  # the middle of matplotlib's arc3 curve (a quadratic Bezier)
            x, y = x + 0.5 * curve * dy, y - 0.5 * curve * dx
        ax.text(x, y, _fmt(value), ha="center", va="center", fontsize=6.5,
                bbox=dict(boxstyle="round,pad=0.08", facecolor="white", edgecolor="none", alpha=0.9))

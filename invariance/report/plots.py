"""Charts of the report, drawn with matplotlib's object interface (no pyplot state).

Figures are rendered by the Agg canvas directly, so the report never touches the
user's pyplot backend or global figure list. Margins are set once from the text they
must hold (:func:`place`) rather than by a layout engine, and figures are drawn at
:data:`DPI`: both keep writing the report shorter than the fitting it reports.

Every chart is sized for a page (6.5 inches wide), uses the Okabe-Ito colour-blind-safe
palette, and never relies on colour alone: groups also differ by marker, lines by dash
pattern, and "beyond the cutoff" bars by hatching, so the charts read in grayscale.
Each function returns PNG bytes (or ``None`` when there is nothing to draw).
"""

from __future__ import annotations

import io
import math
from typing import Mapping, Sequence

import matplotlib
import matplotlib.ticker
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

__all__ = [
    "PAGE_WIDTH",
    "PALETTE",
    "MARKERS",
    "change_chart",
    "dmacs_heatmap",
    "forest_chart",
    "guide_chart",
    "mpl_text",
    "new_figure",
    "png_bytes",
    "profile_chart",
]

#: Width of every figure in inches (a page's text width).
PAGE_WIDTH = 6.5
#: Okabe & Ito (2008) palette, ordered so neighbours also differ in lightness.
PALETTE = ("#000000", "#E69F00", "#0072B2", "#56B4E9", "#D55E00", "#009E73", "#CC79A7", "#F0E442")
MARKERS = ("o", "s", "^", "D", "v", "P", "X", "*")
DASHES = ("-", "--", "-.", ":")
OK_COLOR, BAD_COLOR = "#0072B2", "#D55E00"
DPI = 100
#: Approximate width of one character of 8-point text, and the height of one text line, in inches.
CHAR_IN, LINE_IN = 0.062, 0.16

_RC = {
    "font.size": 8.5,
    "axes.titlesize": 9.5,
    "axes.labelsize": 8.5,
    "xtick.labelsize": 8,
    "ytick.labelsize": 8,
    "legend.fontsize": 8,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "text.usetex": False,
}


def mpl_text(s: object) -> str:
    """Plain text safe for matplotlib (no mathtext from ``$`` in user names)."""
    return str(s).replace("$", r"\$")


def new_figure(height: float, *, width: float = PAGE_WIDTH) -> Figure:
    """A figure of the page width, drawn with the Agg canvas (margins set by :func:`place`)."""
    with matplotlib.rc_context(_RC):
        fig = Figure(figsize=(width, height), dpi=DPI)
    FigureCanvasAgg(fig)
    return fig


def label_width(labels: Sequence[str]) -> float:
    """Inches the longest of ``labels`` takes in 8-point text."""
    return CHAR_IN * max((len(str(t)) for t in labels), default=0)


def place(fig: Figure, *, left: float, bottom: float, top: float = 0.3, right: float = 0.15,
          wspace: float | None = None) -> None:
    """Set the axes margins in inches (left, bottom, top, right) for the figure's size."""
    w, h = fig.get_size_inches()
    left, right = min(left, 0.45 * w), min(right, 0.3 * w)
    bottom, top = min(bottom, 0.6 * h), min(top, 0.3 * h)
    fig.subplots_adjust(left=left / w, right=1 - right / w, bottom=bottom / h, top=1 - top / h, wspace=wspace)


def bottom_legend(fig: Figure, handles, labels, *, ncols: int) -> float:
    """A legend centred at the foot of the figure; returns the inches it takes."""
    fig.legend(handles, labels, loc="lower center", bbox_to_anchor=(0.5, 0.0), ncols=max(ncols, 1), frameon=False)
    rows = math.ceil(len(labels) / max(ncols, 1))
    return 0.12 + 0.2 * rows


def png_bytes(fig: Figure) -> bytes:
    """Render a figure to PNG bytes (white background)."""
    buf = io.BytesIO()
    with matplotlib.rc_context(_RC):
        fig.savefig(buf, format="png", dpi=DPI, facecolor="white")
    return buf.getvalue()


def _style_axes(ax) -> None:
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    ax.tick_params(labelsize=8)


# --------------------------------------------------------------------- changes
def change_chart(steps: Sequence[Mapping], *, deciding: Sequence[str] | None = None) -> bytes | None:
    """Change in each fit index per level, against the cutoff of that step.

    Parameters
    ----------
    steps
        One mapping per compared level: ``label`` (str) and, per index name
        (``cfi``, ``rmsea``, ``srmr``), a mapping with ``change`` and ``cutoff``
        (either may be ``None``).
    deciding
        Indices the decision rule uses; the other panels are titled "not deciding".
        ``None``: no such marking.
    """
    indices = [ix for ix in ("cfi", "rmsea", "srmr") if any(_num(s.get(ix, {}).get("change")) for s in steps)]
    if not steps or not indices:
        return None
    with matplotlib.rc_context(_RC):
        fig = new_figure(2.6)
        axes = fig.subplots(1, len(indices), squeeze=False)[0]
        labels = [mpl_text(s["label"]).replace(" ", "\n", 1) for s in steps]
        x = list(range(len(steps)))
        for ax, ix in zip(axes, indices):
            _style_axes(ax)
            vals = [_num(s.get(ix, {}).get("change")) for s in steps]
            cuts = [_num(s.get(ix, {}).get("cutoff")) for s in steps]
            for k, (v, c) in enumerate(zip(vals, cuts)):
                if v is None:
                    continue
                bad = c is not None and ((v < c) if ix == "cfi" else (v > c))
                ax.bar(
                    k, v, width=0.6,
                    color=BAD_COLOR if bad else OK_COLOR,
                    hatch="////" if bad else None,
                    edgecolor="black", linewidth=0.6,
                )
                if c is not None:
                    ax.hlines(c, k - 0.42, k + 0.42, colors="black", linestyles="--", linewidth=1.2)
            ax.axhline(0, color="black", linewidth=0.6)
            lim = max([abs(v) for v in vals if v is not None] + [abs(c) for c in cuts if c is not None] + [0.005])
            ax.set_ylim(-1.25 * lim, 1.25 * lim)
            ax.set_xticks(x, labels, rotation=30 if len(steps) > 4 else 0, ha="right" if len(steps) > 4 else "center")
            ax.set_title("\u0394" + ix.upper() + ("" if deciding is None or ix in deciding else " (not deciding)"))
            ax.yaxis.set_major_formatter(matplotlib.ticker.FuncFormatter(_signed_tick))
        from matplotlib.lines import Line2D
        from matplotlib.patches import Patch

        handles = [
            Patch(facecolor=OK_COLOR, edgecolor="black", label="within cutoff (or none set)"),
            Patch(facecolor=BAD_COLOR, edgecolor="black", hatch="////", label="beyond cutoff"),
            Line2D([0], [0], color="black", linestyle="--", label="cutoff"),
        ]
        foot = bottom_legend(fig, handles, [h.get_label() for h in handles], ncols=3)
        rotated = len(steps) > 4
        ticks = LINE_IN * 2 + (label_width(labels) * 0.5 if rotated else 0.0)
        place(fig, left=0.6, bottom=foot + ticks + 0.1, wspace=0.45)
        return png_bytes(fig)


def _signed_tick(v: float, _pos=None) -> str:
    if abs(v) < 5e-7:
        return "0"
    return ("+" if v > 0 else "\u2212") + f"{abs(v):.3f}".lstrip("0")


def _num(x) -> float | None:
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


# -------------------------------------------------------------------- profiles
def profile_chart(
    rows: Sequence[str],
    groups: Sequence[str],
    values: Mapping[tuple[str, str], tuple[float, float | None]],
    *,
    released: Sequence[str] = (),
    title: str = "",
    xlabel: str = "estimate",
) -> bytes | None:
    """One parameter kind across groups: a row per item (entry), a marker per group.

    Parameters
    ----------
    rows
        Row names (e.g. ``x1 <- visual``), top to bottom.
    groups
        Group names (the legend order).
    values
        ``(row, group) -> (estimate, se)``; the interval drawn is estimate +/- 1.96 se.
    released
        Rows whose constraint was released: shaded and marked with a dagger.
    """
    if not rows or not values:
        return None
    n, G = len(rows), len(groups)
    with matplotlib.rc_context(_RC):
        fig = new_figure(max(1.8, 1.2 + 0.26 * n * max(1.0, G / 3)))
        ax = fig.subplots()
        _style_axes(ax)
        rel = set(released)
        step = 0.7 / max(G, 1)
        for k, r in enumerate(rows):
            y0 = n - 1 - k
            if r in rel:
                ax.axhspan(y0 - 0.45, y0 + 0.45, color="#dddddd", zorder=0, linewidth=0)
        for j, g in enumerate(groups):
            ys, xs, es = [], [], []
            for k, r in enumerate(rows):
                v = values.get((r, g))
                if v is None or _num(v[0]) is None:
                    continue
                ys.append(n - 1 - k - (j - (G - 1) / 2) * step)  # first group on top
                xs.append(v[0])
                es.append(1.96 * v[1] if _num(v[1]) is not None else 0.0)
            if not xs:
                continue
            ax.errorbar(
                xs, ys, xerr=es, fmt=MARKERS[j % len(MARKERS)], color=PALETTE[j % len(PALETTE)],
                markersize=5, markeredgecolor="black", markeredgewidth=0.5, elinewidth=1,
                capsize=2, linestyle="none", label=mpl_text(g), zorder=3,
            )
        ticks = [mpl_text(r) + ("  \u2020" if r in rel else "") for r in rows]
        ax.set_yticks(range(n - 1, -1, -1), ticks)
        ax.set_ylim(-0.6, n - 0.4)
        ax.grid(axis="x", color="#cccccc", linewidth=0.5)
        ax.set_xlabel(mpl_text(xlabel))
        if title:
            ax.set_title(mpl_text(title))
        handles, labels = ax.get_legend_handles_labels()
        if rel:
            from matplotlib.patches import Patch

            handles.append(Patch(facecolor="#dddddd", label="\u2020 released"))
            labels.append("\u2020 released")
        foot = bottom_legend(fig, handles, labels, ncols=min(len(labels), 5))
        place(fig, left=label_width(ticks) + 0.2, bottom=foot + 0.45, top=0.3 if title else 0.1)
        return png_bytes(fig)


# ---------------------------------------------------------------------- dMACS
def dmacs_heatmap(items: Sequence[str], groups: Sequence[str], values: Mapping[tuple[str, str], float]) -> bytes | None:
    """Items-by-groups heat map of dMACS (blank cells: not computed)."""
    if not items or not groups or not values:
        return None
    import numpy as np

    M = np.full((len(items), len(groups)), np.nan)
    for i, it in enumerate(items):
        for j, g in enumerate(groups):
            v = _num(values.get((it, g)))
            if v is not None:
                M[i, j] = v
    top = max(0.8, float(np.nanmax(M)) if np.isfinite(M).any() else 0.8)
    with matplotlib.rc_context(_RC):
        fig = new_figure(1.2 + 0.3 * len(items), width=min(PAGE_WIDTH, 2.6 + 0.9 * len(groups)))
        ax = fig.subplots()
        cmap = matplotlib.colormaps["cividis"].with_extremes(bad="white")
        im = ax.imshow(np.ma.masked_invalid(M), cmap=cmap, vmin=0, vmax=top, aspect="auto")
        for i in range(M.shape[0]):
            for j in range(M.shape[1]):
                if np.isfinite(M[i, j]):
                    light = M[i, j] / top > 0.45  # cividis is light above the middle
                    ax.text(j, i, f"{M[i, j]:.2f}".replace("0.", ".", 1), ha="center", va="center",
                            color="black" if light else "white", fontsize=8)
                else:
                    ax.text(j, i, "\u2013", ha="center", va="center", color="#777777", fontsize=8)
        ax.set_xticks(range(len(groups)), [mpl_text(g) for g in groups], rotation=30 if len(groups) > 3 else 0,
                      ha="right" if len(groups) > 3 else "center")
        ax.set_yticks(range(len(items)), [mpl_text(i) for i in items])
        ax.set_xlabel("focal group (compared with the reference group)")
        cb = fig.colorbar(im, ax=ax, shrink=0.8, fraction=0.08, pad=0.04)
        cb.set_label("dMACS")
        for t in (0.2, 0.4, 0.6):
            cb.ax.axhline(t, color="white", linewidth=1)
        rotated = len(groups) > 3
        ticks = label_width([mpl_text(g) for g in groups]) * 0.5 if rotated else LINE_IN
        place(fig, left=label_width([mpl_text(i) for i in items]) + 0.2, bottom=ticks + 0.45, top=0.1, right=0.2)
        return png_bytes(fig)


# --------------------------------------------------------------------- forest
def forest_chart(rows: Sequence[tuple[str, float, float | None, float | None]], *, xlabel: str) -> bytes | None:
    """Estimates with intervals, one row each: ``(name, estimate, lower, upper)``."""
    rows = [r for r in rows if _num(r[1]) is not None]
    if not rows:
        return None
    n = len(rows)
    with matplotlib.rc_context(_RC):
        fig = new_figure(0.9 + 0.3 * n)
        ax = fig.subplots()
        _style_axes(ax)
        for k, (name, est, lo, hi) in enumerate(rows):
            y = n - 1 - k
            if _num(lo) is not None and _num(hi) is not None:
                ax.hlines(y, lo, hi, color="black", linewidth=1.4)
            ax.plot([est], [y], marker="s", color=PALETTE[2], markeredgecolor="black", markersize=6, linestyle="none")
        ax.axvline(0, color="black", linestyle="--", linewidth=0.8)
        ax.set_yticks(range(n - 1, -1, -1), [mpl_text(r[0]) for r in rows])
        ax.set_ylim(-0.6, n - 0.4)
        ax.grid(axis="x", color="#cccccc", linewidth=0.5)
        ax.set_xlabel(mpl_text(xlabel))
        place(fig, left=label_width([mpl_text(r[0]) for r in rows]) + 0.2, bottom=0.5, top=0.1)
        return png_bytes(fig)


# ------------------------------------------------------------------ guides
def guide_chart(
    indices: Sequence[str],
    groups: Sequence[str],
    values: Mapping[tuple[str, str], float],
    *,
    guides: Mapping[str, float] | None = None,
    ylabel: str = "value",
) -> bytes | None:
    """Indices on a 0-1 scale per group (a marker per group), with a guide line per index."""
    indices = [ix for ix in indices if any(_num(values.get((ix, g))) is not None for g in groups)]
    if not indices or not groups:
        return None
    guides = dict(guides or {})
    G = len(groups)
    with matplotlib.rc_context(_RC):
        fig = new_figure(2.8)
        ax = fig.subplots()
        _style_axes(ax)
        step = 0.6 / max(G, 1)
        for k, ix in enumerate(indices):
            if _num(guides.get(ix)) is not None:
                ax.hlines(guides[ix], k - 0.4, k + 0.4, colors="black", linestyles="--", linewidth=1.1, zorder=1)
        for j, g in enumerate(groups):
            xs, ys = [], []
            for k, ix in enumerate(indices):
                v = _num(values.get((ix, g)))
                if v is not None:
                    xs.append(k + (j - (G - 1) / 2) * step)
                    ys.append(v)
            ax.plot(xs, ys, MARKERS[j % len(MARKERS)], color=PALETTE[j % len(PALETTE)], markeredgecolor="black",
                    markeredgewidth=0.5, markersize=6, linestyle="none", label=mpl_text(g), zorder=3)
        ax.set_xticks(range(len(indices)), [mpl_text(i) for i in indices])
        ax.set_ylim(0, 1.02)
        ax.set_ylabel(mpl_text(ylabel))
        ax.grid(axis="y", color="#dddddd", linewidth=0.5)
        handles, labels = ax.get_legend_handles_labels()
        if guides:
            from matplotlib.lines import Line2D

            handles.append(Line2D([0], [0], color="black", linestyle="--"))
            labels.append("guide (common practice)")
        foot = bottom_legend(fig, handles, labels, ncols=min(len(labels), 5))
        place(fig, left=0.7, bottom=foot + 0.45, top=0.1)
        return png_bytes(fig)

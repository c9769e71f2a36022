"""Charts for the report: matplotlib figures returned as inline SVG text.

One look everywhere: warm paper background, slate ink, thin grid, no chart
borders. Each channel keeps one colour in every chart (:func:`channel_colours`,
assigned from the sorted channel names of the whole history, so a channel's
colour does not change from week to week). Colour is otherwise spent only on
what the sentence above the chart points at: everything else is drawn
faded. Lines are for time, bars for comparison.

Figures are drawn on matplotlib's Agg canvas without pyplot (no GUI backend,
nothing global changed) and written with its SVG backend. The SVG is made safe
to inline several times in one page: the XML prologue and
metadata (with their namespace URLs) are dropped, text stays text
(``svg.fonttype = none``) in the page's own font stack, ids are prefixed per
chart so two charts never share one, and ``$`` in labels is escaped so user
text is never read as mathtext. matplotlib escapes text for XML itself.
"""

from __future__ import annotations

import io
import re
from typing import Iterable, Sequence

import numpy as np

PAPER = "#fbf8f2"
INK = "#23313a"
MUTED = "#8d969b"
GRID = "#e5dfd3"
ACCENT = "#d2462a"          # "this week" and whatever the sentence points at that is not a channel
CHANNEL_PALETTE = ["#1f7a8c", "#b07d12", "#4c4fa3", "#8f3f71", "#5a8a2f", "#7b5b3a", "#2f5f8a", "#a35d1c"]
NO_CHANNEL_COLOUR = "#7d8589"
FADE = 0.32
WIDTH = 5.8                 # inches; with 10 pt text this stays legible when a phone shrinks it to ~360 px
FONT_STACK = ("system-ui, -apple-system, 'Segoe UI', Roboto, 'Noto Sans', 'Helvetica Neue', "
              "Arial, sans-serif")


def channel_colours(channels: Iterable[str]) -> dict[str, str]:
    """One colour per channel, from the sorted names (stable across weeks and charts)."""
    names = sorted({str(c) for c in channels})
    out: dict[str, str] = {}
    i = 0
    for name in names:
        if name == "(none)":
            out[name] = NO_CHANNEL_COLOUR
            continue
        out[name] = CHANNEL_PALETTE[i % len(CHANNEL_PALETTE)]
        i += 1
    return out


class _Figures:
    """Figures on matplotlib's Agg canvas, made without pyplot: no GUI backend, no global figure
    registry to leak into, and no change to the backend of a notebook that calls the report."""

    @staticmethod
    def rc_context(rc: dict):
        import matplotlib

        return matplotlib.rc_context(rc)

    @staticmethod
    def subplots(figsize: tuple[float, float]):
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure

        fig = Figure(figsize=figsize)
        FigureCanvasAgg(fig)
        return fig, fig.subplots()


def _plt() -> _Figures:
    return _Figures()


def _style() -> dict:
    return {
        "svg.fonttype": "none",
        "svg.hashsalt": "contentlab",
        "font.family": "sans-serif",
        "font.size": 10,
        "axes.edgecolor": GRID,
        "axes.labelcolor": INK,
        "axes.facecolor": "none",
        "figure.facecolor": "none",
        "xtick.color": MUTED,
        "ytick.color": MUTED,
        "xtick.labelcolor": INK,
        "ytick.labelcolor": INK,
        "axes.spines.top": False,
        "axes.spines.right": False,
        "axes.grid": False,
        "text.color": INK,
        "text.usetex": False,
    }


def label(text: object, limit: int = 40) -> str:
    """A user string made safe for a matplotlib label: no mathtext, bounded length."""
    s = " ".join(str(text).split())
    if len(s) > limit:
        s = s[: limit - 1].rstrip() + "…"
    return s.replace("$", r"\$")


_ID = re.compile(r'\bid="([^"]+)"')


def to_svg(fig, name: str, title: str) -> str:
    """The figure as an inline <svg> element with a title, ids unique to ``name``."""
    from xml.sax.saxutils import escape

    buf = io.StringIO()
    fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": None, "Format": None, "Type": None},
                bbox_inches="tight", pad_inches=0.05)
    svg = buf.getvalue()
    svg = svg[svg.index("<svg"):]
    svg = re.sub(r"<metadata>.*?</metadata>\s*", "", svg, flags=re.S)
    svg = re.sub(r'\sxmlns(:xlink)?="[^"]*"', "", svg)
    # matplotlib's <style>*{...}</style> would apply to the whole page once inlined; keep it on this svg only.
    svg = re.sub(r"\s*<defs>\s*<style[^>]*>.*?</style>\s*</defs>", "", svg, count=1, flags=re.S)
    svg = svg.replace('version="1.1"', "")
    ids = set(_ID.findall(svg))
    prefix = re.sub(r"[^a-z0-9-]", "-", name.lower())
    for old in sorted(ids, key=len, reverse=True):
        svg = svg.replace(f'id="{old}"', f'id="{prefix}-{old}"')
        svg = svg.replace(f'href="#{old}"', f'href="#{prefix}-{old}"')
        svg = svg.replace(f"url(#{old})", f"url(#{prefix}-{old})")
    svg = re.sub(r"font-family:[^;\"]*", "font-family: " + FONT_STACK.replace('"', "'"), svg)
    m = re.match(r'<svg([^>]*)\swidth="([\d.]+)pt"\s+height="([\d.]+)pt"', svg)
    head = (f'<svg class="chart" data-chart="{escape(prefix)}" role="img" aria-labelledby="{prefix}-title" '
            'style="stroke-linejoin: round; stroke-linecap: butt"')
    svg = re.sub(r'^<svg\s+', head + " ", svg, count=1)
    if m:
        svg = svg.replace(f'width="{m.group(2)}pt"', "", 1).replace(f'height="{m.group(3)}pt"', "", 1)
    svg = svg.replace(">", f'><title id="{prefix}-title">{escape(title)}</title>', 1)
    return svg.strip()


def _percent_axis(ax, axis: str = "y", digits: int | None = None) -> None:
    from matplotlib.ticker import FuncFormatter

    def fmt(v, _pos):
        d = digits if digits is not None else (1 if abs(v) < 0.1 else 0)
        return f"{100 * v:.{d}f}%"

    (ax.yaxis if axis == "y" else ax.xaxis).set_major_formatter(FuncFormatter(fmt))


def _points_axis(ax, axis: str = "x") -> None:
    from matplotlib.ticker import FuncFormatter

    (ax.xaxis if axis == "x" else ax.yaxis).set_major_formatter(FuncFormatter(lambda v, _p: _signed(100 * v)))


def _signed(v: float, digits: int = 2) -> str:
    """+1.25 / −1.25 with a true minus sign, 0.00 unsigned."""
    if round(v, digits) == 0:
        return f"{0:.{digits}f}"
    return f"{'+' if v > 0 else '−'}{abs(v):.{digits}f}"


def trend_chart(labels: Sequence[str], rates: Sequence[float], *, last_year: Sequence[float] | None = None,
                baseline: float | None = None, baseline_span: int = 4, band: tuple[float, float] | None = None,
                highlight: bool = True, rate_name: str = "rate", name: str = "trend",
                title: str = "Weekly rate") -> str:
    """Rate per block as a line; the last block (this week) marked in the accent colour.

    ``baseline`` is drawn across the ``baseline_span`` blocks before the last;
    ``band`` (low, high) is the normal range of this week's rate given past noise.
    """
    plt = _plt()
    with plt.rc_context(_style()):
        fig, ax = plt.subplots((WIDTH, 3.0))
        x = np.arange(len(labels))
        y = np.asarray(rates, dtype=float)
        ax.yaxis.grid(True, color=GRID, linewidth=0.8)
        ax.set_axisbelow(True)
        if last_year is not None and np.isfinite(np.asarray(last_year, dtype=float)).any():
            ly = np.asarray(last_year, dtype=float)
            ax.plot(x, ly, color=MUTED, linewidth=1.2, linestyle=(0, (3, 2)), label="same weeks last year")
        ax.plot(x, y, color=INK, linewidth=1.8, marker="o", markersize=2.8, label=rate_name)
        n = len(labels)
        if baseline is not None and np.isfinite(baseline) and n > 1:
            lo = max(0, n - 1 - baseline_span)
            ax.plot([lo, n - 2], [baseline, baseline], color=ACCENT, linewidth=1.2, alpha=0.8,
                    solid_capstyle="butt", label=f"previous {baseline_span} (pooled)")
        if band is not None and all(np.isfinite(band)):
            ax.fill_between([n - 1.35, n - 0.65], [band[0]] * 2, [band[1]] * 2, color=ACCENT, alpha=0.12,
                            linewidth=0, label="normal range (±2 sd)")
        if highlight and n and np.isfinite(y[-1]):
            ax.plot([n - 1], [y[-1]], marker="o", markersize=7.5, color=ACCENT, zorder=5)
            ax.annotate(f"{100 * y[-1]:.2f}%", (n - 1, y[-1]), xytext=(-8, 9), textcoords="offset points",
                        ha="right", color=ACCENT, fontsize=10, fontweight="bold")
        step = max(1, int(np.ceil(n / 6)))
        ticks = list(range(n - 1, -1, -step))[::-1]
        ax.set_xticks(ticks)
        ax.set_xticklabels([label(labels[i], 12) for i in ticks])
        ax.set_xlim(-0.6, n - 0.4 if n else 1)
        finite = np.concatenate([y[np.isfinite(y)], np.asarray(last_year if last_year is not None else [],
                                                                dtype=float)])
        finite = finite[np.isfinite(finite)]
        top = float(finite.max()) if finite.size else 0.01
        ax.set_ylim(0, top * 1.22 if top > 0 else 0.01)
        _percent_axis(ax)
        ax.tick_params(length=0)
        ax.legend(loc="lower left", bbox_to_anchor=(0, 1.0), frameon=False, fontsize=8.5, ncol=2,
                  handlelength=1.6, borderaxespad=0.2)
        return to_svg(fig, name, title)


def channel_bars(channels: Sequence[str], base: Sequence[float], current: Sequence[float],
                 colours: dict[str, str], *, highlight: str | None = None, base_label: str = "previous 4 weeks",
                 current_label: str = "this week", name: str = "channels",
                 title: str = "Rate by channel") -> str:
    """Channels side by side: the previous period as an outlined bar, this one solid, in the channel's colour."""
    plt = _plt()
    with plt.rc_context(_style()):
        n = len(channels)
        fig, ax = plt.subplots((WIDTH, 0.62 * n + 0.9))
        y = np.arange(n)[::-1].astype(float)
        h = 0.36
        cur = np.asarray(current, dtype=float)
        old = np.asarray(base, dtype=float)
        top = np.nanmax(np.concatenate([cur, old, [0.001]]))
        for i, ch in enumerate(channels):
            c = colours.get(ch, NO_CHANNEL_COLOUR)
            alpha = 1.0 if (highlight is None or ch == highlight) else FADE + 0.15
            if np.isfinite(old[i]):
                ax.barh(y[i] + h / 2, old[i], height=h * 0.92, facecolor="none", edgecolor=c, linewidth=1.3,
                        alpha=alpha)
                ax.text(old[i] + top * 0.01, y[i] + h / 2, f"{100 * old[i]:.2f}%", va="center", fontsize=8,
                        color=MUTED)
            if np.isfinite(cur[i]):
                ax.barh(y[i] - h / 2, cur[i], height=h * 0.92, color=c, alpha=alpha)
                ax.text(cur[i] + top * 0.01, y[i] - h / 2, f"{100 * cur[i]:.2f}%", va="center", fontsize=8.5,
                        color=INK, fontweight="bold" if ch == highlight else "normal")
            else:
                ax.text(top * 0.01, y[i] - h / 2, "no posts", va="center", fontsize=8, color=MUTED)
        ax.set_yticks(y)
        ax.set_yticklabels([label(c, 22) for c in channels])
        for tick, ch in zip(ax.get_yticklabels(), channels):
            if ch == highlight:
                tick.set_fontweight("bold")
        ax.set_xlim(0, top * 1.2)
        _percent_axis(ax, "x")
        ax.xaxis.grid(True, color=GRID, linewidth=0.8)
        ax.set_axisbelow(True)
        ax.tick_params(length=0)
        ax.spines["left"].set_visible(False)
        from matplotlib.patches import Patch

        ax.legend(handles=[Patch(facecolor="none", edgecolor=MUTED, label=base_label),
                           Patch(facecolor=MUTED, label=current_label)],
                  loc="lower right", frameon=False, fontsize=8)
        return to_svg(fig, name, title)


def shift_share_chart(groups: Sequence[str], mix: Sequence[float], within: Sequence[float],
                      colours: dict[str, str], *, highlight: str | None = None, name: str = "shift-share",
                      title: str = "Change split into mix and performance") -> str:
    """Per channel, the change in points from mix (hatched) and from performance within it (solid)."""
    plt = _plt()
    with plt.rc_context(_style()):
        n = len(groups)
        fig, ax = plt.subplots((WIDTH, 0.62 * (n + 1) + 0.9))
        mix_a = np.asarray(mix, dtype=float)
        within_a = np.asarray(within, dtype=float)
        labels = ["all channels"] + [label(g, 22) for g in groups]
        y = np.arange(n + 1)[::-1].astype(float)
        h = 0.36
        rows = [(mix_a.sum(), within_a.sum(), INK, True)] + [
            (mix_a[i], within_a[i], colours.get(g, NO_CHANNEL_COLOUR), highlight is None or g == highlight)
            for i, g in enumerate(groups)]
        span = max(np.abs(np.concatenate([mix_a, within_a, [mix_a.sum(), within_a.sum(), 1e-5]])).max(), 1e-5)
        for i, (m, w, c, strong) in enumerate(rows):
            alpha = 1.0 if strong else FADE + 0.15
            ax.barh(y[i] + h / 2, m, height=h * 0.92, facecolor="none", edgecolor=c, hatch="////",
                    linewidth=1.0, alpha=alpha)
            ax.barh(y[i] - h / 2, w, height=h * 0.92, color=c, alpha=alpha)
            for val, yy in ((m, y[i] + h / 2), (w, y[i] - h / 2)):
                ax.text(val + (span * 0.02 if val >= 0 else -span * 0.02), yy, _signed(100 * val), va="center",
                        ha="left" if val >= 0 else "right", fontsize=8, color=INK if strong else MUTED)
        ax.axvline(0, color=INK, linewidth=0.9)
        ax.set_yticks(y)
        ax.set_yticklabels(labels)
        ax.get_yticklabels()[0].set_fontweight("bold")
        ax.set_xlim(-span * 1.35, span * 1.35)
        _points_axis(ax)
        ax.set_xlabel("change in the pooled rate, percentage points")
        ax.xaxis.grid(True, color=GRID, linewidth=0.8)
        ax.set_axisbelow(True)
        ax.tick_params(length=0)
        ax.spines["left"].set_visible(False)
        from matplotlib.patches import Patch

        ax.legend(handles=[Patch(facecolor="none", edgecolor=MUTED, hatch="////",
                                 label="mix (how much was posted where)"),
                           Patch(facecolor=MUTED, label="performance within the channel")],
                  loc="upper center", bbox_to_anchor=(0.5, -0.28 if n < 3 else -0.16), frameon=False, fontsize=8,
                  ncol=2)
        return to_svg(fig, name, title)


def interval_bars(labels: Sequence[str], effects: Sequence[float], low: Sequence[float], high: Sequence[float], *,
                  colours: Sequence[str] | None = None, highlight: Sequence[bool] | None = None,
                  xlabel: str = "effect", percent: bool = False, name: str = "drivers",
                  title: str = "Drivers with 90% intervals") -> str:
    """Horizontal bars with interval whiskers; faded unless highlighted."""
    plt = _plt()
    with plt.rc_context(_style()):
        n = len(labels)
        fig, ax = plt.subplots((WIDTH, 0.34 * n + 1.0))
        y = np.arange(n)[::-1].astype(float)
        e = np.asarray(effects, dtype=float)
        lo = np.asarray(low, dtype=float)
        hi = np.asarray(high, dtype=float)
        cols = list(colours) if colours is not None else [INK] * n
        strong = list(highlight) if highlight is not None else [True] * n
        for i in range(n):
            alpha = 1.0 if strong[i] else FADE
            ax.barh(y[i], e[i], height=0.62, color=cols[i], alpha=alpha)
            if np.isfinite(lo[i]) and np.isfinite(hi[i]):
                ax.plot([lo[i], hi[i]], [y[i], y[i]], color=INK, linewidth=1.1, alpha=0.9 if strong[i] else 0.5)
                ax.plot([lo[i]] * 2, [y[i] - 0.16, y[i] + 0.16], color=INK, linewidth=1.1,
                        alpha=0.9 if strong[i] else 0.5)
                ax.plot([hi[i]] * 2, [y[i] - 0.16, y[i] + 0.16], color=INK, linewidth=1.1,
                        alpha=0.9 if strong[i] else 0.5)
        ax.axvline(0, color=INK, linewidth=0.9)
        ax.set_yticks(y)
        ax.set_yticklabels([label(t, 34) for t in labels])
        for tick, s in zip(ax.get_yticklabels(), strong):
            tick.set_color(INK if s else MUTED)
        vals = np.concatenate([e, lo, hi])
        vals = vals[np.isfinite(vals)]
        span = float(np.abs(vals).max()) if vals.size else 1.0
        ax.set_xlim(min(-span * 0.15, vals.min() * 1.1 if vals.size else 0), max(span * 0.15, vals.max() * 1.1
                                                                                  if vals.size else 1))
        if percent:
            _percent_axis(ax, "x")
        ax.set_xlabel(xlabel)
        ax.xaxis.grid(True, color=GRID, linewidth=0.8)
        ax.set_axisbelow(True)
        ax.tick_params(length=0)
        ax.spines["left"].set_visible(False)
        return to_svg(fig, name, title)


def probability_bars(labels: Sequence[str], probs: Sequence[float], *, highlight: int | None = None,
                     colour: str = INK, name: str = "experiment", title: str = "Probability of being best") -> str:
    """P(best) per arm as bars from 0 to 1; the leading arm highlighted."""
    plt = _plt()
    with plt.rc_context(_style()):
        n = len(labels)
        fig, ax = plt.subplots((WIDTH, 0.34 * n + 0.8))
        y = np.arange(n)[::-1].astype(float)
        p = np.asarray(probs, dtype=float)
        for i in range(n):
            strong = highlight is None or i == highlight
            ax.barh(y[i], p[i], height=0.6, color=colour if strong else MUTED, alpha=1.0 if strong else 0.55)
            ax.text(min(p[i], 1) + 0.01, y[i], f"{100 * p[i]:.0f}%", va="center", fontsize=8,
                    color=INK, fontweight="bold" if i == highlight else "normal")
        ax.set_yticks(y)
        ax.set_yticklabels([label(t, 44) for t in labels])
        ax.set_xlim(0, 1.12)
        _percent_axis(ax, "x", digits=0)
        ax.xaxis.grid(True, color=GRID, linewidth=0.8)
        ax.set_axisbelow(True)
        ax.tick_params(length=0)
        ax.spines["left"].set_visible(False)
        return to_svg(fig, name, title)

"""Small line charts as SVG markup for the pages (presentation attributes only: no inline style, no script).

Every text that goes into the SVG is escaped here, so a hostile arm or channel
name stays text.
"""

from __future__ import annotations

from markupsafe import Markup, escape

from ..percentages import percent

# Distinct hues for lines (no meaning attached to any colour).
PALETTE = ["#3b5ba5", "#8e5ea2", "#4a4a4a", "#a0662a", "#2a7f99", "#b0447a", "#6b6b2a", "#5a7fd1"]


# The same chart is drawn at two sizes and the style sheet shows the one that fits: text stays at 12 px of
# the drawing, which is 11 px or more on screen whether the chart fills a desktop column or a 390 px phone.
SIZES = (("wide", 640, 260, 3), ("narrow", 340, 220, 2))


def line_chart(series: dict[str, list[tuple[float, float]]], *, y_label: str, x_label: str,
               y_format=lambda v: percent(v, 0), y_max: float | None = None,
               x_ticks: list[tuple[float, str]] | None = None) -> Markup:
    """Lines of (x, y) points, one per named series, with a legend below; empty series are skipped."""
    if not any(series.values()):
        return Markup("")
    charts = []
    for size, width, height, per_row in SIZES:
        ticks = x_ticks
        if ticks and size == "narrow" and len(ticks) > 3:  # a phone has room for the ends and the middle
            ticks = [ticks[0], ticks[len(ticks) // 2], ticks[-1]]
        charts.append(_chart(series, y_label=y_label, x_label=x_label, y_format=y_format, y_max=y_max,
                             width=width, height=height, per_row=per_row, x_ticks=ticks, size=size))
    return Markup("".join(charts))


def _chart(series, *, y_label, x_label, y_format, y_max, width, height, per_row, x_ticks, size) -> str:
    points = [p for s in series.values() for p in s]
    left, right, top, bottom = 56, 12, 12, 36
    xs = [p[0] for p in points]
    x0, x1 = min(xs), max(xs)
    if x1 == x0:
        x1 = x0 + 1
    y1 = y_max if y_max is not None else max(p[1] for p in points) * 1.1 or 1.0
    w, h = width - left - right, height - top - bottom

    def sx(x):
        return left + (x - x0) / (x1 - x0) * w

    def sy(y):
        return top + h - (y / y1) * h

    rows = (len(series) + per_row - 1) // per_row
    parts = [f'<svg class="chart {size}" viewBox="0 0 {width} {height + 22 * rows}" role="img" '
             f'aria-label="{escape(y_label)}" xmlns="http://www.w3.org/2000/svg">']
    for i in range(5):
        v = y1 * i / 4
        y = sy(v)
        parts.append(f'<line x1="{left}" x2="{width - right}" y1="{y:.1f}" y2="{y:.1f}" stroke="#ddd"/>')
        parts.append(f'<text x="{left - 6}" y="{y + 4:.1f}" text-anchor="end" font-size="12" fill="#333">'
                     f'{escape(y_format(v))}</text>')
    ticks = x_ticks or [(x0, f"{x0:,.0f}"), (x1, f"{x1:,.0f}")]
    for i, (x, label) in enumerate(ticks):
        # The outermost labels are aligned inwards, so that none is cut off at the chart's edge.
        anchor = "start" if x == x0 else "end" if x == x1 else "middle"
        parts.append(f'<text x="{sx(x):.1f}" y="{top + h + 16}" text-anchor="{anchor}" font-size="12" '
                     f'fill="#333">{escape(label)}</text>')
    parts.append(f'<text x="{left + w / 2:.1f}" y="{top + h + 32}" text-anchor="middle" font-size="12" '
                 f'fill="#333">{escape(x_label)}</text>')
    for i, (name, pts) in enumerate(series.items()):
        if not pts:
            continue
        colour = PALETTE[i % len(PALETTE)]
        path = " ".join(f"{sx(x):.1f},{sy(y):.1f}" for x, y in pts)
        parts.append(f'<polyline points="{path}" fill="none" stroke="{colour}" stroke-width="2"/>')
        if len(pts) == 1:
            parts.append(f'<circle cx="{sx(pts[0][0]):.1f}" cy="{sy(pts[0][1]):.1f}" r="3" fill="{colour}"/>')
        lx = left + (i % per_row) * (w / per_row)
        ly = height + 22 * (i // per_row) + 8
        parts.append(f'<rect x="{lx:.1f}" y="{ly - 9}" width="12" height="12" fill="{colour}"/>')
        parts.append(f'<text x="{lx + 18:.1f}" y="{ly + 1}" font-size="12" fill="#222">{escape(_fit(name, int((w / per_row - 24) / 7)))}</text>')
    parts.append("</svg>")
    return "".join(parts)


def _fit(name: str, chars: int) -> str:
    """A legend name cut to the room beside its swatch (about 7 units a character at 12 px), marked when cut."""
    return name if len(name) <= chars else name[: max(chars - 1, 1)] + "…"

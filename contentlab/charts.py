"""Charts for the report, written directly as inline SVG text.

One look everywhere: warm paper background, slate ink, thin grid, no chart
borders. Each channel keeps one colour in every chart (:func:`channel_colours`,
assigned from the sorted channel names of the whole history, so a channel's
colour does not change from week to week). Colour is otherwise spent only on
what the sentence above the chart points at: everything else is drawn
faded. Lines are for time, bars for comparison.

Why SVG by hand rather than a plotting library: text must stay a readable size
on a phone. A chart scaled into a 350 px column shrinks its text with it, so
every chart is drawn twice, at the two sizes it is shown at (:data:`WIDE` for a
desktop column and for print, :data:`NARROW` for a phone, where labels sit above
their bars), with font sizes in CSS pixels of that size; the page shows the one
that fits (see the template's media queries). Writing the elements ourselves
also means every user string (headline, channel, arm) is escaped by one
function, :func:`_esc`, and the result holds only the element and attribute
names of :data:`ALLOWED_ELEMENTS`/:data:`ALLOWED_ATTRIBUTES`, which
:func:`check_svg` verifies before a chart is embedded. And it is fast: no
plotting library to import or render with.

Text widths are estimated from approximate advance widths of DejaVu Sans (from
memory, rounded; one of the widest common sans-serif faces, so the estimate errs
on the wide side for Arial, Roboto or Segoe UI) and layouts leave room for them:
long labels wrap onto a second line rather than run out of the chart.
"""

from __future__ import annotations

import math
import re
import unicodedata
from dataclasses import dataclass, field
from typing import Callable, Iterable, Sequence
from xml.sax.saxutils import escape, quoteattr

from .percentages import TRUE_MINUS, percent, percentage_points, signed_number, signed_percent

PAPER = "#fbf8f2"
INK = "#23313a"
MUTED = "#8d969b"
GRID = "#e5dfd3"
ACCENT = "#d2462a"          # "this week" and whatever the sentence points at that is not a channel
CHANNEL_PALETTE = ["#1f7a8c", "#b07d12", "#4c4fa3", "#8f3f71", "#5a8a2f", "#7b5b3a", "#2f5f8a", "#a35d1c"]
NO_CHANNEL_COLOUR = "#7d8589"
FADE = 0.32
FONT_STACK = ("system-ui, -apple-system, 'Segoe UI', Roboto, 'Noto Sans', 'Helvetica Neue', "
              "Arial, sans-serif")
MINUS = TRUE_MINUS


@dataclass(frozen=True)
class Size:
    """One drawing size: width in CSS px and the font sizes used at it."""

    name: str
    width: int
    font: float              # labels and annotations
    small: float             # tick labels, value labels, legend
    labels_above: bool       # bar labels on their own line above the bars (phone) or in a left column


# Desktop column (the page's chart box is at most 680 px wide) and print.
WIDE = Size("wide", 680, 13.0, 12.0, labels_above=False)
# A phone: a 390 px screen leaves about 330 px inside a chart box (320-345 px on the common 360-414 px
# phones), so 12 px text is drawn at 11.5 px or more there, and larger on wider screens.
NARROW = Size("narrow", 320, 12.5, 12.0, labels_above=True)
SIZES = (WIDE, NARROW)


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


# ------------------------------------------------------------------ text
# Advance widths in em, approximately those of DejaVu Sans (recalled, rounded); others 0.65, wide glyphs 1.0.
_WIDTHS = {" ": .32, "!": .40, '"': .46, "#": .84, "$": .64, "%": .95, "&": .78, "'": .28, "(": .39, ")": .39,
           "*": .50, "+": .84, ",": .32, "-": .36, ".": .32, "/": .34, ":": .34, ";": .34, "<": .84, "=": .84,
           ">": .84, "?": .53, "@": 1.0, "[": .39, "]": .39, "_": .50, "|": .34, "…": 1.0, "–": .50, "—": 1.0,
           "−": .84, "±": .84, "·": .32, "“": .52, "”": .52, "‘": .32, "’": .32}
_WIDTHS.update({d: .64 for d in "0123456789"})
_WIDTHS.update(dict(zip("ABCDEFGHIJKLMNOPQRSTUVWXYZ",
                        [.68, .69, .70, .77, .63, .58, .78, .75, .30, .30, .66, .56, .86, .75, .79, .60, .79, .70,
                         .64, .61, .73, .68, .99, .69, .61, .69])))
_WIDTHS.update(dict(zip("abcdefghijklmnopqrstuvwxyz",
                        [.61, .64, .55, .64, .62, .35, .64, .63, .28, .28, .58, .28, .97, .63, .61, .64, .64, .41,
                         .52, .39, .63, .59, .82, .59, .59, .53])))


def text_width(text: str, size: float, bold: bool = False) -> float:
    """Estimated width in px of ``text`` at font size ``size`` (errs on the wide side)."""
    total = 0.0
    for ch in text:
        w = _WIDTHS.get(ch)
        if w is None:
            w = 1.0 if unicodedata.east_asian_width(ch) in ("W", "F") else 0.65
        total += w
    return total * size * (1.15 if bold else 1.0) * 1.04     # +4%: rounding of the table, other fonts


def label(text: object, limit: int = 60) -> str:
    """A user string as one line for a chart: whitespace collapsed, bounded length (escaped later)."""
    s = " ".join(str(text).split())
    if len(s) > limit:
        s = s[: limit - 1].rstrip() + "…"
    return s


def wrap(text: str, width: float, size: float, *, bold: bool = False, max_lines: int = 2) -> list[str]:
    """``text`` broken into lines no wider than ``width`` px; the last line ends in … if it had to be cut."""
    words = text.split(" ")
    lines: list[str] = []
    line = ""
    for word in words:
        candidate = f"{line} {word}" if line else word
        if text_width(candidate, size, bold) <= width:
            line = candidate
            continue
        if line:
            lines.append(line)
        line = word
        while text_width(line, size, bold) > width:   # one word longer than the line: break it
            cut = _fit(line, width, size, bold)
            lines.append(line[:cut])
            line = line[cut:]
    if line or not lines:
        lines.append(line)
    if len(lines) > max_lines:
        last = lines[max_lines - 1]
        while last and text_width(last + "…", size, bold) > width:
            last = last[:-1]
        lines = lines[: max_lines - 1] + [last.rstrip() + "…"]
    return lines


def _fit(text: str, width: float, size: float, bold: bool) -> int:
    n = 1
    while n < len(text) and text_width(text[: n + 1], size, bold) <= width:
        n += 1
    return n


# Characters XML 1.0 does not allow at all (C0 controls other than tab/LF/CR, lone surrogates, U+FFFE/U+FFFF):
# a headline holding one would make the chart unparseable, so they are dropped from what a chart draws.
_NOT_XML = re.compile("[\x00-\x08\x0b\x0c\x0e-\x1f\ud800-\udfff\ufffe\uffff]")


def _esc(text: object) -> str:
    """Text content made safe for XML/HTML: &, < and > escaped, characters XML forbids dropped."""
    return escape(_NOT_XML.sub("", str(text)))


def _attr(value: object) -> str:
    return quoteattr(_NOT_XML.sub("", str(value)))


def _num(v: float) -> str:
    return f"{v:.1f}".rstrip("0").rstrip(".") if math.isfinite(v) else "0"


# ------------------------------------------------------------------ numbers
def signed(v: float, digits: int = 2) -> str:
    """+1.25 / −1.25 with a true minus sign, 0.00 unsigned (the report's typography)."""
    return signed_number(v, digits, minus=MINUS)


def nice_ticks(lo: float, hi: float, count: int = 5) -> list[float]:
    """Round tick values (1, 2, 2.5 or 5 times a power of ten) covering ``lo`` to ``hi``."""
    if not (math.isfinite(lo) and math.isfinite(hi)) or hi <= lo:
        hi = lo + 1.0 if math.isfinite(lo) else 1.0
        lo = lo if math.isfinite(lo) else 0.0
    raw = (hi - lo) / max(count - 1, 1)
    power = 10 ** math.floor(math.log10(raw))
    # The finest round step that needs at most one tick more than asked for.
    step = 10 * power
    for m in (1, 2, 2.5, 5):
        s = m * power
        if math.ceil(hi / s - 1e-9) - math.floor(lo / s + 1e-9) + 1 <= count + 1:
            step = s
            break
    first = math.floor(lo / step + 1e-9) * step
    ticks = []
    v = first
    while v < hi + step * 0.999:
        ticks.append(round(v, 12))
        v += step
    return ticks


def _decimals(step: float) -> int:
    """Decimals that show every multiple of ``step`` exactly (up to 3)."""
    for d in range(4):
        if abs(round(step, d) - step) < 1e-9 * max(1.0, abs(step)):
            return d
    return 3


def percent_format(ticks: Sequence[float], *, signed_values: bool = False) -> Callable[[float], str]:
    """One format for every tick of a percent axis: the same number of decimals, the same sign rule."""
    step = abs(ticks[1] - ticks[0]) * 100 if len(ticks) > 1 else 1.0
    d = _decimals(step)

    def fmt(v: float) -> str:
        return signed_percent(v, d, minus=MINUS) if signed_values else percent(v, d)
    return fmt


def signed_percent_format(ticks: Sequence[float]) -> Callable[[float], str]:
    return percent_format(ticks, signed_values=True)


def signed_format(ticks: Sequence[float]) -> Callable[[float], str]:
    d = _decimals(abs(ticks[1] - ticks[0]) if len(ticks) > 1 else 1.0)
    return lambda v: signed(v, d)


def points_format(ticks: Sequence[float]) -> Callable[[float], str]:
    """Signed percentage points, one number of decimals for the whole axis."""
    step = abs(ticks[1] - ticks[0]) * 100 if len(ticks) > 1 else 1.0
    d = _decimals(step)
    return lambda v: percentage_points(v, d, minus=MINUS, unit="")


# ------------------------------------------------------------------ SVG building
class _Canvas:
    """Elements of one chart at one size; :meth:`svg` wraps them in the root element."""

    def __init__(self, size: Size, name: str, title: str):
        self.size = size
        self.prefix = re.sub(r"[^a-z0-9-]", "-", f"{name}-{size.name}".lower())
        self.name = re.sub(r"[^a-z0-9-]", "-", name.lower())
        self.title = title
        self.defs: list[str] = []
        self.parts: list[str] = []
        self._patterns: dict[str, str] = {}

    def add(self, tag: str, text: str | None = None, **attrs) -> None:
        a = "".join(f" {k.rstrip('_').replace('_', '-')}={_attr(v)}" for k, v in attrs.items() if v is not None)
        self.parts.append(f"<{tag}{a}/>" if text is None else f"<{tag}{a}>{text}</{tag}>")

    def text(self, x: float, y: float, text: str, *, size: float | None = None, anchor: str = "start",
             fill: str = INK, bold: bool = False, opacity: float | None = None, cls: str | None = None) -> None:
        self.add("text", _esc(text), x=_num(x), y=_num(y), font_size=_num(size or self.size.font),
                 text_anchor=None if anchor == "start" else anchor, fill=fill,
                 font_weight="600" if bold else None, opacity=None if opacity in (None, 1) else f"{opacity:.2f}",
                 class_=cls)

    def line(self, x1, y1, x2, y2, *, stroke: str = INK, width: float = 1.0, dash: str | None = None,
             opacity: float | None = None) -> None:
        self.add("line", x1=_num(x1), y1=_num(y1), x2=_num(x2), y2=_num(y2), stroke=stroke,
                 stroke_width=_num(width), stroke_dasharray=dash,
                 opacity=None if opacity in (None, 1) else f"{opacity:.2f}")

    def rect(self, x, y, w, h, *, fill: str = INK, stroke: str | None = None, width: float | None = None,
             opacity: float | None = None, cls: str | None = None) -> None:
        if w < 0:
            x, w = x + w, -w
        self.add("rect", x=_num(x), y=_num(y), width=_num(max(w, 0)), height=_num(max(h, 0)), fill=fill,
                 stroke=stroke, stroke_width=None if width is None else _num(width),
                 opacity=None if opacity in (None, 1) else f"{opacity:.2f}", class_=cls)

    def hatch(self, colour: str) -> str:
        """A diagonal-hatch fill in ``colour`` (one pattern per colour and chart)."""
        if colour not in self._patterns:
            pid = f"{self.prefix}-hatch-{len(self._patterns) + 1}"
            self._patterns[colour] = pid
            self.defs.append(f'<pattern id="{pid}" patternUnits="userSpaceOnUse" width="5" height="5" '
                             f'patternTransform="rotate(45)"><rect width="5" height="5" fill="#ffffff"/>'
                             f'<line x1="0" y1="0" x2="0" y2="5" stroke={_attr(colour)} stroke-width="1.6"/>'
                             f'</pattern>')
        return f"url(#{self._patterns[colour]})"

    def svg(self, height: float) -> str:
        w, h = self.size.width, math.ceil(height)
        defs = f"<defs>{''.join(self.defs)}</defs>" if self.defs else ""
        return (f'<svg class="chart chart-{self.size.name}" data-chart="{self.name}" '
                f'data-size="{self.size.name}" viewBox="0 0 {w} {h}" width="{w}" height="{h}" role="img" '
                f'aria-labelledby="{self.prefix}-title" font-family={_attr(FONT_STACK)}>'
                f'<title id="{self.prefix}-title">{_esc(self.title)}</title>{defs}{"".join(self.parts)}</svg>')


def _both(draw: Callable[[Size], str]) -> str:
    """The chart at every size, one <svg> each; the page shows the one that fits the screen."""
    return "".join(draw(size) for size in SIZES)


# ------------------------------------------------------------------ legend
@dataclass
class _Key:
    label: str
    kind: str                 # "line", "dash", "marker", "box", "outline", "hatch"
    colour: str
    opacity: float = 1.0


def _legend_rows(keys: Sequence[_Key], width: float, size: float) -> list[list[tuple[_Key, float]]]:
    rows: list[list[tuple[_Key, float]]] = [[]]
    used = 0.0
    for k in keys:
        w = 22 + text_width(k.label, size) + 16
        if rows[-1] and used + w > width:
            rows.append([])
            used = 0.0
        rows[-1].append((k, w))
        used += w
    return rows


def _draw_legend(c: _Canvas, keys: Sequence[_Key], x0: float, y0: float, width: float) -> float:
    """Draw the keys flowing left to right from (x0, y0); returns the height used."""
    size = c.size.small
    rows = _legend_rows(keys, width, size)
    line_h = size + 7
    for r, row in enumerate(rows):
        x = x0
        y = y0 + r * line_h + size * 0.5
        for k, w in row:
            if k.kind in ("line", "dash", "marker"):
                c.line(x, y, x + 16, y, stroke=k.colour, width=1.8 if k.kind != "dash" else 1.3,
                       dash="3 2" if k.kind == "dash" else None, opacity=k.opacity)
                if k.kind == "marker":
                    c.add("circle", cx=_num(x + 8), cy=_num(y), r="2.6", fill=k.colour)
            elif k.kind == "outline":
                c.rect(x, y - 5, 16, 10, fill="none", stroke=k.colour, width=1.3, opacity=k.opacity)
            elif k.kind == "hatch":
                c.rect(x, y - 5, 16, 10, fill=c.hatch(k.colour), stroke=k.colour, width=1.0, opacity=k.opacity)
            else:
                c.rect(x, y - 5, 16, 10, fill=k.colour, opacity=k.opacity)
            c.text(x + 22, y + size * 0.36, k.label, size=size, fill=INK)
            x += w
    return len(rows) * line_h


# ------------------------------------------------------------------ trend
def trend_chart(labels: Sequence[str], rates: Sequence[float], *, last_year: Sequence[float] | None = None,
                baseline: float | None = None, baseline_span: int = 4, band: tuple[float, float] | None = None,
                highlight: bool = True, rate_name: str = "rate", name: str = "trend",
                title: str = "Weekly rate") -> str:
    """Rate per block as a line; the last block (this week) marked in the accent colour.

    ``baseline`` is drawn across the ``baseline_span`` blocks before the last;
    ``band`` (low, high) is the normal range of this week's rate given past noise.
    """
    y_vals = [float(v) for v in rates]
    ly_vals = [float(v) for v in last_year] if last_year is not None else []
    has_ly = any(math.isfinite(v) for v in ly_vals)
    n = len(y_vals)

    def draw(size: Size) -> str:
        c = _Canvas(size, name, title)
        keys = ([_Key("same weeks last year", "dash", MUTED)] if has_ly else []) + [_Key(rate_name, "marker", INK)]
        if baseline is not None and math.isfinite(baseline) and n > 1:
            keys.append(_Key(f"previous {baseline_span} (pooled)", "line", ACCENT, 0.8))
        if band is not None and all(math.isfinite(b) for b in band):
            keys.append(_Key("normal range (±2 sd)", "box", ACCENT, 0.15))
        top_y = 4 + _draw_legend(c, keys, 4, 4, size.width - 8) + 8
        plot_h = 190 if size is WIDE else 170
        finite = [v for v in y_vals + ly_vals if math.isfinite(v)]
        if band is not None and all(math.isfinite(b) for b in band):
            finite.append(band[1])
        top = max(finite) if finite else 0.01
        ticks = nice_ticks(0.0, top * 1.1 if top > 0 else 0.01, 5)
        fmt = percent_format(ticks)
        left = max(text_width(fmt(t), size.small) for t in ticks) + 10
        right = max(8.0, text_width(label(labels[-1], 12), size.small) / 2 + 2) if n else 8.0
        x0, x1 = left, size.width - right
        y0, y1 = top_y, top_y + plot_h
        hi = ticks[-1]

        def X(i: float) -> float:
            return x0 + (i + 0.6) / max(n, 1) * (x1 - x0)

        def Y(v: float) -> float:
            return y1 - v / hi * (y1 - y0)

        for t in ticks:
            c.line(x0, Y(t), x1, Y(t), stroke=GRID, width=0.8)
            c.text(x0 - 6, Y(t) + size.small * 0.35, fmt(t), size=size.small, anchor="end")
        if band is not None and all(math.isfinite(b) for b in band) and n:
            c.rect(X(n - 1.35), Y(min(band[1], hi)), X(n - 0.65) - X(n - 1.35),
                   Y(band[0]) - Y(min(band[1], hi)), fill=ACCENT, opacity=0.12)
        if has_ly:
            for seg in _segments(ly_vals):
                c.add("polyline", points=" ".join(f"{_num(X(i))},{_num(Y(v))}" for i, v in seg), fill="none",
                      stroke=MUTED, stroke_width="1.3", stroke_dasharray="3 2")
        if baseline is not None and math.isfinite(baseline) and n > 1:
            lo = max(0, n - 1 - baseline_span)
            c.line(X(lo), Y(baseline), X(n - 2), Y(baseline), stroke=ACCENT, width=1.4, opacity=0.8)
        for seg in _segments(y_vals):
            if len(seg) > 1:
                c.add("polyline", points=" ".join(f"{_num(X(i))},{_num(Y(v))}" for i, v in seg), fill="none",
                      stroke=INK, stroke_width="1.8", stroke_linejoin="round")
            for i, v in seg:
                c.add("circle", cx=_num(X(i)), cy=_num(Y(v)), r="2.2", fill=INK)
        if highlight and n and math.isfinite(y_vals[-1]):
            x, y = X(n - 1), Y(y_vals[-1])
            c.add("circle", cx=_num(x), cy=_num(y), r="5", fill=ACCENT)
            c.text(x - 9, max(y - 9, y0 + size.font), percent(y_vals[-1]), size=size.font, anchor="end",
                   fill=ACCENT, bold=True)
        step = max(1, math.ceil(n / (7 if size is WIDE else 4)))
        for i in range(n - 1, -1, -step):
            c.text(X(i), y1 + size.small + 5, label(labels[i], 12), size=size.small, anchor="middle")
        c.line(x0, y1, x1, y1, stroke=GRID, width=1.0)
        return c.svg(y1 + size.small + 10)

    return _both(draw)


def _segments(values: Sequence[float]) -> list[list[tuple[int, float]]]:
    """Runs of finite values (a gap where a block had no posts)."""
    out: list[list[tuple[int, float]]] = []
    run: list[tuple[int, float]] = []
    for i, v in enumerate(values):
        if math.isfinite(v):
            run.append((i, v))
        elif run:
            out.append(run)
            run = []
    if run:
        out.append(run)
    return out


# ------------------------------------------------------------------ horizontal bars
@dataclass
class Bar:
    value: float
    colour: str = INK
    style: str = "solid"          # "solid", "outline" or "hatch"
    opacity: float = 1.0
    text: str = ""                # value label at the bar's end
    text_colour: str = INK
    bold: bool = False
    low: float = float("nan")     # whisker (interval), drawn when both ends are finite
    high: float = float("nan")


@dataclass
class Row:
    label: str
    bars: list[Bar]
    colour: str = INK
    bold: bool = False


@dataclass
class _Axis:
    """The value axis: range to cover, and the one tick format for the ticks chosen at each size."""

    lo: float
    hi: float
    formatter: Callable[[Sequence[float]], Callable[[float], str]]
    xlabel: str = ""
    keys: list[_Key] = field(default_factory=list)
    fixed: Sequence[float] | None = None          # ticks to use at every size

    def ticks(self, size: Size) -> list[float]:
        return list(self.fixed) if self.fixed is not None else nice_ticks(self.lo, self.hi, 6 if size is WIDE else 4)


def _hbars(rows: Sequence[Row], axis: _Axis, size: Size, name: str, title: str) -> str:
    """Horizontal bars, grouped per row: labels in a left column (wide) or above each group (narrow)."""
    c = _Canvas(size, name, title)
    W = size.width
    bar_h, gap = (13.0, 3.0) if size is WIDE else (12.0, 3.0)
    ticks = axis.ticks(size)
    fmt = axis.formatter(ticks)
    lo, hi = ticks[0], ticks[-1]
    vals = [b for r in rows for b in r.bars]
    # Room for value labels beyond the bar ends, so none runs out of the chart.
    right_text = max([text_width(b.text, size.small, b.bold) + 6 for b in vals if b.text and b.value >= 0] + [0])
    left_text = max([text_width(b.text, size.small, b.bold) + 6 for b in vals if b.text and b.value < 0] + [0])
    edge = text_width(fmt(hi), size.small) / 2 + 2
    if size.labels_above:
        label_w = 0.0
        wrapped = [wrap(r.label, W - 8, size.font, bold=r.bold) for r in rows]
    else:
        widest = max([text_width(r.label, size.font, r.bold) for r in rows] + [0])
        label_w = 4 + min(widest, W * 0.4) + 10
        wrapped = [wrap(r.label, label_w - 14, size.font, bold=r.bold) for r in rows]
    x0 = label_w + max(left_text, text_width(fmt(lo), size.small) / 2 + 2)
    x1 = W - max(right_text, edge)

    def X(v: float) -> float:
        v = min(max(v, lo), hi)
        return x0 + (v - lo) / (hi - lo) * (x1 - x0)

    y = 6.0
    line_h = size.font + 3
    spans = []
    for r, lines in zip(rows, wrapped):
        group_h = len(r.bars) * bar_h + (len(r.bars) - 1) * gap
        if size.labels_above:
            for i, text in enumerate(lines):
                c.text(2, y + size.font + i * line_h, text, fill=r.colour, bold=r.bold)
            y += len(lines) * line_h + 3
        else:
            text_h = len(lines) * line_h
            block = max(group_h, text_h)
            ty = y + block / 2 - text_h / 2 + size.font * 0.85
            for i, text in enumerate(lines):
                c.text(label_w - 10, ty + i * line_h, text, anchor="end", fill=r.colour, bold=r.bold)
            y += (block - group_h) / 2
        spans.append((y, group_h))
        y += group_h + (12 if size.labels_above else (block - group_h) / 2 + 11)
    plot_top, plot_bottom = 0.0, y - 6
    # Grid and zero line behind the bars; with labels above the bars, only beside the bars, never through a label.
    bands = [(gy - 4, gy + gh + 4) for gy, gh in spans] if size.labels_above else [(plot_top, plot_bottom)]
    for top, bottom in bands:
        for t in ticks:
            c.line(X(t), top, X(t), bottom, stroke=GRID, width=0.8)
        if lo < 0 < hi:
            c.line(X(0), top, X(0), bottom, stroke=INK, width=1.0)
    for r, (gy, _gh) in zip(rows, spans):
        for j, b in enumerate(r.bars):
            by = gy + j * (bar_h + gap)
            if not math.isfinite(b.value):
                if b.text:
                    c.text(X(max(lo, 0)) + 4, by + bar_h * 0.5 + size.small * 0.35, b.text, size=size.small,
                           fill=b.text_colour)
                continue
            base = X(max(lo, min(0.0, hi)))
            end = X(b.value)
            if b.style == "outline":
                c.rect(base, by + 0.65, end - base, bar_h - 1.3, fill="none", stroke=b.colour, width=1.3,
                       opacity=b.opacity, cls="bar")
            elif b.style == "hatch":
                c.rect(base, by + 0.5, end - base, bar_h - 1, fill=c.hatch(b.colour), stroke=b.colour, width=1.0,
                       opacity=b.opacity, cls="bar")
            else:
                c.rect(base, by, end - base, bar_h, fill=b.colour, opacity=b.opacity, cls="bar")
            tip = end
            if math.isfinite(b.low) and math.isfinite(b.high):
                xl, xh = X(b.low), X(b.high)
                cy = by + bar_h / 2
                op = 0.9 if b.opacity >= 1 else 0.5
                c.line(xl, cy, xh, cy, stroke=INK, width=1.2, opacity=op)
                c.line(xl, cy - 4.5, xl, cy + 4.5, stroke=INK, width=1.2, opacity=op)
                c.line(xh, cy - 4.5, xh, cy + 4.5, stroke=INK, width=1.2, opacity=op)
                tip = xh if b.value >= 0 else xl
            if b.text:
                if b.value >= 0:
                    c.text(max(tip, end) + 4, by + bar_h * 0.5 + size.small * 0.35, b.text, size=size.small,
                           fill=b.text_colour, bold=b.bold)
                else:
                    c.text(min(tip, end) - 4, by + bar_h * 0.5 + size.small * 0.35, b.text, size=size.small,
                           fill=b.text_colour, bold=b.bold, anchor="end")
    y = plot_bottom + 4
    for t in ticks:
        c.text(X(t), y + size.small, fmt(t), size=size.small, anchor="middle")
    y += size.small + 8
    if axis.xlabel:
        centre = (x0 + x1) / 2
        if size.labels_above or text_width(axis.xlabel, size.small) > 2 * min(centre, W - centre) - 4:
            centre = W / 2
        lines = wrap(axis.xlabel, 2 * min(centre, W - centre) - 4, size.small)
        for i, text in enumerate(lines):
            c.text(centre, y + size.small + i * (size.small + 3), text, size=size.small, anchor="middle", fill=INK)
        y += len(lines) * (size.small + 3) + 6
    if axis.keys:
        y += _draw_legend(c, axis.keys, 4 if size.labels_above else label_w, y, W - 8 - (0 if size.labels_above
                                                                                      else label_w))
    return c.svg(y + 4)


def _bar_chart(rows: Sequence[Row], axis: _Axis, name: str, title: str) -> str:
    return _both(lambda size: _hbars(rows, axis, size, name, title))


def channel_bars(channels: Sequence[str], base: Sequence[float], current: Sequence[float],
                 colours: dict[str, str], *, highlight: str | None = None, base_label: str = "previous 4 weeks",
                 current_label: str = "this week", name: str = "channels",
                 title: str = "Rate by channel") -> str:
    """Channels side by side: the previous period as an outlined bar, this one solid, in the channel's colour."""
    rows = []
    values = []
    for ch, old, cur in zip(channels, base, current):
        old, cur = float(old), float(cur)
        col = colours.get(ch, NO_CHANNEL_COLOUR)
        alpha = 1.0 if (highlight is None or ch == highlight) else FADE + 0.15
        rows.append(Row(label(ch), [
            Bar(old, col, "outline", alpha, percent(old, missing=""), MUTED),
            Bar(cur, col, "solid", alpha, percent(cur, missing="no posts"),
                INK if math.isfinite(cur) else MUTED, bold=ch == highlight),
        ], bold=ch == highlight))
        values += [v for v in (old, cur) if math.isfinite(v)]
    axis = _Axis(0.0, max(values + [0.001]), percent_format, keys=[_Key(base_label, "outline", MUTED),
                                                                     _Key(current_label, "box", MUTED)])
    return _bar_chart(rows, axis, name, title)


def shift_share_chart(groups: Sequence[str], mix: Sequence[float], within: Sequence[float],
                      colours: dict[str, str], *, highlight: str | None = None, name: str = "shift-share",
                      title: str = "Change split into mix and performance") -> str:
    """Per channel, the change in points from mix (hatched) and from performance within it (solid)."""
    m_all, w_all = float(sum(mix)), float(sum(within))
    entries = [("all channels", m_all, w_all, INK, True, True)] + [
        (label(g), float(m), float(w), colours.get(g, NO_CHANNEL_COLOUR), highlight is None or g == highlight, False)
        for g, m, w in zip(groups, mix, within)]
    span = max([abs(v) for _, m, w, *_ in entries for v in (m, w)] + [1e-5])
    rows = []
    for text, m, w, col, strong, bold in entries:
        alpha = 1.0 if strong else FADE + 0.15
        tcol = INK if strong else MUTED
        rows.append(Row(text, [Bar(m, col, "hatch", alpha, fmt_points(m), tcol),
                               Bar(w, col, "solid", alpha, fmt_points(w), tcol)], bold=bold))
    axis = _Axis(-span, span, points_format, "change in the pooled rate, percentage points",
                 [_Key("mix (how much was posted where)", "hatch", MUTED),
                  _Key("performance within the channel", "box", MUTED)])
    return _bar_chart(rows, axis, name, title)


def fmt_points(v: float) -> str:
    """A bar's label in percentage points, without the unit (the axis names it)."""
    return percentage_points(v, 2, minus=MINUS, unit="")


def interval_bars(labels: Sequence[str], effects: Sequence[float], low: Sequence[float], high: Sequence[float], *,
                  colours: Sequence[str] | None = None, highlight: Sequence[bool] | None = None,
                  xlabel: str = "effect", percent: bool = False, name: str = "drivers",
                  title: str = "Drivers with 90% intervals") -> str:
    """Horizontal bars with interval whiskers, in the order given; faded unless highlighted."""
    n = len(labels)
    cols = list(colours) if colours is not None else [INK] * n
    strong = list(highlight) if highlight is not None else [True] * n
    rows = [Row(label(t, 80), [Bar(float(e), cols[i], "solid", 1.0 if strong[i] else FADE, low=float(lo),
                                   high=float(hi))], colour=INK if strong[i] else MUTED)
            for i, (t, e, lo, hi) in enumerate(zip(labels, effects, low, high))]
    vals = [v for r in rows for b in r.bars for v in (b.value, b.low, b.high) if math.isfinite(v)]
    span = max([abs(v) for v in vals] + [1e-6])
    lo_v = min(vals + [-span * 0.1])
    hi_v = max(vals + [span * 0.1])
    return _bar_chart(rows, _Axis(lo_v, hi_v, signed_percent_format if percent else signed_format, xlabel),
                      name, title)


def probability_bars(labels: Sequence[str], probs: Sequence[float], *, highlight: int | None = None,
                     colour: str = INK, name: str = "experiment", title: str = "Probability of being best") -> str:
    """P(best) per arm as bars from 0 to 1; the leading arm highlighted."""
    rows = []
    for i, (t, p) in enumerate(zip(labels, probs)):
        strong = highlight is None or i == highlight
        rows.append(Row(label(t, 90), [Bar(float(p), colour if strong else MUTED, "solid", 1.0 if strong else 0.55,
                                           percent(p, 0), INK, bold=i == highlight)],
                        bold=i == highlight))
    return _bar_chart(rows, _Axis(0.0, 1.0, lambda _t: percent_format([0.0, 0.5]), fixed=[0.0, 0.25, 0.5, 0.75, 1.0]),
                      name, title)


# ------------------------------------------------------------------ checking
ALLOWED_ELEMENTS = {"svg", "title", "defs", "pattern", "rect", "line", "polyline", "circle", "text"}
ALLOWED_ATTRIBUTES = {
    "class", "data-chart", "data-size", "viewBox", "width", "height", "role", "aria-labelledby", "font-family",
    "id", "patternUnits", "patternTransform", "x", "y", "x1", "y1", "x2", "y2", "cx", "cy", "r", "points",
    "fill", "stroke", "stroke-width", "stroke-dasharray", "stroke-linejoin", "opacity", "font-size",
    "font-weight", "text-anchor",
}
_SAFE_VALUE = re.compile(r"^(?:url\(#[a-z0-9-]+\)|rotate\(-?\d+\)|[^()&<>\"':;\\]*)$", re.I)


def check_svg(svg: str) -> list[str]:
    """Problems that would make ``svg`` unsafe to embed in a page; an empty list when it is plain.

    Parses the markup (so escaped text such as ``&lt;script&gt;`` or the words
    "JavaScript: first steps" is text, not a finding) and checks every element
    and attribute name against the small set the charts use, and every
    attribute value for anything that could fetch or run something (only
    ``url(#local-id)`` references are allowed).
    """
    import xml.etree.ElementTree as ET

    try:
        root = ET.fromstring(f"<charts>{svg}</charts>")
    except ET.ParseError as exc:
        return [f"not well-formed XML ({exc})"]
    problems = []
    for el in root.iter():
        if el is root:
            continue
        if el.tag not in ALLOWED_ELEMENTS:
            problems.append(f"element <{el.tag}>")
        for key, value in el.attrib.items():
            if key not in ALLOWED_ATTRIBUTES:
                problems.append(f"attribute {key!r} on <{el.tag}>")
            elif key == "font-family" and value != FONT_STACK:
                problems.append(f"font-family {value!r} on <{el.tag}>")
            elif key != "font-family" and not _SAFE_VALUE.match(value):
                problems.append(f"value {value!r} of {key!r} on <{el.tag}>")
    if len(root) == 0 or any(child.tag != "svg" for child in root):
        problems.append("not a sequence of <svg> elements")
    return problems

"""Inline SVG figures for the HTML report, drawn from plain numbers.

Nothing here knows the report's layout: :mod:`samesource.output.report_html` picks the numbers and
the words, these functions only draw. Every figure is a self-contained ``<svg>`` element with
``role="img"``, a ``<title>`` and a ``<desc>`` (screen readers announce both), a ``viewBox``
so it scales to any width, and no reference to anything outside the page. Meaning never rests
on colour alone: the preferred estimate is a diamond and says "preferred", a value below its
threshold is a hollow triangle and carries a cross.
"""

from __future__ import annotations

import math
import re
from collections.abc import Sequence
from dataclasses import dataclass
from html import escape

# Palette: every text colour reaches WCAG AA (4.5:1) on white and on the light fills used.
INK = "#1f2933"
MUTED = "#4a5866"
GRID = "#d9e2ec"
AXIS = "#7b8794"
ACCENT = "#1d4e89"
BAND = "#c9daf0"
HIGHLIGHT = "#a2430f"
HIGHLIGHT_BG = "#fbeadc"
FAIL = "#a61b1b"
SHADE = "#eceff3"
REFERENCE = "#2f6b3a"     # a benchmark line (the cross-source estimate)
REFERENCE_BG = "#d8eddc"  # its interval
FONT = "system-ui, -apple-system, 'Segoe UI', Roboto, 'Helvetica Neue', Arial, sans-serif"


# --------------------------------------------------------------------------- primitives

def _n(x: float) -> str:
    """A coordinate: one decimal is plenty at these sizes and keeps the markup short."""
    s = f"{x:.1f}"
    return s[:-2] if s.endswith(".0") else s


def _attrs(attrs: dict[str, object]) -> str:
    out = []
    for k, v in attrs.items():
        if v is None or v is False:
            continue
        name = k.rstrip("_").replace("_", "-")
        val = _n(v) if isinstance(v, float) else str(v)
        out.append(f' {name}="{escape(val, quote=True)}"')
    return "".join(out)


def el(tag: str, content: str = "", **attrs: object) -> str:
    """An element; ``content`` is markup (already escaped), attribute values are escaped here."""
    if content:
        return f"<{tag}{_attrs(attrs)}>{content}</{tag}>"
    return f"<{tag}{_attrs(attrs)}/>"


def text(x: float, y: float, s: str, **attrs: object) -> str:
    attrs.setdefault("fill", INK)
    return el("text", escape(s), x=float(x), y=float(y), **attrs)


def line(x1: float, y1: float, x2: float, y2: float, **attrs: object) -> str:
    return el("line", x1=float(x1), y1=float(y1), x2=float(x2), y2=float(y2), **attrs)


def rect(x: float, y: float, w: float, h: float, **attrs: object) -> str:
    return el("rect", x=float(x), y=float(y), width=float(max(w, 0.0)), height=float(max(h, 0.0)), **attrs)


def points(pts: Sequence[tuple[float, float]]) -> str:
    return " ".join(f"{_n(x)},{_n(y)}" for x, y in pts)


def svg_figure(body: str, width: float, height: float, *, ident: str, title: str, desc: str) -> str:
    """The outer ``<svg>``: scalable (viewBox), labelled for assistive technology. No style
    attribute: the report's content security policy allows its one stylesheet only, so the
    chart's size on screen is set there (report.css: at most its own width)."""
    return (f'<svg viewBox="0 0 {_n(width)} {_n(height)}" width="{_n(width)}" height="{_n(height)}" '
            f'role="img" aria-labelledby="{escape(ident)}-title {escape(ident)}-desc" '
            f'class="chart" font-family="{escape(FONT, quote=True)}">'
            f'<title id="{escape(ident)}-title">{escape(title)}</title>'
            f'<desc id="{escape(ident)}-desc">{escape(desc)}</desc>{body}</svg>')


def wrap(s: str, width: int) -> list[str]:
    """Greedy word wrap for SVG text, which does not wrap by itself."""
    words, lines, cur = s.split(), [], ""
    for w in words:
        if cur and len(cur) + 1 + len(w) > width:
            lines.append(cur)
            cur = w
        else:
            cur = f"{cur} {w}" if cur else w
    if cur:
        lines.append(cur)
    return lines or [""]


def standalone(chart: str) -> str:
    """An inline chart as an SVG file of its own (the namespace a file needs, a white ground)."""
    if "xmlns=" not in chart[:400]:
        chart = chart.replace("<svg ", '<svg xmlns="http://www.w3.org/2000/svg" ', 1)
    head_end = chart.index(">") + 1
    return ('<?xml version="1.0" encoding="UTF-8"?>\n' + chart[:head_end]
            + '<rect width="100%" height="100%" fill="#ffffff"/>' + chart[head_end:])


def to_png(svg_file: str, scale: float = 2.0) -> bytes | None:
    """The chart as PNG bytes (cairosvg, drawing with the system's cairo library); None if unavailable."""
    try:
        import cairosvg
    except (ImportError, OSError):  # the cairo library is missing on this machine
        return None
    # cairosvg ignores paint-order, so a text's white halo would be painted over its letters
    flat = re.sub(r' stroke="[^"]*" stroke-width="4" paint-order="stroke"( stroke-linejoin="round")?', "", svg_file)
    return cairosvg.svg2png(bytestring=flat.encode("utf-8"), scale=scale)


# --------------------------------------------------------------------------- scales and colour

@dataclass
class Linear:
    """Maps a data interval onto a pixel interval."""

    d0: float
    d1: float
    r0: float
    r1: float

    def __call__(self, v: float) -> float:
        if self.d1 == self.d0:
            return (self.r0 + self.r1) / 2
        return self.r0 + (v - self.d0) / (self.d1 - self.d0) * (self.r1 - self.r0)


def nice_ticks(lo: float, hi: float, count: int = 5) -> list[float]:
    """Round tick values covering [lo, hi] (steps of 1, 2 or 5 times a power of ten)."""
    if not (math.isfinite(lo) and math.isfinite(hi)):
        return [0.0]
    if hi <= lo:
        hi = lo + 1.0
    raw = (hi - lo) / max(count, 1)
    mag = 10 ** math.floor(math.log10(raw))
    step = next(m * mag for m in (1, 2, 2.5, 5, 10) if m * mag >= raw)
    start = math.floor(lo / step + 1e-9) * step
    ticks, t = [], start
    while t <= hi + step * 1e-6:
        ticks.append(round(t, 10) + 0.0)
        t += step
    if ticks[-1] < hi - 1e-12:
        ticks.append(round(ticks[-1] + step, 10))
    return ticks


def _rgb(hex_colour: str) -> tuple[int, int, int]:
    h = hex_colour.lstrip("#")
    return int(h[0:2], 16), int(h[2:4], 16), int(h[4:6], 16)


def mix(c0: str, c1: str, t: float) -> str:
    """Colour ``t`` of the way from ``c0`` to ``c1``."""
    t = min(max(t, 0.0), 1.0)
    a, b = _rgb(c0), _rgb(c1)
    return "#" + "".join(f"{round(x + (y - x) * t):02x}" for x, y in zip(a, b, strict=True))


def luminance(colour: str) -> float:
    """Relative luminance (WCAG 2.x)."""
    def ch(c: int) -> float:
        c = c / 255
        return c / 12.92 if c <= 0.03928 else ((c + 0.055) / 1.055) ** 2.4

    r, g, b = _rgb(colour)
    return 0.2126 * ch(r) + 0.7152 * ch(g) + 0.0722 * ch(b)


def contrast(c0: str, c1: str) -> float:
    """WCAG contrast ratio between two colours (1 to 21)."""
    a, b = sorted((luminance(c0), luminance(c1)), reverse=True)
    return (a + 0.05) / (b + 0.05)


def text_on(background: str) -> str:
    """Dark or white text, whichever contrasts more with the cell."""
    return INK if contrast(INK, background) >= contrast("#ffffff", background) else "#ffffff"


# --------------------------------------------------------------------------- forest plot

@dataclass
class ForestRow:
    label: str
    value_text: str  # the numbers as the page prints them, e.g. "0.293 [0.233, 0.354]"
    estimate: float | None = None
    lo: float | None = None
    hi: float | None = None
    preferred: bool = False
    unavailable: str | None = None  # "not available: <why>" when there is no estimate
    highlight_word: str = "preferred"  # what the highlighted row is called in its label


@dataclass
class Reference:
    """A benchmark drawn behind every row: its value as a solid line, its interval as a band."""

    label: str
    estimate: float
    lo: float | None = None
    hi: float | None = None


def forest_plot(rows: Sequence[ForestRow], *, ident: str, title: str, desc: str,
                axis_label: str = "standardized estimate", reference: Reference | None = None) -> str:
    """Every estimate of one path as a point with its interval; zero line; preferred highlighted.

    One line per estimate: its label at the left, level with its point and interval in the
    middle, the numbers in a column of their own at the right, so no grid line crosses a number.
    ``reference``: a benchmark (the cross-source estimate, say) as a band behind the rows.
    """
    W, pad, lab_w, val_w = 760.0, 12.0, 236.0, 176.0
    x0, x1 = lab_w + 10, W - pad - val_w - 8
    vals = [0.0]
    for r in rows:
        vals += [v for v in (r.estimate, r.lo, r.hi) if v is not None and math.isfinite(v)]
    if reference is not None:
        vals += [v for v in (reference.estimate, reference.lo, reference.hi) if v is not None and math.isfinite(v)]
    lo, hi = min(vals), max(vals)
    span = max(hi - lo, 0.1)
    ticks = nice_ticks(lo - 0.04 * span, hi + 0.04 * span, 5)
    sx = Linear(ticks[0], ticks[-1], x0, x1)

    body: list[str] = []
    y = 6.0
    layout: list[tuple[ForestRow, float, float, list[str], list[str]]] = []
    for r in rows:
        label = r.label + (f" ({r.highlight_word})" if r.preferred else "")
        label_lines = wrap(label, 30)
        note_lines = wrap(r.unavailable, 60) if r.unavailable else []
        h = 12.0 + 17.0 * max(len(label_lines), len(note_lines), 1)
        layout.append((r, y, h, label_lines, note_lines))
        y += h
    plot_bottom = y + 4
    H = plot_bottom + 44 + (20 if reference is not None else 0)

    for r, top, h, _, _ in layout:
        if r.preferred:
            body.append(rect(2, top, W - 4, h, fill=HIGHLIGHT_BG, rx=4))
    for t in ticks:  # grid under the data
        body.append(line(sx(t), 4, sx(t), plot_bottom, stroke=GRID, stroke_width=1))
    body.append(line(sx(0.0), 4, sx(0.0), plot_bottom, stroke=INK, stroke_width=1.5, stroke_dasharray="5 4"))
    if reference is not None:
        if reference.lo is not None and reference.hi is not None:
            body.append(rect(sx(reference.lo), 4, max(sx(reference.hi) - sx(reference.lo), 1.0), plot_bottom - 4,
                             fill=REFERENCE_BG))
        body.append(line(sx(reference.estimate), 4, sx(reference.estimate), plot_bottom, stroke=REFERENCE,
                         stroke_width=2.5))
    for r, top, _h, label_lines, note_lines in layout:
        halo = HIGHLIGHT_BG if r.preferred else "#ffffff"
        cy = top + 14.0  # level with the label's first line (its baseline is 5 px below)
        for i, ln in enumerate(label_lines):
            body.append(text(pad, top + 19 + 17 * i, ln, font_size=14, font_weight="700" if r.preferred else None))
        if note_lines:
            for i, ln in enumerate(note_lines):
                body.append(text(x0, top + 19 + 17 * i, ln, font_size=13, fill=MUTED, font_style="italic",
                                 stroke=halo, stroke_width=4, paint_order="stroke", stroke_linejoin="round"))
            continue
        body.append(text(W - pad, cy + 5, r.value_text, font_size=14, text_anchor="end",
                         font_weight="700" if r.preferred else None))
        colour = HIGHLIGHT if r.preferred else ACCENT
        if r.lo is not None and r.hi is not None:
            body.append(line(sx(r.lo), cy, sx(r.hi), cy, stroke=colour, stroke_width=4 if r.preferred else 2.5,
                             stroke_linecap="round"))
        if r.estimate is not None:
            cx = sx(r.estimate)
            if r.preferred:
                d = 8.0
                body.append(el("polygon", points=points([(cx, cy - d), (cx + d, cy), (cx, cy + d), (cx - d, cy)]),
                               fill=colour, stroke="#ffffff", stroke_width=1.5))
            else:
                body.append(el("circle", cx=float(cx), cy=float(cy), r=5.5, fill=colour, stroke="#ffffff",
                               stroke_width=1.5))
    body.append(line(x0, plot_bottom, x1, plot_bottom, stroke=AXIS, stroke_width=1))
    for t in ticks:
        body.append(line(sx(t), plot_bottom, sx(t), plot_bottom + 5, stroke=AXIS))
        body.append(text(sx(t), plot_bottom + 20, fmt_tick(t), font_size=13, text_anchor="middle", fill=MUTED))
    body.append(text((x0 + x1) / 2, plot_bottom + 38, axis_label, font_size=13, text_anchor="middle", fill=MUTED))
    body.append(text(W - pad, plot_bottom + 20, "estimate [interval]", font_size=13, text_anchor="end", fill=MUTED))
    if reference is not None:
        body.append(rect(x0, plot_bottom + 48, 14, 10, fill=REFERENCE_BG, stroke=REFERENCE, stroke_width=1.5))
        body.append(text(x0 + 20, plot_bottom + 57, reference.label, font_size=13, fill=INK))
    return svg_figure("".join(body), W, H, ident=ident, title=title, desc=desc)


def fmt_tick(t: float) -> str:
    s = f"{t:.2f}".rstrip("0").rstrip(".")
    if s in ("-0", ""):
        s = "0"
    return s.replace("-", "\u2212")


# --------------------------------------------------------------------------- sensitivity curve

@dataclass
class Marker:
    share: float
    label: str
    style: str  # "estimated" | "break_even" | "ci_zero"


def sensitivity_plot(curve: Sequence[tuple[float, float | None, float | None, float | None]], *,
                     markers: Sequence[Marker], holds_up_to: float | None, ident: str, title: str,
                     desc: str, x_max: float = 0.5, band_label: str = "interval",
                     published: tuple[float, float] | None = None,
                     estimated_ci: tuple[float, float] | None = None) -> str:
    """Estimate (line) and interval (band) against the assumed method share, with markers.

    ``published``: the range of method shares published reviews report, hatched across the plot;
    ``estimated_ci``: the interval of the estimated share, a bracket on the x axis.
    """
    W = 560.0
    label_rows = max(len(markers), 1)
    top = 14.0 + 18.0 * label_rows
    left, right, bottom = 62.0, 18.0, 56.0
    ph = 230.0
    H = top + ph + bottom
    pts = [(s, e, lo, hi) for s, e, lo, hi in curve if s is not None and e is not None]
    vals = [0.0] + [v for _, e, lo, hi in pts for v in (e, lo, hi) if v is not None]
    lo_v, hi_v = min(vals), max(vals)
    span = max(hi_v - lo_v, 0.1)
    yt = nice_ticks(lo_v - 0.03 * span, hi_v + 0.03 * span, 6)
    sx = Linear(0.0, x_max, left, W - right)
    sy = Linear(yt[0], yt[-1], top + ph, top)

    body: list[str] = []
    if holds_up_to is not None and holds_up_to < x_max:
        xs = sx(holds_up_to)
        body.append(rect(xs, top, W - right - xs, ph, fill=SHADE))
        lines = wrap("beyond what the model can hold", 18)
        for i, ln in enumerate(lines):
            body.append(text((xs + W - right) / 2, top + 18 + 15 * i, ln, font_size=12.5,
                             text_anchor="middle", fill=MUTED))
    if published is not None:
        p0, p1 = (sx(min(max(v, 0.0), x_max)) for v in published)
        body.append(el("pattern", line(0, 0, 0, 8, stroke="#b9c3cf", stroke_width=3), id=f"{ident}-hatch",
                       width=8, height=8, patternUnits="userSpaceOnUse", patternTransform="rotate(45)"))
        body.append(rect(p0, top, p1 - p0, ph, fill=f"url(#{ident}-hatch)", opacity="0.6"))
        body.append(text(p0 + 5, top + 16, "published range", font_size=12.5, text_anchor="start",
                         fill=INK, stroke="#ffffff", stroke_width=4, paint_order="stroke"))
    for t in yt:
        body.append(line(left, sy(t), W - right, sy(t), stroke=GRID))
        body.append(text(left - 8, sy(t) + 4.5, fmt_tick(t), font_size=13, text_anchor="end", fill=MUTED))
    xt = [i * 0.1 for i in range(int(round(x_max * 10)) + 1)]
    for t in xt:
        body.append(line(sx(t), top + ph, sx(t), top + ph + 5, stroke=AXIS))
        body.append(text(sx(t), top + ph + 20, f"{t:.0%}", font_size=13, text_anchor="middle", fill=MUTED))
    body.append(line(left, top + ph, W - right, top + ph, stroke=AXIS))
    body.append(text((left + W - right) / 2, top + ph + 42, "assumed method share of every item's variance",
                     font_size=13, text_anchor="middle", fill=MUTED))
    body.append(text(16, top + ph / 2, "standardized estimate", font_size=13, text_anchor="middle", fill=MUTED,
                     transform=f"rotate(-90 16 {_n(top + ph / 2)})"))
    banded = [(s, lo, hi) for s, _, lo, hi in pts if lo is not None and hi is not None]
    if len(banded) >= 2:
        poly = [(sx(s), sy(hi)) for s, _, hi in banded] + [(sx(s), sy(lo)) for s, lo, _ in reversed(banded)]
        body.append(el("polygon", points=points(poly), fill=BAND, stroke="none"))
    if yt[0] <= 0 <= yt[-1]:
        body.append(line(left, sy(0), W - right, sy(0), stroke=INK, stroke_width=1.5))
    if pts:
        body.append(el("polyline", points=points([(sx(s), sy(e)) for s, e, _, _ in pts]), fill="none",
                       stroke=ACCENT, stroke_width=2.5, stroke_linejoin="round"))
        for s, e, _, _ in pts:
            body.append(el("circle", cx=sx(s), cy=sy(e), r=3, fill=ACCENT))
    styles = {"estimated": dict(stroke=HIGHLIGHT, stroke_width=2.5),
              "break_even": dict(stroke=INK, stroke_width=2, stroke_dasharray="7 4"),
              "ci_zero": dict(stroke=INK, stroke_width=2, stroke_dasharray="2 3")}
    if estimated_ci is not None:
        c0, c1 = (sx(min(max(v, 0.0), x_max)) for v in estimated_ci)
        yb = top + ph - 3
        body.append(line(c0, yb, c1, yb, stroke=HIGHLIGHT, stroke_width=5, stroke_linecap="butt"))
        for c in (c0, c1):
            body.append(line(c, yb - 7, c, yb + 3, stroke=HIGHLIGHT, stroke_width=2))
    for i, m in enumerate(markers):
        x = sx(min(max(m.share, 0.0), x_max))
        ly = 14.0 + 18.0 * i
        body.append(line(x, ly + 4, x, top + ph, **styles.get(m.style, styles["break_even"])))
        # to the right of its line unless it would run off the plot (about 7.5 px per character)
        anchor = "end" if x + 6 + 7.5 * len(m.label) > W - right else "start"
        dx = -6 if anchor == "end" else 6
        body.append(text(x + dx, ly + 8, m.label, font_size=13, text_anchor=anchor,
                         fill=HIGHLIGHT if m.style == "estimated" else INK, font_weight="600",
                         stroke="#ffffff", stroke_width=4, paint_order="stroke", stroke_linejoin="round"))
    return svg_figure("".join(body), W, H, ident=ident, title=title, desc=desc)


def _clip(s: str, n: int) -> str:
    return s if len(s) <= n else s[: n - 1] + "\u2026"


# --------------------------------------------------------------------------- heat map

@dataclass
class HeatColumn:
    label: str
    high: str  # colour at the top of the scale
    top: float  # value that gets the full colour (absolute values)
    span_groups: bool = False  # one cell per group (construct-level value), spanning its rows


@dataclass
class HeatGroup:
    label: str
    rows: list[str]
    # per column: span columns hold one (value, text); item columns a list of (value, text) per row
    cells: list[list[tuple[float | None, str]]]


def heat_map(groups: Sequence[HeatGroup], columns: Sequence[HeatColumn], *, ident: str, title: str,
             desc: str) -> str:
    """Items in rows (grouped by construct), one column per quantity; each cell prints its value."""
    lab_w, col_w, row_h, grp_h = 112.0, 116.0, 24.0, 26.0
    head_lines = [wrap(c.label, 13) for c in columns]
    head = 14.0 + 16.0 * max((len(h) for h in head_lines), default=1)
    W = lab_w + col_w * len(columns) + 4
    n_rows = sum(len(g.rows) for g in groups)
    H = head + grp_h * len(groups) + row_h * n_rows + 6
    body: list[str] = []
    for j, hl in enumerate(head_lines):
        cx = lab_w + col_w * j + col_w / 2
        for i, ln in enumerate(hl):
            body.append(text(cx, 16 + 16 * i, ln, font_size=13, text_anchor="middle", font_weight="700"))
    y = head
    for g in groups:
        body.append(rect(0, y, W, grp_h, fill=SHADE))
        body.append(text(8, y + 17.5, _clip(g.label, 40), font_size=13.5, font_weight="700"))
        y += grp_h
        for i, item in enumerate(g.rows):
            body.append(text(lab_w - 10, y + row_h * i + 16.5, _clip(item, 13), font_size=13, text_anchor="end"))
        for j, c in enumerate(columns):
            cells = g.cells[j] if j < len(g.cells) else []
            x = lab_w + col_w * j
            if c.span_groups:
                v, t = cells[0] if cells else (None, "\u2014")
                body.append(_cell(x, y, col_w, row_h * max(len(g.rows), 1), v, t, c))
            else:
                for i in range(len(g.rows)):
                    v, t = cells[i] if i < len(cells) else (None, "\u2014")
                    body.append(_cell(x, y + row_h * i, col_w, row_h, v, t, c))
        y += row_h * len(g.rows)
    return svg_figure("".join(body), W, H, ident=ident, title=title, desc=desc)


def heat_fill(high: str, t: float) -> str:
    """The cell colour for a value ``t`` of the way up the scale (0-1).

    No text colour reaches 4.5:1 on every mid-tone, so the scale stops where dark text still
    does: the darkest cell is the deepest mix of ``high`` that keeps INK readable.
    """
    lo, hi = 0.0, 1.0
    for _ in range(30):  # bisection for the deepest readable mix
        mid = (lo + hi) / 2
        if contrast(INK, mix("#ffffff", high, mid)) >= 4.6:
            lo = mid
        else:
            hi = mid
    return mix("#ffffff", high, min(max(t, 0.0), 1.0) * lo)


def _cell(x: float, y: float, w: float, h: float, v: float | None, t: str, c: HeatColumn) -> str:
    if v is None:
        fill = "#f7f8fa"
    else:
        fill = heat_fill(c.high, abs(v) / c.top if c.top > 0 else 0.0)
    out = rect(x + 1, y + 1, w - 2, h - 2, fill=fill, stroke="#ffffff")
    out += text(x + w / 2, y + h / 2 + 4.5, t, font_size=13, text_anchor="middle",
                fill=MUTED if v is None else text_on(fill))
    return out


__all__ = ["standalone", "to_png", "ForestRow", "HeatColumn", "HeatGroup", "Linear", "Marker", "contrast", "forest_plot",
           "heat_fill", "heat_map", "mix", "nice_ticks", "sensitivity_plot", "svg_figure", "text_on",
           "wrap"]

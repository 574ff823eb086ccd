"""The report's pictures as plain SVG text: no plotting library, no fonts to find.

Each picture is drawn from the small, already sampled data of
:mod:`panelprep.figures` (at most a few hundred entities and periods, a few
dozen bars), so drawing costs the same at a thousand rows as at a hundred
million.  Text is left to the browser's own sans-serif font, so every script
a variable or an id is written in shows as the browser shows it.

Coordinates are in CSS pixels; every picture scales to the page width
(``viewBox`` with ``width="100%"``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from html import escape
from typing import Any

import numpy as np

FONT = "system-ui, -apple-system, 'Segoe UI', Roboto, 'Noto Sans', sans-serif"


@dataclass(frozen=True)
class Palette:
    ink: str
    muted: str
    rule: str
    fill: str
    accent: str
    absent: str


@dataclass
class Canvas:
    """An SVG picture being drawn: a list of elements and a size."""

    width: float
    height: float
    parts: list[str] = field(default_factory=list)
    # cells that tile the plane: no anti-aliased seams between neighbours
    crisp: bool = False

    def rect(self, x: float, y: float, w: float, h: float, fill: str, extra: str = "") -> None:
        self.parts.append(f'<rect x="{x:.2f}" y="{y:.2f}" width="{max(w, 0):.2f}" '
                          f'height="{max(h, 0):.2f}" fill="{fill}"{extra}/>')

    def line(self, x1: float, y1: float, x2: float, y2: float, stroke: str,
             width: float = 1.0) -> None:
        self.parts.append(f'<line x1="{x1:.2f}" y1="{y1:.2f}" x2="{x2:.2f}" y2="{y2:.2f}" '
                          f'stroke="{stroke}" stroke-width="{width:g}"/>')

    def text(self, x: float, y: float, content: str, fill: str, size: float = 11,
             anchor: str = "start", extra: str = "") -> None:
        self.parts.append(f'<text x="{x:.2f}" y="{y:.2f}" font-size="{size:g}" fill="{fill}" '
                          f'text-anchor="{anchor}"{extra}>{escape(content)}</text>')

    def render(self, name: str, title: str) -> str:
        """The picture as one ``<svg>`` element, labelled by its ``<title>``."""
        head = (f'<svg xmlns="http://www.w3.org/2000/svg" role="img" '
                f'aria-labelledby="{name}-title" viewBox="0 0 {self.width:.0f} {self.height:.0f}" '
                f'width="100%" preserveAspectRatio="xMinYMin meet" '
                f'font-family="{escape(FONT, quote=True)}"'
                + (' shape-rendering="crispEdges">' if self.crisp else ">"))
        return "".join([head, f'<title id="{name}-title">{escape(title)}</title>',
                        *self.parts, "</svg>"])


def _short(label: str, most: int) -> str:
    return label if len(label) <= most else label[: most - 1] + "…"


def _nice_step(span: float, most: int) -> float:
    """A step of 1, 2 or 5 times a power of ten giving at most ``most`` ticks over ``span``."""
    if span <= 0:
        return 1.0
    raw = span / max(most, 1)
    power = 10.0 ** math.floor(math.log10(raw))
    for multiple in (1, 2, 5, 10):
        if multiple * power >= raw:
            return multiple * power
    return 10 * power


def _empty(canvas: Canvas, message: str, palette: Palette) -> None:
    canvas.text(canvas.width / 2, canvas.height / 2, message, palette.muted, anchor="middle")


def presence(data: dict[str, Any], palette: Palette, name: str, title: str,
             colours: dict[int, str]) -> str:
    """Entities (rows, sorted by entry then exit) by periods (columns), one colour per state.

    ``colours`` maps each cell state of ``figures.STATE_WORDS`` to a fill; a
    legend above the map names them.
    """
    entities, periods = list(data["entities"]), list(data["periods"])
    rows, columns = len(entities), len(periods)
    labelled = 0 < rows <= 40
    left = 12 + (min(max(len(e) for e in entities), 18) * 6.6 if labelled else 18)
    tilt = columns > 8
    bottom = 62 if tilt else 34
    cell_h = 14.0 if labelled else max(1.0, min(3.0, 420.0 / max(rows, 1)))
    plot_w = 900.0 - left - 12
    plot_h = max(cell_h * rows, 40.0)
    top = 30.0
    canvas = Canvas(900.0, top + plot_h + bottom, crisp=True)
    legend = data.get("legend") or {}
    x = left
    for state, words in legend.items():
        canvas.rect(x, 8, 12, 12, colours[int(state)], f' stroke="{palette.rule}"')
        canvas.text(x + 17, 18, words, palette.ink, size=10)
        x += 30 + 6.2 * len(words)
    if rows == 0 or columns == 0:
        _empty(canvas, "no rows in the sample", palette)
        return canvas.render(name, title)
    cell_w = plot_w / columns
    states = np.asarray(data["states"], dtype=np.int8).reshape(rows, columns)
    # one rectangle per run of equal states in a row, found without a loop over cells
    change = np.ones((rows, columns), dtype=bool)
    change[:, 1:] = states[:, 1:] != states[:, :-1]
    start_r, start_c = np.nonzero(change)
    flat = np.flatnonzero(change.ravel())
    stop = np.append(flat[1:], rows * columns)
    stop_c = np.where(stop // columns == start_r, stop % columns, columns)
    for r, c0, c1 in zip(start_r.tolist(), start_c.tolist(), stop_c.tolist()):
        canvas.rect(left + c0 * cell_w, top + r * cell_h, (c1 - c0) * cell_w, cell_h,
                    colours[int(states[r, c0])])
    if labelled:
        for r, label in enumerate(entities):
            canvas.text(left - 6, top + (r + 0.72) * cell_h, _short(label, 18), palette.ink,
                        size=10, anchor="end")
    else:
        middle = top + cell_h * rows / 2
        canvas.text(12, middle, f"{rows:,} entities, by entry then exit", palette.muted,
                    size=10, anchor="middle", extra=f' transform="rotate(-90 12 {middle:.2f})"')
    _period_axis(canvas, periods, left, cell_w, top + cell_h * rows + 14, tilt, palette)
    canvas.text(left + plot_w / 2, canvas.height - 6, "period", palette.ink, anchor="middle")
    return canvas.render(name, title)


def _period_axis(canvas: Canvas, periods: list[str], left: float, cell_w: float, base: float,
                 tilt: bool, palette: Palette) -> None:
    """At most 14 period labels under columns of width ``cell_w`` starting at ``left``."""
    step = max(1, math.ceil(len(periods) / 14))
    for c in range(0, len(periods), step):
        x = left + (c + 0.5) * cell_w
        if tilt:
            canvas.text(x, base, _short(periods[c], 14), palette.muted, size=10, anchor="end",
                        extra=f' transform="rotate(-40 {x:.2f} {base:.2f})"')
        else:
            canvas.text(x, base, periods[c], palette.muted, size=10, anchor="middle")


def flow(data: dict[str, Any], palette: Palette, name: str, title: str) -> str:
    """Entities present per period (top), and entering / last seen per period (bottom)."""
    periods = list(data["periods"])
    columns = len(periods)
    canvas = Canvas(900.0, 330.0)
    if columns == 0:
        _empty(canvas, "no rows in the sample", palette)
        return canvas.render(name, title)
    left, right = 56.0, 16.0
    plot_w = canvas.width - left - right
    cell_w = plot_w / columns
    tilt = columns > 8
    panels = ((26.0, 120.0, [("present_most", palette.fill, 0.0, 1.0)], "present"),
              (180.0, 80.0, [("entering", palette.accent, 0.0, 0.5),
                             ("last_seen", palette.muted, 0.5, 1.0)], "entering / last seen"))
    canvas.rect(left, 6, 12, 12, palette.fill)
    canvas.text(left + 17, 16, "entities present", palette.ink, size=10)
    canvas.rect(left + 130, 6, 12, 12, palette.accent)
    canvas.text(left + 147, 16, "entering (first period)", palette.ink, size=10)
    canvas.rect(left + 290, 6, 12, 12, palette.muted)
    canvas.text(left + 307, 16, "last seen (last period)", palette.ink, size=10)
    # every entity present in the first period enters there, and every one present in the
    # last is last seen there: those two bars are the grid's edges, written as numbers instead
    edges = {"entering": 0, "last_seen": columns - 1}
    values = {key: list(data[key]) for key in ("present_most", "entering", "last_seen")}
    for key, c in edges.items():
        values[key][c] = 0
    for top, height, series, label in panels:
        tallest = max(max(values[key]) for key, *_ in series) if columns else 0
        ystep = max(1.0, _nice_step(tallest, 3))
        ymax = max(ystep, math.ceil(tallest / ystep) * ystep)
        tick = 0.0
        while tick <= ymax + 1e-9:
            y = top + height - tick / ymax * height
            canvas.line(left, y, left + plot_w, y, palette.rule, 0.8)
            canvas.text(left - 6, y + 4, f"{tick:,.0f}", palette.muted, size=10, anchor="end")
            tick += ystep
        for key, colour, a, b in series:
            for c, value in enumerate(values[key]):
                if value > 0:
                    h = value / ymax * height
                    canvas.rect(left + (c + a) * cell_w + 0.1 * cell_w * (b - a),
                                top + height - h, 0.8 * cell_w * (b - a), h, colour)
        canvas.text(14, top + height / 2, label, palette.ink, size=10, anchor="middle",
                    extra=f' transform="rotate(-90 14 {top + height / 2:.2f})"')
    canvas.text(left + 2, 176, f"{data['entering'][0]:,} enter in the first column",
                palette.accent, size=10)
    canvas.text(left + plot_w - 2, 176, f"{data['last_seen'][-1]:,} last seen in the last",
                palette.muted, size=10, anchor="end")
    _period_axis(canvas, periods, left, cell_w, 280.0, tilt, palette)
    return canvas.render(name, title)


def missing_map(data: dict[str, Any], palette: Palette, name: str, title: str,
                none_label: str = "no cell missing",
                most_label: str = "{share} of the period's rows missing (the most)") -> str:
    """Variables (rows) by periods (columns): darker where a larger share of the cells counts.

    ``data["share"]`` holds one share per variable and period (None where
    there was nothing to count); the legend names a zero share
    ``none_label`` and the largest ``most_label`` (``{share}`` is replaced by
    it, as a percentage).  Also draws the restated share of a comparison.
    """
    variables, periods = list(data["variables"]), list(data["periods"])
    rows, columns = len(variables), len(periods)
    left = 16 + min(max((len(v) for v in variables), default=4), 22) * 6.6
    cell_h = 16.0
    tilt = columns > 8
    top = 30.0
    canvas = Canvas(900.0, top + cell_h * max(rows, 1) + (62 if tilt else 34), crisp=True)
    if rows == 0 or columns == 0:
        _empty(canvas, "no variables", palette)
        return canvas.render(name, title)
    shares = np.array([[np.nan if v is None else v for v in row] for row in data["share"]],
                      dtype=np.float64).reshape(rows, columns)
    worst = float(np.nanmax(shares)) if np.isfinite(shares).any() else 0.0
    plot_w = canvas.width - left - 16
    cell_w = plot_w / columns
    canvas.rect(left, 8, 12, 12, "white", f' stroke="{palette.rule}"')
    canvas.text(left + 17, 18, none_label, palette.ink, size=10)
    canvas.rect(left + 120, 8, 12, 12, palette.accent)
    canvas.text(left + 137, 18, most_label.format(share=f"{100 * worst:.1f}%"), palette.ink,
                size=10)
    for r, label in enumerate(variables):
        y = top + r * cell_h
        canvas.text(left - 8, y + 12, _short(label, 22), palette.ink, size=10, anchor="end")
        canvas.rect(left, y, plot_w, cell_h - 2, "white", f' stroke="{palette.rule}"')
        for c in np.flatnonzero(shares[r] > 0).tolist():
            # a square-root scale, so a few missing cells still show beside a column all missing
            canvas.rect(left + c * cell_w, y, cell_w, cell_h - 2, palette.accent,
                        f' fill-opacity="{0.15 + 0.85 * math.sqrt(shares[r, c] / worst):.3f}"')
    _period_axis(canvas, periods, left, cell_w, top + cell_h * rows + 14, tilt, palette)
    return canvas.render(name, title)


def distribution(values: list[float], weights: list[int], palette: Palette, name: str,
                 title: str, xlabel: str, discrete: bool,
                 span: tuple[float, float] | None = None, marker: float | None = None,
                 marker_label: str = "") -> str:
    """A histogram of distinct values weighted by their entity counts.

    Whole numbers get one bar per value while the range is at most 60 wide,
    else 40 equal bins; other values get 40 bins over ``span``.  ``marker``
    draws a vertical rule (the median) with its label.
    """
    canvas = Canvas(640.0, 260.0)
    if not values:
        _empty(canvas, "no rows in the sample", palette)
        return canvas.render(name, title)
    vals = np.asarray(values, dtype=np.float64)
    wts = np.asarray(weights, dtype=np.float64)
    if discrete and vals.max() - vals.min() <= 60:
        edges = np.arange(vals.min() - 0.5, vals.max() + 1.0)
    else:
        low, high = span if span is not None else (float(vals.min()), float(vals.max()))
        if high <= low:
            low, high = low - 0.5, high + 0.5
        edges = np.linspace(low, high, 41)
    heights, _ = np.histogram(vals, bins=edges, weights=wts)
    left, right, top, bottom = 56.0, 16.0, 22.0, 44.0
    plot_w, plot_h = canvas.width - left - right, canvas.height - top - bottom
    x0, x1 = float(edges[0]), float(edges[-1])
    tallest = float(heights.max()) if heights.size else 0.0
    ystep = max(1.0, _nice_step(tallest, 5))
    ymax = max(ystep, math.ceil(tallest / ystep) * ystep)

    def sx(v: float) -> float:
        return left + (v - x0) / (x1 - x0) * plot_w

    def sy(v: float) -> float:
        return top + plot_h - v / ymax * plot_h

    tick = 0.0
    while tick <= ymax + 1e-9:
        canvas.line(left, sy(tick), left + plot_w, sy(tick), palette.rule, 0.8)
        canvas.text(left - 6, sy(tick) + 4, f"{tick:,.0f}", palette.muted, size=10, anchor="end")
        tick += ystep
    gap = 0.07 * (edges[1] - edges[0])
    for lo, hi, h in zip(edges[:-1].tolist(), edges[1:].tolist(), heights.tolist()):
        if h > 0:
            canvas.rect(sx(lo + gap), sy(h), sx(hi - gap) - sx(lo + gap), sy(0) - sy(h),
                        palette.fill)
    canvas.line(left, sy(0), left + plot_w, sy(0), palette.muted, 1.0)
    xstep = _nice_step(x1 - x0, 8)
    if discrete:
        xstep = max(1.0, round(xstep))
    first = math.ceil(x0 / xstep) * xstep
    x = first
    while x <= x1 + 1e-9:
        canvas.line(sx(x), sy(0), sx(x), sy(0) + 4, palette.muted)
        shown = f"{x:.0f}" if discrete or xstep >= 1 else f"{x:.2f}".rstrip("0").rstrip(".")
        canvas.text(sx(x), sy(0) + 16, shown, palette.muted, size=10, anchor="middle")
        x += xstep
    canvas.text(left + plot_w / 2, canvas.height - 6, xlabel, palette.ink, anchor="middle")
    canvas.text(14, top + plot_h / 2, "entities", palette.ink, anchor="middle",
                extra=f' transform="rotate(-90 14 {top + plot_h / 2:.2f})"')
    if marker is not None and x0 <= marker <= x1:
        canvas.line(sx(marker), top, sx(marker), sy(0), palette.accent, 1.6)
        canvas.text(sx(marker) + 4, top + 10, marker_label, palette.accent, size=10)
    return canvas.render(name, title)


def shares(variables: dict[str, dict], palette: Palette, name: str, title: str,
           first: str, second: str) -> str:
    """One bar per variable split into its within and between shares of variance."""
    names = list(variables)
    canvas = Canvas(800.0, 56.0 + 26.0 * max(len(names), 1))
    if not names:
        _empty(canvas, "no numeric variables", palette)
        return canvas.render(name, title)
    left = 16 + min(max(len(n) for n in names), 22) * 6.6
    plot_w, top = canvas.width - left - 16, 30.0
    canvas.rect(left, 6, 12, 12, palette.fill)
    canvas.text(left + 18, 16, first, palette.ink, size=10)
    canvas.rect(left + 150, 6, 12, 12, palette.accent)
    canvas.text(left + 168, 16, second, palette.ink, size=10)
    for i, label in enumerate(names):
        y = top + i * 26.0
        canvas.text(left - 8, y + 14, _short(label, 22), palette.ink, size=10, anchor="end")
        within = variables[label].get("within")
        if within is None:
            canvas.rect(left, y, plot_w, 18, "white", f' stroke="{palette.muted}" '
                        'stroke-dasharray="3 3"')
            canvas.text(left + plot_w / 2, y + 13, "undefined (no spread, or too few rows or "
                        "entities)", palette.muted, size=10, anchor="middle")
            continue
        canvas.rect(left, y, plot_w * within, 18, palette.fill)
        canvas.rect(left + plot_w * within, y, plot_w * (1 - within), 18, palette.accent)
        if within >= 0.06:
            canvas.text(left + plot_w * within / 2, y + 13, f"{100 * within:.0f}%", "white",
                        size=10, anchor="middle", extra=' font-weight="600"')
        if within <= 0.94:
            canvas.text(left + plot_w * (1 + within) / 2, y + 13, f"{100 * (1 - within):.0f}%",
                        "white", size=10, anchor="middle", extra=' font-weight="600"')
    base = top + 26.0 * len(names) + 4
    for q in (0, 0.25, 0.5, 0.75, 1.0):
        canvas.text(left + plot_w * q, base + 10, f"{100 * q:.0f}%", palette.muted, size=10,
                    anchor="middle")
    return canvas.render(name, title)

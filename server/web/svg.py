"""A small server-side SVG plotter: axes with round-number ticks, lines, steps, bands, marks.

Plots are drawn on the server so the page works on a lab network with no internet and no
charting library; colours and strokes come from classes styled in the vendored stylesheet.
All labels go through `markup.el`, so a name from the store can never become markup.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Sequence

from server.web.markup import Safe, el, join

_clip_ids = itertools.count(1)  # unique clip-path ids when several plots share a page


def nice_step(span: float, count: int) -> float:
    """A 1-2-5 x 10^k step giving about `count` intervals over `span` (Heckbert, 1990,
    "Nice numbers for graph labels", Graphics Gems)."""
    if not span > 0 or not math.isfinite(span):
        return 1.0
    raw = span / max(1, count)
    power = 10.0 ** math.floor(math.log10(raw))
    for factor in (1.0, 2.0, 2.5, 5.0, 10.0):
        if raw <= factor * power * (1 + 1e-9):
            return factor * power
    return 10.0 * power


def nice_ticks(lo: float, hi: float, count: int = 5, *, whole: bool = False) -> list[float]:
    """Round-numbered ticks covering [lo, hi] (inclusive where they fall on a step);
    `whole` keeps steps of at least 1 (trial and session numbers)."""
    if not (math.isfinite(lo) and math.isfinite(hi)) or hi <= lo:
        return [lo] if math.isfinite(lo) else []
    step = nice_step(hi - lo, count)
    if whole:
        step = max(1.0, round(step))
    first = math.ceil(lo / step - 1e-9) * step
    ticks = []
    k = 0
    while first + k * step <= hi + step * 1e-9:
        value = first + k * step
        ticks.append(0.0 if abs(value) < step * 1e-9 else round(value, 12))
        k += 1
    return ticks


def tick_texts(values: Sequence[float]) -> list[str]:
    """Tick labels with the fewest decimals that show every tick exactly (0.25 stays 0.25),
    the same count for the whole axis."""
    decimals = 0
    for value in values:
        while decimals < 6 and abs(float(f"{value:.{decimals}f}") - value) > 1e-9 * max(1.0, abs(value)):
            decimals += 1
    return [f"{value:.{decimals}f}" for value in values]


def padded(lo: float, hi: float, *, floor: float | None = None) -> tuple[float, float]:
    """A data range widened so a flat or empty series still gets a usable axis."""
    if not (math.isfinite(lo) and math.isfinite(hi)):
        return (0.0, 1.0)
    if hi <= lo:
        width = abs(lo) * 0.1 or 1.0
        lo, hi = lo - width, hi + width
    if floor is not None:
        lo = max(lo, floor)
    return lo, hi


class Plot:
    """One panel: data coordinates mapped into a fixed viewBox, drawn in call order."""

    def __init__(
        self,
        x_range: tuple[float, float],
        y_range: tuple[float, float],
        *,
        title: str,
        x_label: str = "",
        y_label: str = "",
        width: int = 900,
        height: int = 260,
        y_ticks: Sequence[float] | None = None,
        y_tick_text: dict[float, str] | None = None,
        x_tick_text: dict[float, str] | None = None,
        whole_x: bool = False,
    ):
        self.x0, self.x1 = padded(*x_range)
        self.y0, self.y1 = padded(*y_range)
        self.title = title
        self.x_label = x_label
        self.y_label = y_label
        self.width = width
        self.height = height
        self.left, self.right, self.top, self.bottom = 78, 18, 34, 52
        self._y_ticks = list(y_ticks) if y_ticks is not None else None
        self._y_tick_text = y_tick_text or {}
        self._x_tick_text = x_tick_text or {}  # categories on x: only these ticks, with these texts
        self.whole_x = whole_x  # x counts trials or sessions: integer ticks only
        self._layers: list[Safe] = []
        self._legend: list[tuple[str, str]] = []

    # ------------------------------------------------------------ coordinates

    def px(self, x: float) -> float:
        span = self.width - self.left - self.right
        return self.left + (x - self.x0) / (self.x1 - self.x0) * span

    def py(self, y: float) -> float:
        span = self.height - self.top - self.bottom
        return self.top + (1.0 - (y - self.y0) / (self.y1 - self.y0)) * span

    def _pts(self, xs: Sequence[float], ys: Sequence[float]) -> str:
        return " ".join(
            f"{self.px(x):.1f},{self.py(y):.1f}" for x, y in zip(xs, ys) if math.isfinite(x) and math.isfinite(y)
        )

    # ------------------------------------------------------------ layers

    def legend(self, cls: str, text: str) -> None:
        self._legend.append((cls, text))

    def line(self, xs: Sequence[float], ys: Sequence[float], cls: str) -> None:
        if len(xs):
            self._layers.append(el("polyline", points=self._pts(xs, ys), class_=f"ln {cls}"))

    def steps(self, xs: Sequence[float], ys: Sequence[float], cls: str) -> None:
        """A staircase: y holds its value until the next x (a cumulative record)."""
        sx: list[float] = []
        sy: list[float] = []
        for i, (x, y) in enumerate(zip(xs, ys)):
            if i:
                sx.append(x)
                sy.append(sy[-1])
            sx.append(x)
            sy.append(y)
        self.line(sx, sy, cls)

    def band(self, xs: Sequence[float], lows: Sequence[float], highs: Sequence[float], cls: str) -> None:
        """A shaded interval between two curves (e.g. a 95 % credible band)."""
        if not len(xs):
            return
        outline = self._pts(list(xs) + list(xs)[::-1], list(highs) + list(lows)[::-1])
        self._layers.append(el("polygon", points=outline, class_=f"band {cls}"))

    def marks(
        self, xs: Sequence[float], ys: Sequence[float], cls: str, *, shape: str = "dot", size: float = 4.0
    ) -> None:
        """Point marks; `shape` is dot, ring, square or tick (a short vertical bar)."""
        parts = []
        for x, y in zip(xs, ys):
            if not (math.isfinite(x) and math.isfinite(y)):
                continue
            cx, cy = self.px(x), self.py(y)
            if shape in ("dot", "ring"):
                parts.append(f'<circle cx="{cx:.1f}" cy="{cy:.1f}" r="{size:g}"/>')
            elif shape == "square":
                parts.append(
                    f'<rect x="{cx - size:.1f}" y="{cy - size:.1f}" width="{2 * size:g}" height="{2 * size:g}"/>'
                )
            else:
                parts.append(f'<line x1="{cx:.1f}" y1="{cy - size:.1f}" x2="{cx:.1f}" y2="{cy + size:.1f}"/>')
        if parts:
            self._layers.append(el("g", Safe("".join(parts)), class_=f"mk {shape} {cls}"))

    def spans(self, intervals: Sequence[tuple[float, float]], y_lo: float, y_hi: float, cls: str) -> None:
        """Filled rectangles from x0 to x1 between two y values (a timeline row)."""
        top, bottom = self.py(y_hi), self.py(y_lo)
        parts = []
        for a, b in intervals:
            if not (math.isfinite(a) and math.isfinite(b)) or b < a:
                continue
            x = self.px(a)
            w = max(0.8, self.px(b) - x)
            parts.append(f'<rect x="{x:.1f}" y="{top:.1f}" width="{w:.1f}" height="{max(1.0, bottom - top):.1f}"/>')
        if parts:
            self._layers.append(el("g", Safe("".join(parts)), class_=f"sp {cls}"))

    def rules(self, xs: Sequence[float], labels: Sequence[str], cls: str) -> None:
        """Vertical lines across the panel, each labelled at the top in the first of three
        rows where the label does not run into the previous one (else left unlabelled)."""
        parts = []
        row_free = [-math.inf] * 3  # x where each label row is free again
        for x, label in zip(xs, labels):
            if not math.isfinite(x):
                continue
            cx = self.px(x)
            parts.append(
                el("line", x1=f"{cx:.1f}", x2=f"{cx:.1f}", y1=f"{self.top:.1f}", y2=f"{self.height - self.bottom:.1f}")
            )
            text = label[:28]
            for row, free in enumerate(row_free):
                if cx >= free:
                    row_free[row] = cx + 7.5 * len(text) + 10  # ~7.5 px per 12 px glyph
                    parts.append(el("text", text, x=f"{cx + 3:.1f}", y=f"{self.top + 12 + 13 * row:.1f}"))
                    break
        if parts:
            self._layers.append(el("g", parts, class_=f"vr {cls}"))

    # ------------------------------------------------------------ output

    def _axes(self) -> Safe:
        left, bottom = self.left, self.height - self.bottom
        right, top = self.width - self.right, self.top
        parts = [el("rect", x=left, y=top, width=right - left, height=bottom - top, class_="frame")]
        xt = sorted(self._x_tick_text) if self._x_tick_text else nice_ticks(self.x0, self.x1, 8, whole=self.whole_x)
        for v, text in zip(xt, tick_texts(xt)):
            text = self._x_tick_text.get(v, text)
            x = f"{self.px(v):.1f}"
            parts.append(el("line", x1=x, x2=x, y1=bottom, y2=bottom + 6, class_="tk"))
            parts.append(el("text", text, x=x, y=bottom + 22, class_="tl x"))
        yt = self._y_ticks if self._y_ticks is not None else nice_ticks(self.y0, self.y1, 4)
        for v, text in zip(yt, tick_texts(yt)):
            y = f"{self.py(v):.1f}"
            parts.append(el("line", x1=left - 6, x2=right, y1=y, y2=y, class_="grid"))
            text = self._y_tick_text.get(v, text)
            parts.append(el("text", text, x=left - 10, y=y, class_="tl y"))
        parts.append(el("text", self.title, x=left, y=22, class_="pt"))
        if self.x_label:
            parts.append(el("text", self.x_label, x=right, y=self.height - 8, class_="al x"))
        if self.y_label:  # along the left edge, turned to read upwards
            mid = (top + bottom) / 2
            parts.append(
                el("text", self.y_label, x=16, y=f"{mid:.0f}", class_="al y", transform=f"rotate(-90 16 {mid:.0f})")
            )
        return join(*parts)

    def _legend_svg(self) -> Safe:
        parts = []
        x: float = self.width - self.right
        for cls, text in reversed(self._legend):
            x -= 14 + 8.2 * len(text) + 18
            parts.append(el("rect", x=f"{x:.0f}", y=12, width=14, height=10, class_=f"key {cls}"))
            parts.append(el("text", text, x=f"{x + 19:.0f}", y=22, class_="kt"))
        return join(*parts)

    def render(self, *, css_class: str = "plot") -> Safe:
        clip = f"clip{next(_clip_ids)}"
        inner = el(
            "rect",
            x=self.left,
            y=self.top,
            width=self.width - self.left - self.right,
            height=self.height - self.top - self.bottom,
        )
        return el(
            "svg",
            el("title", self.title),
            el("defs", el("clipPath", inner, id=clip)),
            self._axes(),
            el("g", self._layers, clip_path=f"url(#{clip})"),
            self._legend_svg(),
            xmlns="http://www.w3.org/2000/svg",
            viewBox=f"0 0 {self.width} {self.height}",
            role="img",
            class_=css_class,
            aria_label=self.title,
        )

"""Plots across days: one animal's sessions (learning curve, reversals and trials to
criterion, the estimates' trajectories, rewards against the cap) and a cohort's animals
overlaid with their median and spread.

x is the session's place in the animal's history (1 = its first), labelled with the date it
started; every session-indexed panel of a page shares that axis.
"""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime
from typing import Any

import numpy as np

from server.web.markup import Safe
from server.web.svg import Plot
from server.web.words import quantity

MAX_DATE_TICKS = 12


def session_ticks(history: Sequence[dict[str, Any]]) -> dict[float, str]:
    """Session numbers labelled with their start date ("05-11"), at most `MAX_DATE_TICKS`."""
    every = max(1, -(-len(history) // MAX_DATE_TICKS))
    ticks = {}
    for i, s in enumerate(history):
        if i % every == 0 or i == len(history) - 1:
            try:
                day = datetime.fromisoformat(s["started_at"]).strftime("%m-%d")
            except (TypeError, ValueError):
                day = str(i + 1)
            ticks[float(i + 1)] = f"{i + 1}: {day}"
    return ticks


def _axis(history: Sequence[dict[str, Any]], title: str, y_range, **kw) -> Plot:
    n = len(history)
    return Plot((0.5, n + 0.5), y_range, title=title, x_label="session (date)", x_tick_text=session_ticks(history),
                height=kw.pop("height", 230), **kw)  # fmt: skip


def _points(history: Sequence[dict[str, Any]], key: str) -> tuple[list[float], list[float]]:
    pairs = [(float(i + 1), float(s[key])) for i, s in enumerate(history) if s.get(key) is not None]
    return [x for x, _ in pairs], [y for _, y in pairs]


def _bars(plot: Plot, xs: Sequence[float], ys: Sequence[float], cls: str = "bar") -> None:
    for x, y in zip(xs, ys):
        plot.spans([(x - 0.3, x + 0.3)], 0.0, y, cls)


def animal_panels(history: Sequence[dict[str, Any]]) -> list[Safe]:
    """The animal page's plots, oldest session first."""
    if not history:
        return []
    panels = []
    xs, acc = _points(history, "accuracy")
    if xs:
        plot = _axis(history, "Learning curve: accuracy per session", (0.0, 1.0),
                     subtitle="fraction of scored trials correct; 0.5 = chance with two options",
                     y_ticks=[0.0, 0.25, 0.5, 0.75, 1.0])  # fmt: skip
        plot.line(xs, acc, "mean")
        plot.marks(xs, acc, "mean", shape="dot")
        panels.append(plot.render(axis="session"))
    xs, pca = _points(history, "pca")
    if xs:
        plot = _axis(history, "Learning curve: PCA index per session", (-1.0, 1.0),
                     subtitle="+1 = works the lever (sign-tracking), −1 = goes to the magazine (goal-tracking)",
                     y_ticks=[-1.0, -0.5, 0.0, 0.5, 1.0])  # fmt: skip
        plot.line(xs, pca, "pca")
        plot.marks(xs, pca, "pca", shape="dot")
        panels.append(plot.render(axis="session"))
    if any(s["reversals"] for s in history):
        xs, rev = _points(history, "reversals")
        tx, tc = _points(history, "to_criterion")
        top = max(rev + tc + [1.0])
        plot = _axis(history, "Reversals and trials to criterion", (0.0, top * 1.1), whole_y=True,
                     subtitle="bars: reversals in the session; dots: trials until the first reversal")  # fmt: skip
        _bars(plot, xs, rev)
        plot.marks(tx, tc, "crit", shape="dot", size=5)
        plot.legend("bar", "reversals")
        plot.legend("crit", "trials to criterion")
        panels.append(plot.render(axis="session"))
    panels.extend(_estimate_panels(history))
    xs, rewards = _points(history, "rewards")
    cx, caps = _points(history, "max_rewards")
    plot = _axis(history, "Rewards per session", (0.0, max(rewards + caps + [1.0]) * 1.08), whole_y=True,
                 subtitle="pellets delivered, for food-restriction planning; ticks: the session's cap")  # fmt: skip
    _bars(plot, xs, rewards)
    plot.marks(cx, caps, "cap", shape="hbar", size=12)
    plot.legend("bar", "rewards")
    if cx:
        plot.legend("cap", "cap")
    panels.append(plot.render(axis="session"))
    return panels


def _estimate_panels(history: Sequence[dict[str, Any]]) -> list[Safe]:
    """Each model parameter's posterior mean and 95 % band at the end of every session."""
    names: list[str] = []
    for s in history:
        for name in (s.get("fitted") or {}).get("params") or {}:
            if name not in names:
                names.append(name)
    panels = []
    for name in names:
        xs, mean, low, high = [], [], [], []
        for i, s in enumerate(history):
            p = ((s.get("fitted") or {}).get("params") or {}).get(name)
            if p:
                xs.append(float(i + 1))
                mean.append(p["mean"])
                low.append(p["low"])
                high.append(p["high"])
        title, subtitle = quantity(name)
        plot = _axis(history, f"{title} at the end of each session", (min(low + [0.0]), max(high) * 1.05),
                     subtitle=subtitle)  # fmt: skip
        plot.band(xs, low, high, "ci")
        plot.line(xs, mean, "mean")
        plot.marks(xs, mean, "mean", shape="dot")
        plot.legend("ci", "95 % band")
        plot.legend("mean", "posterior mean")
        panels.append(plot.render(axis="session"))
    return panels


# ---------------------------------------------------------------- cohort


def spread(series: Sequence[Sequence[float | None]]) -> list[tuple[int, float, float, float, int]]:
    """Per session number (1-based): median, 25th and 75th percentile over the animals that
    have a value there, and how many do (numpy's linear percentiles)."""
    out = []
    longest = max((len(s) for s in series), default=0)
    for i in range(longest):
        values = [s[i] for s in series if i < len(s) and s[i] is not None]
        if values:
            q1, q2, q3 = np.percentile(np.asarray(values, dtype=float), [25, 50, 75])
            out.append((i + 1, float(q2), float(q1), float(q3), len(values)))
    return out


def cohort_panel(
    by_animal: dict[str, list[float | None]], *, title: str, subtitle: str, y_range, y_ticks=None, counts=False
) -> Safe:
    """Each animal's thin line by session number, with the cohort's median (thick) and the
    25–75 % band; `counts` for a measure that counts (whole ticks)."""
    longest = max((len(v) for v in by_animal.values()), default=1)
    rows = spread(list(by_animal.values()))
    # each session number with how many animals have a value there
    ticks = {float(r[0]): f"{r[0]} (n={r[4]})" for r in rows} if longest <= 12 else None
    plot = Plot((0.5, longest + 0.5), y_range, title=title, subtitle=subtitle, x_label="session number",
                x_tick_text=ticks, whole_x=True, y_ticks=y_ticks, whole_y=counts, height=280)  # fmt: skip
    plot.band([r[0] for r in rows], [r[2] for r in rows], [r[3] for r in rows], "ci")
    for values in by_animal.values():
        xs = [float(i + 1) for i, v in enumerate(values) if v is not None]
        plot.line(xs, [v for v in values if v is not None], "one")
        plot.marks(xs, [v for v in values if v is not None], "one", shape="dot", size=2)
    plot.line([r[0] for r in rows], [r[1] for r in rows], "median")
    plot.marks([r[0] for r in rows], [r[1] for r in rows], "median", shape="dot")
    plot.legend("one", "each animal")
    plot.legend("median", "median")
    plot.legend("ci", "25–75 %")
    return plot.render(axis="session")

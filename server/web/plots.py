"""The session and animal plots, drawn from stored rows with `svg.Plot`.

Time axes are minutes from session start. Each function takes plain rows (as returned by
`server.store.queries`) and returns SVG markup, or None when there is nothing to draw.
"""

from __future__ import annotations

import bisect
from collections.abc import Sequence
from typing import Any

from server.engine.stay import CONDITION_NAMES, CONDITIONS, StayCount
from server.web.markup import Safe, el
from server.web.svg import Plot

OPERANT_KINDS = ("lever_press", "nose_poke")  # inputs an animal works on (wiring kinds)
MAX_STEPS = 3000  # points kept per cumulative line; beyond this the line is thinned
PARAM_TITLES = {
    "alpha": "learning rate α",
    "beta": "inverse temperature β (lower = more exploration)",
}


def _minutes(seconds: float) -> float:
    return seconds / 60.0


def pause_spans(events: Sequence[dict[str, Any]], end_t: float) -> list[tuple[float, float]]:
    """(start, end) session seconds of each pause, from pause/resume events in order."""
    spans, start = [], None
    for ev in events:
        if ev["kind"] == "pause" and start is None:
            start = ev["t"]
        elif ev["kind"] == "resume" and start is not None:
            spans.append((start, ev["t"]))
            start = None
    if start is not None:
        spans.append((start, max(start, end_t)))
    return spans


def _wiring(settings: dict[str, Any] | None) -> tuple[dict[str, str], dict[str, str]]:
    wiring = (settings or {}).get("wiring") or {}
    return dict(wiring.get("inputs") or {}), dict(wiring.get("outputs") or {})


def response_inputs(
    settings: dict[str, Any] | None, inputs: Sequence[dict[str, Any]], trials: Sequence[dict[str, Any]]
) -> list[str]:
    """Which inputs count as responses: lever presses and nose pokes by their wiring kind;
    without wiring in the store, the inputs that ended a response window, else all."""
    kinds, _ = _wiring(settings)
    if kinds:
        return sorted(n for n, k in kinds.items() if k in OPERANT_KINDS)
    chosen = sorted({t["response"] for t in trials if t.get("response")})
    return chosen or sorted({ev["name"] for ev in inputs})


def feeder_names(settings: dict[str, Any] | None, pulses: Sequence[dict[str, Any]], rewards: int) -> set[str]:
    """Pulsed outputs that deliver reinforcers: feeders by wiring kind; without wiring, the
    pulse names whose delivered count equals the session's reward count."""
    _, kinds = _wiring(settings)
    if kinds:
        return {n for n, k in kinds.items() if k == "feeder"}
    counts: dict[str, int] = {}
    for ev in pulses:
        if not (ev.get("detail") or {}).get("withheld"):
            counts[ev["name"]] = counts.get(ev["name"], 0) + 1
    return {n for n, c in counts.items() if c == rewards and rewards > 0}


def _thin(xs: list[float], ys: list[float]) -> tuple[list[float], list[float]]:
    if len(xs) <= MAX_STEPS:
        return xs, ys
    every = len(xs) / MAX_STEPS
    keep = sorted({int(i * every) for i in range(MAX_STEPS)} | {len(xs) - 1})
    return [xs[i] for i in keep], [ys[i] for i in keep]


def cumulative_record(
    *,
    session: dict[str, Any],
    inputs: Sequence[dict[str, Any]],
    pulses: Sequence[dict[str, Any]],
    trials: Sequence[dict[str, Any]],
    blocks: Sequence[dict[str, Any]],
    firings: Sequence[dict[str, Any]],
    pauses: Sequence[tuple[float, float]],
    end_t: float,
) -> Safe:
    """Responses over time, one staircase per response input; reinforcers marked as squares
    on the line of the response that earned them (on the floor when none did)."""
    names = response_inputs(session.get("settings"), inputs, trials)
    times: dict[str, list[float]] = {n: [] for n in names}
    for ev in inputs:
        if ev["name"] in times and ev["value"]:
            times[ev["name"]].append(ev["t"])
    feeders = feeder_names(session.get("settings"), pulses, session.get("rewards") or 0)
    pellets = [ev["t"] for ev in pulses if ev["name"] in feeders and not (ev.get("detail") or {}).get("withheld")]
    top = max([len(v) for v in times.values()] + [1])
    plot = Plot(
        (0.0, _minutes(max(end_t, 1.0))),
        (0.0, top * 1.05),
        title="Cumulative record",
        x_label="minutes",
        y_label="responses",
    )
    if pauses:
        plot.spans([(_minutes(a), _minutes(b)) for a, b in pauses], 0, top * 1.05, "paused")
        plot.legend("paused", "paused")
    for i, name in enumerate(names):
        ts = times[name]
        xs = [0.0] + [_minutes(t) for t in ts] + [_minutes(end_t)]
        ys = [0.0] + [float(k + 1) for k in range(len(ts))] + [float(len(ts))]
        xs, ys = _thin(xs, ys)
        plot.steps(xs, ys, f"c{i % 4 + 1}")
        plot.legend(f"c{i % 4 + 1}", name)
    starts = [t["t_start"] for t in trials]
    px, py = [], []
    for t in pellets:
        i = bisect.bisect_right(starts, t) - 1
        response = trials[i].get("response") if 0 <= i < len(trials) else None
        y = 0.0
        if response in times:
            y = float(bisect.bisect_right(times[response], t))
        px.append(_minutes(t))
        py.append(y)
    plot.marks(px, py, "pellet", shape="square", size=4)
    if px:
        plot.legend("pellet", "reward")
    plot.rules([_minutes(b["t_start"]) for b in blocks[1:]], [b["block"] for b in blocks[1:]], "blk")
    _rule_marks(plot, firings)
    return plot.render()


def _rule_marks(plot: Plot, firings: Sequence[dict[str, Any]]) -> None:
    xs, labels = [], []
    for row in firings:
        t = row.get("t")
        if isinstance(t, (int, float)):
            xs.append(_minutes(t))
            labels.append(str(row.get("rule") or "rule"))
    plot.rules(xs, labels, "rulefire")


def choice_panel(trials: Sequence[dict[str, Any]], estimates: Sequence[dict[str, Any]]) -> Safe | None:
    """Choices trial by trial with the estimator's predicted probability of the first option
    (the estimate after trial n predicts trial n + 1); without estimates, the observed
    fraction over the last 10 choices."""
    choice_trials = [t for t in trials if t.get("choice") is not None]
    if not choice_trials:
        return None
    options = sorted({t["choice"] for t in choice_trials})
    for est in estimates:
        options = sorted(set(options) | set((est["data"] or {}).get("p_choice") or {}))
    first = options[0]
    last_trial = max(t["trial"] for t in trials)
    plot = Plot(
        (0.5, last_trial + 0.5),
        (-0.12, 1.12),
        title=f"Choices and P({first})",
        x_label="trial",
        y_ticks=[0.0, 0.25, 0.5, 0.75, 1.0],
        whole_x=True,
    )
    if estimates:
        xs = [e["trial"] + 1 for e in estimates]
        ys = [((e["data"] or {}).get("p_choice") or {}).get(first, float("nan")) for e in estimates]
        plot.line(xs, ys, "pred")
        plot.legend("pred", f"predicted P({first})")
    else:
        xs, ys = [], []
        window: list[float] = []
        for t in choice_trials:
            window = (window + [1.0 if t["choice"] == first else 0.0])[-10:]
            xs.append(t["trial"])
            ys.append(sum(window) / len(window))
        plot.line(xs, ys, "obs")
        plot.legend("obs", f"observed P({first}), last 10")
    for rewarded, shape, label in ((True, "dot", "rewarded"), (False, "ring", "not rewarded")):
        picked = [t for t in choice_trials if bool(t["rewarded"]) == rewarded]
        rail = [1.06 if t["choice"] == first else -0.06 for t in picked]
        plot.marks([t["trial"] for t in picked], rail, f"ch {shape}", shape=shape, size=3.5)
        plot.legend(f"ch {shape}", label)
    omitted = [t["trial"] for t in trials if t.get("omission")]
    plot.marks(omitted, [0.5] * len(omitted), "omit", shape="tick", size=5)
    if omitted:
        plot.legend("omit", "omission")
    return plot.render()


def two_stage_panels(trials: Sequence[dict[str, Any]]) -> list[Safe]:
    """Two trial-indexed panels on the same x axis: the second-stage options' reward
    probabilities each trial was played under, and the first choices marked by outcome and
    transition; empty for a session without two-stage trials."""
    played = [t for t in trials if t.get("state") is not None]
    if not played:
        return []
    last_trial = max(t["trial"] for t in trials)
    x_range = (0.5, last_trial + 0.5)
    odds = Plot(x_range, (0.0, 1.0), title="Second-stage reward probabilities", x_label="trial",
                y_label="P(reward)", y_ticks=[0.0, 0.25, 0.5, 0.75, 1.0], whole_x=True, height=220)  # fmt: skip
    series: dict[str, tuple[list[float], list[float]]] = {}
    for t in played:
        for option, p in ((t.get("extra") or {}).get("reward_probability") or {}).items():
            xs, ys = series.setdefault(option, ([], []))
            xs.append(t["trial"])
            ys.append(p)
    for i, (option, (xs, ys)) in enumerate(sorted(series.items())):
        cls = ("c1", "c3", "c2", "c4")[i % 4]
        odds.line(xs, ys, cls)
        odds.legend(cls, option)
    firsts = sorted({t["choice"] for t in played if t.get("choice") is not None})
    top, bottom = (firsts + ["", ""])[:2]
    choices = Plot(x_range, (-0.2, 1.2), title="First choices", x_label="trial", whole_x=True, height=200,
                   y_ticks=[0.0, 1.0], y_tick_text={0.0: bottom, 1.0: top})  # fmt: skip
    kinds = (
        (True, "common", "dot", "ch"),
        (False, "common", "ring", "ch"),
        (True, "rare", "square", "ch rare"),
        (False, "rare", "square", "ch rare open"),
    )
    for rewarded, transition, shape, cls in kinds:
        picked = [t for t in played if t.get("choice") is not None and bool(t["rewarded"]) == rewarded
                  and t.get("transition") == transition]  # fmt: skip
        # rare transitions a little inside the rail, so the two kinds never hide each other
        inset = 0.12 if transition == "rare" else 0.0
        rail = [1.0 - inset if t["choice"] == top else inset for t in picked]
        choices.marks([t["trial"] for t in picked], rail, cls, shape=shape, size=3.5)
    missed = [t["trial"] for t in played if t.get("omitted2")] + [t["trial"] for t in trials if t.get("omission")]
    choices.marks(missed, [0.5] * len(missed), "omit", shape="tick", size=5)
    key = el(
        "p",
        "First choices: ● rewarded after a common transition, ○ unrewarded after a common one, "
        "■ rewarded after a rare one, □ unrewarded after a rare one (rare ones drawn just inside "
        "the rail); red ticks: no response.",
        class_="note",
    )
    return [odds.render(), choices.render(), key]


def stay_panel(counts: dict[tuple[bool, bool], StayCount]) -> Safe | None:
    """P(repeating the first choice) after each kind of trial, with how many pairs it rests on."""
    if not any(c.pairs for c in counts.values()):
        return None
    ticks = {
        float(i + 1): f"{CONDITION_NAMES[key]} ({counts[key].stays}/{counts[key].pairs})"
        for i, key in enumerate(CONDITIONS)
    }
    plot = Plot(
        (0.5, len(CONDITIONS) + 0.5),
        (0.0, 1.0),
        title="Stay probability: repeating the first choice after ...",
        y_label="P(stay)",
        y_ticks=[0.0, 0.25, 0.5, 0.75, 1.0],
        x_tick_text=ticks,
        height=240,
    )
    for i, key in enumerate(CONDITIONS):
        p = counts[key].p
        if p is not None:
            plot.spans([(i + 1 - 0.3, i + 1 + 0.3)], 0.0, p, "bar")
    return plot.render()


def parameter_panels(estimates: Sequence[dict[str, Any]]) -> list[Safe]:
    """One panel per model parameter: posterior mean with its 95 % band (2.5–97.5 %)."""
    if not estimates:
        return []
    names: list[str] = []
    for est in estimates:
        for name in (est["data"] or {}).get("params") or {}:
            if name not in names:
                names.append(name)
    panels = []
    trials = [e["trial"] for e in estimates]
    for name in names:
        rows = [((e["data"] or {}).get("params") or {}).get(name) for e in estimates]
        xs = [t for t, r in zip(trials, rows) if r]
        mean = [r["mean"] for r in rows if r]
        low = [r["low"] for r in rows if r]
        high = [r["high"] for r in rows if r]
        if not xs:
            continue
        plot = Plot(
            (0.0, max(xs) + 0.5),
            (min(low + [0.0]), max(high) * 1.05),
            title=PARAM_TITLES.get(name, name),
            x_label="trial",
            height=220,
            whole_x=True,
        )
        plot.band(xs, low, high, "ci")
        plot.line(xs, mean, "mean")
        plot.legend("ci", "95 % band")
        plot.legend("mean", "posterior mean")
        panels.append(plot.render())
    reported = [(e["trial"], (e["data"] or {}).get("exploration")) for e in estimates]
    explore: list[tuple[Any, float]] = [(t, v) for t, v in reported if isinstance(v, (int, float))]
    if explore:
        plot = Plot(
            (0.0, explore[-1][0] + 0.5),
            (0.0, 1.0),
            height=200,
            title="exploration: P(not choosing the best option next)",
            x_label="trial",
            whole_x=True,
        )
        plot.line([t for t, _ in explore], [v for _, v in explore], "mean")
        panels.append(plot.render())
    return panels


def iti_timeline(
    trials: Sequence[dict[str, Any]],
    blocks: Sequence[dict[str, Any]],
    pauses: Sequence[tuple[float, float]],
    firings: Sequence[dict[str, Any]],
    end_t: float,
) -> Safe | None:
    """Trials and the ITIs between them on one time axis, with blocks, pauses, rule firings."""
    if not trials:
        return None
    rows = {3.0: "trial", 2.0: "ITI", 1.0: "paused"}
    plot = Plot(
        (0.0, _minutes(max(end_t, 1.0))),
        (0.4, 3.6),
        title="Timeline",
        x_label="minutes",
        height=200,
        y_ticks=list(rows),
        y_tick_text=rows,
    )
    plot.spans([(_minutes(t["t_start"]), _minutes(t["t_end"])) for t in trials], 2.6, 3.4, "trial")
    plot.spans(
        [(_minutes(t["t_end"]), _minutes(t["t_end"] + t["iti_s"])) for t in trials if t["iti_s"] > 0], 1.6, 2.4, "iti"
    )
    plot.spans([(_minutes(a), _minutes(b)) for a, b in pauses], 0.6, 1.4, "paused")
    plot.rules([_minutes(b["t_start"]) for b in blocks[1:]], [b["block"] for b in blocks[1:]], "blk")
    _rule_marks(plot, firings)
    return plot.render()


def animal_panels(history: Sequence[dict[str, Any]]) -> list[Safe]:
    """Accuracy and trials per session across an animal's sessions, oldest first."""
    if not history:
        return []
    n = len(history)
    xs = list(range(1, n + 1))
    panels = []
    acc = [(x, s["accuracy"]) for x, s in zip(xs, history) if s.get("accuracy") is not None]
    if acc:
        plot = Plot(
            (0.5, n + 0.5),
            (0.0, 1.0),
            title="Accuracy per session",
            x_label="session",
            height=220,
            y_ticks=[0.0, 0.25, 0.5, 0.75, 1.0],
            whole_x=True,
        )
        plot.line([x for x, _ in acc], [a for _, a in acc], "mean")
        plot.marks([x for x, _ in acc], [a for _, a in acc], "mean", shape="dot")
        panels.append(plot.render())
    counts = [float(s["trials"]) for s in history]
    plot = Plot(
        (0.5, n + 0.5),
        (0.0, max(counts + [1.0]) * 1.05),
        title="Trials per session",
        x_label="session",
        height=200,
        whole_x=True,
    )
    for x, c in zip(xs, counts):
        plot.spans([(x - 0.3, x + 0.3)], 0.0, c, "bar")
    panels.append(plot.render())
    return panels

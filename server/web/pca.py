"""The Pavlovian conditioned approach (PCA) panel of an autoshaping session: the index and
its three parts per block of trials, with the sign-/goal-tracking classification.

The index is Meyer et al. (2012), PLoS ONE 7:e38987 (server/rules/metrics.py::pca_index,
the same function the session's rules read); the parts are counted here from the stored
trials the way the rules count them: lever presses and magazine entries during the CS, the
fraction of CS periods with each, and the first latency of each (the whole CS when none).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from server.protocol.model import Pavlovian
from server.rules.metrics import pca_index
from server.web.markup import Safe, el
from server.web.svg import Plot

BLOCK_TRIALS = 5  # CS trials per point of the panel
SIGN_AT, GOAL_AT = 0.5, -0.5  # the usual cut-offs (Meyer et al. 2012)


@dataclass(frozen=True, slots=True)
class PcaParts:
    trials: int  # CS trials counted
    first: int  # first and last trial numbers of the block
    last: int
    bias: float  # (LP - CE) / (LP + CE)
    probability: float  # P(lever) - P(magazine)
    latency: float  # (magazine latency - lever latency) / CS duration
    index: float


def classify(index: float) -> str:
    if index >= SIGN_AT:
        return "sign-tracking"
    if index <= GOAL_AT:
        return "goal-tracking"
    return "intermediate"


def pca_parts(trials: Sequence[dict[str, Any]], pav: Pavlovian) -> PcaParts | None:
    """The PCA index and its parts over stored trials (rows with `steps`, `counts`, `first_s`);
    None when no trial had the CS."""
    lever_key, magazine_key = f"{pav.cs_step}.{pav.lever}", f"{pav.cs_step}.{pav.magazine}"
    cs = [t for t in trials if not t.get("interrupted") and any(s[0] == pav.cs_step for s in t.get("steps") or ())]
    if not cs:
        return None
    n = len(cs)
    lp = sum((t.get("counts") or {}).get(lever_key, 0) for t in cs)
    ce = sum((t.get("counts") or {}).get(magazine_key, 0) for t in cs)
    p_lever = sum(lever_key in (t.get("counts") or {}) for t in cs) / n
    p_magazine = sum(magazine_key in (t.get("counts") or {}) for t in cs) / n
    cs_s = pav.cs_seconds
    lever_latency = sum(min((t.get("first_s") or {}).get(lever_key, cs_s), cs_s) for t in cs) / n
    magazine_latency = sum(min((t.get("first_s") or {}).get(magazine_key, cs_s), cs_s) for t in cs) / n
    total = lp + ce
    return PcaParts(
        trials=n,
        first=cs[0]["trial"],
        last=cs[-1]["trial"],
        bias=(lp - ce) / total if total else 0.0,
        probability=p_lever - p_magazine,
        latency=(magazine_latency - lever_latency) / cs_s,
        index=pca_index(lp, ce, p_lever, p_magazine, lever_latency, magazine_latency, cs_s),
    )


def pca_panel(trials: Sequence[dict[str, Any]], pav: Pavlovian, x_range: tuple[float, float]) -> list[Safe]:
    """The index and its parts per block of `BLOCK_TRIALS` trials on the session's trial
    axis, and a line that says how the whole session classifies the animal."""
    whole = pca_parts(trials, pav)
    if whole is None:
        return []
    blocks = [pca_parts(trials[i : i + BLOCK_TRIALS], pav) for i in range(0, len(trials), BLOCK_TRIALS)]
    shown = [b for b in blocks if b is not None]
    plot = Plot(
        x_range,
        (-1.05, 1.05),
        title="Pavlovian conditioned approach (PCA index)",
        subtitle=f"per {BLOCK_TRIALS} trials; +1 = works the lever (sign-tracking), −1 = goes to the magazine "
        "(goal-tracking)",
        x_label="trial",
        y_ticks=[-1.0, -0.5, 0.0, 0.5, 1.0],
        whole_x=True,
        height=280,
    )
    plot.spans([(x_range[0], x_range[1])], SIGN_AT, 1.05, "zone sign")
    plot.spans([(x_range[0], x_range[1])], -1.05, GOAL_AT, "zone goal")
    xs = [(b.first + b.last) / 2 for b in shown]
    for cls, label, values in (
        ("c2", "response bias", [b.bias for b in shown]),
        ("c3", "probability difference", [b.probability for b in shown]),
        ("c4", "latency score", [b.latency for b in shown]),
        ("pca", "PCA index", [b.index for b in shown]),
    ):
        plot.line(xs, values, cls)
        plot.marks(xs, values, cls, shape="dot", size=3)
        plot.legend(cls, label)
    verdict = el(
        "p",
        f"Whole session: PCA index {whole.index:+.2f} over {whole.trials} CS trials — {classify(whole.index)} "
        f"(response bias {whole.bias:+.2f}, probability difference {whole.probability:+.2f}, "
        f"latency score {whole.latency:+.2f}; sign-tracking ≥ +0.5, goal-tracking ≤ −0.5).",
        class_="note pca-verdict",
    )
    return [plot.render(axis="trial"), verdict]

"""Reading duration specs (step waits, ITIs): a number, or one named distribution."""

from __future__ import annotations

from typing import TYPE_CHECKING

from server.protocol.marked import Marked
from server.protocol.model import ORDERS, Duration

if TYPE_CHECKING:
    from server.protocol.reader import Reader

FORMS = ("fixed", "uniform", "exponential", "list")
MAX_SECONDS = 24 * 3600.0


def read_duration(r: Reader, node: Marked | None, where: str) -> Duration | None:
    """`5`, `{fixed: 5}`, `{uniform: [4, 8]}`, `{exponential: {mean: 6, min: 2, max: 20}}`
    (truncated to [min, max]) or `{list: [3, 5, 7], order: shuffled|in_turn}`."""
    if node is None:
        return None
    if not node.is_mapping:
        seconds = r.number(node, f"{where} (seconds)", low=0, high=MAX_SECONDS)
        return None if seconds is None else Duration.fixed(float(seconds))
    f = r.mapping(node, where, FORMS + ("order",))
    if f is None:
        return None
    forms = [k for k in FORMS if k in f]
    if len(forms) != 1:
        r.error(node.mark, f"{where}: expected exactly one of {', '.join(FORMS)}, found {len(forms)}")
        return None
    form = forms[0]
    if "order" in f and form != "list":
        r.error(f["order"].mark, f"{where}.order: only meaningful with 'list'")
        return None
    value = f[form]
    if form == "fixed":
        seconds = r.number(value, f"{where}.fixed", low=0, high=MAX_SECONDS)
        return None if seconds is None else Duration.fixed(float(seconds))
    if form == "uniform":
        bounds = r.listing(value, f"{where}.uniform")
        if value.is_list and len(bounds) != 2:
            r.error(value.mark, f"{where}.uniform: expected [low, high], found {len(bounds)} numbers")
            return None
        if len(bounds) != 2:
            return None
        low = r.number(bounds[0], f"{where}.uniform low", low=0, high=MAX_SECONDS)
        high = r.number(bounds[1], f"{where}.uniform high", low=0, high=MAX_SECONDS)
        if low is None or high is None:
            return None
        if high < low:
            r.error(value.mark, f"{where}.uniform: low {low} is above high {high}")
            return None
        return Duration("uniform", low=float(low), high=float(high))
    if form == "exponential":
        e = r.mapping(value, f"{where}.exponential", ("mean", "min", "max"), required=("mean", "max"))
        if e is None:
            return None
        mean = r.number(e.get("mean"), f"{where}.exponential.mean", low=0, low_open=True, high=MAX_SECONDS)
        low = r.number(e["min"], f"{where}.exponential.min", low=0, high=MAX_SECONDS) if "min" in e else 0.0
        high = r.number(e.get("max"), f"{where}.exponential.max", low=0, high=MAX_SECONDS)
        if mean is None or low is None or high is None:
            return None
        if high <= low:
            r.error(value.mark, f"{where}.exponential: max {high} must be above min {low}")
            return None
        return Duration("exponential", mean=float(mean), low=float(low), high=float(high))
    items = r.listing(value, f"{where}.list")
    if value.is_list and not items:
        r.error(value.mark, f"{where}.list: needs at least one duration")
        return None
    values = [r.number(item, f"{where}.list", low=0, high=MAX_SECONDS) for item in items]
    numbers = [v for v in values if v is not None]
    if not items or len(numbers) < len(values):
        return None
    order = r.choice(f["order"], f"{where}.order", ORDERS) if "order" in f else "shuffled"
    if order is None:
        return None
    return Duration("list", values=tuple(float(v) for v in numbers), shuffled=order == "shuffled")

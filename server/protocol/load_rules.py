"""Reading the closed-loop parts of a protocol: estimator, rules, ITI bounds, Pavlovian CS."""

from __future__ import annotations

from typing import TYPE_CHECKING

from server.protocol.expressions import METRICS, ExpressionError, parse_condition
from server.protocol.marked import Mark, Marked
from server.protocol.model import (
    ACTION_KINDS,
    END_SESSION,
    ESTIMATE_PARAMETERS,
    ESTIMATOR_MODELS,
    Block,
    EstimatorSpec,
    Option,
    Pavlovian,
    Rule,
    RuleAction,
    TrialType,
)
from server.protocol.wiring import Wiring

if TYPE_CHECKING:
    from server.protocol.reader import Reader

RULE_KEYS = ("rule", "when", "do", "hold_for", "cooldown", "max_firings")


def read_estimator(r: Reader, node: Marked | None) -> EstimatorSpec | None:
    f = r.mapping(node, "estimator", ("model", "drift"))
    if f is None:
        return None
    model = r.choice(f["model"], "estimator.model", ESTIMATOR_MODELS) if "model" in f else "q_learning"
    drift = r.number(f["drift"], "estimator.drift", low=0, high=2) if "drift" in f else 0.0
    if model is None or drift is None:
        return None
    return EstimatorSpec(model, float(drift))


def read_iti_bounds(r: Reader, node: Marked | None) -> tuple[float, float] | None:
    items = r.listing(node, "iti_bounds")
    if node is None or (node.is_list and len(items) != 2) or not node.is_list:
        if node is not None and node.is_list:
            r.error(node.mark, f"iti_bounds: expected [shortest, longest] in seconds, found {len(items)} numbers")
        return None
    low = r.number(items[0], "iti_bounds shortest", low=0)
    high = r.number(items[1], "iti_bounds longest", low=0)
    if low is None or high is None:
        return None
    if high < low:
        r.error(node.mark, f"iti_bounds: shortest {low:g} is above longest {high:g}")
        return None
    return float(low), float(high)


def read_pavlovian(
    r: Reader, node: Marked | None, wiring: Wiring | None, types: dict[str, TrialType]
) -> Pavlovian | None:
    f = r.mapping(node, "pavlovian", ("cs_step", "lever", "magazine"), required=("cs_step", "lever", "magazine"))
    if f is None or wiring is None:
        return None
    steps = {s.name: s for t in types.values() for s in t.steps}
    cs = r.reference(f.get("cs_step"), "pavlovian.cs_step", steps, "step")
    lever = r.reference(f.get("lever"), "pavlovian.lever", wiring.inputs, "input")
    magazine = r.reference(f.get("magazine"), "pavlovian.magazine", wiring.inputs, "input")
    if cs is None or lever is None or magazine is None:
        return None
    wait = steps[cs].wait
    if wait is None or wait.kind != "fixed" or wait.value <= 0:
        r.error(f["cs_step"].mark, "pavlovian.cs_step: the CS step needs a fixed wait_s above 0 (its duration)")
        return None
    return Pavlovian(cs, lever, magazine, wait.value)


def read_settings(r: Reader, node: Marked | None) -> dict[str, float]:
    settings: dict[str, float] = {}
    for name, value, key_mark in r.items(node, "settings"):
        if name in METRICS or name in ESTIMATE_PARAMETERS:
            r.error(key_mark, f"settings.{name}: '{name}' is already a metric or parameter name")
            continue
        number = r.number(value, f"settings.{name}")
        if number is not None:
            settings[name] = float(number)
    return settings


def read_rules(
    r: Reader,
    node: Marked | None,
    blocks: list[Block],
    options: dict[str, Option],
    iti_bounds: tuple[float, float] | None,
    settings: dict[str, float],
) -> tuple[Rule, ...]:
    rules: list[Rule] = []
    seen: set[str] = set()
    block_names = [b.name for b in blocks]
    for i, rule_node in enumerate(r.listing(node, "rules")):
        where = f"rules[{i + 1}]"
        f = r.mapping(rule_node, where, RULE_KEYS, required=("rule", "when", "do"), renamed={"then": "do"})
        if f is None:
            continue
        before = len(r.problems)
        name = r.text(f.get("rule"), f"{where}.rule")
        if name is not None:
            if name in seen:
                r.error(f["rule"].mark, f"{where}.rule: rule name '{name}' is used twice")
            seen.add(name)
            where = f"rules.{name}"
        condition = _condition(r, f.get("when"), f"{where}.when", tuple(settings))
        actions = []
        do = f.get("do")
        for item in (
            r.listing(do, f"{where}.do", allow_single=True)
            if do is not None and not do.is_mapping
            else ([do] if do is not None else [])
        ):
            action = _action(r, item, f"{where}.do", block_names, options)
            if action is not None:
                actions.append(action)
                if action.kind in ("set_iti", "scale_iti") and iti_bounds is None:
                    r.error(
                        item.mark,
                        f"{where}.do.{action.kind}: declare iti_bounds: [shortest, longest] at the top level",
                    )
                if action.kind == "set_iti" and iti_bounds:
                    assert action.seconds is not None  # _action gives every set_iti its seconds
                    if not iti_bounds[0] <= action.seconds <= iti_bounds[1]:
                        r.error(
                            item.mark,
                            f"{where}.do.set_iti: {action.seconds:g} s is outside "
                            f"iti_bounds {iti_bounds[0]:g}-{iti_bounds[1]:g}",
                        )
        hold = r.number(f["hold_for"], f"{where}.hold_for", low=1, integer=True) if "hold_for" in f else 1
        cooldown = r.number(f["cooldown"], f"{where}.cooldown", low=0, integer=True) if "cooldown" in f else 0
        most = r.number(f["max_firings"], f"{where}.max_firings", low=1, integer=True) if "max_firings" in f else None
        if len(r.problems) > before or name is None or condition is None or not actions:
            continue
        text, tree, reads = condition
        rules.append(
            Rule(
                name, text, tree, reads, tuple(actions), int(hold or 1), int(cooldown or 0), int(most) if most else None
            )
        )
    return tuple(rules)


def _condition(r: Reader, node: Marked | None, where: str, settings: tuple[str, ...]):
    text = r.text(node, where)
    if text is None:
        return None
    try:
        tree, reads = parse_condition(text, ESTIMATE_PARAMETERS, settings)
    except ExpressionError as exc:
        assert node is not None
        # Point at the character: plain and quoted scalars start one column later when quoted.
        quoted = 1 if node.quoted else 0
        mark = Mark(node.mark.file, node.mark.line, node.mark.col + quoted + exc.offset)
        r.error(mark, f"{where}: {exc}")
        return None
    return text, tree, reads


def _action(r: Reader, node: Marked, where: str, blocks: list[str], options: dict[str, Option]) -> RuleAction | None:
    f = r.mapping(node, where, ACTION_KINDS)
    if not f:
        if f is not None:
            r.error(node.mark, f"{where}: expected one action: {', '.join(ACTION_KINDS)}")
        return None
    if len(f) != 1:
        r.error(node.mark, f"{where}: one action per list item, found {len(f)} ({', '.join(f)})")
        return None
    kind, value = next(iter(f.items()))
    here = f"{where}.{kind}"
    if kind == "switch_block":
        block = r.reference(value, here, blocks, "block")
        return RuleAction(kind, block=block) if block else None
    if kind == "reverse":
        items = r.listing(value, here)
        if len(items) != 2:
            if value.is_list:
                r.error(value.mark, f"{here}: expected a pair of options, found {len(items)} names")
            return None
        a = r.reference(items[0], here, options, "option")
        b = r.reference(items[1], here, options, "option")
        if a and b and a == b:
            r.error(value.mark, f"{here}: cannot swap '{a}' with itself")
            return None
        first_stage = [x for x in (a, b) if x and options[x].reward_probability is None]
        if first_stage:
            r.error(
                value.mark,
                f"{here}: '{first_stage[0]}' is a first-stage option; its outcome comes from the state "
                "it leads to, so reverse second-stage options",
            )
            return None
        return RuleAction(kind, options=(a, b)) if a and b else None
    if kind == "probe":
        p = r.mapping(value, here, ("minutes", "after"), required=("minutes",), renamed={"then": "after"})
        if p is None:
            return None
        minutes = r.number(p.get("minutes"), f"{here}.minutes", low=0, low_open=True, high=600)
        after: str | None = END_SESSION
        if "after" in p:
            after = r.reference(p["after"], f"{here}.after", blocks + [END_SESSION], "block")
        if minutes is None or after is None:
            return None
        return RuleAction(kind, minutes=float(minutes), block=None if after == END_SESSION else after)
    if kind == "set_iti":
        seconds = r.number(value, here, low=0)
        return None if seconds is None else RuleAction(kind, seconds=float(seconds))
    if kind == "scale_iti":
        factor = r.number(value, here, low=0, low_open=True, high=100)
        return None if factor is None else RuleAction(kind, factor=float(factor))
    message = r.text(value, here)
    return None if message is None else RuleAction(kind, message=message)

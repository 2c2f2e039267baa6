"""The blocks of a protocol file: which trial types they mix and when each one ends."""

from __future__ import annotations

from server.protocol.durations import read_duration
from server.protocol.marked import Marked
from server.protocol.model import END_SESSION, ORDERS, Block, BlockEnd, Option, TrialType
from server.protocol.reader import Reader

LEADS_ON = "its outcome comes from the state it leads to, so name second-stage options here"
BLOCK_KEYS = (
    "block", "trial_types", "order", "max_run", "until", "next",
    "reward_probability", "swap", "withhold_outcomes", "iti",
)  # fmt: skip


def read_blocks(
    r: Reader,
    node: Marked | None,
    trial_types: dict[str, TrialType],
    options: dict[str, Option],
    declared_types: list[str],
) -> list[Block]:
    """Every well-formed block; `declared_types` names trial types even where they failed to compile."""
    nodes = r.listing(node, "blocks")
    if node is not None and node.is_list and not nodes:
        r.error(node.mark, "blocks: needs at least one block")
    parsed = [(n, f) for n, f, _ in r.named_list(
        nodes, "blocks", "blocks", BLOCK_KEYS, ("block", "trial_types"), "block",
        END_SESSION, "ending the session",
    )]  # fmt: skip
    names = [n for n, _ in parsed]
    return [b for b in (_block(r, n, f, names, trial_types, options, declared_types) for n, f in parsed) if b]


def _block(
    r: Reader,
    name: str,
    f: dict[str, Marked],
    names: list[str],
    trial_types: dict[str, TrialType],
    options: dict[str, Option],
    declared_types: list[str],
) -> Block | None:
    where = f"blocks.{name}"
    before = len(r.problems)
    mix: list[tuple[str, float]] = []
    mix_node = f.get("trial_types")
    if mix_node is not None and mix_node.is_list:
        for item in mix_node.value:
            t = r.reference(item, f"{where}.trial_types", declared_types, "trial type")
            if t in trial_types:
                mix.append((t, 1.0))
    else:
        for t_name, w_node, key_mark in r.items(mix_node, f"{where}.trial_types"):
            t = r.reference(Marked(t_name, key_mark), f"{where}.trial_types", declared_types, "trial type")
            w = r.number(w_node, f"{where}.trial_types.{t_name}", low=0, low_open=True)
            if t in trial_types and w is not None:
                mix.append((t, float(w)))
    if mix_node is not None and not mix and len(r.problems) == before and not declared_types:
        r.error(mix_node.mark, f"{where}.trial_types: needs at least one trial type")
    order = r.choice(f["order"], f"{where}.order", ORDERS) if "order" in f else "shuffled"
    max_run = None
    if "max_run" in f:
        max_run = r.number(f["max_run"], f"{where}.max_run", low=1, integer=True)
        if max_run is not None and len(mix) < 2:
            r.error(f["max_run"].mark, f"{where}.max_run: needs at least two trial types to alternate")
    until = _block_end(r, f.get("until"), f"{where}.until")
    nxt = None
    if "next" in f:
        nxt = r.reference(f["next"], f"{where}.next", names + [END_SESSION], "block")
    probs: dict[str, float] = {}
    for label, p_node, key_mark in r.items(f.get("reward_probability"), f"{where}.reward_probability"):
        if r.reference(Marked(label, key_mark), f"{where}.reward_probability", options, "option"):
            if options[label].reward_probability is None:
                r.error(key_mark, f"{where}.reward_probability: '{label}' is a first-stage option; {LEADS_ON}")
                continue
            p = r.probability(p_node, f"{where}.reward_probability.{label}")
            if p is not None:
                probs[label] = float(p)
    swaps: list[tuple[str, str]] = []
    swap_node = f.get("swap")
    pairs = r.listing(swap_node, f"{where}.swap")
    if pairs and all(not p.is_list for p in pairs):
        assert swap_node is not None  # listing(None) is empty
        pairs = [swap_node]  # a single pair written flat: swap: [left, right]
    for pair in pairs:
        items = r.listing(pair, f"{where}.swap")
        if len(items) != 2:
            r.error(pair.mark, f"{where}.swap: expected a pair of options, found {len(items)} names")
            continue
        a = r.reference(items[0], f"{where}.swap", options, "option")
        b = r.reference(items[1], f"{where}.swap", options, "option")
        if a and b:
            first_stage = [x for x in (a, b) if options[x].reward_probability is None]
            if first_stage:
                r.error(pair.mark, f"{where}.swap: '{first_stage[0]}' is a first-stage option; {LEADS_ON}")
                continue
            if a == b:
                r.error(pair.mark, f"{where}.swap: cannot swap '{a}' with itself")
            swaps.append((a, b))
    withhold = r.flag(f["withhold_outcomes"], f"{where}.withhold_outcomes") if "withhold_outcomes" in f else False
    iti = read_duration(r, f["iti"], f"{where}.iti") if "iti" in f else None
    if len(r.problems) > before:
        return None
    return Block(
        name=name, mix=tuple(mix), order=order or "shuffled",
        max_run=int(max_run) if max_run else None, until=until, next=nxt,
        reward_probability=probs, swap=tuple(swaps), withhold_outcomes=bool(withhold), iti=iti,
    )  # fmt: skip


def _block_end(r: Reader, node: Marked | None, where: str) -> BlockEnd:
    f = r.mapping(node, where, ("trials", "minutes", "rewards", "streak", "accuracy"))
    if not f:
        if node is not None and node.is_mapping and not node.value:
            r.error(node.mark, f"{where}: give at least one of trials, minutes, rewards, streak, accuracy")
        return BlockEnd()
    values: dict[str, float | None] = {}
    for key in ("trials", "rewards", "streak"):
        if key in f:
            values[key] = r.number(f[key], f"{where}.{key}", low=1, integer=True)
    if "minutes" in f:
        values["minutes"] = r.number(f["minutes"], f"{where}.minutes", low=0, low_open=True)
    if "accuracy" in f:
        acc = r.mapping(f["accuracy"], f"{where}.accuracy", ("at_least", "window"), required=("at_least", "window"))
        if acc:
            values["accuracy"] = r.probability(acc.get("at_least"), f"{where}.accuracy.at_least")
            values["window"] = r.number(acc.get("window"), f"{where}.accuracy.window", low=1, integer=True)
    counts = {k: int(v) for k in ("trials", "rewards", "streak", "window") if (v := values.get(k)) is not None}
    return BlockEnd(
        trials=counts.get("trials"),
        minutes=values.get("minutes"),
        rewards=counts.get("rewards"),
        streak=counts.get("streak"),
        accuracy=values.get("accuracy"),
        window=counts.get("window"),
    )

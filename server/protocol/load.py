"""Read a protocol YAML file into a compiled `Protocol`, reporting every problem at once."""

from __future__ import annotations

import hashlib
from pathlib import Path

from server.protocol.durations import read_duration
from server.protocol.load_rules import read_estimator, read_iti_bounds, read_pavlovian, read_rules, read_settings
from server.protocol.marked import Mark, Marked, load_marked
from server.protocol.model import (
    END_SESSION,
    END_TRIAL,
    ORDERS,
    SCHEDULE_KINDS,
    Block,
    BlockEnd,
    Duration,
    EstimatorSpec,
    Limits,
    Option,
    OutputActions,
    Protocol,
    Schedule,
    Step,
    TrialType,
)
from server.protocol.problems import InvalidFile, Problem
from server.protocol.reader import Reader, did_you_mean
from server.protocol.wiring import (
    HELD_OUTPUT_KINDS,
    INPUT_KINDS,
    OUTPUT_KINDS,
    PULSED_OUTPUT_KINDS,
    InputLine,
    OutputLine,
    Wiring,
)

FORMAT_VERSION = 1
TOP_KEYS = (
    "vigil_protocol", "name", "about", "wiring", "options", "trial_types",
    "blocks", "iti", "limits", "at_start", "estimator", "rules", "iti_bounds", "pavlovian",
    "settings",
)  # fmt: skip
STEP_KEYS = (
    "step", "activate", "deactivate", "pulse", "on_leave", "wait_s", "next",
    "respond", "choose", "if_rewarded", "if_unrewarded", "schedule", "draw",
)  # fmt: skip
BLOCK_KEYS = (
    "block", "trial_types", "order", "max_run", "until", "next",
    "reward_probability", "swap", "withhold_outcomes", "iti",
)  # fmt: skip
ACTION_KEYS = ("activate", "deactivate", "pulse")
MAX_FILE_BYTES = 1_000_000


def load_protocol(path: str | Path) -> Protocol:
    """Load and validate one protocol file; raises InvalidFile listing every problem."""
    path = Path(path)
    file = str(path)
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise InvalidFile([Problem(Mark(file, 1, 1), f"cannot read file: {exc.strerror}")]) from None
    if len(data) > MAX_FILE_BYTES:
        raise InvalidFile([Problem(Mark(file, 1, 1), "file is larger than 1 MB; not a protocol?")])
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise InvalidFile([Problem(Mark(file, 1, 1), f"not UTF-8 text (byte {exc.start})")]) from None
    return parse_protocol(text, file, sha256=hashlib.sha256(data).hexdigest())


def parse_protocol(text: str, file: str = "<protocol>", sha256: str = "") -> Protocol:
    root, problems = load_marked(text, file)
    if root is None:
        raise InvalidFile(problems)
    compiler = _Compiler(file)
    compiler.problems.extend(problems)
    protocol = compiler.compile(root, sha256 or hashlib.sha256(text.encode()).hexdigest())
    if compiler.problems or protocol is None:
        raise InvalidFile(compiler.problems)
    return protocol


class _Compiler(Reader):
    def __init__(self, file: str):
        super().__init__()
        self.file = file
        self.declared_types: list[str] = []

    # ------------------------------------------------------------ top level

    def compile(self, root: Marked, sha256: str) -> Protocol | None:
        top = self.mapping(
            root, "protocol", TOP_KEYS, required=("vigil_protocol", "name", "wiring", "trial_types", "blocks")
        )
        if top is None:
            return None
        version = self.number(top.get("vigil_protocol"), "vigil_protocol", integer=True)
        if version is not None and version != FORMAT_VERSION:
            self.error(
                top["vigil_protocol"].mark, f"vigil_protocol: this Vigil reads format {FORMAT_VERSION}, found {version}"
            )
        name = self.text(top.get("name"), "name") or ""
        about = self.text(top.get("about"), "about") if "about" in top else ""
        wiring = self.wiring(top.get("wiring"))
        options = self.options(top.get("options"), wiring)
        trial_types = self.trial_types(top.get("trial_types"), wiring, options)
        blocks = self.blocks(top.get("blocks"), trial_types, options)
        iti = self.duration(top.get("iti"), "iti") if "iti" in top else Duration.fixed(0.0)
        limits = self.limits(top.get("limits"))
        at_start = self.actions(top.get("at_start"), "at_start", wiring, allowed=ACTION_KEYS)
        estimator = read_estimator(self, top.get("estimator"))
        if estimator is None and "estimator" not in top and options:
            estimator = EstimatorSpec()  # choice protocols get the default estimator
        iti_bounds = read_iti_bounds(self, top.get("iti_bounds"))
        settings = read_settings(self, top.get("settings"))
        rules = read_rules(self, top.get("rules"), blocks, options, iti_bounds, settings)
        pavlovian = read_pavlovian(self, top.get("pavlovian"), wiring, trial_types) if "pavlovian" in top else None
        if self.problems or wiring is None or iti is None:
            return None
        return Protocol(
            name=name, source=self.file, sha256=sha256, wiring=wiring, options=options,
            trial_types=trial_types, blocks=tuple(blocks), iti=iti, limits=limits,
            at_start=at_start, description=about or "", estimator=estimator, rules=rules,
            iti_bounds=iti_bounds, pavlovian=pavlovian, settings=settings,
        )  # fmt: skip

    def duration(self, node: Marked | None, where: str) -> Duration | None:
        return read_duration(self, node, where)

    # ------------------------------------------------------------ wiring

    def wiring(self, node: Marked | None) -> Wiring | None:
        top = self.mapping(node, "wiring", ("outputs", "inputs"), required=("outputs", "inputs"))
        if top is None:
            return None
        outputs: dict[str, OutputLine] = {}
        channels: dict[int, str] = {}
        declared_held: list[str] = []
        for name, value, _ in self.items(top.get("outputs"), "wiring.outputs"):
            kind_node = value.value.get("kind") if value.is_mapping else None
            if kind_node is None or kind_node.value not in PULSED_OUTPUT_KINDS:
                declared_held.append(name)
            where = f"wiring.outputs.{name}"
            fields = self.mapping(value, where, ("kind", "channel", "pulse_ms"), required=("kind", "channel"))
            if fields is None:
                continue
            kind = self.choice(fields.get("kind"), f"{where}.kind", OUTPUT_KINDS)
            channel = self.channel(fields.get("channel"), where, channels, name)
            pulse_ms = 0
            if "pulse_ms" in fields:
                pulse_ms = self.number(fields["pulse_ms"], f"{where}.pulse_ms", low=1, high=60_000, integer=True) or 0
                if kind in HELD_OUTPUT_KINDS:
                    self.error(fields["pulse_ms"].mark, f"{where}.pulse_ms: only feeder and sync outputs are pulsed")
            elif kind in PULSED_OUTPUT_KINDS:
                self.error(value.mark, f"{where}: missing required key 'pulse_ms' for a {kind} output")
            if kind is not None and channel is not None:
                outputs[name] = OutputLine(name, kind, channel, int(pulse_ms))
            else:
                self.broken.add(name)
        inputs: dict[str, InputLine] = {}
        channels = {}
        for name, value, key_mark in self.items(top.get("inputs"), "wiring.inputs"):
            where = f"wiring.inputs.{name}"
            if name in outputs:
                self.error(key_mark, f"{where}: '{name}' is already an output name")
            fields = self.mapping(value, where, ("kind", "channel", "presented_by"), required=("kind", "channel"))
            if fields is None:
                continue
            kind = self.choice(fields.get("kind"), f"{where}.kind", INPUT_KINDS)
            channel = self.channel(fields.get("channel"), where, channels, name)
            presented_by = None
            if "presented_by" in fields:
                presented_by = self.reference(
                    fields["presented_by"], f"{where}.presented_by", declared_held, "held output"
                )
            if kind is not None and channel is not None and (presented_by or "presented_by" not in fields):
                inputs[name] = InputLine(name, kind, channel, presented_by)
            else:
                self.broken.add(name)
        return Wiring(outputs, inputs)

    def channel(self, node: Marked | None, where: str, taken: dict[int, str], name: str) -> int | None:
        channel = self.number(node, f"{where}.channel", low=0, high=63, integer=True)
        if channel is None:
            return None
        if channel in taken:
            assert node is not None
            self.error(node.mark, f"{where}.channel: channel {channel} is already used by '{taken[channel]}'")
            return None
        taken[int(channel)] = name
        return int(channel)

    def actions(
        self, node: Marked | None, where: str, wiring: Wiring | None, allowed: tuple[str, ...]
    ) -> OutputActions:
        fields = self.mapping(node, where, allowed) if node is not None else None
        if not fields or wiring is None:
            return OutputActions()
        return self.action_fields(fields, where, wiring)

    def action_fields(self, fields: dict[str, Marked], where: str, wiring: Wiring) -> OutputActions:
        lists: dict[str, tuple[str, ...]] = {}
        for key in ACTION_KEYS:
            names: list[str] = []
            for item in self.listing(fields.get(key), f"{where}.{key}", allow_single=True):
                name = self.reference(item, f"{where}.{key}", wiring.outputs, "output")
                if name is None:
                    continue
                pulsed = wiring.outputs[name].pulsed
                if key == "pulse" and not pulsed:
                    self.error(item.mark, f"{where}.pulse: '{name}' is a held output; use activate/deactivate")
                elif key != "pulse" and pulsed:
                    self.error(item.mark, f"{where}.{key}: '{name}' is a pulsed output; use pulse")
                else:
                    names.append(name)
            lists[key] = tuple(names)
        return OutputActions(**lists)

    # ------------------------------------------------------------ options

    def options(self, node: Marked | None, wiring: Wiring | None) -> dict[str, Option]:
        options: dict[str, Option] = {}
        used: dict[str, str] = {}
        for label, value, _ in self.items(node, "options"):
            where = f"options.{label}"
            fields = self.mapping(
                value, where, ("input", "reward_probability"), required=("input", "reward_probability")
            )
            if fields is None or wiring is None:
                continue
            input_name = self.reference(fields.get("input"), f"{where}.input", wiring.inputs, "input")
            p = self.probability(fields.get("reward_probability"), f"{where}.reward_probability")
            if input_name is not None and input_name in used:
                self.error(
                    fields["input"].mark,
                    f"{where}.input: '{input_name}' already belongs to option '{used[input_name]}'",
                )
                continue
            if input_name is not None and p is not None:
                used[input_name] = label
                options[label] = Option(label, input_name, float(p))
            else:
                self.broken.add(label)
        return options

    # ------------------------------------------------------------ trial types

    def trial_types(
        self, node: Marked | None, wiring: Wiring | None, options: dict[str, Option]
    ) -> dict[str, TrialType]:
        types: dict[str, TrialType] = {}
        entries = self.items(node, "trial_types")
        self.declared_types = [name for name, _, _ in entries]
        for name, value, _ in entries:
            where = f"trial_types.{name}"
            fields = self.mapping(value, where, ("steps",), required=("steps",))
            if fields is None or wiring is None:
                continue
            step_nodes = self.listing(fields.get("steps"), f"{where}.steps")
            if "steps" in fields and not step_nodes and fields["steps"].is_list:
                self.error(fields["steps"].mark, f"{where}.steps: needs at least one step")
            named = self.named_list(
                step_nodes, f"{where}.steps", where, STEP_KEYS, ("step",), "step",
                END_TRIAL, "ending the trial",
            )  # fmt: skip
            names = [n for n, _, _ in named]
            steps = []
            for i, (step_name, step_fields, _) in enumerate(named):
                following = names[i + 1] if i + 1 < len(names) else END_TRIAL
                step = self.step(step_name, step_fields, f"{where}.{step_name}", names, following, wiring, options)
                if step is not None:
                    steps.append(step)
            if steps and len(steps) == len(named):
                types[name] = TrialType(name, tuple(steps))
        return types

    def named_list(
        self,
        nodes: list[Marked],
        where: str,
        owner: str,
        keys: tuple[str, ...],
        required: tuple[str, ...],
        name_key: str,
        reserved: str,
        reserved_for: str,
    ) -> list[tuple[str, dict[str, Marked], Marked]]:
        """Entries of a list of mappings each named by `name_key`, names unique and never
        the reserved word; (name, fields, node) for every well-formed entry, in order."""
        named: list[tuple[str, dict[str, Marked], Marked]] = []
        seen: set[str] = set()
        for i, node in enumerate(nodes):
            fields = self.mapping(node, f"{where}[{i + 1}]", keys, required=required)
            if fields is None:
                continue
            name = self.text(fields.get(name_key), f"{where}[{i + 1}].{name_key}")
            if name is None:
                continue
            if name in seen or name == reserved:
                why = f"is reserved for {reserved_for}" if name == reserved else "is used twice"
                self.error(fields[name_key].mark, f"{owner}: {name_key} name '{name}' {why}")
                continue
            seen.add(name)
            named.append((name, fields, node))
        return named

    def target(self, node: Marked | None, where: str, names: list[str]) -> str | None:
        return self.reference(node, where, names + [END_TRIAL], "step")

    def step(
        self,
        name: str,
        f: dict[str, Marked],
        where: str,
        names: list[str],
        following: str,
        wiring: Wiring,
        options: dict[str, Option],
    ) -> Step | None:
        before = len(self.problems)
        on_enter = self.action_fields(f, where, wiring)
        on_leave = self.actions(f.get("on_leave"), f"{where}.on_leave", wiring, ACTION_KEYS)
        wait = self.duration(f["wait_s"], f"{where}.wait_s") if "wait_s" in f else None
        # A response window that runs out ends the trial unless told otherwise: falling through
        # to the following step (often the reward) on an omission would be a dangerous default.
        waits_for_animal = any(k in f for k in ("choose", "respond", "schedule"))
        default_next = END_TRIAL if waits_for_animal else following
        nxt = self.target(f["next"], f"{where}.next", names) if "next" in f else default_next
        respond: dict[str, str] = {}
        for input_name, target_node, key_mark in self.items(f.get("respond"), f"{where}.respond"):
            if input_name not in wiring.inputs:
                self.error(
                    key_mark,
                    f"{where}.respond: no input named '{input_name}'" + did_you_mean(input_name, wiring.inputs),
                )
                continue
            target = self.target(target_node, f"{where}.respond.{input_name}", names)
            if target is not None:
                respond[input_name] = target
        choose: list[str] = []
        for item in self.listing(f.get("choose"), f"{where}.choose", allow_single=True):
            label = self.reference(item, f"{where}.choose", options, "option")
            if label is not None:
                if options[label].input in respond:
                    self.error(
                        item.mark,
                        f"{where}.choose: option '{label}' uses input '{options[label].input}', "
                        "which 'respond' also handles",
                    )
                choose.append(label)
        branch = {}
        for key in ("if_rewarded", "if_unrewarded"):
            if key in f:
                if "choose" not in f:
                    self.error(f[key].mark, f"{where}.{key}: only meaningful with 'choose'")
                branch[key] = self.target(f[key], f"{where}.{key}", names)
        schedule = self.schedule(f.get("schedule"), f"{where}.schedule", names, wiring) if "schedule" in f else None
        draw: list[tuple[str, float]] = []
        if "draw" in f:
            for target_name, p_node, key_mark in self.items(f["draw"], f"{where}.draw"):
                target = self.target(Marked(target_name, key_mark), f"{where}.draw", names)
                p = self.probability(p_node, f"{where}.draw.{target_name}")
                if target is not None and p is not None:
                    draw.append((target, float(p)))
            total = sum(p for _, p in draw)
            if draw and abs(total - 1.0) > 1e-9:
                self.error(f["draw"].mark, f"{where}.draw: probabilities must add up to 1, found {total:g}")
            exclusive = [k for k in ("wait_s", "respond", "choose", "schedule") if k in f]
            if exclusive:
                self.error(f["draw"].mark, f"{where}.draw: a draw step moves on at once; remove {', '.join(exclusive)}")
        if "respond" in f and "schedule" in f and schedule and schedule.input in respond:
            self.error(f["schedule"].mark, f"{where}.schedule: input '{schedule.input}' is also under 'respond'")
        if len(self.problems) > before:
            return None
        return Step(
            name=name, on_enter=on_enter, on_leave=on_leave, wait=wait, next=nxt or END_TRIAL,
            respond=respond, choose=tuple(choose),
            if_rewarded=branch.get("if_rewarded") or following,
            if_unrewarded=branch.get("if_unrewarded") or following,
            schedule=schedule, draw=tuple(draw),
        )  # fmt: skip

    def schedule(self, node: Marked | None, where: str, names: list[str], wiring: Wiring) -> Schedule | None:
        f = self.mapping(
            node, where, ("input", "kind", "value", "intervals", "then"), required=("input", "kind", "value")
        )
        if f is None:
            return None
        input_name = self.reference(f.get("input"), f"{where}.input", wiring.inputs, "input")
        kind = self.choice(f.get("kind"), f"{where}.kind", SCHEDULE_KINDS)
        value: float | None = None
        if kind in ("FR", "VR"):
            value = self.number(f.get("value"), f"{where}.value (responses per reinforcer)", low=1, integer=True)
        elif kind == "RR":
            value = self.number(
                f.get("value"), f"{where}.value (probability per response)", low=0, high=1, low_open=True
            )
        elif kind in ("FI", "VI"):
            value = self.number(f.get("value"), f"{where}.value (seconds)", low=0, low_open=True)
        intervals = 12
        if "intervals" in f:
            if kind != "VI":
                self.error(f["intervals"].mark, f"{where}.intervals: only meaningful for VI")
            intervals = self.number(f["intervals"], f"{where}.intervals", low=2, high=1000, integer=True) or 12
        then = self.target(f["then"], f"{where}.then", names) if "then" in f else END_TRIAL
        if input_name is None or kind is None or value is None or then is None:
            return None
        return Schedule(input_name, kind, float(value), int(intervals), then)

    # ------------------------------------------------------------ blocks

    def blocks(self, node: Marked | None, trial_types: dict[str, TrialType], options: dict[str, Option]) -> list[Block]:
        nodes = self.listing(node, "blocks")
        if node is not None and node.is_list and not nodes:
            self.error(node.mark, "blocks: needs at least one block")
        parsed = [(n, f) for n, f, _ in self.named_list(
            nodes, "blocks", "blocks", BLOCK_KEYS, ("block", "trial_types"), "block",
            END_SESSION, "ending the session",
        )]  # fmt: skip
        names = [n for n, _ in parsed]
        return [b for b in (self.block(n, f, names, trial_types, options) for n, f in parsed) if b]

    def block(
        self,
        name: str,
        f: dict[str, Marked],
        names: list[str],
        trial_types: dict[str, TrialType],
        options: dict[str, Option],
    ) -> Block | None:
        where = f"blocks.{name}"
        before = len(self.problems)
        mix: list[tuple[str, float]] = []
        mix_node = f.get("trial_types")
        if mix_node is not None and mix_node.is_list:
            for item in mix_node.value:
                t = self.reference(item, f"{where}.trial_types", self.declared_types, "trial type")
                if t in trial_types:
                    mix.append((t, 1.0))
        else:
            for t_name, w_node, key_mark in self.items(mix_node, f"{where}.trial_types"):
                t = self.reference(Marked(t_name, key_mark), f"{where}.trial_types", self.declared_types, "trial type")
                w = self.number(w_node, f"{where}.trial_types.{t_name}", low=0, low_open=True)
                if t in trial_types and w is not None:
                    mix.append((t, float(w)))
        if mix_node is not None and not mix and len(self.problems) == before and not self.declared_types:
            self.error(mix_node.mark, f"{where}.trial_types: needs at least one trial type")
        order = self.choice(f["order"], f"{where}.order", ORDERS) if "order" in f else "shuffled"
        max_run = None
        if "max_run" in f:
            max_run = self.number(f["max_run"], f"{where}.max_run", low=1, integer=True)
            if max_run is not None and len(mix) < 2:
                self.error(f["max_run"].mark, f"{where}.max_run: needs at least two trial types to alternate")
        until = self.block_end(f.get("until"), f"{where}.until")
        nxt = None
        if "next" in f:
            nxt = self.reference(f["next"], f"{where}.next", names + [END_SESSION], "block")
        probs: dict[str, float] = {}
        for label, p_node, key_mark in self.items(f.get("reward_probability"), f"{where}.reward_probability"):
            if self.reference(Marked(label, key_mark), f"{where}.reward_probability", options, "option"):
                p = self.probability(p_node, f"{where}.reward_probability.{label}")
                if p is not None:
                    probs[label] = float(p)
        swaps: list[tuple[str, str]] = []
        swap_node = f.get("swap")
        pairs = self.listing(swap_node, f"{where}.swap")
        if pairs and all(not p.is_list for p in pairs):
            assert swap_node is not None  # listing(None) is empty
            pairs = [swap_node]  # a single pair written flat: swap: [left, right]
        for pair in pairs:
            items = self.listing(pair, f"{where}.swap")
            if len(items) != 2:
                self.error(pair.mark, f"{where}.swap: expected a pair of options, found {len(items)} names")
                continue
            a = self.reference(items[0], f"{where}.swap", options, "option")
            b = self.reference(items[1], f"{where}.swap", options, "option")
            if a and b:
                if a == b:
                    self.error(pair.mark, f"{where}.swap: cannot swap '{a}' with itself")
                swaps.append((a, b))
        withhold = (
            self.flag(f["withhold_outcomes"], f"{where}.withhold_outcomes") if "withhold_outcomes" in f else False
        )
        iti = self.duration(f["iti"], f"{where}.iti") if "iti" in f else None
        if len(self.problems) > before:
            return None
        return Block(
            name=name, mix=tuple(mix), order=order or "shuffled",
            max_run=int(max_run) if max_run else None, until=until, next=nxt,
            reward_probability=probs, swap=tuple(swaps), withhold_outcomes=bool(withhold), iti=iti,
        )  # fmt: skip

    def block_end(self, node: Marked | None, where: str) -> BlockEnd:
        f = self.mapping(node, where, ("trials", "minutes", "rewards", "streak", "accuracy"))
        if not f:
            if node is not None and node.is_mapping and not node.value:
                self.error(node.mark, f"{where}: give at least one of trials, minutes, rewards, streak, accuracy")
            return BlockEnd()
        values: dict[str, float | None] = {}
        for key in ("trials", "rewards", "streak"):
            if key in f:
                values[key] = self.number(f[key], f"{where}.{key}", low=1, integer=True)
        if "minutes" in f:
            values["minutes"] = self.number(f["minutes"], f"{where}.minutes", low=0, low_open=True)
        if "accuracy" in f:
            acc = self.mapping(
                f["accuracy"], f"{where}.accuracy", ("at_least", "window"), required=("at_least", "window")
            )
            if acc:
                values["accuracy"] = self.probability(acc.get("at_least"), f"{where}.accuracy.at_least")
                values["window"] = self.number(acc.get("window"), f"{where}.accuracy.window", low=1, integer=True)
        counts = {k: int(v) for k in ("trials", "rewards", "streak", "window") if (v := values.get(k)) is not None}
        return BlockEnd(
            trials=counts.get("trials"),
            minutes=values.get("minutes"),
            rewards=counts.get("rewards"),
            streak=counts.get("streak"),
            accuracy=values.get("accuracy"),
            window=counts.get("window"),
        )

    # ------------------------------------------------------------ limits

    def limits(self, node: Marked | None) -> Limits:
        f = self.mapping(node, "limits", ("max_minutes", "max_rewards", "max_trials"))
        if not f:
            return Limits()
        minutes = (
            self.number(f["max_minutes"], "limits.max_minutes", low=0, low_open=True) if "max_minutes" in f else None
        )
        rewards = (
            self.number(f["max_rewards"], "limits.max_rewards", low=0, integer=True) if "max_rewards" in f else None
        )
        trials = self.number(f["max_trials"], "limits.max_trials", low=1, integer=True) if "max_trials" in f else None
        return Limits(
            max_minutes=minutes,
            max_rewards=int(rewards) if rewards is not None else None,
            max_trials=int(trials) if trials is not None else None,
        )


__all__ = ["load_protocol", "parse_protocol", "InvalidFile"]

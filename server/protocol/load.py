"""Read a protocol YAML file into a compiled `Protocol`, reporting every problem at once."""

from __future__ import annotations

import hashlib
from pathlib import Path

from server.protocol.durations import read_duration
from server.protocol.load_blocks import read_blocks
from server.protocol.load_rules import read_estimator, read_iti_bounds, read_pavlovian, read_rules, read_settings
from server.protocol.load_two_stage import check_two_stage_steps, first_stage_labels, read_two_stage
from server.protocol.load_wiring import ACTION_KEYS, read_action_fields, read_actions, read_options, read_wiring
from server.protocol.marked import Mark, Marked, load_marked
from server.protocol.model import (
    END_TRIAL,
    SCHEDULE_KINDS,
    Duration,
    EstimatorSpec,
    Limits,
    Option,
    Protocol,
    Schedule,
    Step,
    TrialType,
)
from server.protocol.problems import InvalidFile, Problem
from server.protocol.reader import Reader, did_you_mean
from server.protocol.wiring import Wiring

FORMAT_VERSION = 1
TOP_KEYS = (
    "vigil_protocol", "name", "about", "wiring", "options", "trial_types",
    "blocks", "iti", "limits", "at_start", "estimator", "rules", "iti_bounds", "pavlovian",
    "settings", "two_stage",
)  # fmt: skip
STEP_KEYS = (
    "step", "activate", "deactivate", "pulse", "on_leave", "wait_s", "next",
    "respond", "choose", "if_rewarded", "if_unrewarded", "schedule", "draw", "to_state",
)  # fmt: skip
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
        self.step_fields: dict[tuple[str, str], dict[str, Marked]] = {}

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
        wiring = read_wiring(self, top.get("wiring"))
        options = read_options(self, top.get("options"), wiring, first_stage_labels(top.get("two_stage")))
        two_stage = read_two_stage(self, top["two_stage"], options) if "two_stage" in top else None
        before_types = len(self.problems)
        trial_types = self.trial_types(top.get("trial_types"), wiring, options)
        if len(self.problems) == before_types and ("two_stage" not in top or two_stage is not None):
            check_two_stage_steps(self, two_stage, trial_types, self.step_fields)
        blocks = read_blocks(self, top.get("blocks"), trial_types, options, self.declared_types)
        iti = self.duration(top.get("iti"), "iti") if "iti" in top else Duration.fixed(0.0)
        limits = self.limits(top.get("limits"))
        at_start = read_actions(self, top.get("at_start"), "at_start", wiring, allowed=ACTION_KEYS)
        estimator = read_estimator(self, top.get("estimator"))
        if estimator is None and "estimator" not in top and options and "two_stage" not in top:
            estimator = EstimatorSpec()  # choice protocols get the default estimator
        if estimator is not None and "two_stage" in top:
            self.error(
                top["estimator"].mark,
                f"estimator.model: '{estimator.model}' learns single-stage choices; a two_stage task "
                "needs a two-stage model",
            )
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
            iti_bounds=iti_bounds, pavlovian=pavlovian, settings=settings, two_stage=two_stage,
            warnings=tuple(self.warnings),
        )  # fmt: skip

    def duration(self, node: Marked | None, where: str) -> Duration | None:
        return read_duration(self, node, where)

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
                self.step_fields[(name, step_name)] = step_fields
                following = names[i + 1] if i + 1 < len(names) else END_TRIAL
                step = self.step(step_name, step_fields, f"{where}.{step_name}", names, following, wiring, options)
                if step is not None:
                    steps.append(step)
            if steps and len(steps) == len(named):
                types[name] = TrialType(name, tuple(steps))
        return types

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
        on_enter = read_action_fields(self, f, where, wiring)
        on_leave = read_actions(self, f.get("on_leave"), f"{where}.on_leave", wiring, ACTION_KEYS)
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
                elif "to_state" in f:
                    self.error(f[key].mark, f"{where}.{key}: a first choice's outcome comes from the state it leads to")
                branch[key] = self.target(f[key], f"{where}.{key}", names)
        to_state: dict[str, str] = {}
        if "to_state" in f:
            if "choose" not in f:
                self.error(f["to_state"].mark, f"{where}.to_state: only meaningful with 'choose'")
            for state, target_node, _ in self.items(f["to_state"], f"{where}.to_state"):
                target = self.target(target_node, f"{where}.to_state.{state}", names)
                if target is not None:
                    to_state[state] = target
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
            schedule=schedule, draw=tuple(draw), to_state=to_state,
        )  # fmt: skip

    def schedule(self, node: Marked | None, where: str, names: list[str], wiring: Wiring) -> Schedule | None:
        f = self.mapping(
            node,
            where,
            ("input", "kind", "value", "intervals", "on_met"),
            required=("input", "kind", "value"),
            renamed={"then": "on_met"},
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
        on_met = self.target(f["on_met"], f"{where}.on_met", names) if "on_met" in f else END_TRIAL
        if input_name is None or kind is None or value is None or on_met is None:
            return None
        return Schedule(input_name, kind, float(value), int(intervals), on_met)

    # ------------------------------------------------------------ blocks

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

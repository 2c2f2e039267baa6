"""The `two_stage` section of a protocol: a first choice leads, by declared transition
probabilities, to one of several second-stage states whose options decide the outcome.

    two_stage:
      first: [west, east]                 # first-stage options (no reward probability)
      states:                             # each state's options; one option = a single response
        north: [north_port]
        south: [south_port]
      transitions:                        # P(state | first choice), each row adding up to 1
        west: {north: 0.8, south: 0.2}
        east: {north: 0.2, south: 0.8}
      reward_walk: {sd: 0.025, within: [0.25, 0.75]}   # optional drift of the states' options

The trial's steps say where each state is played out: the step that offers the first choice
has `to_state: {north: <step>, south: <step>}`, and each of those steps chooses exactly its
state's options (see `check_two_stage_steps`).
"""

from __future__ import annotations

from server.protocol.marked import Marked
from server.protocol.model import Option, RewardWalk, SecondState, Step, TrialType, TwoStage
from server.protocol.reader import Reader

TWO_STAGE_KEYS = ("first", "states", "transitions", "reward_walk")
WALK_KEYS = ("sd", "within")
MAX_WALK_SD = 0.5


def first_stage_labels(node: Marked | None) -> frozenset[str]:
    """The labels listed under `two_stage.first`, unchecked: the options section is read
    before this one and needs to know which options take no reward probability."""
    if node is None or not node.is_mapping:
        return frozenset()
    first = node.value.get("first")
    if first is None or not first.is_list:
        return frozenset()
    return frozenset(str(item.value) for item in first.value if isinstance(item.value, str))


def read_two_stage(r: Reader, node: Marked | None, options: dict[str, Option]) -> TwoStage | None:
    f = r.mapping(node, "two_stage", TWO_STAGE_KEYS, required=("first", "states", "transitions"))
    if f is None:
        return None
    before = len(r.problems)
    first: list[str] = []
    for item in r.listing(f.get("first"), "two_stage.first"):
        label = r.reference(item, "two_stage.first", options, "option")
        if label is None:
            continue
        if label in first:
            r.error(item.mark, f"two_stage.first: option '{label}' is listed twice")
            continue
        first.append(label)
    if "first" in f and f["first"].is_list and len(f["first"].value) < 2:
        r.error(f["first"].mark, "two_stage.first: a first choice needs at least two options")
    states = _states(r, f.get("states"), options, set(first))
    transitions = _transitions(r, f.get("transitions"), first, states, f["transitions"] if "transitions" in f else None)
    walk = _walk(r, f["reward_walk"], states, options) if "reward_walk" in f else None
    if len(r.problems) > before:
        return None
    return TwoStage(tuple(first), states, transitions, walk)


def _states(r: Reader, node: Marked | None, options: dict[str, Option], first: set[str]) -> dict[str, SecondState]:
    states: dict[str, SecondState] = {}
    owner: dict[str, str] = {}
    for name, value, _ in r.items(node, "two_stage.states"):
        where = f"two_stage.states.{name}"
        labels: list[str] = []
        before = len(r.problems)
        items = r.listing(value, where, allow_single=True)
        for item in items:
            label = r.reference(item, where, options, "option")
            if label is None:
                r.broken.add(name)  # its options are reported; references to it are not
                continue
            if label in first:
                r.error(item.mark, f"{where}: '{label}' is a first-stage option; a state offers its own options")
            elif label in owner:
                r.error(item.mark, f"{where}: option '{label}' is already offered in state '{owner[label]}'")
            else:
                owner[label] = name
                labels.append(label)
        if value.is_list and not value.value:
            r.error(value.mark, f"{where}: a state needs at least one option")
        if len(r.problems) > before or not items:
            r.broken.add(name)
        else:
            states[name] = SecondState(name, tuple(labels))
    if node is not None and node.is_mapping and len(node.value) < 2:
        r.error(node.mark, "two_stage.states: a two-stage task needs at least two second-stage states")
    return states


def _transitions(
    r: Reader,
    node: Marked | None,
    first: list[str],
    states: dict[str, SecondState],
    whole: Marked | None,
) -> dict[str, dict[str, float]]:
    rows: dict[str, dict[str, float]] = {}
    for label, value, key_mark in r.items(node, "two_stage.transitions"):
        where = f"two_stage.transitions.{label}"
        if r.reference(Marked(label, key_mark), "two_stage.transitions", first, "first-stage option") is None:
            continue
        row: dict[str, float] = {}
        complete = True
        for state, p_node, state_mark in r.items(value, where):
            p = r.probability(p_node, f"{where}.{state}")
            if r.reference(Marked(state, state_mark), where, states, "state") is None or p is None:
                complete = False
                continue
            row[state] = float(p)
        total = sum(row.values())
        if complete and row and abs(total - 1.0) > 1e-9:
            r.error(value.mark, f"{where}: probabilities must add up to 1, found {total:g}")
        rows[label] = row
    if whole is not None and whole.is_mapping:
        missing = [label for label in first if label not in rows]
        if missing:
            r.error(whole.mark, f"two_stage.transitions: no transition row for {', '.join(repr(m) for m in missing)}")
    return rows


def _walk(r: Reader, node: Marked, states: dict[str, SecondState], options: dict[str, Option]) -> RewardWalk | None:
    f = r.mapping(node, "two_stage.reward_walk", WALK_KEYS, required=("sd", "within"))
    if f is None:
        return None
    sd = r.number(f.get("sd"), "two_stage.reward_walk.sd", low=0, high=MAX_WALK_SD, low_open=True)
    bounds = r.listing(f.get("within"), "two_stage.reward_walk.within")
    if "within" in f and f["within"].is_list and len(bounds) != 2:
        r.error(
            f["within"].mark, f"two_stage.reward_walk.within: expected [lowest, highest], found {len(bounds)} numbers"
        )
        return None
    if len(bounds) != 2:
        return None
    low = r.probability(bounds[0], "two_stage.reward_walk.within")
    high = r.probability(bounds[1], "two_stage.reward_walk.within")
    if sd is None or low is None or high is None:
        return None
    if low >= high:
        r.error(f["within"].mark, f"two_stage.reward_walk.within: expected lowest < highest, found [{low:g}, {high:g}]")
        return None
    outside = [
        f"'{label}' starts at {p:g}"
        for state in states.values()
        for label in state.options
        if (p := options[label].reward_probability) is not None and not low <= p <= high
    ]
    if outside:
        r.error(
            f["within"].mark,
            f"two_stage.reward_walk.within: option {', '.join(outside)}, outside [{low:g}, {high:g}]",
        )
    return RewardWalk(float(sd), float(low), float(high))


def check_two_stage_steps(
    r: Reader,
    two_stage: TwoStage | None,
    trial_types: dict[str, TrialType],
    step_fields: dict[tuple[str, str], dict[str, Marked]],
) -> None:
    """Every step agrees with the declared structure: a first choice goes on to the states,
    each state's step offers exactly that state's options, and nothing else chooses them."""
    first = set(two_stage.first) if two_stage is not None else set()
    for type_name, trial_type in trial_types.items():
        # Second-stage options belong to trial types with a first choice, whose `to_state`
        # is checked against them; anywhere else they would pay off without a first choice.
        has_first_choice = any(set(step.choose) & first for step in trial_type.steps)
        for step in trial_type.steps:
            fields = step_fields[(type_name, step.name)]
            where = f"trial_types.{type_name}.{step.name}"
            _check_step(r, two_stage, step, where, fields, trial_type, has_first_choice)


def _check_step(
    r: Reader,
    ts: TwoStage | None,
    step: Step,
    where: str,
    fields: dict[str, Marked],
    trial_type: TrialType,
    has_first_choice: bool,
) -> None:
    mark = (fields.get("to_state") or fields.get("choose") or fields["step"]).mark
    if ts is None:
        if step.to_state:
            r.error(mark, f"{where}.to_state: only meaningful with a two_stage section")
        return
    chosen = set(step.choose)
    first = set(ts.first)
    if not chosen & first:
        if step.to_state:
            r.error(mark, f"{where}.to_state: only meaningful on the step that offers two_stage.first")
        elif chosen and not has_first_choice and any(ts.state_of(label) for label in chosen):
            r.error(mark, f"{where}.choose: second-stage options are offered only after a first choice")
        return
    if chosen != first:
        r.error(mark, f"{where}.choose: a first choice offers all of two_stage.first ({', '.join(ts.first)})")
    if not step.to_state:
        r.error(mark, f"{where}: a first choice needs 'to_state', the step each state is played out in")
        return
    missing = [s for s in ts.states if s not in step.to_state]
    extra = [s for s in step.to_state if s not in ts.states]
    if missing:
        r.error(mark, f"{where}.to_state: no step for state {', '.join(repr(s) for s in missing)}")
    if extra:
        r.error(mark, f"{where}.to_state: no state named {', '.join(repr(s) for s in extra)}")
    names = {s.name for s in trial_type.steps}
    for state, target in step.to_state.items():
        if state not in ts.states or target not in names:
            continue
        offered = set(trial_type.steps[trial_type.step_index(target)].choose)
        if offered != set(ts.states[state].options):
            r.error(
                mark,
                f"{where}.to_state.{state}: step '{target}' must choose exactly the options of state "
                f"'{state}' ({', '.join(ts.states[state].options)})",
            )

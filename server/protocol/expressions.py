"""Rule conditions: a small expression language, parsed safely (no `eval`).

    p_prefers_best >= 0.95 and block_trials >= 10
    accuracy(20) >= 0.8 or streak >= 8
    not (omission_rate(10) > 0.5) and beta.mean < 2

Names are metrics of the session, fields of the learning-model estimate, or the protocol's
settings (named numbers a lab config may change per animal); some metrics take a window in
trials, `name(N)`; estimate parameters take `.mean`, `.low` or `.high`. A value
that is not known yet (no estimate, window not filled) makes its comparison false.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

# name -> (takes a window?, what it is). The rules layer computes each of them.
METRICS: dict[str, tuple[bool, str]] = {
    "accuracy": (True, "fraction correct over the last N choice trials"),
    "streak": (False, "consecutive correct choices (omissions skipped)"),
    "omission_rate": (True, "fraction of omitted trials over the last N trials"),
    "win_stay": (True, "P(same choice | previous choice rewarded) over the last N trials"),
    "lose_shift": (True, "P(other choice | previous choice unrewarded) over the last N trials"),
    "stay_reward_effect": (
        True,
        "two-stage: P(repeat first choice | rewarded) - P(repeat | unrewarded) over the last N trials",
    ),
    "stay_interaction": (
        True,
        "two-stage: reward x transition effect on repeating the first choice over the last N trials",
    ),
    "median_latency": (True, "median response latency (s) over the last N trials"),
    "rewards": (False, "pellets delivered this session"),
    "rewarded_responses": (False, "trials ending in a pellet this session"),
    "responses_per_minute": (True, "responses per minute over the last N trials"),
    "minutes": (False, "minutes since the session started"),
    "trials": (False, "trials finished this session"),
    "block_trials": (False, "trials finished in the current block"),
    "reversals": (False, "reversals so far this session"),
    "pca": (False, "Pavlovian conditioned approach index so far (Meyer et al. 2012)"),
    "exploration": (False, "estimated probability of not choosing the best-valued option"),
    "p_prefers_best": (False, "estimated probability the animal prefers its best-valued option"),
    "p_prefers_correct": (
        False,
        "posterior probability the animal chooses the option that is best now with probability >= 0.75",
    ),
    "reward_rate": (False, "exponentially filtered reward rate from the estimator"),
    "prediction_error": (False, "prediction error of the last trial"),
}
PARAMETER_FIELDS = ("mean", "low", "high")
COMPARISONS = ("<", "<=", ">", ">=", "==", "!=")
MAX_LENGTH = 2000


class ExpressionError(Exception):
    def __init__(self, message: str, offset: int):
        super().__init__(message)
        self.offset = offset  # 0-based character offset in the expression


@dataclass(frozen=True, slots=True)
class Number:
    value: float


@dataclass(frozen=True, slots=True)
class Quantity:
    """A metric (`name`, optional `window`) or an estimate parameter (`name.field`)."""

    name: str
    window: int | None = None
    field: str | None = None  # for parameters: mean | low | high
    setting: bool = False  # a named number from the protocol's settings (per animal)

    @property
    def label(self) -> str:
        if self.field:
            return f"{self.name}.{self.field}"
        return f"{self.name}({self.window})" if self.window else self.name


@dataclass(frozen=True, slots=True)
class Arithmetic:
    op: str  # + - * /
    left: Node
    right: Node


@dataclass(frozen=True, slots=True)
class Negate:
    operand: Node


@dataclass(frozen=True, slots=True)
class Compare:
    op: str
    left: Node
    right: Node


@dataclass(frozen=True, slots=True)
class Logic:
    op: str  # and | or
    parts: tuple[Node, ...]


@dataclass(frozen=True, slots=True)
class Not:
    operand: Node


Node = Number | Quantity | Arithmetic | Negate | Compare | Logic | Not

_TOKEN = re.compile(
    r"\s*(?:(?P<num>\d+(?:\.\d*)?(?:[eE][-+]?\d+)?|\.\d+)|(?P<name>[A-Za-z_][A-Za-z0-9_]*)"
    r"|(?P<op><=|>=|==|!=|[<>()+\-*/.,]))"
)


def _tokens(text: str) -> list[tuple[str, str, int]]:
    out: list[tuple[str, str, int]] = []
    pos = 0
    while pos < len(text):
        if text[pos:].strip() == "":
            break
        m = _TOKEN.match(text, pos)
        if not m or m.end() == pos:
            offset = pos + (len(text[pos:]) - len(text[pos:].lstrip()))
            raise ExpressionError(f"unexpected character '{text[offset]}'", offset)
        kind = m.lastgroup
        assert kind is not None  # every match ends inside one of the named groups
        value = m.group(kind)
        out.append((kind, value, m.start(kind)))
        pos = m.end()
    out.append(("end", "", len(text)))
    return out


class _Parser:
    def __init__(self, text: str, parameters: tuple[str, ...], settings: tuple[str, ...]):
        self.tokens = _tokens(text)
        self.i = 0
        self.parameters = parameters
        self.settings = settings
        self.quantities: list[Quantity] = []

    def peek(self) -> tuple[str, str, int]:
        return self.tokens[self.i]

    def take(self) -> tuple[str, str, int]:
        token = self.tokens[self.i]
        self.i += 1
        return token

    def expect(self, value: str) -> None:
        kind, found, offset = self.take()
        if found != value:
            raise ExpressionError(f"expected '{value}', found {_show(kind, found)}", offset)

    def parse(self) -> Node:
        node = self.disjunction()
        kind, value, offset = self.peek()
        if kind != "end":
            raise ExpressionError(f"unexpected {_show(kind, value)}", offset)
        return node

    def disjunction(self) -> Node:
        parts = [self.conjunction()]
        while self.peek()[1] == "or":
            self.take()
            parts.append(self.conjunction())
        return parts[0] if len(parts) == 1 else Logic("or", tuple(parts))

    def conjunction(self) -> Node:
        parts = [self.negation()]
        while self.peek()[1] == "and":
            self.take()
            parts.append(self.negation())
        return parts[0] if len(parts) == 1 else Logic("and", tuple(parts))

    def negation(self) -> Node:
        if self.peek()[1] == "not":
            self.take()
            return Not(self.negation())
        return self.comparison()

    def comparison(self) -> Node:
        left = self.sum()
        kind, value, offset = self.peek()
        if value in COMPARISONS:
            self.take()
            right = self.sum()
            if self.peek()[1] in COMPARISONS:
                raise ExpressionError("chained comparisons are not allowed; join them with 'and'", self.peek()[2])
            return Compare(value, left, right)
        return left

    def sum(self) -> Node:
        node = self.product()
        while self.peek()[1] in ("+", "-"):
            op = self.take()[1]
            node = Arithmetic(op, node, self.product())
        return node

    def product(self) -> Node:
        node = self.unary()
        while self.peek()[1] in ("*", "/"):
            op = self.take()[1]
            node = Arithmetic(op, node, self.unary())
        return node

    def unary(self) -> Node:
        if self.peek()[1] == "-":
            self.take()
            return Negate(self.unary())
        return self.atom()

    def atom(self) -> Node:
        kind, value, offset = self.take()
        if kind == "num":
            return Number(float(value))
        if value == "(":
            node = self.disjunction()
            self.expect(")")
            return node
        if kind == "name" and value not in ("and", "or", "not"):
            return self.quantity(value, offset)
        raise ExpressionError(f"expected a number or a name, found {_show(kind, value)}", offset)

    def quantity(self, name: str, offset: int) -> Quantity:
        if name in self.settings:
            q = Quantity(name, setting=True)
        elif name in self.parameters:
            if self.peek()[1] != ".":
                raise ExpressionError(f"parameter '{name}' needs .mean, .low or .high", offset)
            self.take()
            kind, field, f_offset = self.take()
            if field not in PARAMETER_FIELDS:
                raise ExpressionError(
                    f"expected mean, low or high after '{name}.', found {_show(kind, field)}", f_offset
                )
            q = Quantity(name, field=field)
        elif name in METRICS:
            windowed = METRICS[name][0]
            window = None
            if windowed:
                if self.peek()[1] != "(":
                    raise ExpressionError(f"'{name}' needs a window in trials, e.g. {name}(20)", offset)
                self.take()
                kind, value, w_offset = self.take()
                if kind != "num" or not value.isdigit() or int(value) < 1:
                    raise ExpressionError(
                        f"window of '{name}' must be a whole number of trials, found {_show(kind, value)}", w_offset
                    )
                window = int(value)
                self.expect(")")
            q = Quantity(name, window)
        else:
            from server.protocol.reader import did_you_mean

            known = list(METRICS) + list(self.parameters) + list(self.settings)
            raise ExpressionError(f"unknown quantity '{name}'{did_you_mean(name, known)}", offset)
        self.quantities.append(q)
        return q


def _show(kind: str, value: str) -> str:
    return "the end" if kind == "end" else f"'{value}'"


def parse_condition(
    text: str, parameters: tuple[str, ...] = (), settings: tuple[str, ...] = ()
) -> tuple[Node, tuple[Quantity, ...]]:
    """Parse a condition; returns the tree and every quantity it reads (in order, unique)."""
    if len(text) > MAX_LENGTH:
        raise ExpressionError(f"condition longer than {MAX_LENGTH} characters", 0)
    parser = _Parser(text, parameters, settings)
    try:
        node = parser.parse()
    except RecursionError:
        raise ExpressionError("condition nested too deeply", 0) from None
    if not isinstance(node, (Compare, Logic, Not)):
        raise ExpressionError("a condition must compare something, e.g. streak >= 8", 0)
    unique = tuple(dict.fromkeys(parser.quantities))
    return node, unique

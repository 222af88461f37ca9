"""The safe expression language of the `expression` basis term.

A user writes a basis term as text, e.g. ``log1p(t / 7d)`` or ``(temperature - 20) * exp(-t/36h)``.
That text is tokenised and parsed here into a small tree of frozen nodes; the tree is then
evaluated with numpy over whole arrays, and differentiated symbolically with respect to `t`
(for drift-rate alerts). Nothing in this module ever hands user text to Python's own parser,
compiler or `eval`: the only things the language can name are numbers, durations, `pi`, the
variables the caller allows, and the functions in `FUNCTIONS`. There is no attribute access,
no indexing, no strings and no calls of anything else, so an injection attempt such as
``__import__('os')`` fails in the tokenizer or the name check with a one-line error.

Grammar (precedence from low to high; ``^`` and ``**`` are the same, right-associative)::

    expr    := term (("+" | "-") term)*
    term    := unary (("*" | "/") unary)*
    unary   := ("+" | "-") unary | power
    power   := atom (("^" | "**") unary)?
    atom    := NUMBER | DURATION | NAME | FUNC "(" expr ")" | "(" expr ")"

A DURATION is a number written directly before a unit (``7d``, ``36h``, ``15min``); it stands
for that many seconds, so ``t / 7d`` is time in weeks.
"""

from __future__ import annotations

import math
import operator
import re
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt

from zeroline.durations import UNIT_SECONDS
from zeroline.errors import ExpressionError

Array = npt.NDArray[np.float64]

MAX_LENGTH = 500
MAX_DEPTH = 40

#: The fixed list of functions: name -> (numpy function, derivative as a function of the argument).
FUNCTIONS: dict[str, tuple[Callable[[Array], Array], Callable[[Node], Node] | None]] = {}

_TOKEN = re.compile(
    r"\s*(?:"
    r"(?P<number>(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?)(?P<unit>[A-Za-z_]\w*)?"
    r"|(?P<name>[A-Za-z_]\w*)"
    r"|(?P<op>\*\*|[-+*/^()])"
    r")"
)


# --- the tree -------------------------------------------------------------------------------


@dataclass(frozen=True)
class Node:
    """Base of every expression node."""


@dataclass(frozen=True)
class Number(Node):
    value: float


@dataclass(frozen=True)
class Variable(Node):
    name: str


@dataclass(frozen=True)
class Negate(Node):
    operand: Node


@dataclass(frozen=True)
class Binary(Node):
    op: str  # one of + - * / ^
    left: Node
    right: Node


@dataclass(frozen=True)
class Call(Node):
    function: str
    argument: Node


def _register_functions() -> None:
    table: dict[str, tuple[Callable[[Array], Array], Callable[[Node], Node] | None]] = {
        "abs": (np.abs, None),  # derivative undefined at 0: see `derivative`
        "sqrt": (np.sqrt, lambda u: Binary("/", Number(0.5), Call("sqrt", u))),
        "exp": (np.exp, lambda u: Call("exp", u)),
        "expm1": (np.expm1, lambda u: Call("exp", u)),
        "log": (np.log, lambda u: Binary("/", Number(1.0), u)),
        "log1p": (np.log1p, lambda u: Binary("/", Number(1.0), Binary("+", Number(1.0), u))),
        "log10": (
            np.log10,
            lambda u: Binary("/", Number(1.0 / math.log(10.0)), u),
        ),
        "sin": (np.sin, lambda u: Call("cos", u)),
        "cos": (np.cos, lambda u: Negate(Call("sin", u))),
        "tan": (
            np.tan,
            lambda u: Binary("+", Number(1.0), Binary("^", Call("tan", u), Number(2.0))),
        ),
        "atan": (
            np.arctan,
            lambda u: Binary(
                "/", Number(1.0), Binary("+", Number(1.0), Binary("^", u, Number(2.0)))
            ),
        ),
        "sinh": (np.sinh, lambda u: Call("cosh", u)),
        "cosh": (np.cosh, lambda u: Call("sinh", u)),
        "tanh": (
            np.tanh,
            lambda u: Binary("-", Number(1.0), Binary("^", Call("tanh", u), Number(2.0))),
        ),
    }
    FUNCTIONS.update(table)


_register_functions()

CONSTANTS = {"pi": math.pi}


# --- parsing --------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Token:
    kind: str  # number | name | op | end
    text: str
    value: float
    position: int


def _tokenize(text: str) -> list[_Token]:
    tokens: list[_Token] = []
    position = 0
    while position < len(text):
        if text[position:].strip() == "":
            break
        match = _TOKEN.match(text, position)
        if match is None or match.end() == position:
            stripped = len(text[position:]) - len(text[position:].lstrip())
            bad = text[position + stripped]
            raise ExpressionError(
                f"character {bad!r} at position {position + stripped + 1} is not part of the "
                "expression language; use numbers, durations (7d), names, + - * / ^ and "
                "parentheses"
            )
        start = match.start(match.lastgroup or 0)
        if match.group("number") is not None:
            value = float(match.group("number"))
            unit = match.group("unit")
            if unit is not None:
                if unit not in UNIT_SECONDS:
                    raise ExpressionError(
                        f"{match.group(0).strip()!r} is neither a number nor a duration; write a "
                        f"duration with one of the units {', '.join(UNIT_SECONDS)}, or use * "
                        "to multiply"
                    )
                value *= UNIT_SECONDS[unit]
            tokens.append(_Token("number", match.group(0).strip(), value, start))
        elif match.group("name") is not None:
            tokens.append(_Token("name", match.group("name"), 0.0, start))
        else:
            tokens.append(_Token("op", match.group("op"), 0.0, start))
        position = match.end()
    tokens.append(_Token("end", "", 0.0, len(text)))
    return tokens


class _Parser:
    def __init__(self, text: str, variables: frozenset[str]) -> None:
        self._tokens = _tokenize(text)
        self._index = 0
        self._variables = variables
        self._depth = 0

    def parse(self) -> Node:
        node = self._expr()
        token = self._peek()
        if token.kind != "end":
            raise ExpressionError(
                f"unexpected {token.text!r} at position {token.position + 1}; "
                "an operator (+ - * / ^) or the end of the expression was expected"
            )
        return node

    def _peek(self) -> _Token:
        return self._tokens[self._index]

    def _take(self) -> _Token:
        token = self._tokens[self._index]
        self._index += 1
        return token

    def _enter(self) -> None:
        self._depth += 1
        if self._depth > MAX_DEPTH:
            raise ExpressionError(f"expression nests deeper than {MAX_DEPTH} levels; simplify it")

    def _expr(self) -> Node:
        node = self._term()
        while self._peek().text in {"+", "-"} and self._peek().kind == "op":
            op = self._take().text
            node = Binary(op, node, self._term())
        return node

    def _term(self) -> Node:
        node = self._unary()
        while self._peek().text in {"*", "/"} and self._peek().kind == "op":
            op = self._take().text
            node = Binary(op, node, self._unary())
        return node

    def _unary(self) -> Node:
        self._enter()
        try:
            token = self._peek()
            if token.kind == "op" and token.text in {"+", "-"}:
                self._take()
                operand = self._unary()
                return operand if token.text == "+" else Negate(operand)
            return self._power()
        finally:
            self._depth -= 1

    def _power(self) -> Node:
        base = self._atom()
        token = self._peek()
        if token.kind == "op" and token.text in {"^", "**"}:
            self._take()
            return Binary("^", base, self._unary())
        return base

    def _atom(self) -> Node:
        token = self._take()
        if token.kind == "number":
            return Number(token.value)
        if token.kind == "name":
            return self._name(token)
        if token.kind == "op" and token.text == "(":
            self._enter()
            node = self._expr()
            self._depth -= 1
            self._expect(")")
            return node
        what = "the end of the expression" if token.kind == "end" else repr(token.text)
        raise ExpressionError(
            f"expected a number, a name, a function or '(' at position {token.position + 1}, "
            f"found {what}"
        )

    def _name(self, token: _Token) -> Node:
        name = token.text
        if self._peek().kind == "op" and self._peek().text == "(":
            if name not in FUNCTIONS:
                raise ExpressionError(
                    f"unknown function {name!r}; the functions are {', '.join(sorted(FUNCTIONS))}"
                )
            self._take()
            self._enter()
            argument = self._expr()
            self._depth -= 1
            self._expect(")")
            return Call(name, argument)
        if name in FUNCTIONS:
            raise ExpressionError(
                f"function {name!r} needs an argument in parentheses: {name}(...)"
            )
        if name in CONSTANTS:
            return Number(CONSTANTS[name])
        if name not in self._variables:
            known = ", ".join(sorted(self._variables)) or "none"
            raise ExpressionError(
                f"unknown name {name!r}; an expression may use t, pi and the channel's declared "
                f"inputs (here: {known})"
            )
        return Variable(name)

    def _expect(self, text: str) -> None:
        token = self._take()
        if token.kind != "op" or token.text != text:
            found = "the end of the expression" if token.kind == "end" else repr(token.text)
            raise ExpressionError(
                f"expected {text!r} at position {token.position + 1}, found {found}"
            )


def parse(text: object, variables: frozenset[str] | set[str]) -> Node:
    """Parse `text` into a tree, allowing only the names in `variables` (plus `pi`).

    >>> tree = parse("log1p(t / 7d)", {"t"})
    >>> tree.function, tree.argument.right
    ('log1p', Number(value=604800.0))
    """
    if not isinstance(text, str):
        raise ExpressionError(f"an expression must be a string, got {type(text).__name__}")
    if not text.strip():
        raise ExpressionError("the expression is empty; write e.g. log1p(t / 7d)")
    if len(text) > MAX_LENGTH:
        raise ExpressionError(f"expression is {len(text)} characters long; at most {MAX_LENGTH}")
    return _Parser(text, frozenset(variables)).parse()


def variables_of(node: Node) -> frozenset[str]:
    """The variable names a tree uses."""
    if isinstance(node, Variable):
        return frozenset({node.name})
    if isinstance(node, Negate):
        return variables_of(node.operand)
    if isinstance(node, Binary):
        return variables_of(node.left) | variables_of(node.right)
    if isinstance(node, Call):
        return variables_of(node.argument)
    return frozenset()


# --- evaluation -----------------------------------------------------------------------------


def evaluate(node: Node, values: Mapping[str, Array], size: int) -> Array:
    """Evaluate the tree over arrays of length `size`; invalid points come out as NaN or inf."""
    with np.errstate(all="ignore"):
        result = _evaluate(node, values)
    full: Array = np.broadcast_to(np.asarray(result, dtype=np.float64), (size,)).copy()
    return full


# The four arithmetic operators, the same for arrays and floats; "^" differs (numpy's power
# against Python's, which can turn complex) and is handled by each evaluator.
_ARITHMETIC: dict[str, Callable[[Any, Any], Any]] = {
    "+": operator.add,
    "-": operator.sub,
    "*": operator.mul,
    "/": operator.truediv,
}


def _evaluate(node: Node, values: Mapping[str, Array]) -> Array:
    if isinstance(node, Number):
        return np.asarray(node.value)
    if isinstance(node, Variable):
        return values[node.name]
    if isinstance(node, Negate):
        return -_evaluate(node.operand, values)
    if isinstance(node, Call):
        function = FUNCTIONS[node.function][0]
        return np.asarray(function(_evaluate(node.argument, values)), dtype=np.float64)
    if isinstance(node, Binary):
        left = _evaluate(node.left, values)
        right = _evaluate(node.right, values)
        arithmetic = _ARITHMETIC.get(node.op)
        return arithmetic(left, right) if arithmetic else np.power(left, right)
    raise TypeError(f"not an expression node: {node!r}")


def evaluate_scalar(node: Node, values: Mapping[str, float]) -> float:
    """The same tree at one point with Python floats (the per-reading hot path; several
    times faster than numpy for one value). Domain errors come out as NaN, like `evaluate`."""
    try:
        return _scalar(node, values)
    except (ValueError, ZeroDivisionError, OverflowError):
        return math.nan


_SCALAR_FUNCTIONS: dict[str, Callable[[float], float]] = {
    "abs": abs,
    "sqrt": math.sqrt,
    "exp": math.exp,
    "expm1": math.expm1,
    "log": math.log,
    "log1p": math.log1p,
    "log10": math.log10,
    "sin": math.sin,
    "cos": math.cos,
    "tan": math.tan,
    "atan": math.atan,
    "sinh": math.sinh,
    "cosh": math.cosh,
    "tanh": math.tanh,
}


def _scalar(node: Node, values: Mapping[str, float]) -> float:
    if isinstance(node, Number):
        return node.value
    if isinstance(node, Variable):
        return values[node.name]
    if isinstance(node, Negate):
        return -_scalar(node.operand, values)
    if isinstance(node, Call):
        return _SCALAR_FUNCTIONS[node.function](_scalar(node.argument, values))
    if isinstance(node, Binary):
        left, right = _scalar(node.left, values), _scalar(node.right, values)
        arithmetic = _ARITHMETIC.get(node.op)
        if arithmetic:
            return float(arithmetic(left, right))
        result = left**right
        return result if isinstance(result, float) else math.nan  # complex: undefined
    raise TypeError(f"not an expression node: {node!r}")


# --- symbolic derivative with respect to one variable ----------------------------------------


def derivative(node: Node, variable: str) -> Node:
    """d(node)/d(variable) as a new tree; other variables are held constant.

    `abs` is differentiated as sign(u)·u', which is zero at u = 0.
    """
    if isinstance(node, Number):
        return Number(0.0)
    if isinstance(node, Variable):
        return Number(1.0 if node.name == variable else 0.0)
    if isinstance(node, Negate):
        return _neg(derivative(node.operand, variable))
    if isinstance(node, Call):
        inner = derivative(node.argument, variable)
        if _is_zero(inner):
            return Number(0.0)
        outer_rule = FUNCTIONS[node.function][1]
        if outer_rule is None:  # abs
            outer: Node = Binary("/", node.argument, Call("abs", node.argument))
        else:
            outer = outer_rule(node.argument)
        return _mul(outer, inner)
    if isinstance(node, Binary):
        return _derivative_binary(node, variable)
    raise TypeError(f"not an expression node: {node!r}")


def _derivative_binary(node: Binary, variable: str) -> Node:
    u, v = node.left, node.right
    du, dv = derivative(u, variable), derivative(v, variable)
    if node.op == "+":
        return _add(du, dv)
    if node.op == "-":
        return _add(du, _neg(dv))
    if node.op == "*":
        return _add(_mul(du, v), _mul(u, dv))
    if node.op == "/":
        # (u/v)' = u'/v − u v'/v²
        return _add(_div(du, v), _neg(_div(_mul(u, dv), Binary("^", v, Number(2.0)))))
    # power: (u^v)' = v u^(v−1) u' + u^v ln(u) v'
    first = _mul(_mul(v, Binary("^", u, _add(v, Number(-1.0)))), du)
    if _is_zero(dv):
        return first
    return _add(first, _mul(_mul(node, Call("log", u)), dv))


def _is_zero(node: Node) -> bool:
    return isinstance(node, Number) and node.value == 0.0


def _add(a: Node, b: Node) -> Node:
    if _is_zero(a):
        return b
    if _is_zero(b):
        return a
    return Binary("+", a, b)


def _neg(a: Node) -> Node:
    return Number(-a.value) if isinstance(a, Number) else Negate(a)


def _mul(a: Node, b: Node) -> Node:
    if _is_zero(a) or _is_zero(b):
        return Number(0.0)
    if isinstance(a, Number) and a.value == 1.0:
        return b
    if isinstance(b, Number) and b.value == 1.0:
        return a
    return Binary("*", a, b)


def _div(a: Node, b: Node) -> Node:
    if _is_zero(a):
        return Number(0.0)
    return Binary("/", a, b)

"""The safe expression language: grammar, values, derivatives, and that it stays closed.

Sources: the grammar and the function list are zeroline's own (design §2, module docstring
of zeroline.expression); operator precedence and right-associative `^` follow ordinary
mathematical notation (common practice, no source); derivative rules are the standard
ones of calculus (checked numerically here, not from a table); the central difference
with Richardson extrapolation is the textbook scheme (Press et al., Numerical Recipes,
3rd ed., §5.7). The injection strings are the classic Python sandbox escapes (common
practice, no source). Randomised checks use hypothesis with fixed seeds (`derandomize`).
"""

from __future__ import annotations

import builtins
import math
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import Any
from unittest import mock

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from zeroline import expression
from zeroline.basis import parse_basis
from zeroline.errors import ConfigError, ExpressionError
from zeroline.expression import Binary, Call, Negate, Node, Number, Variable

SETTINGS = settings(max_examples=120, derandomize=True, deadline=None, database=None)
ALLOWED = frozenset({"t", "temperature"})


def value(text: str, **variables: float) -> float:
    """Evaluate `text` at one point."""
    arrays = {name: np.array([v]) for name, v in variables.items()}
    return float(expression.evaluate(expression.parse(text, ALLOWED), arrays, 1)[0])


def slope(text: str, t: np.ndarray, **inputs: float) -> np.ndarray:
    """d(text)/dt by the module's symbolic derivative, evaluated at `t`."""
    tree = expression.derivative(expression.parse(text, ALLOWED), "t")
    values = {"t": t, **{name: np.full_like(t, v) for name, v in inputs.items()}}
    return expression.evaluate(tree, values, t.shape[0])


def central_difference(
    f: Callable[[np.ndarray], np.ndarray], t: np.ndarray, h: float = 1e-3
) -> np.ndarray:
    """Richardson-extrapolated central difference, error O(h⁴)."""
    step = h * np.maximum(1.0, np.abs(t))

    def d(width: np.ndarray) -> np.ndarray:
        return (f(t + width) - f(t - width)) / (2 * width)

    return (4 * d(step / 2) - d(step)) / 3


def difference_with_error(
    f: Callable[[np.ndarray], np.ndarray], t: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """A central difference and an estimate of its own error (two step sizes compared).

    Where a random expression oscillates fast the difference is not resolved; the error
    estimate then widens the tolerance at that point only.
    """
    fine = central_difference(f, t, 2.5e-4)
    return fine, np.abs(fine - central_difference(f, t, 1e-3))


def walk(node: Node) -> Iterator[Node]:
    yield node
    for child in ("operand", "left", "right", "argument"):
        if hasattr(node, child):
            yield from walk(getattr(node, child))


def assert_inside_language(tree: Node, allowed: frozenset[str]) -> None:
    """Every node is one of the five node kinds, naming only allowed things."""
    for node in walk(tree):
        assert type(node) in {Number, Variable, Negate, Binary, Call}, node
        if isinstance(node, Variable):
            assert node.name in allowed
        if isinstance(node, Binary):
            assert node.op in {"+", "-", "*", "/", "^"}
        if isinstance(node, Call):
            assert node.function in expression.FUNCTIONS


@contextmanager
def no_dynamic_code() -> Iterator[list[str]]:
    """Make eval/exec/compile/__import__ fail loudly and record any attempt."""
    attempts: list[str] = []
    real_import = builtins.__import__

    def refuse(name: str) -> Callable[..., Any]:
        def trap(*args: Any, **kwargs: Any) -> Any:
            attempts.append(name)
            raise AssertionError(f"{name} was called")

        return trap

    def guarded_import(module: str, *args: Any, **kwargs: Any) -> Any:
        attempts.append(f"import {module}")
        return real_import(module, *args, **kwargs)

    with mock.patch.multiple(
        builtins, eval=refuse("eval"), exec=refuse("exec"), compile=refuse("compile"),
        __import__=guarded_import,
    ):  # fmt: skip
        yield attempts


# --- grammar and values ---------------------------------------------------------------------


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("2^3^2", 512.0),  # right-associative
        ("2**3", 8.0),
        ("-2^2", -4.0),  # unary minus binds looser than ^
        ("2^-1", 0.5),
        ("2*3+4", 10.0),
        ("2+3*4", 14.0),
        ("2-3-4", -5.0),  # left-associative
        ("8/4/2", 1.0),
        ("(2+3)*4", 20.0),
        ("--3", 3.0),
        ("+3", 3.0),
        (".5 + 1.", 1.5),
        ("1.5e3", 1500.0),
        ("7d", 604800.0),
        ("36h / 15min", 144.0),
        ("30s + 1ms", 30.001),
        ("pi", math.pi),
        ("  t\t*\n2 ", 6.0),
        ("log1p(t / 7d)", math.log1p(3.0 / 604800.0)),
        ("(temperature - 20) * exp(-t/36h)", 5.0 * math.exp(-3.0 / 129600.0)),
    ],
)
def test_values(text: str, expected: float) -> None:
    """Ordinary precedence and associativity; durations are seconds."""
    assert value(text, t=3.0, temperature=25.0) == pytest.approx(expected, rel=1e-15)


@pytest.mark.parametrize("name", sorted(expression.FUNCTIONS))
def test_every_function_matches_math(name: str) -> None:
    """Each function equals Python's math module at a point inside its domain."""
    reference = {"abs": abs, "atan": math.atan}.get(name, getattr(math, name, None))
    assert reference is not None
    assert value(f"{name}(0.3 + 0.1*t)", t=2.0) == pytest.approx(reference(0.5), rel=1e-15)


def test_out_of_domain_gives_nan_or_inf_not_an_exception() -> None:
    """Invalid points become NaN or inf (the fit then refuses that row, naming it)."""
    assert math.isnan(value("log(t)", t=-1.0))
    assert math.isinf(value("1/t", t=0.0))
    assert math.isnan(value("sqrt(t)", t=-4.0))


def test_variables_of_lists_the_names_used() -> None:
    tree = expression.parse("temperature * t + pi", ALLOWED)
    assert expression.variables_of(tree) == {"t", "temperature"}
    assert expression.variables_of(expression.parse("2 * pi", ALLOWED)) == frozenset()


# --- errors ---------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("text", "says"),
    [
        ("", "empty"),
        ("   ", "empty"),
        ("humidity * 2", "unknown name 'humidity'"),
        ("foo(t)", "unknown function 'foo'"),
        ("sin", "needs an argument"),
        ("2m", "'2m' is neither a number nor a duration"),
        ("2pi", "neither a number nor a duration"),
        ("t t", "unexpected 't'"),
        ("(t", "expected ')'"),
        ("t)", "unexpected ')'"),
        ("t +", "found the end of the expression"),
        ("*t", "found '*'"),
        ("sin(t, t)", "','"),
        ("t" + "+t" * 300, "at most 500"),
        ("(" * 45 + "t" + ")" * 45, "deeper than 40"),
        ("-" * 45 + "t", "deeper than 40"),
    ],
)
def test_errors_say_what_is_wrong(text: str, says: str) -> None:
    """Each mistake is one ExpressionError line that names it."""
    with pytest.raises(ExpressionError) as caught:
        expression.parse(text, ALLOWED)
    message = str(caught.value)
    assert says in message
    assert "\n" not in message


@pytest.mark.parametrize("text", [None, 5, 2.5, ["t"], {"t": 1}, b"t"])
def test_non_string_is_refused(text: object) -> None:
    with pytest.raises(ExpressionError, match="must be a string"):
        expression.parse(text, ALLOWED)


INJECTIONS = [
    "__import__('os').system('id')",
    "__import__",
    "t.__class__",
    "t.__class__.__mro__[1].__subclasses__()",
    "().__class__.__bases__[0]",
    "[c for c in ().__class__.__base__.__subclasses__()]",
    "lambda: 0",
    "eval('1')",
    "exec('import os')",
    "open('/etc/passwd')",
    "getattr(t, 'real')",
    "globals()",
    "t; import os",
    "t # comment",
    "t if t else t",
    "f'{t}'",
    "'t'",
    '"t"',
    "t[0]",
    "{}",
    "t == t",
    "t @ t",
    "t, t",
    "\\x74",
    "t := 1",
    "sin.__call__(t)",
    "1 .real",
    "exp(t).real",
    "exp",
    "os",
    "__builtins__",
]


@pytest.mark.parametrize("text", INJECTIONS)
def test_injection_attempts_are_clear_errors(text: str) -> None:
    """Classic sandbox escapes never get past the tokenizer or the name check."""
    with no_dynamic_code() as attempts, pytest.raises(ExpressionError) as caught:
        expression.parse(text, ALLOWED)
    assert attempts == []
    assert "\n" not in str(caught.value)


# --- randomised: the language is closed ------------------------------------------------------

SOUP = [
    "__import__", "os", "system", "eval", "exec", "lambda", "open", "getattr", "__class__",
    "__builtins__", "__globals__", "t", "temperature", "pi", "sin", "exp", "log1p", "x",
    ".", "[", "]", "(", ")", "{", "}", "'", '"', ";", ":", ",", "=", "==", "@", "!", "#",
    "\\", "`", "$", "&", "|", "~", "%", "<", ">", "+", "-", "*", "/", "^", "**", " ",
    "\n", "\t", "1", "2.5", "1e3", "7d", "36h", "0x1f", "_", "import", "\x00", "é",
]  # fmt: skip


@SETTINGS
@given(st.lists(st.sampled_from(SOUP), max_size=25).map("".join))
def test_token_soup_is_parsed_inside_the_language_or_refused(text: str) -> None:
    """Random soups of code-like tokens: an ExpressionError, or a tree of allowed nodes only.

    eval/exec/compile/__import__ are trapped while the text is parsed and evaluated.
    """
    with no_dynamic_code() as attempts:
        try:
            tree = expression.parse(text, ALLOWED)
        except ExpressionError as error:
            assert "\n" not in str(error)
        else:
            assert_inside_language(tree, ALLOWED)
            values = {"t": np.array([0.5, 2.0]), "temperature": np.array([20.0, 21.0])}
            result = expression.evaluate(tree, values, 2)
            assert result.shape == (2,) and result.dtype == np.float64
    assert attempts == []


@SETTINGS
@given(st.text(max_size=600))
def test_arbitrary_text_raises_only_expression_error(text: str) -> None:
    """Any text at all: parsed inside the language, or ExpressionError; nothing else."""
    try:
        tree = expression.parse(text, ALLOWED)
    except ExpressionError:
        return
    assert_inside_language(tree, ALLOWED)


@SETTINGS
@given(st.text(alphabet=st.characters(codec="utf-8"), max_size=80))
def test_arbitrary_text_as_a_basis_term_raises_only_config_error(text: str) -> None:
    """Through the basis parser an expression problem is a ConfigError with its key path."""
    try:
        parse_basis([{"expression": text}], "basis", frozenset({"temperature"}))
    except ConfigError as error:
        assert str(error).startswith("basis[0].expression: ")


# --- randomised: values and derivatives -----------------------------------------------------

Expr = tuple[str, Callable[[float], float]]
LEAVES: st.SearchStrategy[Expr] = st.one_of(
    st.just(("t", lambda t: t)),
    st.just(("pi", lambda t: math.pi)),
    st.sampled_from([0.5, 1.5, 2.0, 3.25, 0.125]).map(lambda c: (repr(c), lambda t, c=c: c)),
)

UNARY: dict[str, Callable[[str, Callable[[float], float]], Expr]] = {
    "sin": lambda s, f: (f"sin({s})", lambda t: math.sin(f(t))),
    "cos": lambda s, f: (f"cos({s})", lambda t: math.cos(f(t))),
    "atan": lambda s, f: (f"atan({s})", lambda t: math.atan(f(t))),
    "tanh": lambda s, f: (f"tanh({s})", lambda t: math.tanh(f(t))),
    "exp": lambda s, f: (f"exp(sin({s}))", lambda t: math.exp(math.sin(f(t)))),
    "expm1": lambda s, f: (f"expm1(cos({s}))", lambda t: math.expm1(math.cos(f(t)))),
    "sqrt": lambda s, f: (f"sqrt(1 + ({s})^2)", lambda t: math.sqrt(1 + f(t) ** 2)),
    "log": lambda s, f: (f"log(2 + sin({s}))", lambda t: math.log(2 + math.sin(f(t)))),
    "log1p": lambda s, f: (f"log1p(({s})^2)", lambda t: math.log1p(f(t) ** 2)),
    "log10": lambda s, f: (f"log10(1.5 + cos({s}))", lambda t: math.log10(1.5 + math.cos(f(t)))),
    "sinh": lambda s, f: (f"sinh(sin({s}))", lambda t: math.sinh(math.sin(f(t)))),
    "cosh": lambda s, f: (f"cosh(atan({s}))", lambda t: math.cosh(math.atan(f(t)))),
    "tan": lambda s, f: (f"tan(atan({s}) / 2)", lambda t: math.tan(math.atan(f(t)) / 2)),
    "neg": lambda s, f: (f"-({s})", lambda t: -f(t)),
    "square": lambda s, f: (f"({s})^2", lambda t: f(t) ** 2),
    "cube": lambda s, f: (f"({s})**3", lambda t: f(t) ** 3),
}


def combine(op: str, a: Expr, b: Expr) -> Expr:
    (sa, fa), (sb, fb) = a, b
    if op == "+":
        return f"({sa}) + ({sb})", lambda t: fa(t) + fb(t)
    if op == "-":
        return f"({sa}) - ({sb})", lambda t: fa(t) - fb(t)
    if op == "*":
        return f"({sa}) * ({sb})", lambda t: fa(t) * fb(t)
    if op == "/":  # denominators kept away from zero
        return f"({sa}) / (1 + ({sb})^2)", lambda t: fa(t) / (1 + fb(t) ** 2)
    # a power with a variable exponent and a positive base
    return f"(1.5 + sin({sa}))^({sb})", lambda t: (1.5 + math.sin(fa(t))) ** fb(t)


def extend(children: st.SearchStrategy[Expr]) -> st.SearchStrategy[Expr]:
    unary = st.tuples(st.sampled_from(sorted(UNARY)), children).map(
        lambda pair: UNARY[pair[0]](*pair[1])
    )
    binary = st.tuples(st.sampled_from("+-*/^"), children, children).map(lambda x: combine(*x))
    return st.one_of(unary, binary)


EXPRESSIONS = st.recursive(LEAVES, extend, max_leaves=8)
POINTS = np.array([0.3, 0.9, 1.7, 2.6])


@SETTINGS
@given(EXPRESSIONS)
def test_random_expressions_evaluate_to_their_meaning(case: Expr) -> None:
    """The parsed tree evaluates to what the same formula gives in Python's math."""
    text, meaning = case
    tree = expression.parse(text, ALLOWED)
    got = expression.evaluate(tree, {"t": POINTS}, POINTS.shape[0])
    expected = np.array([meaning(t) for t in POINTS])
    np.testing.assert_allclose(got, expected, rtol=1e-12, atol=1e-300)


@SETTINGS
@given(EXPRESSIONS)
def test_random_derivatives_match_finite_differences(case: Expr) -> None:
    """The symbolic d/dt of random expressions equals a central difference of the value."""
    text, _ = case
    tree = expression.parse(text, ALLOWED)

    def f(t: np.ndarray) -> np.ndarray:
        return expression.evaluate(tree, {"t": t}, t.shape[0])

    numeric, error = difference_with_error(f, POINTS)
    size = max(1.0, float(np.max(np.abs(f(POINTS)))))
    tolerance = 1e-6 * np.abs(numeric) + 1e-7 * size + 10 * error
    assert np.all(np.abs(slope(text, POINTS) - numeric) <= tolerance), text


@pytest.mark.parametrize("name", sorted(expression.FUNCTIONS))
def test_derivative_rule_of_every_function(name: str) -> None:
    """The chain rule for each function, checked against a central difference."""
    text = f"{name}(0.3 + 0.5*t)"
    t = np.array([-0.4, 0.1, 0.35, 0.8])  # arguments 0.1 … 0.7: inside every domain
    tree = expression.parse(text, ALLOWED)
    numeric = central_difference(lambda x: expression.evaluate(tree, {"t": x}, 4), t)
    np.testing.assert_allclose(slope(text, t), numeric, rtol=1e-8)


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("t^t", lambda t: t**t * (math.log(t) + 1)),
        ("2^t", lambda t: 2**t * math.log(2)),
        ("t^2.5", lambda t: 2.5 * t**1.5),
        ("abs(t - 1)", lambda t: math.copysign(1.0, t - 1)),
        ("temperature * t^2", lambda t: 2 * 21.0 * t),  # inputs held constant
        ("temperature^2", lambda t: 0.0),
        ("t / 7d", lambda t: 1 / 604800.0),
    ],
)
def test_derivative_closed_forms(text: str, expected: Callable[[float], float]) -> None:
    """Closed-form derivatives from calculus (power rule with variable exponent, |u|')."""
    t = np.array([0.5, 1.5, 2.5])
    np.testing.assert_allclose(
        slope(text, t, temperature=21.0), [expected(x) for x in t], rtol=1e-14
    )


def test_derivative_of_a_long_product_chain_evaluates() -> None:
    """The longest allowed product t·t·…·t (250 factors) differentiates and evaluates."""
    text = "*".join(["t"] * 250)
    assert slope(text, np.array([1.0]))[0] == pytest.approx(250.0, rel=1e-14)

"""Tests for the restricted expression parser (compartments.expressions).

Reference values are sympy expressions built by hand with sympy's own operators; operator
precedence and associativity follow the Python language reference ("Operator precedence":
``**`` binds tighter than unary minus and groups right to left; ``*`` ``/`` and ``+`` ``-``
group left to right).
"""

from __future__ import annotations

import math
import time
from datetime import timedelta

import pytest
import sympy as sp
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from compartments.errors import ExpressionError
from compartments.expressions import MAX_DEPTH, MAX_LENGTH, parse_expression

x, y, ka, ke, depot, central, V, Vmax, Km = sp.symbols(
    "x y ka ke depot central V Vmax Km", real=True
)
NAMES = {
    "x": x,
    "y": y,
    "ka": ka,
    "ke": ke,
    "depot": depot,
    "central": central,
    "V": V,
    "Vmax": Vmax,
    "Km": Km,
}
HANG_GUARD_S = 5.0  # a hang detector, not a speed test


def parse(text: str, **kwargs) -> sp.Expr:
    return parse_expression(text, NAMES, **kwargs)


class TestAccepted:
    """Text inside the grammar gives the same sympy object as building it by hand."""

    @pytest.mark.parametrize(
        ("text", "expected"),
        [
            ("ka*depot - ke*central", ka * depot - ke * central),
            ("-ka*depot", -ka * depot),
            ("-x**2", -(x**2)),  # Python reference: ** binds tighter than unary minus
            ("2**-1", sp.Rational(1, 2)),
            ("x^2", x**2),
            ("x**y**2", x ** (y**2)),  # ** groups right to left
            ("x^y^2", x ** (y**2)),
            ("x/y/2", (x / y) / 2),  # / groups left to right
            ("x - y - 1", (x - y) - 1),
            ("x - (y - 1)", x - (y - 1)),
            ("2*x + 3*y", 2 * x + 3 * y),
            ("1e-3*x", sp.Float(0.001) * x),
            (".5*x", sp.Float(0.5) * x),
            ("2.5E2", sp.Float(250.0)),
            ("3.", sp.Float(3.0)),
            ("007", sp.Integer(7)),
            ("+x", x),
            ("--x", x),
            ("-(-x)", x),
            ("exp(-ke*x)", sp.exp(-ke * x)),
            ("log(2)/ke", sp.log(2) / ke),
            ("sqrt(x)", sp.sqrt(x)),
            ("abs(x - y)", sp.Abs(x - y)),
            ("min(x, y)", sp.Min(x, y)),
            ("max(x, y, 1)", sp.Max(x, y, 1)),
            ("piecewise(x < 1, x, 2*x)", sp.Piecewise((x, x < 1), (2 * x, True))),
            ("piecewise(x <= y, 0, 1)", sp.Piecewise((0, x <= y), (1, True))),
            ("piecewise(x > 0, x, -x)", sp.Piecewise((x, x > 0), (-x, True))),
            ("piecewise(x >= 2*y, x, y)", sp.Piecewise((x, x >= 2 * y), (y, True))),
            ("-Vmax*(central/V)/(Km + central/V)", -Vmax * (central / V) / (Km + central / V)),
            ("ka *\n\tdepot", ka * depot),
            ("((((x))))", x),
            ("sqrt(4)", sp.Integer(2)),
            ("2*(x + 1)", 2 * x + 2),
        ],
    )
    def test_equals_hand_built(self, text: str, expected: sp.Expr) -> None:
        """The parsed expression equals the sympy expression built by hand."""
        assert parse(text) == expected

    def test_constants_are_substituted_as_numbers(self) -> None:
        """Integral settings become exact integers, others floats."""
        assert parse("(n + 1)/ka", constants={"n": 3}) == 4 / ka
        assert parse("(n + 1)/ka", constants={"n": 3.0}) == 4 / ka
        assert parse("c*x", constants={"c": 0.25}) == sp.Float(0.25) * x
        assert not parse("population - x", constants={"population": 1000}).has(
            sp.Symbol("population")
        )

    def test_names_may_stand_for_expressions(self) -> None:
        """A declared name can be an alias for another symbol or an expression."""
        last = sp.Symbol("transit3", real=True)
        assert parse_expression("ka*transit_out", {"ka": ka, "transit_out": last}) == ka * last

    def test_symbols_are_real(self) -> None:
        """The result uses the caller's real symbols, so it is real for real inputs."""
        expr = parse("exp(-ke*x) + sqrt(x**2)")
        assert expr.free_symbols == {ke, x}
        assert all(s.is_real for s in expr.free_symbols)
        assert expr.is_real

    def test_depth_limit_is_reachable(self) -> None:
        """Nesting just under the limit is accepted."""
        depth = MAX_DEPTH - 1
        assert parse("(" * depth + "x" + ")" * depth) == x

    def test_length_limit_is_inclusive(self) -> None:
        """An expression of exactly MAX_LENGTH characters is accepted."""
        text = "x" + "+x" * ((MAX_LENGTH - 1) // 2)
        text = text + " " * (MAX_LENGTH - len(text))
        assert len(text) == MAX_LENGTH
        assert parse(text) == ((MAX_LENGTH - 1) // 2 + 1) * x


class TestRefused:
    """Text outside the grammar is refused with a one-line message naming the place."""

    @pytest.mark.parametrize(
        ("text", "words", "column"),
        [
            ("a.b", ["attribute access"], 2),
            ("x.__class__", ["attribute access"], 2),
            ("x[0]", ["subscripts"], 2),
            ("lambda q: q", ["keyword 'lambda'"], 1),
            ("x if y else 1", ["keyword 'if'"], 3),
            ("'os'", ["strings"], 1),
            ('"os"', ["strings"], 1),
            ("__import__('os').system('touch /tmp/x')", ["'__'", "__import__"], 1),
            ("x + __builtins__", ["'__'"], 5),
            ("kk*x", ["unknown name 'kk'", "declared names", "x"], 1),
            ("kx", ["unknown name 'kx'", "did you mean"], 1),
            ("t", ["unknown name 't'"], 1),
            ("foo(x)", ["unknown function 'foo'", "exp"], 1),
            ("eval(x)", ["unknown function 'eval'"], 1),
            ("exp(x, y)", ["exp takes exactly 1 argument, got 2"], 1),
            ("log()", ["log takes exactly 1 argument, got 0"], 1),
            ("min(x)", ["min takes 2 or more arguments"], 1),
            ("piecewise(x, 1, 2)", ["comparison"], 12),
            ("piecewise(x < 1, 1)", ["piecewise takes 3 arguments"], 1),
            ("piecewise(x < y < 1, 1, 2)", ["comparison", "once"], 17),
            ("", ["empty expression"], None),
            ("   ", ["empty expression"], None),
            ("x y", ["operator is missing"], 3),
            ("2 (x)", ["operator is missing"], 3),
            ("x)", ["unmatched ')'"], 2),
            ("(x", ["ends early"], None),
            ("x +", ["ends early"], None),
            ("* x", ["unexpected '*'"], 1),
            ("x = 1", ["'='"], 3),
            ("x == 1", ["'=='"], 3),
            ("x != 1", ["'!='"], 3),
            ("x; y", ["';'"], 2),
            ("x, y", ["commas"], 2),
            ("x < y", ["piecewise"], 3),
            ("2x", ["malformed number"], 1),
            ("1.2.3", ["malformed number"], 1),
            ("1_000", ["malformed number"], 1),
            ("x // 2", ["floor division"], 3),
            ("x % 2", ["'%'"], 3),
            ("x @ y", ["'@'"], 3),
            ("{x}", ["braces"], 1),
            ("`x`", ["character '`'"], 1),
            ("$x", ["character '$'"], 1),
            ("x \u00e9", ["character"], 3),
            ("x\x00", ["character"], 2),
            ("exp", ["needs arguments"], 1),
            ("x(2)", ["not a function"], 1),
            ("1/0", ["division by zero"], 2),
            ("log(0)", ["undefined"], 1),
            ("sqrt(-1)", ["not a real number"], 1),
            ("log(-2)", ["not a real number"], 1),
            ("x**1001", ["exponent", "1000"], 2),
            ("9**9**9**9", ["exponent"], 5),
            ("(10**299)**2", ["out of range", "larger than"], 10),
            ("1e400", ["larger than"], 1),
            ("1" * 301, ["larger than"], 1),
        ],
    )
    def test_refused(self, text: str, words: list[str], column: int | None) -> None:
        """Each refusal names what is wrong and the column of the offending token."""
        with pytest.raises(ExpressionError) as info:
            parse(text)
        message = str(info.value)
        assert "\n" not in message
        for word in words:
            assert word in message
        if column is not None:
            assert f"column {column}" in message
        else:
            assert "at the end" in message

    def test_where_prefixes_the_message(self) -> None:
        """The `where` argument starts the message."""
        with pytest.raises(ExpressionError, match=r"^equations\.central: unknown name 'q'"):
            parse("q", where="equations.central")

    def test_too_long(self) -> None:
        """Text over the length limit is refused before tokenizing."""
        with pytest.raises(ExpressionError, match="limit is 2000"):
            parse("x" + "+x" * MAX_LENGTH)

    def test_non_text(self) -> None:
        """Only text is parsed."""
        with pytest.raises(ExpressionError, match="must be text"):
            parse_expression(42, NAMES)  # type: ignore[arg-type]

    def test_non_finite_constant(self) -> None:
        """A setting that is not a finite number is refused."""
        with pytest.raises(ExpressionError, match="not a finite number"):
            parse("n*x", constants={"n": math.inf})


class TestResources:
    """Hostile inputs finish quickly with an ExpressionError (never RecursionError)."""

    @pytest.mark.parametrize(
        ("text", "word"),
        [
            ("9**9**9**9", "exponent"),
            ("9**9**9", "exponent"),
            ("(" * 5000 + "x" + ")" * 5000, "characters long"),
            ("(" * 660 + "x" + ")" * 660, "nested too deeply"),
            ("-" * 1500 + "x", "nested too deeply"),
            ("x" + "**x" * 500, "nested too deeply"),
            ("exp(" * 100 + "x" + ")" * 100, "nested too deeply"),
            ("((10**299*x)**1000)**1000", "out of range"),
            ("((1/10**299)**1000)**1000", "constant power"),
            ("(x**1000)**1000", "exponent"),
            ("2**1000**1000", "larger than"),
            ("1e300*1e300", "larger than"),
            ("exp(exp(exp(1000)))", "out of range"),
            ("exp(691)", "out of range"),
            ("10**exp(10**299)", "out of range"),
            ("sqrt(-log(log(log(0.5) + 10)))", "not a real number"),
            ("10**300*10**300", "out of range"),
        ],
    )
    def test_refused_quickly(self, text: str, word: str) -> None:
        """The parser refuses resource-exhausting text without hanging."""
        start = time.perf_counter()
        with pytest.raises(ExpressionError, match=word):
            parse(text)
        assert time.perf_counter() - start < HANG_GUARD_S

    def test_constants_up_to_the_limit(self) -> None:
        """Constants just under 1e300 are kept (exp unevaluated, powers exact)."""
        start = time.perf_counter()
        assert parse("exp(690)") == sp.exp(690)  # e**690 is about 1.4e299
        assert parse("2**996") == sp.Integer(2) ** 996  # about 6.7e299
        assert parse("1e300*x") == sp.Float(1e300) * x
        assert time.perf_counter() - start < HANG_GUARD_S


# ------------------------------------------------------------------ property tests

_TOKENS = [
    "x", "y", "ka", "1", "0", "2.5", "1e300", "1e-300", ".5", "+", "-", "*", "/", "**",
    "^", "(", ")", ",", "<", ">=", "exp", "log", "sqrt", "abs", "min", "max",
    "piecewise", " ", "9", "99", "1000",
]  # fmt: skip


@settings(
    max_examples=300,
    deadline=timedelta(seconds=2),
    suppress_health_check=[HealthCheck.too_slow],
)
@given(
    st.one_of(
        st.text(max_size=80),
        st.text(alphabet="xy0123456789.eE+-*/^()<>=,;_ !'\"[]{}:", max_size=80),
        st.lists(st.sampled_from(_TOKENS), max_size=40).map("".join),
    )
)
def test_fuzz_only_expression_errors(text: str) -> None:
    """Random text either parses to a sympy expression or raises ExpressionError."""
    try:
        result = parse(text)
    except ExpressionError as exc:
        assert "\n" not in str(exc)
        return
    assert isinstance(result, sp.Expr)


def _trees() -> st.SearchStrategy:
    leaves = st.one_of(st.integers(0, 9), st.sampled_from(["x", "y"]))
    return st.recursive(
        leaves,
        lambda kids: st.one_of(
            st.tuples(st.sampled_from(["+", "-", "*", "/"]), kids, kids),
            st.tuples(st.just("**"), kids, st.integers(-3, 3)),
            st.tuples(st.just("neg"), kids),
        ),
        max_leaves=12,
    )


def _render(tree) -> str:
    if isinstance(tree, int):
        return str(tree)
    if isinstance(tree, str):
        return tree
    if tree[0] == "neg":
        return f"-({_render(tree[1])})"
    op, a, b = tree
    return f"({_render(a)}) {op} ({_render(b)})"


def _reference(tree) -> sp.Expr:
    """The same tree built with sympy's own operators."""
    if isinstance(tree, int):
        return sp.Integer(tree)
    if isinstance(tree, str):
        return NAMES[tree]
    if tree[0] == "neg":
        return -_reference(tree[1])
    op, a, b = tree
    left, right = _reference(a), _reference(b)
    return {
        "+": lambda: left + right,
        "-": lambda: left - right,
        "*": lambda: left * right,
        "/": lambda: left / right,
        "**": lambda: left**right,
    }[op]()


@settings(max_examples=200, deadline=timedelta(seconds=2))
@given(_trees())
def test_random_arithmetic_matches_sympy(tree) -> None:
    """Fully parenthesised random arithmetic parses to what sympy's operators build."""
    text = _render(tree)
    reference = _reference(tree)
    try:
        parsed = parse(text)
    except ExpressionError as exc:
        # Only refusals for undefined or out-of-range constants are expected here.
        words = ("undefined", "out of range", "division by zero", "larger than")
        assert any(w in str(exc) for w in words)
        return
    assume(not reference.has(sp.zoo, sp.nan))
    assert parsed == reference

"""Restricted math-expression parser: template text to sympy, never through ``eval``.

The grammar is small on purpose::

    expression  := term (("+" | "-") term)*
    term        := unary (("*" | "/") unary)*
    unary       := ("+" | "-") unary | power
    power       := atom (("**" | "^") unary)?          # right-associative
    atom        := number | name | call | "(" expression ")"
    call        := function "(" arguments ")"
    condition   := expression ("<" | "<=" | ">" | ">=") expression   # piecewise only

Numbers are decimal (``2``, ``0.5``, ``.5``, ``1e-3``). Names are the declared ones
(given as a mapping to sympy symbols or expressions) and constants (template settings,
substituted as numbers). Functions: ``exp``, ``log`` (natural), ``sqrt``, ``abs``,
``min`` and ``max`` (two or more arguments) and ``piecewise(condition, then, otherwise)``.

The text is split by a hand-written tokenizer and read by a recursive-descent parser that
builds sympy objects directly; Python's ``eval``, ``exec``, ``ast`` and sympy's string
parsers are never used. Resource limits keep every call bounded in time and memory:
at most :data:`MAX_LENGTH` characters, :data:`MAX_DEPTH` levels of nesting (checked while
parsing, so no ``RecursionError``), at most 20 arguments per call, constant exponents
of magnitude at most :data:`MAX_EXPONENT`, and constants of magnitude at most
:data:`MAX_MAGNITUDE`. Every constant sub-expression is also evaluated with Python floats
as it is read, so ``exp(1000)``, ``log(0)``, ``sqrt(-1)`` or ``1/0`` are refused before
sympy works on them. ``abs``, ``min``, ``max``, comparisons and ``piecewise`` are built
unevaluated (sympy's own evaluation of them can take unbounded time), and a ``piecewise``
may not appear inside a condition. Arithmetic, ``exp``, ``log`` and ``sqrt`` are evaluated
as sympy usually does (``2*(x + 1)`` becomes ``2*x + 2``).
"""

from __future__ import annotations

import difflib
import keyword
import math
import re
from collections.abc import Callable, Mapping
from dataclasses import dataclass

import sympy as sp

from .errors import ExpressionError

__all__ = [
    "FUNCTIONS",
    "MAX_DEPTH",
    "MAX_EXPONENT",
    "MAX_LENGTH",
    "MAX_MAGNITUDE",
    "RESERVED_NAMES",
    "parse_expression",
]

#: Longest accepted expression text, in characters.
MAX_LENGTH = 2000
#: Deepest accepted nesting (parentheses, signs, exponents, function calls).
MAX_DEPTH = 64
#: Largest accepted magnitude of a constant exponent.
MAX_EXPONENT = 1000
#: Largest accepted magnitude of a constant number.
MAX_MAGNITUDE = 1e300
#: Largest accepted size, in bits, of the numerator or denominator of an exact constant.
_MAX_BITS = 1100
_MAX_ARGUMENTS = 20


def _float_log(value: float) -> float:
    if value <= 0:
        raise ValueError("log of a non-positive number")
    return math.log(value)


def _float_pow(base: float, exponent: float) -> float:
    if base == 0 and exponent < 0:
        raise ZeroDivisionError("0 to a negative power")
    return math.pow(base, exponent)


# name -> (sympy constructor, float function for constant arguments)
_FUNCTIONS_1: dict[str, tuple[Callable[..., sp.Basic], Callable[..., float]]] = {
    "exp": (sp.exp, math.exp),
    "log": (sp.log, _float_log),
    "sqrt": (sp.sqrt, math.sqrt),
    # Abs is built unevaluated: its evaluation may expand products (unbounded time).
    "abs": (lambda a: sp.Abs(a, evaluate=False), abs),
}
# Min/Max are built unevaluated: sympy's pairwise simplification of their arguments
# grows quadratically with costly assumption queries (tens of seconds for ~200 arguments).
_FUNCTIONS_N: dict[str, tuple[Callable[..., sp.Basic], Callable[..., float]]] = {
    "min": (lambda *a: sp.Min(*a, evaluate=False), min),
    "max": (lambda *a: sp.Max(*a, evaluate=False), max),
}
#: Function names the grammar knows.
FUNCTIONS: tuple[str, ...] = ("exp", "log", "sqrt", "abs", "min", "max", "piecewise")
#: Names a template may not declare: the functions and ``t`` (time, kept for later use).
RESERVED_NAMES: frozenset[str] = frozenset(FUNCTIONS) | {"t"}

# Comparisons and piecewise are built unevaluated: evaluating them may run sympy's
# assumption system and logic simplifier on the whole operands (unbounded time).
_COMPARISONS: dict[str, tuple[Callable[..., sp.Basic], Callable[..., bool]]] = {
    "<": (lambda a, b: sp.Lt(a, b, evaluate=False), lambda a, b: a < b),
    "<=": (lambda a, b: sp.Le(a, b, evaluate=False), lambda a, b: a <= b),
    ">": (lambda a, b: sp.Gt(a, b, evaluate=False), lambda a, b: a > b),
    ">=": (lambda a, b: sp.Ge(a, b, evaluate=False), lambda a, b: a >= b),
}


def _piecewise(cond: sp.Basic, then: sp.Expr, otherwise: sp.Expr) -> sp.Expr:
    return sp.Piecewise((then, cond), (otherwise, True), evaluate=False)


def _piecewise_value(cond: bool, then: float, otherwise: float) -> float:
    return then if cond else otherwise


_ALLOWED = (
    "allowed: numbers, declared names, + - * / ** ^, parentheses, "
    "exp log sqrt abs min max piecewise(cond, then, otherwise)"
)
_NUMBER = re.compile(r"(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?", re.ASCII)
_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*", re.ASCII)
_TWO_CHAR = ("**", "<=", ">=", "==", "!=", "//")
_ONE_CHAR = "+-*/^(),<>"
_REFUSED_CHARS = {
    ".": "attribute access is not allowed",
    "[": "subscripts are not allowed",
    "]": "subscripts are not allowed",
    "{": "braces are not allowed",
    "}": "braces are not allowed",
    "'": "strings are not allowed",
    '"': "strings are not allowed",
    "=": "'=' is not allowed (no assignments; comparisons are < <= > >= inside piecewise)",
    ";": "';' is not allowed (one expression only, no statements)",
    ":": "':' is not allowed (no lambdas, slices or annotations)",
    "%": "'%' is not allowed (no remainder)",
    "@": "'@' is not allowed",
    "\\": "backslashes are not allowed",
}
_REFUSED_PAIRS = {
    "==": "'==' is not allowed; comparisons are < <= > >= inside piecewise(...)",
    "!=": "'!=' is not allowed; comparisons are < <= > >= inside piecewise(...)",
    "//": "'//' (floor division) is not allowed; use /",
}


@dataclass(frozen=True)
class _Token:
    kind: str  # "number", "name", "op", "end"
    text: str
    column: int  # 1-based


@dataclass(frozen=True)
class _Node:
    """A parsed sub-expression and, when it is constant, its value as a Python float."""

    expr: sp.Basic
    value: float | bool | None = None


_MINUS_ONE = _Node(sp.S.NegativeOne, -1.0)


def parse_expression(
    text: str,
    names: Mapping[str, sp.Expr],
    *,
    constants: Mapping[str, float] = {},  # noqa: B006 - read only
    where: str = "",
) -> sp.Expr:
    """Parse restricted math text into a sympy expression.

    Parameters
    ----------
    text : str
        The expression, e.g. ``"ka*depot - ke*central"``.
    names : mapping of str to sympy.Symbol
        Declared names and the sympy objects they stand for (usually real symbols; any
        sympy expression is accepted, e.g. an alias).
    constants : mapping of str to float, optional
        Named numbers (template settings), substituted as numbers. Integral values become
        sympy integers.
    where : str, optional
        Where the text comes from (e.g. ``"equations.central"``); starts the message of
        any error.

    Returns
    -------
    sympy.Expr
        The expression, built directly from sympy objects.

    Raises
    ------
    ExpressionError
        If the text is outside the grammar, uses an undeclared name, is too long or too
        deeply nested, or has a constant that is too large or not a real number.

    Examples
    --------
    >>> import sympy as sp
    >>> ke, c = sp.symbols("ke central", real=True)
    >>> parse_expression("-ke*central", {"ke": ke, "central": c})
    -central*ke
    >>> parse_expression("(n + 1)/ke", {"ke": ke}, constants={"n": 3})
    4/ke
    """
    prefix = f"{where}: " if where else ""
    if not isinstance(text, str):
        raise ExpressionError(f"{prefix}an expression must be text, got {type(text).__name__}")
    if len(text) > MAX_LENGTH:
        raise ExpressionError(
            f"{prefix}expression is {len(text)} characters long; the limit is {MAX_LENGTH}"
            " - split it or simplify it"
        )
    return _Parser(text, names, constants, prefix).parse()


def _number_from_float(value: float) -> sp.Number:
    """A sympy number for a setting value: integers stay exact."""
    if float(value).is_integer() and abs(value) < 2**53:
        return sp.Integer(int(value))
    return sp.Float(float(value))


class _Parser:
    """Tokenizer plus recursive-descent parser; one instance per expression."""

    def __init__(
        self,
        text: str,
        names: Mapping[str, sp.Expr],
        constants: Mapping[str, float],
        prefix: str,
    ) -> None:
        self.text = text
        self.names = names
        self.constants = constants
        self.prefix = prefix
        self.depth = 0
        self.pos = 0
        self.tokens: list[_Token] = []

    # ------------------------------------------------------------------ errors
    def _snippet(self) -> str:
        text = " ".join(self.text.split())
        if len(text) > 60:
            text = text[:57] + "..."
        return repr(text)

    def error(
        self, what: str, token: _Token | None = None, allowed: str = _ALLOWED
    ) -> ExpressionError:
        place = ""
        if token is not None:
            place = " at the end" if token.kind == "end" else f" at column {token.column}"
        tail = f"; {allowed}" if allowed else ""
        return ExpressionError(f"{self.prefix}{what}{place} in {self._snippet()}{tail}")

    # --------------------------------------------------------------- tokenizer
    def tokenize(self) -> None:
        text, i, n = self.text, 0, len(self.text)
        tokens = self.tokens
        while i < n:
            c = text[i]
            col = i + 1
            if c in " \t\r\n":
                i += 1
                continue
            if c in "0123456789" or (c == "." and i + 1 < n and text[i + 1] in "0123456789"):
                m = _NUMBER.match(text, i)
                end = m.end() if m else i + 1
                if end < n and (text[end].isalnum() or text[end] in "_."):
                    bad = _Token("number", text[i : end + 1], col)
                    raise self.error(
                        f"malformed number {text[i : end + 1]!r} (write 2*x, not 2x)", bad
                    )
                tokens.append(_Token("number", text[i:end], col))
                i = end
                continue
            if c.isascii() and (c.isalpha() or c == "_"):
                m = _NAME.match(text, i)
                end = m.end() if m else i + 1
                token = _Token("name", text[i:end], col)
                if token.text.startswith("__"):
                    raise self.error(
                        f"names starting with '__' are not allowed ({token.text!r})", token
                    )
                if keyword.iskeyword(token.text):
                    raise self.error(f"Python keyword {token.text!r} is not allowed", token)
                tokens.append(token)
                i = end
                continue
            pair = text[i : i + 2]
            if pair in _REFUSED_PAIRS:
                raise self.error(_REFUSED_PAIRS[pair], _Token("op", pair, col))
            if pair in _TWO_CHAR:
                tokens.append(_Token("op", pair, col))
                i += 2
                continue
            if c in _ONE_CHAR:
                tokens.append(_Token("op", c, col))
                i += 1
                continue
            token = _Token("op", c, col)
            if c in _REFUSED_CHARS:
                raise self.error(_REFUSED_CHARS[c], token)
            raise self.error(f"character {c!r} is not allowed", token)
        tokens.append(_Token("end", "", n + 1))

    # ----------------------------------------------------------------- helpers
    @property
    def peek(self) -> _Token:
        return self.tokens[self.pos]

    def advance(self) -> _Token:
        tok = self.tokens[self.pos]
        if tok.kind != "end":
            self.pos += 1
        return tok

    def is_op(self, *ops: str) -> bool:
        tok = self.peek
        return tok.kind == "op" and tok.text in ops

    def unexpected(self, tok: _Token, expected: str) -> ExpressionError:
        """The error for a token that does not fit where it stands."""
        if tok.kind == "end":
            return self.error(f"expression ends early; expected {expected}", tok)
        if tok.kind in ("name", "number") or tok.text == "(":
            return self.error(
                f"unexpected {tok.text!r}; an operator is missing (write 2*x, not 2 x)", tok
            )
        if tok.text == ",":
            return self.error("unexpected ','; commas only separate function arguments", tok)
        if tok.text == ")":
            return self.error("unmatched ')'", tok)
        if tok.text in _COMPARISONS:
            return self.error(
                f"comparison {tok.text!r} is allowed only as the first argument of"
                " piecewise(cond, then, otherwise), once",
                tok,
            )
        return self.error(f"unexpected {tok.text!r}; expected {expected}", tok)

    def expect(self, op: str, expected: str) -> _Token:
        if not self.is_op(op):
            raise self.unexpected(self.peek, expected)
        return self.advance()

    def constant(self, value: float | None, tok: _Token) -> float | None:
        """Check the float value of a constant sub-expression (None: not constant)."""
        if value is not None and not (math.isfinite(value) and abs(value) <= MAX_MAGNITUDE):
            raise self.error(
                f"a constant is out of range (larger than {MAX_MAGNITUDE:g} in magnitude)",
                tok,
                allowed="",
            )
        return value

    def evaluate(self, fn: Callable[..., float], values: list, tok: _Token) -> float | None:
        """Float value of a constant node, computed with Python floats before sympy works."""
        if any(v is None for v in values):
            return None
        try:
            value = fn(*values)
        except OverflowError:
            raise self.error(
                f"a constant is out of range (larger than {MAX_MAGNITUDE:g} in magnitude)",
                tok,
                allowed="",
            ) from None
        except ZeroDivisionError:
            raise self.error(
                "the expression is undefined (division by zero)", tok, allowed=""
            ) from None
        except ValueError:
            raise self.error(
                "the value is undefined or not a real number (log or sqrt of a negative"
                " number, 0 to a negative power, a negative number to a fractional power)",
                tok,
                allowed="",
            ) from None
        if isinstance(value, bool):
            return value
        return self.constant(float(value), tok)

    def build(
        self,
        fn: Callable[..., sp.Basic],
        args: list[_Node],
        tok: _Token,
        value_fn: Callable[..., float] | None = None,
    ) -> _Node:
        """Call a sympy constructor and check what comes out."""
        value = None
        if value_fn is not None:
            value = self.evaluate(value_fn, [a.value for a in args], tok)
        try:
            result = fn(*(a.expr for a in args))
        except (TypeError, ValueError, ArithmeticError, AttributeError, RecursionError) as exc:
            raise self.error(f"cannot form this expression ({type(exc).__name__})", tok) from None
        self.check(result, tok)
        return _Node(result, value)

    def check_number(self, num: sp.Basic, tok: _Token) -> None:
        if num in (sp.S.NaN, sp.S.ComplexInfinity, sp.S.Infinity, sp.S.NegativeInfinity):
            raise self.error(
                "the expression is undefined or infinite (division by zero?)", tok, allowed=""
            )
        if num.is_Rational:
            p, q = int(num.p), int(num.q)
            if p.bit_length() > _MAX_BITS or q.bit_length() > _MAX_BITS or abs(p) > 10**300 * q:
                raise self.error(
                    f"a constant is out of range (larger than {MAX_MAGNITUDE:g} in magnitude"
                    " or too many digits)",
                    tok,
                    allowed="",
                )
        elif num.is_Float and not abs(num) <= MAX_MAGNITUDE:
            raise self.error(
                f"a constant is out of range (larger than {MAX_MAGNITUDE:g} in magnitude)",
                tok,
                allowed="",
            )

    def check(self, expr: sp.Basic, tok: _Token) -> None:
        """Bounded look at a freshly built node: numbers in range, exponents bounded, real."""
        stack: list[tuple[sp.Basic, int]] = [(expr, 0)]
        while stack:
            node, level = stack.pop()
            if node is sp.S.ImaginaryUnit:
                raise self.error("the value is not a real number", tok, allowed="")
            if node.is_Number or node is sp.S.ComplexInfinity:
                self.check_number(node, tok)
                continue
            if node.is_Pow and node.exp.is_Number and abs(node.exp) > MAX_EXPONENT:
                raise self.error(
                    f"an exponent is larger than {MAX_EXPONENT} in magnitude", tok, allowed=""
                )
            if level < 2:
                stack.extend((a, level + 1) for a in node.args)

    # ------------------------------------------------------------------ parser
    def parse(self) -> sp.Expr:
        self.tokenize()
        if self.peek.kind == "end":
            raise self.error("empty expression", self.peek)
        node = self.expression()
        if self.peek.kind != "end":
            raise self.unexpected(self.peek, "the end of the expression")
        return node.expr

    def negate(self, node: _Node, tok: _Token) -> _Node:
        return self.build(sp.Mul, [_MINUS_ONE, node], tok, lambda a, b: a * b)

    def expression(self) -> _Node:
        first = self.peek
        terms = [self.term()]
        while self.is_op("+", "-"):
            op = self.advance()
            term = self.term()
            terms.append(term if op.text == "+" else self.negate(term, op))
        if len(terms) == 1:
            return terms[0]
        return self.build(sp.Add, terms, first, lambda *v: math.fsum(v))

    def term(self) -> _Node:
        first = self.peek
        factors = [self.unary()]
        while self.is_op("*", "/"):
            op = self.advance()
            factor = self.unary()
            if op.text == "/":
                factor = self.power_of(factor, _MINUS_ONE, op)
            factors.append(factor)
        if len(factors) == 1:
            return factors[0]
        return self.build(sp.Mul, factors, first, lambda *v: math.prod(v))

    def unary(self) -> _Node:
        tok = self.peek
        self.depth += 1
        if self.depth > MAX_DEPTH:
            raise self.error(
                f"expression is nested too deeply (more than {MAX_DEPTH} levels)", tok, allowed=""
            )
        try:
            if self.is_op("+", "-"):
                op = self.advance()
                operand = self.unary()
                return operand if op.text == "+" else self.negate(operand, op)
            return self.power()
        finally:
            self.depth -= 1

    def power(self) -> _Node:
        base = self.atom()
        if self.is_op("**", "^"):
            op = self.advance()
            exponent = self.unary()
            return self.power_of(base, exponent, op)
        return base

    def power_of(self, base: _Node, exponent: _Node, tok: _Token) -> _Node:
        b, e = base.expr, exponent.expr
        if e.is_Number:
            if abs(e) > MAX_EXPONENT:
                raise self.error(
                    f"constant exponent {e} is larger than {MAX_EXPONENT} in magnitude",
                    tok,
                    allowed="",
                )
            if b.is_Rational and e.is_Integer:
                bits = max(int(b.p).bit_length(), int(b.q).bit_length())
                if bits * abs(int(e)) > 4 * _MAX_BITS:
                    raise self.error(
                        f"constant power is larger than {MAX_MAGNITUDE:g}", tok, allowed=""
                    )
            elif b.is_Rational and e.is_Rational and int(e.q) > MAX_EXPONENT:
                raise self.error("constant exponent has too many digits", tok, allowed="")
        return self.build(sp.Pow, [base, exponent], tok, _float_pow)

    def atom(self) -> _Node:
        tok = self.advance()
        if tok.kind == "number":
            return self.number(tok)
        if tok.kind == "name":
            return self.name(tok)
        if tok.kind == "op" and tok.text == "(":
            inner = self.expression()
            if not self.is_op(")"):
                raise self.unexpected(self.peek, "')'")
            self.advance()
            return inner
        raise self.unexpected(tok, "a number, a name or '('")

    def number(self, tok: _Token) -> _Node:
        text = tok.text
        if all(c in "0123456789" for c in text):
            if len(text.lstrip("0")) > 300:
                raise self.error(f"number is larger than {MAX_MAGNITUDE:g}", tok, allowed="")
            integer = int(text)
            return _Node(sp.Integer(integer), self.constant(float(integer), tok))
        value = float(text)
        if not abs(value) <= MAX_MAGNITUDE:
            raise self.error(f"number is larger than {MAX_MAGNITUDE:g}", tok, allowed="")
        return _Node(sp.Float(value), value)

    def name(self, tok: _Token) -> _Node:
        name = tok.text
        if self.is_op("("):
            if name in FUNCTIONS:
                return self.call(tok)
            if name in self.names or name in self.constants:
                raise self.error(
                    f"{name!r} is not a function; write {name}*(...) for a product", tok
                )
            raise self.error(
                f"unknown function {name!r}", tok, allowed="functions: " + ", ".join(FUNCTIONS)
            )
        if name in FUNCTIONS:
            raise self.error(f"function {name!r} needs arguments in parentheses", tok)
        if name in self.constants:
            value = self.constants[name]
            if isinstance(value, bool) or not isinstance(value, (int, float)):
                raise self.error(f"setting {name!r} is not a number", tok, allowed="")
            if not (math.isfinite(value) and abs(value) <= MAX_MAGNITUDE):
                raise self.error(f"setting {name!r} is not a finite number", tok, allowed="")
            return _Node(_number_from_float(value), float(value))
        if name in self.names:
            expr = self.names[name]
            return _Node(expr, float(expr) if expr.is_Number else None)
        raise self.error(f"unknown name {name!r}", tok, allowed=self.known_names(name))

    def known_names(self, name: str) -> str:
        known = sorted(set(self.names) | set(self.constants))
        if not known:
            return "no names are declared here"
        shown = ", ".join(known[:12]) + (f" (+{len(known) - 12} more)" if len(known) > 12 else "")
        close = difflib.get_close_matches(name, known, n=1)
        hint = f"; did you mean {close[0]!r}?" if close else ""
        return f"declared names: {shown}{hint}"

    def call(self, tok: _Token) -> _Node:
        fname = tok.text
        self.expect("(", "'('")
        args: list[_Node] = []
        if not self.is_op(")"):
            while True:
                if len(args) >= _MAX_ARGUMENTS:
                    raise self.error(
                        f"too many arguments to {fname} (at most {_MAX_ARGUMENTS})", tok, allowed=""
                    )
                if fname == "piecewise" and not args:
                    args.append(self.condition())
                else:
                    args.append(self.expression())
                if not self.is_op(","):
                    break
                self.advance()
        if not self.is_op(")"):
            raise self.unexpected(self.peek, f"',' or ')' to close {fname}(")
        self.advance()
        count = len(args)
        if fname in _FUNCTIONS_1:
            if count != 1:
                raise self.error(f"{fname} takes exactly 1 argument, got {count}", tok, allowed="")
            sympy_fn, float_fn = _FUNCTIONS_1[fname]
            return self.build(sympy_fn, args, tok, float_fn)
        if fname in _FUNCTIONS_N:
            if count < 2:
                raise self.error(f"{fname} takes 2 or more arguments, got {count}", tok, allowed="")
            sympy_fn, float_fn = _FUNCTIONS_N[fname]
            return self.build(sympy_fn, args, tok, float_fn)
        # piecewise
        if count != 3:
            raise self.error(
                f"piecewise takes 3 arguments (condition, then, otherwise), got {count}",
                tok,
                allowed="",
            )
        cond, then, otherwise = args
        return self.build(_piecewise, [cond, then, otherwise], tok, _piecewise_value)

    def condition(self) -> _Node:
        left = self.expression()
        if not (self.peek.kind == "op" and self.peek.text in _COMPARISONS):
            raise self.error(
                "piecewise needs a comparison such as x < 1 as its first argument",
                self.peek,
                allowed="comparisons: < <= > >=",
            )
        op = self.advance()
        right = self.expression()
        if left.expr.has(sp.Piecewise) or right.expr.has(sp.Piecewise):
            # sympy rewrites such conditions through its logic simplifier (unbounded time)
            raise self.error(
                "piecewise(...) is not allowed inside a piecewise condition; compare plain"
                " expressions",
                op,
                allowed="",
            )
        sympy_fn, float_fn = _COMPARISONS[op.text]
        return self.build(sympy_fn, [left, right], op, float_fn)

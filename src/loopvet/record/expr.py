"""Safe parser and evaluator for the expressions written in loop records.

Text is never handed to Python's ``eval``: a small tokenizer and a recursive-descent parser
with an explicit nesting counter build a frozen syntax tree, and two evaluators walk it.

Grammar, from loosest to tightest binding::

    sum      := product (('+' | '-') product)*
    product  := unary (('*' | '/') unary)*
    unary    := ('+' | '-') unary | power
    power    := primary (('^' | '**') unary)?      exponent: a whole-number literal 0..40
    primary  := number | name | function '(' sum ')' | '(' sum ')'

* Numbers: ``12``, ``1.5``, ``.5``, ``1e-3``, ``1.5E+3``.
* Names: ``[A-Za-z_][A-Za-z0-9_]*``. ``s`` and ``z`` are the transform variable (one of them
  per expression), ``pi`` and ``e`` are constants, ``sqrt exp log sin cos tan`` are functions
  (``log`` is the natural logarithm, angles in radians). Every other name is a parameter.
* Power is right-associative and binds tighter than a sign: ``-s^2`` is ``-(s^2)``. Its
  exponent must be a whole-number literal, optionally in parentheses (``s^(2)``).
* Functions take one argument and apply to parameter values only, never to an expression in
  the transform variable (``exp(-T*s)`` is a dead time; records write it as ``delay:``).
* There is no implicit multiplication: ``2s`` is an error that says to write ``2*s``.

Rational results use the package conventions: polynomial coefficients in **ascending** order
(``c[:, k]`` multiplies ``s**k``) with a leading sample axis, shape ``(samples, degree + 1)``.
"""

from __future__ import annotations

import difflib
import math
import re
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field, replace

import numpy as np
from numpy.typing import NDArray

from ..lti import poly

MAX_TEXT = 4000
"""Longest accepted expression, in characters."""
MAX_EXPONENT = 40
"""Largest exponent of ``^`` / ``**``."""
MAX_DEGREE = 40
"""Largest polynomial degree of any intermediate result of :meth:`Expr.rational`."""
MAX_DEPTH = 60
"""Deepest nesting of parentheses, function calls, signs and exponents."""

FUNCTIONS: frozenset[str] = frozenset({"sqrt", "exp", "log", "sin", "cos", "tan"})
RESERVED: frozenset[str] = frozenset({"s", "z", "pi", "e"}) | FUNCTIONS
"""Words that cannot be parameter names."""

_VARIABLES = frozenset({"s", "z"})
_CONSTANTS = {"pi": math.pi, "e": math.e}
_FUNCTION_LIST = "sqrt exp log sin cos tan"
_SPACE = " \t\r\n"
_NUMBER = re.compile(r"(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")
_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
_DIGITS = re.compile(r"[0-9]+")
_HINTS = {
    "\u2212": "use '-' for minus",
    "\u00d7": "use '*' for multiplication",
    "\u00b7": "use '*' for multiplication",
    "\u00f7": "use '/' for division",
    "[": "use '(' and ')' for grouping",
    "]": "use '(' and ')' for grouping",
    "{": "use '(' and ')' for grouping",
    "}": "use '(' and ')' for grouping",
    "%": "write a percentage as a fraction, e.g. 0.25",
}
_SNIPPET = 60

FloatArray = NDArray[np.float64]


class ExpressionError(ValueError):
    """A problem with an expression, located in its text.

    Attributes
    ----------
    message : str
        Lower-case start, no final full stop; says what is wrong and how to fix it.
    start, end : int
        0-based character offsets of the offending part of the text (``end`` exclusive).
    """

    def __init__(self, message: str, start: int, end: int) -> None:
        super().__init__(message)
        self.message = message
        self.start = start
        self.end = end

    def __str__(self) -> str:
        return self.message

    def __reduce__(self) -> tuple[type[ExpressionError], tuple[str, int, int]]:
        return (type(self), (self.message, self.start, self.end))


# --------------------------------------------------------------------------- syntax tree


@dataclass(frozen=True, slots=True)
class _Node:
    start: int
    end: int
    dynamic: bool  # the subtree contains the transform variable


@dataclass(frozen=True, slots=True)
class _Num(_Node):
    value: float
    literal: str  # the token text: digits, or 'pi' / 'e'


@dataclass(frozen=True, slots=True)
class _Name(_Node):
    name: str


@dataclass(frozen=True, slots=True)
class _Var(_Node):
    name: str


@dataclass(frozen=True, slots=True)
class _Neg(_Node):
    operand: _Node


@dataclass(frozen=True, slots=True)
class _Sum(_Node):
    first: _Node
    rest: tuple[tuple[bool, _Node], ...]  # (subtract, term)


@dataclass(frozen=True, slots=True)
class _Product(_Node):
    first: _Node
    rest: tuple[tuple[bool, _Node], ...]  # (divide, factor)


@dataclass(frozen=True, slots=True)
class _Pow(_Node):
    base: _Node
    exponent: int


@dataclass(frozen=True, slots=True)
class _Call(_Node):
    function: str
    arg: _Node


def _children(node: _Node) -> list[_Node]:
    if isinstance(node, _Neg):
        return [node.operand]
    if isinstance(node, _Sum | _Product):
        return [node.first, *(n for _, n in node.rest)]
    if isinstance(node, _Pow):
        return [node.base]
    if isinstance(node, _Call):
        return [node.arg]
    return []


def _first_variable(root: _Node) -> _Var | None:
    stack = [root]
    while stack:
        node = stack.pop()
        if isinstance(node, _Var):
            return node
        if node.dynamic:
            stack.extend(reversed(_children(node)))
    return None


# --------------------------------------------------------------------------- tokenizer


@dataclass(frozen=True, slots=True)
class _Token:
    kind: str  # "num", "name", "op", "(", ")", ",", "end"
    text: str
    start: int
    end: int


def _tokens(text: str) -> Iterator[_Token]:
    """Yield the tokens of ``text`` lazily, so errors come out in reading order."""
    i, n = 0, len(text)
    while i < n:
        ch = text[i]
        if ch in _SPACE:
            i += 1
        elif "0" <= ch <= "9" or ch == ".":
            m = _NUMBER.match(text, i)
            if m is None:
                raise ExpressionError("unexpected character '.': write decimals with a digit, "
                                      "e.g. 0.5", i, i + 1)
            j = m.end()
            if j < n and text[j] == ".":
                while j < n and ("0" <= text[j] <= "9" or text[j] == "."):
                    j += 1
                raise ExpressionError(f"malformed number {text[i:j]!r}: write a number like "
                                      "1.5 or 1.5e-3", i, j)
            yield _Token("num", text[i:j], i, j)
            i = j
        elif ch.isascii() and (ch.isalpha() or ch == "_"):
            m = _NAME.match(text, i)
            assert m is not None
            yield _Token("name", m.group(), i, m.end())
            i = m.end()
        elif text.startswith("**", i):
            yield _Token("op", "**", i, i + 2)
            i += 2
        elif ch in "+-*/^":
            yield _Token("op", ch, i, i + 1)
            i += 1
        elif ch in "(),":
            yield _Token(ch, ch, i, i + 1)
            i += 1
        else:
            raise _bad_character(ch, i)
    yield _Token("end", "", n, n)


def _bad_character(ch: str, i: int) -> ExpressionError:
    message = f"unexpected character {ch!r}"
    if not ch.isascii():
        message += f" (U+{ord(ch):04X})"
    hint = _HINTS.get(ch)
    if hint is None and ch in "'\"":
        hint = "quotes cannot appear inside an expression"
    if hint is None:
        hint = "allowed are numbers, names, + - * / ^ ** and parentheses"
    return ExpressionError(f"{message}: {hint}", i, i + 1)


# --------------------------------------------------------------------------- parser


class _Parser:
    """Recursive descent with an explicit depth counter checked before every nested call."""

    def __init__(self, text: str, allow_variable: bool) -> None:
        self._text = text
        self._allow_variable = allow_variable
        self._stream = _tokens(text)
        self._prev: _Token | None = None
        self._tok = next(self._stream)
        self._depth = 0
        self.names: set[str] = set()
        self.variable: str | None = None

    # token handling ------------------------------------------------------------------

    def _advance(self) -> _Token:
        tok = self._tok
        self._prev = tok
        if tok.kind != "end":
            self._tok = next(self._stream)
        return tok

    def _at_op(self, *ops: str) -> bool:
        return self._tok.kind == "op" and self._tok.text in ops

    def _enter(self, tok: _Token) -> None:
        if self._depth >= MAX_DEPTH:
            raise ExpressionError(
                f"expression is nested too deeply (more than {MAX_DEPTH} levels of "
                "parentheses, calls or signs): split it into derived parameters",
                tok.start, tok.end)
        self._depth += 1

    # grammar ---------------------------------------------------------------------------

    def parse(self) -> _Node:
        node = self._sum()
        if self._tok.kind != "end":
            raise self._cannot_follow()
        return node

    def _sum(self) -> _Node:
        first = self._product()
        rest: list[tuple[bool, _Node]] = []
        while self._at_op("+", "-"):
            subtract = self._advance().text == "-"
            rest.append((subtract, self._product()))
        if not rest:
            return first
        dynamic = first.dynamic or any(n.dynamic for _, n in rest)
        return _Sum(first.start, rest[-1][1].end, dynamic, first, tuple(rest))

    def _product(self) -> _Node:
        first = self._unary()
        rest: list[tuple[bool, _Node]] = []
        while self._at_op("*", "/"):
            divide = self._advance().text == "/"
            rest.append((divide, self._unary()))
        if not rest:
            return first
        dynamic = first.dynamic or any(n.dynamic for _, n in rest)
        return _Product(first.start, rest[-1][1].end, dynamic, first, tuple(rest))

    def _unary(self) -> _Node:
        if not self._at_op("+", "-"):
            return self._power()
        sign = self._advance()
        self._enter(sign)
        operand = self._unary()
        self._depth -= 1
        if sign.text == "+":
            return operand
        return _Neg(sign.start, operand.end, operand.dynamic, operand)

    def _power(self) -> _Node:
        base = self._primary()
        if not self._at_op("^", "**"):
            return base
        op = self._advance()
        self._enter(op)
        exponent = self._unary()  # right-associative: a^b^c reads the exponent as b^c
        self._depth -= 1
        k = self._exponent(exponent)
        return _Pow(base.start, exponent.end, base.dynamic, base, k)

    def _primary(self) -> _Node:
        tok = self._tok
        if tok.kind == "num":
            self._advance()
            return _Num(tok.start, tok.end, False, self._number(tok), tok.text)
        if tok.kind == "name":
            return self._name()
        if tok.kind == "(":
            self._advance()
            self._enter(tok)
            inner = self._sum()
            self._depth -= 1
            close = self._close(tok)
            return replace(inner, start=tok.start, end=close.end)
        raise self._missing_operand()

    def _name(self) -> _Node:
        tok = self._advance()
        name = tok.text
        if name in FUNCTIONS:
            return self._call(tok)
        if name in _VARIABLES:
            self._use_variable(tok)
            return _Var(tok.start, tok.end, True, name)
        if name in _CONSTANTS:
            return _Num(tok.start, tok.end, False, _CONSTANTS[name], name)
        if self._tok.kind == "(":
            message = f"unknown function {name!r} (allowed: {_FUNCTION_LIST})"
            close = difflib.get_close_matches(name.lower(), sorted(FUNCTIONS), n=1)
            if name.lower() == "ln":
                close = ["log"]
            if close:
                message += f"; did you mean {close[0]!r}?"
            else:
                message += f"; for a product write {name}*(...)"
            raise ExpressionError(message, tok.start, tok.end)
        self.names.add(name)
        return _Name(tok.start, tok.end, False, name)

    def _call(self, name_tok: _Token) -> _Node:
        name = name_tok.text
        if self._tok.kind != "(":
            raise ExpressionError(
                f"function {name!r} needs its argument in parentheses, e.g. {name}(x); it "
                "cannot be used as a parameter name", name_tok.start, name_tok.end)
        open_tok = self._advance()
        self._enter(open_tok)
        arg = self._sum()
        self._depth -= 1
        if self._tok.kind == ",":
            raise ExpressionError(f"function {name!r} takes one argument: remove the ',' and "
                                  "what follows it", self._tok.start, self._tok.end)
        close = self._close(open_tok)
        if arg.dynamic:
            if name == "exp" and self.variable == "s":
                message = ("exp(...) of an expression in s is a dead time: remove it here and "
                           "write the time as 'delay: T' in this block")
            else:
                message = (f"function {name!r} applies to parameter values only, not to an "
                           f"expression in {self.variable}")
            raise ExpressionError(message, name_tok.start, close.end)
        return _Call(name_tok.start, close.end, False, name, arg)

    def _close(self, open_tok: _Token) -> _Token:
        if self._tok.kind == ")":
            return self._advance()
        if self._tok.kind == "end":
            raise ExpressionError(f"missing ')' for the '(' at column {open_tok.start + 1}",
                                  open_tok.start, open_tok.end)
        raise self._cannot_follow()

    # checks ----------------------------------------------------------------------------

    def _use_variable(self, tok: _Token) -> None:
        if not self._allow_variable:
            raise ExpressionError(f"the transform variable {tok.text!r} cannot appear in a "
                                  "parameter expression", tok.start, tok.end)
        if self.variable is None:
            self.variable = tok.text
        elif self.variable != tok.text:
            raise ExpressionError(
                "expression mixes 's' and 'z': write a continuous-time block in s or a sampled "
                "block in z, not both", tok.start, tok.end)

    def _number(self, tok: _Token) -> float:
        value = float(tok.text)
        mantissa = re.split("[eE]", tok.text)[0]
        if math.isinf(value):
            raise ExpressionError(f"number out of range: {tok.text} is too large for a float "
                                  "(at most about 1.8e308)", tok.start, tok.end)
        if value == 0.0 and any(c in "123456789" for c in mantissa):
            raise ExpressionError(f"number out of range: {tok.text} is too small for a float "
                                  "and would become 0", tok.start, tok.end)
        return value

    def _exponent(self, node: _Node) -> int:
        prefix = f"exponent must be a whole number from 0 to {MAX_EXPONENT}"
        literal = self._text[node.start:node.end]
        if isinstance(node, _Num) and _DIGITS.fullmatch(node.literal):
            if len(node.literal) <= 3 and int(node.literal) <= MAX_EXPONENT:
                return int(node.literal)
            raise ExpressionError(f"{prefix}, got {node.literal}", node.start, node.end)
        if isinstance(node, _Num) and node.value.is_integer():
            message = f"{prefix} written with digits only, got {literal!r}"
        elif isinstance(node, _Num):
            message = f"{prefix}, got {literal!r}; for a square root write sqrt(...)"
        elif isinstance(node, _Neg):
            message = f"{prefix}, got {literal!r}; for a negative power divide, e.g. 1/x^2"
        elif isinstance(node, _Pow):
            message = (f"{prefix}, got {literal!r} (powers group from the right: a^b^c is "
                       "a^(b^c)); write the exponent as one number")
        else:
            message = f"{prefix}, got {literal!r}; the exponent cannot be an expression"
        raise ExpressionError(message, node.start, node.end)

    # error helpers -----------------------------------------------------------------------

    def _missing_operand(self) -> ExpressionError:
        """The current token stands where an operand must start."""
        tok, prev = self._tok, self._prev
        if tok.kind == "end" and prev is not None and prev.kind == "op":
            return ExpressionError(f"expression ends with operator {prev.text!r}: add an operand "
                                   "after it or remove it", prev.start, prev.end)
        if tok.kind == "end" and prev is not None and prev.kind == "(":
            return ExpressionError(f"expression ends with '(' at column {prev.start + 1}: add an "
                                   "expression and ')' or remove it", prev.start, prev.end)
        if tok.kind == ")" and prev is not None and prev.kind == "(":
            return ExpressionError("empty parentheses '()': put an expression inside them or "
                                   "remove them", prev.start, tok.end)
        if tok.kind in (")", ",") and prev is not None and prev.kind == "op":
            return ExpressionError(f"missing operand after {prev.text!r}", prev.start, prev.end)
        if tok.kind == "op" and prev is not None and prev.kind == "op":
            return ExpressionError(f"missing operand between {prev.text!r} and {tok.text!r}",
                                   prev.start, tok.end)
        if tok.kind == "op":
            return ExpressionError(f"missing operand before {tok.text!r}", tok.start, tok.end)
        return self._stray(tok)

    def _cannot_follow(self) -> ExpressionError:
        """The current token cannot follow the complete operand just read."""
        tok, prev = self._tok, self._prev
        assert prev is not None
        if prev.kind == "num" and tok.kind == "name" and tok.text in ("e", "E") \
                and prev.end == tok.start:
            return ExpressionError(f"malformed number {prev.text + tok.text!r}: an exponent "
                                   "needs digits, e.g. 1.5e-3", prev.start, tok.end)
        if tok.kind in ("num", "name", "("):
            left = "(...)" if prev.kind == ")" else prev.text
            right = "(...)" if tok.kind == "(" else tok.text
            return ExpressionError(f"missing operator between {prev.text!r} and {tok.text!r} "
                                   f"(write {left}*{right})", prev.start, tok.end)
        return self._stray(tok)

    @staticmethod
    def _stray(tok: _Token) -> ExpressionError:
        if tok.kind == ")":
            return ExpressionError(f"unmatched ')' at column {tok.start + 1}: remove it or add "
                                   "a '(' before it", tok.start, tok.end)
        if tok.kind == ",":
            return ExpressionError("unexpected ',': functions take one argument and decimals "
                                   "are written with '.', e.g. 1.5", tok.start, tok.end)
        return ExpressionError(f"unexpected {tok.text!r}", tok.start, tok.end)


# --------------------------------------------------------------------------- evaluation


def _degree(a: NDArray) -> int:
    return int(a.shape[1]) - 1


class _Evaluator:
    """Walks a syntax tree over a batch of parameter values (vectorised over samples)."""

    def __init__(self, text: str, values: Mapping[str, object], samples: int) -> None:
        if isinstance(samples, bool) or not isinstance(samples, int | np.integer) \
                or samples < 1:
            raise ValueError(f"samples must be a positive integer, got {samples!r}")
        self._text = text
        self._values = values
        self._samples = int(samples)
        self._ones = np.ones((self._samples, 1))

    def _fail(self, what: str, start: int, end: int, bad: NDArray[np.bool_] | None = None,
              fix: str = "") -> ExpressionError:
        """``"<what> in '<part>' (in k of n samples, first at index i)<fix>"``."""
        part = self._text[start:end]
        if len(part) > _SNIPPET:
            part = part[: _SNIPPET - 3] + "..."
        return ExpressionError(f"{what} in {part!r}{self._where(bad)}{fix}", start, end)

    def _where(self, bad: NDArray[np.bool_] | None) -> str:
        if bad is None or self._samples == 1:
            return ""
        return (f" (in {int(bad.sum())} of {self._samples} samples, first at index "
                f"{int(np.argmax(bad))})")

    def _finite(self, start: int, end: int, *arrays: NDArray) -> None:
        bad = np.zeros(self._samples, dtype=bool)
        for a in arrays:
            bad |= ~np.isfinite(a.reshape(a.shape[0], -1)).all(axis=1)
        if bad.any():
            raise self._fail("overflow", start, end, bad, ": the value is too large for a float")

    # scalar values -----------------------------------------------------------------------

    def value(self, node: _Node) -> FloatArray:
        """The value of a parameter-only subtree, shape (samples,)."""
        if isinstance(node, _Num):
            return np.full(self._samples, node.value)
        if isinstance(node, _Name):
            return self._parameter(node)
        if isinstance(node, _Neg):
            return 0.0 - self.value(node.operand)  # 0 - x: no negative zeros
        if isinstance(node, _Sum):
            acc = self.value(node.first)
            for subtract, term in node.rest:
                t = self.value(term)
                acc = acc - t if subtract else acc + t
                self._finite(node.start, term.end, acc)
            return acc
        if isinstance(node, _Product):
            acc = self.value(node.first)
            for divide, factor in node.rest:
                f = self.value(factor)
                if divide:
                    zero = f == 0.0
                    if zero.any():
                        raise self._fail("division by zero", node.start, factor.end, zero)
                    acc = acc / f
                else:
                    acc = acc * f
                self._finite(node.start, factor.end, acc)
            return acc
        if isinstance(node, _Pow):
            out = np.power(self.value(node.base), float(node.exponent))
            self._finite(node.start, node.end, out)
            return out
        if isinstance(node, _Call):
            return self._call(node)
        assert isinstance(node, _Var)
        raise ExpressionError(f"expected a parameter value, but the expression contains the "
                              f"transform variable {node.name!r}", node.start, node.end)

    def _parameter(self, node: _Name) -> FloatArray:
        name = node.name
        if name not in self._values:
            raise ExpressionError(f"unknown parameter {name!r}{self._suggest(name)}",
                                  node.start, node.end)
        arr = np.array(self._values[name], dtype=np.float64)
        if arr.size == 1:
            arr = np.full(self._samples, float(arr.reshape(())))
        elif arr.shape != (self._samples,):
            raise ValueError(f"values[{name!r}] has shape {arr.shape}; expected a scalar or "
                             f"shape ({self._samples},)")
        bad = ~np.isfinite(arr)
        if bad.any():
            raise ExpressionError(f"parameter {name!r} has a value that is not finite"
                                  f"{self._where(bad)}", node.start, node.end)
        return arr

    def _suggest(self, name: str) -> str:
        keys = sorted(k for k in self._values if isinstance(k, str))
        match = [k for k in keys if k.lower() == name.lower()]
        match = match or difflib.get_close_matches(name, keys, n=1)
        return f" (did you mean {match[0]!r}?)" if match else " (define it under 'parameters')"

    def _call(self, node: _Call) -> FloatArray:
        x = self.value(node.arg)
        name = node.function
        if name == "sqrt":
            bad = x < 0.0
            if bad.any():
                raise self._fail("square root of a negative value", node.start, node.end, bad)
            out = np.sqrt(x)
        elif name == "log":
            bad = x <= 0.0
            if bad.any():
                raise self._fail("logarithm of a value that is not positive", node.start,
                                 node.end, bad)
            out = np.log(x)
        elif name == "exp":
            out = np.exp(x)
        elif name == "sin":
            out = np.sin(x)
        elif name == "cos":
            out = np.cos(x)
        else:
            out = np.tan(x)
        self._finite(node.start, node.end, out)
        return out

    # rational functions ------------------------------------------------------------------

    def rational(self, node: _Node) -> tuple[FloatArray, FloatArray]:
        """(numerator, denominator) coefficient batches, ascending, shape (samples, n)."""
        if not node.dynamic:
            return self.value(node)[:, None], self._ones
        if isinstance(node, _Var):
            return poly.variable(self._samples), self._ones
        if isinstance(node, _Neg):
            n, d = self.rational(node.operand)
            return 0.0 - n, d
        if isinstance(node, _Sum):
            n, d = self.rational(node.first)
            for subtract, term in node.rest:
                n2, d2 = self.rational(term)
                n, d = self._add(n, d, 0.0 - n2 if subtract else n2, d2, node.start, term.end)
            return n, d
        if isinstance(node, _Product):
            n, d = self.rational(node.first)
            for divide, factor in node.rest:
                n2, d2 = self.rational(factor)
                n, d = self._multiply(n, d, n2, d2, divide, factor, node.start)
            return n, d
        assert isinstance(node, _Pow)
        n, d = self.rational(node.base)
        k = node.exponent
        self._degree_ok(max(_degree(n), _degree(d)) * k, node.start, node.end)
        n, d = poly.power(n, k), poly.power(d, k)
        self._finite(node.start, node.end, n, d)
        return n, d

    def _degree_ok(self, degree: int, start: int, end: int) -> None:
        if degree > MAX_DEGREE:
            raise self._fail(f"polynomial degree {degree} is above the limit of {MAX_DEGREE}",
                             start, end, fix=": lower the powers or split the block")

    def _add(self, n1: FloatArray, d1: FloatArray, n2: FloatArray, d2: FloatArray,
             start: int, end: int) -> tuple[FloatArray, FloatArray]:
        if d1.shape == d2.shape and np.array_equal(d1, d2):
            n, d = poly.add(n1, n2), d1
        elif _degree(d1) == 0 and _degree(d2) == 0:
            n, d = poly.add(n1 / d1, n2 / d2), self._ones
        else:
            self._degree_ok(max(_degree(n1) + _degree(d2), _degree(n2) + _degree(d1),
                                _degree(d1) + _degree(d2)), start, end)
            n, d = poly.add(poly.mul(n1, d2), poly.mul(n2, d1)), poly.mul(d1, d2)
        self._finite(start, end, n, d)
        return n, d

    def _multiply(self, n1: FloatArray, d1: FloatArray, n2: FloatArray, d2: FloatArray,
                  divide: bool, factor: _Node, start: int) -> tuple[FloatArray, FloatArray]:
        end = factor.end
        if divide:
            zero = ~(n2 != 0.0).any(axis=1)
            if zero.any():
                what = "division by zero polynomial" if factor.dynamic else "division by zero"
                raise self._fail(what, start, end, zero)
            if _degree(n2) == 0:
                # dividing by a constant: scale the numerator, keep the denominator
                self._degree_ok(_degree(n1) + _degree(d2), start, end)
                n, d = poly.mul(n1, d2) / n2, d1
            else:
                self._degree_ok(max(_degree(n1) + _degree(d2), _degree(d1) + _degree(n2)),
                                start, end)
                n, d = poly.mul(n1, d2), poly.mul(d1, n2)
        else:
            self._degree_ok(max(_degree(n1) + _degree(n2), _degree(d1) + _degree(d2)),
                            start, end)
            n, d = poly.mul(n1, n2), poly.mul(d1, d2)
        self._finite(start, end, n, d)
        return n, d


# --------------------------------------------------------------------------- public API


@dataclass(frozen=True, slots=True)
class Expr:
    """A parsed expression.

    Attributes
    ----------
    text : str
        The source text, as given to :func:`parse`.
    names : frozenset of str
        Parameter names referenced (not ``s``/``z``, constants or functions).
    variable : {"s", "z"} or None
        The transform variable if it occurs, else None.
    """

    text: str
    names: frozenset[str]
    variable: str | None
    _root: _Node = field(repr=False, compare=False)

    def evaluate(self, values: Mapping[str, object], samples: int) -> FloatArray:
        """Value of a parameter expression for every sample.

        Parameters
        ----------
        values : mapping of str to array_like
            Parameter values, each a float array of shape (samples,) or a scalar.
        samples : int
            Batch size (>= 1).

        Returns
        -------
        ndarray of float64, shape (samples,)
            A new array.

        Raises
        ------
        ExpressionError
            If the expression contains the transform variable, names a parameter missing from
            ``values`` (with a suggestion), or an operation fails in some sample: division by
            zero, square root of a negative value, logarithm of a value <= 0, overflow or a
            non-finite parameter value. The span is that of the failing operation.
        ValueError
            If ``samples`` is not a positive integer or a value has the wrong shape.
        """
        ev = _Evaluator(self.text, values, samples)
        var = _first_variable(self._root)
        if var is not None:
            raise ExpressionError(f"expected a parameter value, but the expression contains the "
                                  f"transform variable {var.name!r}", var.start, var.end)
        with np.errstate(all="ignore"):
            return np.array(ev.value(self._root), dtype=np.float64)

    def rational(self, values: Mapping[str, object],
                 samples: int) -> tuple[FloatArray, FloatArray]:
        """Numerator and denominator polynomials in the transform variable.

        Parameters
        ----------
        values : mapping of str to array_like
            Parameter values, each a float array of shape (samples,) or a scalar.
        samples : int
            Batch size (>= 1).

        Returns
        -------
        num, den : ndarray of float64, shape (samples, n) and (samples, m)
            Coefficients in **ascending** order (``num[:, k]`` multiplies ``s**k``). A
            parameter-only expression gives ``num`` of shape (samples, 1) and ``den`` of ones.

        Raises
        ------
        ExpressionError
            For the evaluation failures of :meth:`evaluate`, for division by a polynomial that
            is identically zero in some sample, and when an intermediate polynomial would
            exceed degree :data:`MAX_DEGREE` (raised before it is built).

        Notes
        -----
        The result is built bottom-up from the syntax tree with exact formulas: ``a*b`` and
        ``a/b`` cross-multiply numerators and denominators, ``a + b`` uses ``n1*d2 + n2*d1``
        over ``d1*d2``, except that identical denominators (for example the ``[1]`` of every
        polynomial subexpression) are kept once and constant denominators are divided out, so
        polynomials keep the denominator ``[1]``. Division by a parameter-only value scales
        the numerator. Common factors are never cancelled and zero leading coefficients are
        never trimmed: ``(s+1)/((s+1)*(s+2))`` keeps the pole-zero pair at -1 and
        ``(s+1)^2 - s^2`` keeps an exactly-zero ``s^2`` coefficient; the loop analysis reports
        both. Column counts follow the structure of the text, so they can exceed the true
        degree.

        Accuracy: each coefficient is a sum of products of the inputs, so its absolute error
        is a few units of roundoff times the same sum taken with absolute values; coefficients
        that come out small through cancellation (``(s-1)^10`` expanded, sums of nearly equal
        terms) have a large relative error. The rational value at a point ``x`` is as accurate
        as evaluating ``num`` and ``den`` in the monomial basis allows: relative error about
        ``eps * (sum |num_k| |x|^k + |r| sum |den_k| |x|^k) / |den(x)|``, poor near poles and
        for high degrees with widely spread roots.
        """
        ev = _Evaluator(self.text, values, samples)
        with np.errstate(all="ignore"):
            num, den = ev.rational(self._root)
        return np.array(num, dtype=np.float64), np.array(den, dtype=np.float64)


def parse(text: str, *, allow_variable: bool = True) -> Expr:
    """Parse an expression of a loop record.

    Parameters
    ----------
    text : str
        The expression, at most :data:`MAX_TEXT` characters (grammar in the module docstring).
    allow_variable : bool
        False for parameter expressions: the transform variable is then an error.

    Returns
    -------
    Expr

    Raises
    ------
    ExpressionError
        For the first problem in reading order, with its span in ``text``.
    """
    if not isinstance(text, str):
        raise TypeError(f"expression text must be a str, got {type(text).__name__}")
    if len(text) > MAX_TEXT:
        raise ExpressionError(f"expression is too long ({len(text)} characters, at most "
                              f"{MAX_TEXT}): split it into derived parameters", 0, len(text))
    if not text.strip(_SPACE):
        raise ExpressionError("empty expression: write a number, a parameter name or a formula",
                              0, len(text))
    parser = _Parser(text, allow_variable)
    root = parser.parse()
    return Expr(text, frozenset(parser.names), parser.variable, root)


__all__ = [
    "FUNCTIONS",
    "MAX_DEGREE",
    "MAX_DEPTH",
    "MAX_EXPONENT",
    "MAX_TEXT",
    "RESERVED",
    "Expr",
    "ExpressionError",
    "parse",
]

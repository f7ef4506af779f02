"""Tests for the safe expression parser, :mod:`loopvet.record.expr`.

Sources of expected values: hand expansion of small products (marked "by hand"), the
grammar and messages of /work/shared/spec/record-format.md ("spec"), and sympy evaluated at
30 significant digits for the randomised comparison ("sympy as reference").
"""

from __future__ import annotations

import ast
import builtins
import cmath
import math
import pickle
from dataclasses import dataclass

import numpy as np
import pytest
import sympy
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from loopvet.lti import poly
from loopvet.record.expr import (
    FUNCTIONS,
    MAX_DEGREE,
    MAX_DEPTH,
    MAX_EXPONENT,
    MAX_TEXT,
    RESERVED,
    Expr,
    ExpressionError,
    parse,
)

# --------------------------------------------------------------------------- reference tables

# (text, values, expected numerator, expected denominator), ascending coefficients.
# Source: by hand (products expanded on paper; precedence rules from the spec).
RATIONAL_CASES = [
    ("Kh / ((tau*s + 1) * (0.5*s + 1))", {"Kh": 2.0, "tau": 3.0}, [2.0], [1.0, 3.5, 1.5]),
    ("-s^2", {}, [0.0, 0.0, -1.0], [1.0]),                      # -(s^2), not (-s)^2
    ("s**2/2 + 1", {}, [1.0, 0.0, 0.5], [1.0]),                 # constant divisor scales
    ("1/(s+1) + 1/(s+1)", {}, [2.0], [1.0, 1.0]),               # identical denominators once
    ("1/(s+1) + 1/(s+2)", {}, [3.0, 2.0], [2.0, 3.0, 1.0]),     # (s+2)+(s+1) over (s+1)(s+2)
    ("(s+1)/((s+1)*(s+2))", {}, [1.0, 1.0], [2.0, 3.0, 1.0]),   # no cancellation, ever
    ("(s+1)^2 - s^2", {}, [1.0, 2.0, 0.0], [1.0]),              # zero leading term kept
    ("s^(2)", {}, [0.0, 0.0, 1.0], [1.0]),                      # parenthesised exponent
    ("1.5e-3*s + .5", {}, [0.5, 0.0015], [1.0]),
    ("a - -b*s", {"a": 1.0, "b": 2.0}, [1.0, 2.0], [1.0]),
    ("+a*-s", {"a": 3.0}, [0.0, -3.0], [1.0]),
    ("z^2 - 1", {}, [-1.0, 0.0, 1.0], [1.0]),
    ("s^0", {}, [1.0], [1.0]),
    ("2/s^2", {}, [2.0], [0.0, 0.0, 1.0]),
    ("1/(1/(s+1))", {}, [1.0, 1.0], [1.0]),
    ("a", {"a": 4.0}, [4.0], [1.0]),                            # parameter only: degree 0
]

# (text, values, expected value). Source: by hand.
VALUE_CASES = [
    ("-2^2", {}, -4.0),                    # power binds tighter than the sign
    ("2*pi", {}, 2.0 * math.pi),
    ("e^2", {}, math.e**2),
    ("sqrt(a)*log(b) + exp(0)", {"a": 4.0, "b": math.e}, 3.0),
    ("sin(pi/2) + cos(0) + tan(0)", {}, 2.0),
    ("a/b/c", {"a": 8.0, "b": 2.0, "c": 2.0}, 2.0),   # left-associative division
    ("a-b-c", {"a": 8.0, "b": 2.0, "c": 2.0}, 4.0),   # left-associative subtraction
    ("2 ** 3", {}, 8.0),
    ("(((1)))", {}, 1.0),
    ("1e-3 + 12 + 1.5 + .5 + 1E2", {}, 114.001),
]

# (text, message fragment, span). Source: spec and the messages the parser promises.
PARSE_ERRORS = [
    ("", "empty expression", (0, 0)),
    (" \t ", "empty expression", (0, 3)),
    ("x" * (MAX_TEXT + 1), f"expression is too long ({MAX_TEXT + 1} characters", (0, MAX_TEXT + 1)),
    ("a $ b", "unexpected character '$'", (2, 3)),
    ("2 \u00d7 s", "unexpected character '\u00d7' (U+00D7): use '*'", (2, 3)),
    ("a \u2212 b", "use '-' for minus", (2, 3)),
    ("(s+1", "missing ')' for the '(' at column 1", (0, 1)),
    ("k*((s+1)", "missing ')' for the '(' at column 3", (2, 3)),
    ("s+1)", "unmatched ')' at column 4", (3, 4)),
    ("s+", "expression ends with operator '+'", (1, 2)),
    ("s^", "expression ends with operator '^'", (1, 2)),
    ("s **", "expression ends with operator '**'", (2, 4)),
    ("*s", "missing operand before '*'", (0, 1)),
    ("s*/2", "missing operand between '*' and '/'", (1, 3)),
    ("(s-)", "missing operand after '-'", (2, 3)),
    ("()", "empty parentheses '()'", (0, 2)),
    ("(", "expression ends with '(' at column 1", (0, 1)),
    ("2s", "missing operator between '2' and 's' (write 2*s)", (0, 2)),
    ("2 tau", "missing operator between '2' and 'tau' (write 2*tau)", (0, 5)),
    ("2(s+1)", "missing operator between '2' and '(' (write 2*(...))", (0, 2)),
    ("(s+1)(s+2)", "missing operator between ')' and '(' (write (...)*(...))", (4, 6)),
    ("2*pi(1)", "missing operator between 'pi' and '('", (2, 5)),
    ("exp(-T*s)", "exp(...) of an expression in s is a dead time: remove it here and write "
                  "the time as 'delay: T' in this block", (0, 9)),
    ("K*exp(-T*s)/(s+1)", "is a dead time", (2, 11)),
    ("sin(w*s)", "function 'sin' applies to parameter values only, not to an expression in s",
     (0, 8)),
    ("1 + sqrt(z)", "function 'sqrt' applies to parameter values only, not to an expression "
                    "in z", (4, 11)),
    ("exp(z)", "function 'exp' applies to parameter values only", (0, 6)),
    ("s + z", "expression mixes 's' and 'z'", (4, 5)),
    ("abs(x)", "unknown function 'abs' (allowed: sqrt exp log sin cos tan)", (0, 3)),
    ("ln(x)", "did you mean 'log'?", (0, 2)),
    ("sqrt + 1", "function 'sqrt' needs its argument in parentheses", (0, 4)),
    ("2*log", "function 'log' needs its argument", (2, 5)),
    ("s^n", "exponent must be a whole number from 0 to 40, got 'n'", (2, 3)),
    ("s^0.5", "exponent must be a whole number from 0 to 40, got '0.5'; for a square root "
              "write sqrt(...)", (2, 5)),
    ("a**1.5", "sqrt(...)", (3, 6)),
    ("s^-1", "exponent must be a whole number from 0 to 40, got '-1'", (2, 4)),
    ("s^41", "exponent must be a whole number from 0 to 40, got 41", (2, 4)),
    ("s^1000", "exponent must be a whole number from 0 to 40, got 1000", (2, 6)),
    ("s^(1+1)", "exponent must be a whole number from 0 to 40", (2, 7)),
    ("s^2^3", "powers group from the right", (2, 5)),
    ("s^2.0", "written with digits only", (2, 5)),
    ("s^pi", "exponent must be a whole number", (2, 4)),
    ("1e400", "number out of range", (0, 5)),
    ("2*1e-400", "number out of range", (2, 8)),
    ("sqrt(a, b)", "function 'sqrt' takes one argument", (6, 7)),
    ("1,5", "unexpected ','", (1, 2)),
    ("1.2.3", "malformed number '1.2.3'", (0, 5)),
    ("1.5e", "malformed number '1.5e'", (0, 4)),
    (". 5", "unexpected character '.'", (0, 1)),
    ("'s+1'", "unexpected character \"'\"", (0, 1)),
]

# (text, message fragment, span) with allow_variable=False. Source: spec.
PARAMETER_ERRORS = [
    ("2*s", "the transform variable 's' cannot appear in a parameter expression", (2, 3)),
    ("z", "the transform variable 'z' cannot appear in a parameter expression", (0, 1)),
]

# (method, text, values, samples, message fragment, span). Source: by hand.
EVAL_ERRORS = [
    ("evaluate", "a/(b-c)", {"a": 1.0, "b": 2.0, "c": 2.0}, 1,
     "division by zero in 'a/(b-c)'", (0, 7)),
    ("evaluate", "a/(b-c)", {"a": 1.0, "b": [1.0, 2.0, 3.0], "c": [1.0, 1.0, 3.0]}, 3,
     "division by zero in 'a/(b-c)' (in 2 of 3 samples, first at index 0)", (0, 7)),
    ("evaluate", "x*a/(b-c) + 1", {"x": 1.0, "a": 1.0, "b": 2.0, "c": 2.0}, 1,
     "division by zero in 'x*a/(b-c)'", (0, 9)),
    ("evaluate", "log(a-b)", {"a": 1.0, "b": 1.0}, 1,
     "logarithm of a value that is not positive in 'log(a-b)'", (0, 8)),
    ("evaluate", "2 + sqrt(a-b)", {"a": 1.0, "b": 2.0}, 1,
     "square root of a negative value in 'sqrt(a-b)'", (4, 13)),
    ("evaluate", "exp(a)", {"a": 1000.0}, 1, "overflow in 'exp(a)'", (0, 6)),
    ("evaluate", "1 + a*b", {"a": 1e200, "b": 1e200}, 1, "overflow in 'a*b'", (4, 7)),
    ("evaluate", "a^40", {"a": 1e10}, 1, "overflow in 'a^40'", (0, 4)),
    ("evaluate", "tua + 1", {"tau": 1.0}, 1, "unknown parameter 'tua' (did you mean 'tau'?)",
     (0, 3)),
    ("evaluate", "2*kh", {"Kh": 1.0}, 1, "unknown parameter 'kh' (did you mean 'Kh'?)", (2, 4)),
    ("evaluate", "q", {"tau": 1.0}, 1, "unknown parameter 'q'", (0, 1)),
    ("evaluate", "a + 1", {"a": [1.0, np.nan]}, 2,
     "parameter 'a' has a value that is not finite (in 1 of 2 samples, first at index 1)",
     (0, 1)),
    ("evaluate", "2*s + 1", {}, 1, "contains the transform variable 's'", (2, 3)),
    ("rational", "1/(s-s)", {}, 1, "division by zero polynomial in '1/(s-s)'", (0, 7)),
    ("rational", "s/(a*s - b*s)", {"a": [1.0, 2.0], "b": 1.0}, 2,
     "division by zero polynomial in 's/(a*s - b*s)' (in 1 of 2 samples, first at index 0)",
     (0, 13)),
    ("rational", "s/(a-b)", {"a": 1.0, "b": 1.0}, 1, "division by zero in 's/(a-b)'", (0, 7)),
    ("rational", "s^40*s", {}, 1, "polynomial degree 41 is above the limit of 40", (0, 6)),
    ("rational", "(s^20)^3", {}, 1, "polynomial degree 60 is above the limit of 40", (0, 8)),
    ("rational", "1/s^30 + 1/(s+1)^11", {}, 1, "polynomial degree 41", (0, 19)),
    ("rational", "(1e200*s)^2", {}, 1, "overflow in '(1e200*s)^2'", (0, 11)),
    ("rational", "K*exp(-a)/(s+1)", {"K": 1.0, "a": -1000.0}, 1, "overflow in 'exp(-a)'",
     (2, 9)),
    ("rational", "1/(s+1) + b", {}, 1, "unknown parameter 'b'", (10, 11)),
]

# Text that Python would execute; the parser must reject each with an ExpressionError.
HOSTILE = [
    "__import__('os').system('x')",
    "os.system('rm -rf /')",
    "().__class__.__bases__[0].__subclasses__()",
    "lambda: 0",
    "[x for x in (1,)]",
    "1 if a else 2",
    "a; b",
    "a = 1",
    "open('f').read()",
    "exec('1')",
    "eval('1')",
    "a.b",
    "a @ b",
    "not a",
    "a and b",
    "f'{a}'",
    "\\x41",
]

# --------------------------------------------------------------------------- strategies
#
# A random tree is drawn once and turned into (a) expression text, (b) a sympy expression and
# (c) a rounding-error scale, so the three always describe the same expression. Trees are
# tuples: ("num", text) ("const", name) ("par", name) ("s",) ("neg", t) ("add"|"sub"|"mul"|
# "div", t1, t2) ("pow", t, k, op, k_text) ("fn", name, t).
#
# "Positive" trees are > 0 for a, b, c > 0 and, if they contain s, for all large real s; they
# are the only divisors, so no divisor is identically zero.

NUMBER_TEXTS = ["1", "2", "3", "0.5", ".5", "1.5", "2.5e-1", "12", "1E0", "0.1"]
PARAMS = ["a", "b", "c"]
SYMBOLS = {name: sympy.Symbol(name) for name in [*PARAMS, "s"]}

_static_leaves = st.one_of(
    st.sampled_from(NUMBER_TEXTS).map(lambda t: ("num", t)),
    st.sampled_from(PARAMS).map(lambda n: ("par", n)),
    st.sampled_from(["pi", "e"]).map(lambda n: ("const", n)),
)
_exponents = st.tuples(st.integers(0, 3), st.sampled_from(["^", "**"]), st.booleans())


def _pow(base: tuple, exp: tuple[int, str, bool]) -> tuple:
    k, op, paren = exp
    return ("pow", base, k, op, f"({k})" if paren else str(k))


@st.composite
def static_trees(draw: st.DrawFn, depth: int, positive: bool) -> tuple:
    """Parameter-only trees; ``positive`` ones are > 0 whenever a, b, c > 0."""
    if depth == 0 or draw(st.integers(0, 2)) == 0:
        return draw(_static_leaves)
    kinds = ["add", "mul", "div", "pow", "sqrt", "exp", "log1p"]
    if not positive:
        kinds += ["sub", "neg", "sin", "cos", "tan", "log"]
    kind = draw(st.sampled_from(kinds))
    sub = static_trees(depth - 1, positive)
    pos = static_trees(depth - 1, True)
    if kind in ("add", "sub", "mul"):
        return (kind, draw(sub), draw(sub))
    if kind == "div":
        return ("div", draw(sub), draw(pos))
    if kind == "pow":
        return _pow(draw(sub), draw(_exponents))
    if kind == "neg":
        return ("neg", draw(sub))
    if kind == "exp":
        return ("fn", "exp", draw(_static_leaves))
    if kind == "log1p":
        return ("fn", "log", ("add", ("num", "1"), draw(pos)))
    return ("fn", kind, draw(pos))


@st.composite
def dynamic_trees(draw: st.DrawFn, depth: int, positive: bool) -> tuple:
    """Trees in s over a, b, c; divisors are positive trees."""
    if depth == 0 or draw(st.integers(0, 3)) == 0:
        leaves = [st.just(("s",)), static_trees(2, positive)]
        if positive:
            leaves.append(st.sampled_from(NUMBER_TEXTS).map(lambda t: ("sub", ("s",), ("num", t))))
        return draw(st.one_of(leaves))
    kinds = ["add", "mul", "div", "pow"] + ([] if positive else ["sub", "neg"])
    kind = draw(st.sampled_from(kinds))
    sub = dynamic_trees(depth - 1, positive)
    if kind in ("add", "sub", "mul"):
        return (kind, draw(sub), draw(sub))
    if kind == "div":
        return ("div", draw(sub), draw(dynamic_trees(depth - 1, True)))
    if kind == "pow":
        return _pow(draw(sub), draw(_exponents))
    return ("neg", draw(sub))


_PREC = {"add": 1, "sub": 1, "mul": 2, "div": 2, "neg": 3, "pow": 4}
_OPS = {"add": "+", "sub": "-", "mul": "*", "div": "/"}


def _prec(t: tuple) -> int:
    return _PREC.get(t[0], 5)


def to_text(t: tuple, sep: str) -> str:
    """Expression text with only the parentheses the precedence rules require."""
    def wrap(child: tuple, needed: bool) -> str:
        inner = to_text(child, sep)
        return f"({inner})" if needed else inner

    kind = t[0]
    if kind in ("num", "const", "par"):
        return t[1]
    if kind == "s":
        return "s"
    if kind == "neg":
        return "-" + wrap(t[1], _prec(t[1]) < 3)
    if kind in _OPS:
        p = _PREC[kind]
        left, right = wrap(t[1], _prec(t[1]) < p), wrap(t[2], _prec(t[2]) <= p)
        return f"{left}{sep}{_OPS[kind]}{sep}{right}"
    if kind == "pow":
        return f"{wrap(t[1], _prec(t[1]) < 5)}{t[3]}{t[4]}"
    return f"{t[1]}({to_text(t[2], sep)})"


def to_sympy(t: tuple) -> sympy.Expr:
    kind = t[0]
    if kind == "num":
        return sympy.Rational(float(t[1]))  # the exact binary value the parser reads
    if kind == "const":  # the float the parser uses; exact pi would make tan(pi/2) a pole
        return sympy.Rational(math.pi if t[1] == "pi" else math.e)
    if kind == "par":
        return SYMBOLS[t[1]]
    if kind == "s":
        return SYMBOLS["s"]
    if kind == "neg":
        return -to_sympy(t[1])
    if kind == "pow":
        return to_sympy(t[1]) ** t[2]
    if kind == "fn":
        return getattr(sympy, t[1])(to_sympy(t[2]))
    a, b = to_sympy(t[1]), to_sympy(t[2])
    return {"add": a + b, "sub": a - b, "mul": a * b, "div": a / b}[kind]


def has_s(t: tuple) -> bool:
    return t[0] == "s" or any(isinstance(c, tuple) and has_s(c) for c in t[1:])


def degrees(t: tuple) -> tuple[int, int]:
    """Upper bounds of the numerator and denominator degrees the parser builds."""
    if not has_s(t):
        return 0, 0
    kind = t[0]
    if kind == "s":
        return 1, 0
    if kind == "neg":
        return degrees(t[1])
    if kind == "pow":
        n, d = degrees(t[1])
        return n * t[2], d * t[2]
    (n1, d1), (n2, d2) = degrees(t[1]), degrees(t[2])
    if kind == "mul":
        return n1 + n2, d1 + d2
    if kind == "div":
        return n1 + d2, d1 + n2
    return max(n1 + d2, n2 + d1), d1 + d2


def static_error_scale(t: tuple, vals: dict[str, float]) -> tuple[float, float]:
    """(value, m): forward rounding-error bound, |error| <~ eps * m, of parameter-only trees."""
    kind = t[0]
    if kind in ("num", "const", "par"):
        v = float(t[1]) if kind == "num" else (
            {"pi": math.pi, "e": math.e}[t[1]] if kind == "const" else vals[t[1]])
        return v, abs(v)
    if kind == "neg":
        v, m = static_error_scale(t[1], vals)
        return -v, m
    if kind == "pow":
        v1, m1 = static_error_scale(t[1], vals)
        k = t[2]
        v = v1**k
        return v, (k * abs(v1) ** (k - 1) * m1 if k else 0.0) + abs(v)
    if kind == "fn":
        x, m1 = static_error_scale(t[2], vals)
        v = {"sqrt": math.sqrt, "exp": math.exp, "log": math.log, "sin": math.sin,
             "cos": math.cos, "tan": math.tan}[t[1]](x)
        slope = {"sqrt": lambda: 0.5 / v, "exp": lambda: v, "log": lambda: 1.0 / x,
                 "sin": lambda: math.cos(x), "cos": lambda: math.sin(x),
                 "tan": lambda: 1.0 / math.cos(x) ** 2}[t[1]]()
        return v, abs(slope) * m1 + abs(v)
    (v1, m1), (v2, m2) = static_error_scale(t[1], vals), static_error_scale(t[2], vals)
    if kind in ("add", "sub"):
        v = v1 + v2 if kind == "add" else v1 - v2
        return v, m1 + m2 + abs(v)
    if kind == "mul":
        return v1 * v2, m1 * abs(v2) + abs(v1) * m2 + abs(v1 * v2)
    v = v1 / v2
    return v, m1 / abs(v2) + abs(v1) * m2 / v2**2 + abs(v)


@dataclass
class Scale:
    """Value of num and den at x, and of the same construction with absolute values."""

    num: complex
    den: complex
    num_abs: float
    den_abs: float


def error_scale(t: tuple, x: complex, vals: dict[str, float]) -> Scale:
    """Mirror of the parser's num/den construction, to bound coefficient rounding.

    The absolute-value construction evaluated at |x| bounds sum_k |c_k| |x|^k for every
    coefficient error, so the computed ratio is within about
    eps * (num_abs + |r| den_abs) / |den| of the exact one.
    """
    kind = t[0]
    if not has_s(t):
        v, m = static_error_scale(t, vals)
        return Scale(v, 1.0, m, 1.0)
    if kind == "s":
        return Scale(x, 1.0, abs(x), 1.0)
    if kind == "neg":
        a = error_scale(t[1], x, vals)
        return Scale(-a.num, a.den, a.num_abs, a.den_abs)
    if kind == "pow":
        a, k = error_scale(t[1], x, vals), t[2]
        return Scale(a.num**k, a.den**k, a.num_abs**k, a.den_abs**k)
    a, b = error_scale(t[1], x, vals), error_scale(t[2], x, vals)
    if kind == "mul":
        return Scale(a.num * b.num, a.den * b.den, a.num_abs * b.num_abs, a.den_abs * b.den_abs)
    if kind == "div":
        return Scale(a.num * b.den, a.den * b.num, a.num_abs * b.den_abs, a.den_abs * b.num_abs)
    sign = 1.0 if kind == "add" else -1.0
    return Scale(a.num * b.den + sign * b.num * a.den, a.den * b.den,
                 a.num_abs * b.den_abs + b.num_abs * a.den_abs, a.den_abs * b.den_abs)


expressions = st.tuples(
    dynamic_trees(4, False).filter(lambda t: max(degrees(t)) <= MAX_DEGREE),
    st.sampled_from(["", " "]),
)
parameter_values = st.fixed_dictionaries({n: st.floats(0.5, 2.0) for n in PARAMS})
points = st.lists(
    # upper half-plane only (real coefficients make the lower half its mirror image), away
    # from the real axis where the poles of the 's - c' leaves sit
    st.tuples(st.floats(0.3, 3.0), st.floats(0.05, math.pi - 0.05)).map(lambda p: cmath.rect(*p)),
    min_size=3, max_size=3,
)


def _exact(v: float) -> sympy.Rational:
    return sympy.Rational(v)


def _reference(sym: sympy.Expr, vals: dict[str, float], x: complex) -> complex:
    subs = {SYMBOLS[n]: _exact(v) for n, v in vals.items()}
    subs[SYMBOLS["s"]] = _exact(x.real) + sympy.I * _exact(x.imag)
    return complex(sym.evalf(30, subs=subs))


def _coefficients(p: sympy.Expr, vals: dict[str, float]) -> np.ndarray:
    """Ascending numeric coefficients in s of a sympy polynomial expression."""
    subs = {SYMBOLS[n]: _exact(v) for n, v in vals.items()}
    coeffs = sympy.Poly(p, SYMBOLS["s"]).all_coeffs()[::-1]
    return np.array([complex(c.evalf(30, subs=subs)).real for c in coeffs])


def _trim(c: np.ndarray) -> np.ndarray:
    nz = np.nonzero(c)[0]
    return c[: nz[-1] + 1] if nz.size else c[:1]


# --------------------------------------------------------------------------- property tests


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(case=expressions, vals=parameter_values, xs=points)
def test_rational_matches_sympy(case: tuple, vals: dict[str, float], xs: list[complex]) -> None:
    """num(x)/den(x) equals the expression's value at random complex x (sympy as reference).

    Statement under test: for every expression built from + - * / ^k, the constants, the
    functions and s, ``rational`` returns polynomials whose ratio is the expression, up to
    coefficient rounding bounded by the same construction carried out on absolute values.
    Where sympy.together gives the same degrees, the coefficients also agree with sympy's
    Poly coefficients up to one common scale factor; in every case the cross products
    num*den_sympy and num_sympy*den agree coefficient by coefficient.
    """
    tree, sep = case
    text = to_text(tree, sep)
    sym = to_sympy(tree)
    expr = parse(text)
    assert expr.variable == ("s" if has_s(tree) else None), text
    num, den = expr.rational(vals, 1)
    assert num.shape[1] - 1 <= degrees(tree)[0] and den.shape[1] - 1 <= degrees(tree)[1], text

    for x in xs:
        at = np.array([x])
        n_x, d_x = complex(poly.evaluate(num, at)[0, 0]), complex(poly.evaluate(den, at)[0, 0])
        sc = error_scale(tree, x, vals)
        if d_x == 0 or sc.den == 0:
            continue  # exactly on a pole: nothing to compare
        got = n_x / d_x
        ref = _reference(sym, vals, x)
        tol = 1e-12 * (sc.num_abs + abs(ref) * sc.den_abs) / abs(sc.den)
        assert abs(got - ref) <= tol, f"{text!r} at s={x}: got {got}, sympy {ref}, tol {tol}"

    # coefficient comparison against sympy.together (sympy as reference)
    sym_num, sym_den = sympy.fraction(sympy.together(sym))
    cn, cd = _coefficients(sym_num, vals), _coefficients(sym_den, vals)
    on, od = num[0], den[0]
    at_one = error_scale(tree, 1.0, vals)
    cross = np.polynomial.polynomial.polysub(np.polynomial.polynomial.polymul(on, cd),
                                             np.polynomial.polynomial.polymul(cn, od))
    cross_tol = 1e-12 * (at_one.num_abs * np.abs(cd).sum() + at_one.den_abs * np.abs(cn).sum())
    assert np.abs(cross).max() <= cross_tol, f"{text!r}: cross products differ by {cross}"
    on_t, od_t = _trim(on), _trim(od)
    if on_t.size == cn.size and od_t.size == cd.size and np.any(cn):
        j = int(np.argmax(np.abs(cd)))
        k = od_t[j] / cd[j]
        scale_tol = 1e-12 * (at_one.num_abs + np.abs(on_t).max() * at_one.den_abs / abs(od_t[j]))
        np.testing.assert_allclose(on_t, k * cn, rtol=0, atol=scale_tol, err_msg=text)
        np.testing.assert_allclose(od_t, k * cd, rtol=0,
                                   atol=2e-12 * at_one.den_abs, err_msg=text)


_FUZZ_ALPHABET = list("sz ab().+-*/^,0123456789eE_$") + ["**", "pi", "sqrt", "exp", "log"]


@settings(max_examples=300, deadline=None)
@given(pieces=st.lists(st.sampled_from(_FUZZ_ALPHABET), max_size=30),
       allow=st.booleans())
def test_any_text_parses_or_raises_expression_error(pieces: list[str], allow: bool) -> None:
    """Every text either parses or raises ExpressionError with a span inside the text, and a
    parsed expression either evaluates or raises ExpressionError (no other exception)."""
    text = "".join(pieces)
    try:
        expr = parse(text, allow_variable=allow)
    except ExpressionError as err:
        assert 0 <= err.start <= err.end <= len(text), (text, err.start, err.end)
        assert err.message and err.message[0].islower() and not err.message.endswith(".")
        return
    vals = {"a": np.array([0.5, 2.0]), "b": 1.5}
    for run in (expr.evaluate, expr.rational):
        try:
            run(vals, 2)
        except ExpressionError as err:
            assert 0 <= err.start <= err.end <= len(text), (text, err.start, err.end)


# --------------------------------------------------------------------------- known values


@pytest.mark.parametrize(("text", "values", "num", "den"), RATIONAL_CASES)
def test_rational_known_cases(text: str, values: dict, num: list, den: list) -> None:
    got_num, got_den = parse(text).rational(values, 1)
    np.testing.assert_allclose(got_num, [num], rtol=1e-15, atol=0, err_msg=text)
    np.testing.assert_allclose(got_den, [den], rtol=1e-15, atol=0, err_msg=text)
    assert got_num.dtype == np.float64 and got_den.dtype == np.float64


@pytest.mark.parametrize(("text", "values", "expected"), VALUE_CASES)
def test_evaluate_known_cases(text: str, values: dict, expected: float) -> None:
    got = parse(text, allow_variable=False).evaluate(values, 1)
    assert got.shape == (1,)
    np.testing.assert_allclose(got, [expected], rtol=1e-14, atol=1e-15, err_msg=text)


def test_negation_gives_no_negative_zeros() -> None:
    num, _ = parse("-s^2").rational({}, 1)
    assert not np.signbit(num[0, :2]).any()


def test_attributes() -> None:
    expr = parse("Kh/(tau*s + 1) + sqrt(pi)*e - 0*wn")
    assert expr.names == frozenset({"Kh", "tau", "wn"})
    assert expr.variable == "s"
    assert expr.text == "Kh/(tau*s + 1) + sqrt(pi)*e - 0*wn"
    assert parse("a*b", allow_variable=False).variable is None
    assert parse("z + 1").variable == "z"
    assert parse("a + b") == parse("a + b")
    assert hash(parse("a + b")) == hash(parse("a + b"))


def test_constants_and_reserved_words() -> None:
    assert sorted(FUNCTIONS) == ["cos", "exp", "log", "sin", "sqrt", "tan"]
    assert sorted(RESERVED - FUNCTIONS) == ["e", "pi", "s", "z"]
    assert (MAX_TEXT, MAX_EXPONENT, MAX_DEGREE, MAX_DEPTH) == (4000, 40, 40, 60)


def test_limits_are_inclusive() -> None:
    num, _ = parse(f"s^{MAX_EXPONENT}").rational({}, 1)
    assert num.shape == (1, MAX_EXPONENT + 1)
    nested = "(" * MAX_DEPTH + "s+1" + ")" * MAX_DEPTH
    np.testing.assert_array_equal(parse(nested).rational({}, 1)[0], [[1.0, 1.0]])
    assert parse("1" + "+1" * ((MAX_TEXT - 1) // 2)).evaluate({}, 1)[0] == (MAX_TEXT + 1) // 2


def test_long_flat_sums_and_products_do_not_recurse() -> None:
    """Source: by hand. 1999 terms of s sum to 1999*s; chains are flat in the tree."""
    num, den = parse("+".join(["s"] * 1999)).rational({}, 1)
    np.testing.assert_array_equal(num, [[0.0, 1999.0]])
    np.testing.assert_array_equal(den, [[1.0]])
    assert parse("-".join(["a"] * 1999), allow_variable=False).evaluate({"a": 2.0}, 1)[0] \
        == 2.0 * (2 - 1999)


# --------------------------------------------------------------------------- batching


def test_batch_equals_per_sample() -> None:
    """1000 samples at once give the same coefficients as 1000 single-sample runs."""
    rng = np.random.default_rng(20240611)
    samples = 1000
    vals: dict[str, np.ndarray] = {
        "Kh": rng.uniform(0.5, 3.0, samples), "tau": rng.uniform(10.0, 200.0, samples),
        "zeta": rng.uniform(0.1, 1.0, samples), "wn": np.array(30.0),
        "dead": rng.uniform(0.0, 5.0, samples)}
    polynomial = parse("Kh*wn^2 / ((tau*s + 1)*(s^2 + 2*zeta*wn*s + wn^2)) - (Kh - 1)/s")
    functions = parse("Kh*sqrt(wn)/(tau*s^2 + 2*zeta*s + exp(-dead)) - log(Kh)*sin(zeta)*s")
    param = parse("Kh*exp(-dead/tau) + cos(zeta)^2", allow_variable=False)
    bn, bd = polynomial.rational(vals, samples)
    fn, fd = functions.rational(vals, samples)
    pv = param.evaluate(vals, samples)
    assert bn.shape[0] == bd.shape[0] == fn.shape[0] == fd.shape[0] == pv.shape[0] == samples
    for i in range(samples):
        one = {k: (v[i] if v.ndim else v) for k, v in vals.items()}
        n, d = polynomial.rational(one, 1)
        np.testing.assert_array_equal(bn[i], n[0], err_msg=f"sample {i}")
        np.testing.assert_array_equal(bd[i], d[0], err_msg=f"sample {i}")
        n, d = functions.rational(one, 1)
        np.testing.assert_allclose(fn[i], n[0], rtol=1e-14, atol=0, err_msg=f"sample {i}")
        np.testing.assert_allclose(fd[i], d[0], rtol=1e-14, atol=0, err_msg=f"sample {i}")
        np.testing.assert_allclose(pv[i], param.evaluate(one, 1)[0], rtol=1e-14, atol=0)


def test_scalars_broadcast_and_results_are_fresh() -> None:
    a = np.array([1.0, 2.0, 3.0])
    out = parse("a", allow_variable=False).evaluate({"a": a}, 3)
    out[0] = 99.0
    assert a[0] == 1.0
    np.testing.assert_array_equal(parse("2*b").evaluate({"b": 1.5}, 3), [3.0, 3.0, 3.0])
    num, den = parse("b*s + 1").rational({"b": np.array([2.0])}, 2)
    np.testing.assert_array_equal(num, [[1.0, 2.0], [1.0, 2.0]])
    np.testing.assert_array_equal(den, [[1.0], [1.0]])


def test_bad_arguments_are_value_errors() -> None:
    with pytest.raises(ValueError, match="samples must be a positive integer"):
        parse("1").evaluate({}, 0)
    with pytest.raises(ValueError, match="has shape"):
        parse("a").evaluate({"a": np.ones(4)}, 3)
    with pytest.raises(TypeError):
        parse(12)  # type: ignore[arg-type]


# --------------------------------------------------------------------------- errors


def _check(err: ExpressionError, text: str, fragment: str, span: tuple[int, int]) -> None:
    assert fragment in err.message, f"{text!r}: {err.message!r}"
    assert (err.start, err.end) == span, f"{text!r}: span {(err.start, err.end)}, {err.message}"
    assert str(err) == err.message
    assert err.message[0].islower() and not err.message.endswith(".")


@pytest.mark.parametrize(("text", "fragment", "span"), PARSE_ERRORS)
def test_parse_errors(text: str, fragment: str, span: tuple[int, int]) -> None:
    with pytest.raises(ExpressionError) as info:
        parse(text)
    _check(info.value, text, fragment, span)


@pytest.mark.parametrize(("text", "fragment", "span"), PARAMETER_ERRORS)
def test_parameter_expression_errors(text: str, fragment: str, span: tuple[int, int]) -> None:
    with pytest.raises(ExpressionError) as info:
        parse(text, allow_variable=False)
    _check(info.value, text, fragment, span)


@pytest.mark.parametrize(("method", "text", "values", "samples", "fragment", "span"),
                         EVAL_ERRORS)
def test_evaluation_errors(method: str, text: str, values: dict, samples: int, fragment: str,
                           span: tuple[int, int]) -> None:
    expr = parse(text)
    with pytest.raises(ExpressionError) as info:
        getattr(expr, method)(values, samples)
    _check(info.value, text, fragment, span)


@pytest.mark.parametrize("text", [
    "(" * 10000 + "1" + ")" * 10000,          # over MAX_TEXT as well
    "(" * 1999 + "1" + ")" * 1999,            # within MAX_TEXT: the depth bound fires
    "-" * 3000 + "s",
    "sqrt(" * 500 + "a" + ")" * 500,
    "s^(" * 300 + "2" + ")" * 300,
    "((((((((((" * 100,                       # unbalanced and deep
])
def test_deep_nesting_is_an_expression_error(text: str) -> None:
    with pytest.raises(ExpressionError) as info:
        parse(text)
    assert "too deeply" in info.value.message or "too long" in info.value.message


def test_depth_error_points_at_the_first_level_too_many() -> None:
    with pytest.raises(ExpressionError) as info:
        parse("(" * 1000 + "1" + ")" * 1000)
    assert "nested too deeply" in info.value.message
    assert (info.value.start, info.value.end) == (MAX_DEPTH, MAX_DEPTH + 1)


def test_error_is_a_value_error_and_pickles() -> None:
    err = ExpressionError("division by zero in 'a/b'", 0, 3)
    assert isinstance(err, ValueError)
    back = pickle.loads(pickle.dumps(err))
    assert (back.message, back.start, back.end) == (err.message, 0, 3)
    expr = parse("K/(tau*s + 1)")
    again = pickle.loads(pickle.dumps(expr))
    assert isinstance(again, Expr) and again == expr
    np.testing.assert_array_equal(again.rational({"K": 2, "tau": 3}, 1)[1], [[1.0, 3.0]])


# --------------------------------------------------------------------------- no eval


@pytest.mark.parametrize("text", HOSTILE)
def test_python_code_is_rejected_cleanly(text: str) -> None:
    with pytest.raises(ExpressionError) as info:
        parse(text).rational({}, 1)
    assert 0 <= info.value.start <= info.value.end <= len(text)


def test_no_python_evaluation_is_used(monkeypatch: pytest.MonkeyPatch) -> None:
    def refuse(*args: object, **kwargs: object) -> None:
        raise AssertionError("the parser must not evaluate Python code")

    for name in ("eval", "exec", "compile"):
        monkeypatch.setattr(builtins, name, refuse)
    monkeypatch.setattr(ast, "literal_eval", refuse)
    expr = parse("Kh*sqrt(a)/(tau*s^2 + 2*s + 1)")
    num, den = expr.rational({"Kh": 1.0, "a": 4.0, "tau": 0.5}, 1)
    np.testing.assert_array_equal(num, [[2.0]])
    np.testing.assert_array_equal(den, [[1.0, 2.0, 0.5]])

"""Nominal closed-loop stability against the Routh-Hurwitz criterion in exact arithmetic.

Reference: the Routh-Hurwitz criterion (a real polynomial with positive leading coefficient
has all roots in the open left half-plane iff the first column of its Routh array is
positive), evaluated with sympy rationals. Loops and their known stable ranges:

* K/(s(s+1)(s+2)): stable exactly for 0 < K < 6 (classic worked example, from memory;
  recomputed here).
* K/(s+1)^3: stable for -1 < K < 8 (from memory; recomputed).
* K(s+1)/(s(s-1)(s+6)): open-loop unstable, stable for K > 7.5 (recomputed).
* K(s+1)^2/s^3: conditionally stable, stable for K > 1/2 (recomputed).
"""

from __future__ import annotations

import sympy as sp
from hypothesis import given, settings
from hypothesis import strategies as st

from loopvet.analysis.poles import closed_loop_poles, is_stable
from loopvet.lti.loop import assemble
from loopvet.record import params

from .conftest import load_text

S = sp.symbols("s")


def routh_stable(coeffs_desc: list[sp.Rational]) -> bool:
    """Routh-Hurwitz test in exact arithmetic; any zero in the first column -> not stable."""
    c = [sp.nsimplify(x) for x in coeffs_desc]
    if c[0] < 0:
        c = [-x for x in c]
    n = len(c)
    rows = [c[0::2], c[1::2]]
    width = len(rows[0])
    rows = [r + [0] * (width - len(r)) for r in rows]
    for _ in range(n - 2):
        a, b = rows[-2], rows[-1]
        if b[0] == 0:
            return False
        new = [(b[0] * a[j + 1] - a[0] * b[j + 1]) / b[0] for j in range(width - 1)] + [0]
        rows.append(new)
    return all(r[0] > 0 for r in rows[:n])


LOOPS = {
    "type1-three-poles": ("1 / (s*(s+1)*(s+2))", lambda k: 0 < k < 6),
    "triple-lag": ("1 / (s+1)^3", lambda k: -1 < k < 8),
    "open-loop-unstable": ("(s+1) / (s*(s-1)*(s+6))", lambda k: k > 7.5),
    "conditionally-stable": ("(s+1)^2 / s^3", lambda k: k > 0.5),
}


def _char_poly_sympy(transfer: str, k: sp.Rational) -> list[sp.Rational]:
    expr = sp.sympify(transfer.replace("^", "**"), locals={"s": S})
    num, den = sp.fraction(sp.together(expr))
    return sp.Poly(sp.expand(den + k * num), S).all_coeffs()


def _loopvet_stable(transfer: str, k: float) -> bool:
    rec = load_text(f"plant: {{transfer: \"{transfer}\"}}\ncontroller: {{transfer: \"1\"}}\n"
                    f"gain: {k!r}\n")
    loop = assemble(rec, params.values(rec, 1), 1)
    return bool(is_stable(closed_loop_poles(loop).poles)[0])


@settings(max_examples=60, deadline=None)
@given(name=st.sampled_from(sorted(LOOPS)),
       k=st.fractions(min_value=-20, max_value=40, max_denominator=64))
def test_nominal_stability_matches_routh_hurwitz(name, k):
    """'All roots of D + K N in the open left half-plane iff the Routh array's first
    column is positive' — loopvet's verdict must agree with the exact test."""
    transfer, known = LOOPS[name]
    if k == 0:
        k = sp.Rational(1, 3)
    kr = sp.Rational(k.numerator, k.denominator)
    exact = routh_stable(_char_poly_sympy(transfer, kr))
    assert exact == known(float(kr)), "reference table disagrees with Routh (test bug)"
    # stay off the exact boundary where floating point cannot decide
    boundaries = {"type1-three-poles": (0, 6), "triple-lag": (-1, 8),
                  "open-loop-unstable": (7.5,), "conditionally-stable": (0.5,)}[name]
    if min(abs(float(kr) - b) for b in boundaries) < 1e-9:
        return
    assert _loopvet_stable(transfer, float(kr)) == exact, (name, kr)


def test_textbook_boundary_of_type1_loop():
    """K/(s(s+1)(s+2)) is stable for 0 < K < 6 (from memory; Routh recomputed)."""
    assert routh_stable(_char_poly_sympy("1/(s*(s+1)*(s+2))", sp.Rational(599, 100)))
    assert not routh_stable(_char_poly_sympy("1/(s*(s+1)*(s+2))", sp.Rational(601, 100)))
    assert _loopvet_stable("1/(s*(s+1)*(s+2))", 5.99)
    assert not _loopvet_stable("1/(s*(s+1)*(s+2))", 6.01)
    assert not _loopvet_stable("1/(s*(s+1)*(s+2))", 6.0)   # poles on the axis: not stable

"""Exact stable gain intervals against exact rational arithmetic (see tests/routh.py).

Loops (textbook forms; the known intervals are from memory and are recomputed by the
exact oracle in every test, never trusted as typed):
  three-pole type-1 K/(s(s+1)(s+2)): (0, 6); triple lag K/(s+1)^3: (-1, 8);
  open-loop unstable K(s+1)/(s(s-1)(s+6)): (7.5, inf); conditionally stable
  K(s+1)^2/s^3: (0.5, inf); non-minimum-phase K(1-s)/((s+1)(s+2)): (-2, 3);
  two bands K(s^2+0.088s+4.84)/(s(s+2.7)(s+0.9)); a twelfth-order lag chain; a loop with
  imaginary-axis zeros; a biproper lead loop; a repeated-pole loop.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import sympy as sp
from hypothesis import given, settings
from hypothesis import strategies as st

from loopvet.analysis.gain import gain_margins, stable_gain_intervals

from .routh import S, crossing_candidates, stable_at

LOOPS = {
    "type1-three-poles": ("1", "s*(s+1)*(s+2)"),
    "triple-lag": ("1", "(s+1)**3"),
    "open-loop-unstable": ("s+1", "s*(s-1)*(s+6)"),
    "conditionally-stable": ("(s+1)**2", "s**3"),
    "non-minimum-phase": ("1-s", "(s+1)*(s+2)"),
    "two-bands": ("s**2+88/1000*s+484/100", "s*(s+27/10)*(s+9/10)"),
    "twelfth-order": ("(s+3)*(s+5)", "(s+1)**4*(s+2)**4*(s+4)**2*(s+8)**2"),
    "axis-zeros": ("s**2+1", "s*(s+1)*(s+2)"),
    "biproper-lead": ("(s+1)*(2*s+1)", "(s+3)*(s-1/2)"),
    "repeated-poles": ("1", "s**2*(s+4)**2"),
    # a servo axis with roots from 0 to 1500 rad/s: coefficients span 30 decades
    "wide-spread": ("9600*(s/30+1)*(s**2+80*s+640000)*(s**2+30*s+250225)",
                    "s**2*(s**2+48*s+640576)*(s/600+1)*(s**2+800*s+640000)*(s/1500+1)"),
}


def _coeffs(expr: str) -> tuple[sp.Expr, np.ndarray]:
    e = sp.sympify(expr, locals={"s": S})
    return e, np.array([float(c) for c in sp.Poly(e, S).all_coeffs()[::-1]])[None, :]


def _case(name):
    ns, ds = LOOPS[name]
    num, n = _coeffs(ns)
    den, d = _coeffs(ds)
    return num, den, stable_gain_intervals(n, d)[0]


def _rational_between(lo: float, hi: float) -> sp.Rational:
    if math.isinf(lo) and math.isinf(hi):
        return sp.Rational(1, 3)
    if math.isinf(lo):
        return sp.nsimplify(hi - max(1.0, abs(hi)), rational=True)
    if math.isinf(hi):
        return sp.nsimplify(lo + max(1.0, abs(lo)), rational=True)
    return sp.nsimplify((lo + hi) / 2, rational=True)


@pytest.mark.parametrize("name", sorted(LOOPS))
def test_crossings_are_exact_roots(name):
    """Every reported finite crossing gain is a real root of Delta_{n-1} a_0 a_n (1e-8 rel)
    and every such root at which stability changes is reported."""
    num, den, res = _case(name)
    exact = [float(r) for r in crossing_candidates(num, den)]
    for c in res.crossings:
        assert min(abs(c.gain - r) for r in exact) <= 1e-8 * max(1.0, abs(c.gain)), (name, c)
    reported = [c.gain for c in res.crossings]
    for r in exact:
        eps = 1e-6 * max(1.0, abs(r))
        left = stable_at(num, den, sp.nsimplify(r - eps, rational=True))
        right = stable_at(num, den, sp.nsimplify(r + eps, rational=True))
        if left != right:
            assert min((abs(g - r) for g in reported), default=1.0) <= 1e-8 * max(1.0, abs(r)), \
                (name, r, reported)


@pytest.mark.parametrize("name", sorted(LOOPS))
def test_intervals_match_routh(name):
    """Inside each reported interval the Routh array says stable; between them unstable."""
    num, den, res = _case(name)
    edges = sorted({-math.inf, math.inf, *(c.gain for c in res.crossings)})
    for lo, hi in zip(edges[:-1], edges[1:], strict=True):
        k = _rational_between(lo, hi)
        inside = any(a < float(k) < b for a, b in res.stable)
        assert inside == stable_at(num, den, k), (name, lo, hi, float(k))


def test_textbook_intervals_and_margins():
    """K/(s(s+1)(s+2)) with K = 1: stable (0, 6), GM = 20 log10 6 = 15.563 dB (from memory;
    recomputed); K(s+1)^2/s^3 at K = 2: reduction margin 20 log10(2/0.5) = 12.04 dB."""
    _, _, res = _case("type1-three-poles")
    assert len(res.stable) == 1
    lo, hi = res.stable[0]
    assert lo == 0.0 and hi == pytest.approx(6.0, rel=1e-12)
    gm, grm = gain_margins(res, 1.0)
    assert gm == pytest.approx(20 * math.log10(6.0), rel=1e-10) and grm == math.inf
    _, _, res = _case("conditionally-stable")
    gm, grm = gain_margins(res, 2.0)
    assert gm == math.inf and grm == pytest.approx(20 * math.log10(4.0), rel=1e-10)
    _, _, res = _case("two-bands")
    assert sum(1 for lo, hi in res.stable if lo >= 0) == 2
    assert gain_margins(res, 10.0) == (None, None)


def test_reverse_acting_margins():
    """For K < 0 'rise' means |K| grows: K(1-s)/((s+1)(s+2)) is stable on (-2, 3); at
    K = -1 the loop may grow by 20 log10 2 dB before it goes unstable."""
    _, _, res = _case("non-minimum-phase")
    gm, grm = gain_margins(res, -1.0)
    assert gm == pytest.approx(20 * math.log10(2.0), rel=1e-10) and grm == math.inf


def test_batched_equals_one_by_one():
    d = np.array([np.polynomial.polynomial.polyfromroots([-1.0, -2.0 - a, -3.0])
                  for a in np.linspace(0, 2, 7)])
    n = np.array([[1.0, 0.5]])
    batch = stable_gain_intervals(n, d)
    for i in range(d.shape[0]):
        one = stable_gain_intervals(n, d[i:i + 1])[0]
        assert one.stable == batch[i].stable


roots = st.floats(min_value=-5, max_value=2, allow_nan=False).map(lambda x: round(x, 2))


@settings(max_examples=60, deadline=None)
@given(poles=st.lists(roots, min_size=2, max_size=6), zeros=st.lists(roots, max_size=2),
       k=st.floats(min_value=-50, max_value=50))
def test_inside_stable_outside_not(poles, zeros, k):
    """'At gains strictly inside a reported stable interval all roots of D + K N lie in the
    open left half-plane; just outside, at least one does not' (numerical roots of the
    exact polynomial, numpy as reference)."""
    if len(zeros) > len(poles):
        return
    d = np.polynomial.polynomial.polyfromroots(poles)[None, :]
    n = np.polynomial.polynomial.polyfromroots(zeros)[None, :] if zeros else np.ones((1, 1))
    res = stable_gain_intervals(n, d)[0]
    for lo, hi in res.stable:
        for kk in (lo, hi):
            if not math.isfinite(kk):
                continue
            eps = 1e-4 * max(1.0, abs(kk))
            if math.isfinite(hi - lo):
                eps = min(eps, 0.01 * (hi - lo))   # stay inside narrow intervals
            inside = kk + eps if kk == lo else kk - eps
            outside = kk - eps if kk == lo else kk + eps
            if any(a < outside < b for a, b in res.stable):
                continue
            r_in = np.roots((d[0] + inside * np.pad(n[0], (0, d.shape[1] - n.shape[1])))[::-1])
            r_out = np.roots((d[0] + outside * np.pad(n[0], (0, d.shape[1] - n.shape[1])))[::-1])
            assert r_in.real.max() < 0, (poles, zeros, kk)
            assert r_out.real.max() >= -1e-9 * max(1, np.abs(r_out).max()), (poles, zeros, kk)

"""Pole-region gain intervals (D-decomposition) against independent references.

* Boundary gains recomputed with sympy: the closed-loop polynomial has a root on the
  boundary curve exactly when its real and imaginary parts vanish together there; sympy
  solves that system in exact arithmetic.
* The classic value for K/(s(s+1)(s+2)) at damping ratio 0.5: K = 28/27 ~ 1.037 with the
  dominant poles at -1/3 +- j/sqrt(3) (textbook worked example, from memory of its form;
  recomputed here exactly).
* Property (hypothesis): at gains inside a reported interval every closed-loop pole meets the
  bound; at gains outside all intervals at least one does not (numpy roots as reference).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import sympy as sp
from hypothesis import given, settings
from hypothesis import strategies as st

from loopvet.analysis.regions import metric_at_gains, region_intervals

P = np.polynomial.polynomial
s, k, r = sp.symbols("s k r", real=True)


def test_damping_boundary_of_type1_loop_is_exact():
    """s^3 + 3 s^2 + 2 s + K with a root on the zeta = 0.5 ray s = r(-1/2 + j sqrt(3)/2)."""
    ray = r * (-sp.Rational(1, 2) + sp.I * sp.sqrt(3) / 2)
    expr = sp.expand(ray**3 + 3 * ray**2 + 2 * ray + k)
    sol = sp.solve([sp.re(expr), sp.im(expr)], [r, k], dict=True)
    ks = sorted(float(x[k]) for x in sol if x[r] > 0)
    assert ks == pytest.approx([28 / 27], rel=1e-12)
    ivs, _ = region_intervals("damping_ratio", 0.5, None, np.array([1.0]),
                              P.polyfromroots([0, -1, -2]))
    assert ivs[0][1] == pytest.approx(28 / 27, rel=1e-12)


def test_decay_and_circle_boundaries_are_exact():
    """decay rate 0.2 on s^3 + 3s^2 + 2s + K: a root on Re s = -0.2, i.e. s = -0.2 + jw,
    solved by sympy; natural frequency 2: at every reported boundary gain a closed-loop root
    has |s| = 2 (identity check with numpy roots)."""
    w = sp.symbols("w", real=True)
    line = -sp.Rational(1, 5) + sp.I * w
    expr = sp.expand(line**3 + 3 * line**2 + 2 * line + k)
    sol = sp.solve([sp.re(expr), sp.im(expr)], [w, k], dict=True)
    exact = sorted({float(x[k]) for x in sol})
    ivs, edges = region_intervals("decay_rate", 0.2, None, np.array([1.0]),
                                  P.polyfromroots([0, -1, -2]))
    for g in exact:
        assert min(abs(g - e) for e in edges) <= 1e-10 * max(1, abs(g))
    assert ivs == [(pytest.approx(0.288, rel=1e-12), pytest.approx(2.496, rel=1e-12))]
    _, edges = region_intervals("natural_frequency", None, 2.0, np.array([1.0]),
                                P.polyfromroots([0, -1, -2]))
    assert edges
    for g in edges:
        rr = np.roots([1.0, 3.0, 2.0, g])
        assert np.min(np.abs(np.abs(rr) - 2.0)) < 1e-9, (g, rr)


def test_biproper_loop_includes_degree_loss_gain():
    n = np.array([1.0, 1.0])
    d = np.array([2.0, 1.0])
    _, edges = region_intervals("decay_rate", 0.5, None, n, d)
    assert any(abs(e + 1.0) < 1e-12 for e in edges)   # K = -d_1/n_1


roots = st.floats(min_value=-6, max_value=1, allow_nan=False).map(lambda x: round(x, 2))


@settings(max_examples=80, deadline=None)
@given(poles=st.lists(roots, min_size=2, max_size=5), zeros=st.lists(roots, max_size=2),
       key=st.sampled_from(["damping_ratio", "decay_rate", "natural_frequency"]),
       bound=st.floats(min_value=0.1, max_value=3.0))
def test_inside_holds_outside_not(poles, zeros, key, bound):
    """'Inside a reported interval every pole meets the bound; outside all intervals at
    least one does not' (numpy roots as reference)."""
    if len(zeros) > len(poles):
        return
    if key == "damping_ratio":
        bound = min(bound / 3.0, 0.99)
    d = P.polyfromroots(poles)
    n = P.polyfromroots(zeros) if zeros else np.ones(1)
    lo_b, hi_b = (bound, None) if key != "natural_frequency" else (None, bound)
    ivs, edges = region_intervals(key, lo_b, hi_b, n, d)
    probes = []
    full = [-30.0, *[e for e in edges if abs(e) < 30], 30.0]
    for a, b in zip(full[:-1], full[1:], strict=True):
        if b - a > 1e-6:
            probes.append(0.5 * (a + b))
    for g in probes:
        char = np.pad(d, (0, max(0, len(n) - len(d)))) + g * np.pad(n, (0, len(d) - len(n)))
        if abs(char[-1]) < 1e-9:
            continue
        rr = np.roots(char[::-1])
        if key == "damping_ratio":
            mag = np.abs(rr)
            value = np.min(np.where(mag > 0, -rr.real / np.where(mag > 0, mag, 1), 0.0))
            ok = value >= bound
        elif key == "decay_rate":
            value = np.min(-rr.real)
            ok = value >= bound
        else:
            value = np.max(np.abs(rr))
            ok = value <= bound
        margin = 1e-6 * max(1.0, abs(bound))
        if abs(value - bound) < margin:
            continue
        inside = any(lo <= g <= hi for lo, hi in ivs)
        assert inside == ok, (poles, zeros, key, bound, g, ivs)


def test_metric_at_gains_is_batched():
    n, d = np.array([1.0]), P.polyfromroots([0, -1, -2])
    gains = np.linspace(0.1, 5, 50)
    batch = metric_at_gains("decay_rate", n, d, gains)
    for g, v in zip(gains, batch, strict=True):
        rr = np.roots((d + g * np.pad(n, (0, 3)))[::-1])
        assert v == pytest.approx(np.min(-rr.real), rel=1e-9, abs=1e-12)
    assert math.isfinite(batch.max())

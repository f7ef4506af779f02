"""Stable gain intervals of dead-time loops D(s) + K N(s) e^{-sT}, checked against
references that do not share loopvet's method:

* the ultimate gain of first-order-plus-dead-time loops from w T + atan(w tau) = pi,
  K_u = sqrt(1 + (w tau)^2) / k (classic result, from memory; solved here with mpmath);
* the integrator with dead time K e^{-sT}/s: stable for 0 < K < pi/(2T) (from memory;
  recomputed by the argument principle below);
* crossings polished independently by mpmath.findroot on the quasi-polynomial at 30 digits;
* the number of right-half-plane roots of the quasi-polynomial from the argument principle
  (Z = n/2 - Delta arg f(jw) / pi over w in [0, R], valid for retarded quasi-polynomials
  with deg N < deg D = n), sampled densely with numpy: an oracle for every interval.
"""

from __future__ import annotations

import math

import mpmath
import numpy as np
import pytest

from loopvet.analysis.delay import delay_gain_intervals
from loopvet.analysis.gain import gain_margins

P = np.polynomial.polynomial

LOOPS = {
    # name: (numerator roots, denominator roots, numerator gain, delay)
    "fopdt": ([], [-0.1], 0.1, 2.0),
    "integrator": ([], [0.0], 1.0, 2.0),
    "sopdt-pi": ([-0.2], [0.0, -0.5, -1.0], 0.5, 0.8),
    "unstable-plant": ([], [0.5], 1.0, 0.5),
    "resonance": ([], [-0.05 + 2j, -0.05 - 2j, -1.0], 4.0, 0.1),
    "thermal": ([-1 / 70], [0.0, -1 / 75, -0.25], 0.6 * 5 / 4, 9.0),
    # double integrator with PI: the roots leaving s = 0 are decided beyond first order
    "type2-pi": ([-0.5], [0.0, 0.0, -2.0], 1.0, 0.3),
}


def _polys(name):
    zr, pr, k, t = LOOPS[name]
    n = (P.polyfromroots(zr).real if zr else np.ones(1)) * k
    d = P.polyfromroots(pr).real
    return n, d, t


def _intervals(name, k_interest=1.0):
    n, d, t = _polys(name)
    return delay_gain_intervals(n[None], d[None], np.array([t]), np.array([[k_interest]]))[0]


def rhp_count(n, d, t, k, points=400_000):
    """Right-half-plane roots of D + K N e^{-sT} by the argument principle (numpy)."""
    deg = len(d) - 1
    r = max(np.abs(np.roots(d[::-1])).max(initial=0) if deg else 0, 1.0)
    big = 50 * r + 50 * abs(k) ** (1 / max(deg - len(n) + 1, 1)) + 200 / t
    w = np.concatenate([np.linspace(0, big / 100, points // 2), np.geomspace(big / 100, big,
                                                                                points // 2)])
    s = 1j * w
    f = P.polyval(s, d) + k * P.polyval(s, n) * np.exp(-s * t)
    phase = np.unwrap(np.angle(f))
    dphase = np.diff(phase)
    assert np.abs(dphase).max() < 1.0, "oracle grid too coarse"
    z = deg / 2 - (phase[-1] - phase[0]) / math.pi
    return round(z)


@pytest.mark.parametrize("name", sorted(LOOPS))
def test_intervals_agree_with_argument_principle(name):
    n, d, t = _polys(name)
    res = _intervals(name)
    edges = sorted({c.gain for c in res.crossings if abs(c.gain) < 0.9 * res.search_bound})
    edges = [g for g in edges if abs(g) < 60]
    tests = [edges[0] - 1.0] if edges else [1.0]
    tests += [0.5 * (a + b) for a, b in zip(edges[:-1], edges[1:], strict=True)]
    tests += [edges[-1] + 0.5] if edges else []
    for k in tests:
        if abs(k) < 1e-9:
            continue
        inside = any(lo < k < hi for lo, hi in res.stable)
        assert inside == (rhp_count(n, d, t, k) == 0), (name, k, res.stable)


def _check_crossings_with_mpmath(name, n, d, t, res):
    """Each crossing (w, K) solves D(jw) + K N(jw) e^{-jwT} = 0: mpmath.findroot (30 digits)
    from loopvet's value must agree to 1e-9 relative."""
    with mpmath.workdps(30):
        for c in res.crossings:
            if c.frequency == 0 or not math.isfinite(c.frequency) or c.gain == 0:
                continue

            def f(w, k):
                s = 1j * w
                val = sum(mpmath.mpf(x) * s**i for i, x in enumerate(d)) + k * sum(
                    mpmath.mpf(x) * s**i for i, x in enumerate(n)) * mpmath.exp(-s * t)
                return [mpmath.re(val), mpmath.im(val)]

            w_ref, k_ref = mpmath.findroot(f, (mpmath.mpf(c.frequency), mpmath.mpf(c.gain)))
            assert c.frequency == pytest.approx(float(w_ref), rel=1e-9), (name, c)
            assert c.gain == pytest.approx(float(k_ref), rel=1e-9), (name, c)


@pytest.mark.parametrize("name", sorted(LOOPS))
def test_crossings_match_mpmath(name):
    """Each crossing (w, K) solves D(jw) + K N(jw) e^{-jwT} = 0; mpmath polishes from
    loopvet's value at 30 digits and must agree to 1e-9 relative (target 1e-6)."""
    n, d, t = _polys(name)
    res = _intervals(name)
    _check_crossings_with_mpmath(name, n, d, t, res)


def test_fopdt_ultimate_gain():
    """k e^{-sT}/(tau s + 1): w_u T + atan(w_u tau) = pi, K_u = sqrt(1 + (w_u tau)^2)/k."""
    tau, t, k = 10.0, 2.0, 1.0
    n, d = np.array([k]), np.array([1.0, tau])
    res = delay_gain_intervals(n[None], d[None], np.array([t]), np.array([[1.0]]))[0]
    mpmath.mp.dps = 30
    w_u = mpmath.findroot(lambda w: w * t + mpmath.atan(w * tau) - mpmath.pi, 0.8)
    k_u = float(mpmath.sqrt(1 + (w_u * tau) ** 2) / k)
    lo, hi = res.interval_containing(1.0)
    assert hi == pytest.approx(k_u, rel=1e-10)
    assert lo == pytest.approx(-1.0 / k, rel=1e-12)   # real root through s = 0 at K = -1/k
    gm, _ = gain_margins(res, 1.0)
    assert gm == pytest.approx(20 * math.log10(k_u), rel=1e-10)


def test_integrator_with_dead_time():
    """K e^{-sT}/s is stable exactly for 0 < K < pi/(2T) (from memory; recomputed)."""
    t = 2.0
    res = delay_gain_intervals(np.array([[1.0]]), np.array([[0.0, 1.0]]), np.array([t]),
                               np.array([[0.1]]))[0]
    assert len(res.stable) == 1
    lo, hi = res.stable[0]
    assert lo == 0.0 and hi == pytest.approx(math.pi / (2 * t), rel=1e-12)
    n, d = np.array([1.0]), np.array([0.0, 1.0])
    assert rhp_count(n, d, t, 0.99 * hi) == 0 and rhp_count(n, d, t, 1.01 * hi) == 2


def test_batched_samples_are_independent():
    n = np.array([[1.0]])
    d = np.array([[1.0, 10.0], [1.0, 20.0]])
    res = delay_gain_intervals(n, d, np.array([2.0, 3.0]), np.array([[1.0], [1.0]]))
    one = delay_gain_intervals(n, d[1:], np.array([3.0]), np.array([[1.0]]))[0]
    assert res[1].stable == one.stable


# Open-loop poles and zeros in the right half-plane: their phase terms decrease (poles) or
# increase (zeros) psi, the opposite of their left-half-plane counterparts.
RHP_LOOPS = {
    # name: (N ascending, D ascending, delay)
    "rhp-zero": ([1.0, -1.0], [1.0, 3.0, 1.0], 0.3),
    "integrator-rhp-zero": ([1.0, -0.5], [0.0, 1.0, 1.0], 0.4),
    "rhp-pair": ([1.0], [1.0, -0.2, 1.0], 0.2),
    "rhp-pole-and-lhp-zero": ([2.0, 1.0], [-1.0, 0.5, 1.0], 0.3),
}


@pytest.mark.parametrize("name", sorted(RHP_LOOPS))
def test_right_half_plane_poles_and_zeros(name):
    """Every interval against the argument principle, every crossing against mpmath."""
    n, d, t = (np.asarray(x, dtype=float) if i < 2 else x
               for i, x in enumerate(RHP_LOOPS[name]))
    res = delay_gain_intervals(n[None], d[None], np.array([t]), np.array([[1.0]]))[0]
    edges = sorted({c.gain for c in res.crossings if abs(c.gain) < 60})
    tests = [edges[0] - 1.0] + [0.5 * (a + b) for a, b in zip(edges[:-1], edges[1:],
                                                                strict=True)] + [edges[-1] + 0.5]
    for k in tests:
        if abs(k) < 1e-9:
            continue
        inside = any(lo < k < hi for lo, hi in res.stable)
        assert inside == (rhp_count(n, d, t, k) == 0), (name, k, res.stable)
    _check_crossings_with_mpmath(name, n, d, t, res)

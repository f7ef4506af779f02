"""The batched evaluation used by sweeps against independent references.

* Routh-Hurwitz in exact rational arithmetic (tests/routh.py) for the stability verdict of
  every sample of a batch;
* the gain margins from the nearest crossing gains against the margins of the exact stable
  intervals (a different route: every interval classified by a root count);
* each sample of a batch against the same loop evaluated alone (batching must not couple
  samples: per-sample grids, padded arrays);
* the magnitude in real arithmetic (even/odd parts at s = jw) against complex Horner
  evaluation, and the sensitivity peak of a lightly damped loop against a dense mpmath scan.
"""

from __future__ import annotations

import math

import mpmath
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from loopvet.analysis.evaluate import evaluate
from loopvet.analysis.gain import crossing_arrays, gain_margins, margins_at, stable_gain_intervals
from loopvet.lti import poly
from loopvet.lti.loop import ClosedLoopMap, Loop
from loopvet.lti.rational import Rational

from .routh import routh_stable

P = np.polynomial.polynomial
KEYS = ("gain_margin_db", "gain_reduction_margin_db", "phase_margin_deg", "delay_margin_s",
        "crossover_frequency", "sensitivity_peak", "complementary_sensitivity_peak",
        "control_sensitivity_peak", "bandwidth", "damping_ratio")


def batch_loop(n: np.ndarray, d: np.ndarray, k: np.ndarray) -> Loop:
    """A batch with plant n/d per sample (unity controller, sensor and prefilter)."""
    s = n.shape[0]
    one = Rational(np.ones((s, 1)), np.ones((s, 1)), np.zeros(s))
    plant = Rational(n, d, np.zeros(s))
    return Loop(samples=s, gain=np.asarray(k, float), n=n, d=d, delay=np.zeros(s),
                plant=plant, controller=one, sensor=one, prefilter=one)


def random_batch(seed: int, samples: int, order: int) -> tuple[np.ndarray, np.ndarray,
                                                                np.ndarray]:
    """Plants with stable/unstable real and complex poles, zeros, integrators; K of both
    signs. Coefficients rounded to 3 significant digits (exact decimals for sympy)."""
    rng = np.random.default_rng(seed)
    ns, ds = [], []
    for _ in range(samples):
        poles = list(-10 ** rng.uniform(-1, 1, order - 2))
        w, z = 10 ** rng.uniform(-0.5, 0.8), rng.uniform(-0.1, 0.9)
        poles += [complex(-z * w, w * math.sqrt(max(1 - z * z, 0.01))),
                  complex(-z * w, -w * math.sqrt(max(1 - z * z, 0.01)))]
        if rng.random() < 0.3:
            poles[0] = 0.0
        zeros = list(-10 ** rng.uniform(-1, 1, int(rng.integers(0, 2))))
        ns.append(P.polyfromroots(zeros).real if zeros else np.ones(1))
        ds.append(P.polyfromroots(poles).real)
    width_n, width_d = max(len(x) for x in ns), max(len(x) for x in ds)
    n = np.array([np.pad(x, (0, width_n - len(x))) for x in ns])
    d = np.array([np.pad(x, (0, width_d - len(x))) for x in ds])
    n = np.array([[float(f"{v:.3g}") for v in row] for row in n])
    d = np.array([[float(f"{v:.3g}") for v in row] for row in d])
    k = 10 ** rng.uniform(-1.5, 1.0, samples) * np.where(rng.random(samples) < 0.15, -1, 1)
    return n, d, np.array([float(f"{v:.3g}") for v in k])


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_batch_stability_matches_routh_hurwitz(seed):
    """Routh-Hurwitz (published criterion, exact arithmetic): all roots of D + K N in the
    open left half-plane iff the first column of the Routh array is positive."""
    n, d, k = random_batch(seed, 24, 5)
    ev = evaluate(batch_loop(n, d, k), pade=None, time=False, keys=KEYS)
    for i in range(n.shape[0]):
        char = poly.add(d[i:i + 1], k[i] * n[i:i + 1])[0]
        exact = routh_stable([f"{c:.17g}" for c in char[::-1]])
        assert bool(ev.stable[i]) == exact, (seed, i)


@pytest.mark.parametrize("seed", [4, 5, 6])
def test_margins_from_nearest_crossings_equal_interval_margins(seed):
    """The stable interval holding K is bounded by the nearest crossing gains: the margins
    equal those of the classified intervals (gain_margins) wherever K is stable."""
    n, d, k = random_batch(seed, 30, 6)
    gains, _ = crossing_arrays(n, d)
    intervals = stable_gain_intervals(n, d)
    stable = np.array([iv.interval_containing(float(kk)) is not None
                       for iv, kk in zip(intervals, k, strict=True)])
    rise, fall = margins_at(gains, k, stable)
    for i, iv in enumerate(intervals):
        ref = gain_margins(iv, float(k[i]))
        if ref[0] is None:
            assert math.isnan(rise[i]) and math.isnan(fall[i])
            continue
        for got, want in ((rise[i], ref[0]), (fall[i], ref[1])):
            assert got == pytest.approx(want, rel=1e-12, abs=1e-12), (seed, i)


@pytest.mark.parametrize("seed", [7, 8])
def test_each_sample_of_a_batch_equals_the_loop_alone(seed):
    n, d, k = random_batch(seed, 12, 6)
    batch = evaluate(batch_loop(n, d, k), pade=None, time=False, keys=KEYS)
    for i in range(n.shape[0]):
        alone = evaluate(batch_loop(n[i:i + 1], d[i:i + 1], k[i:i + 1]), pade=None,
                         time=False, keys=KEYS)
        assert bool(alone.stable[0]) == bool(batch.stable[i])
        for key in KEYS:
            a, b = alone.metrics[key][0], batch.metrics[key][i]
            if math.isnan(a) or math.isinf(a):
                assert (math.isnan(a) and math.isnan(b)) or a == b, (key, i, a, b)
            else:
                assert b == pytest.approx(a, rel=1e-9, abs=1e-12), (key, i)


@settings(max_examples=30, deadline=None)
@given(st.integers(1, 9), st.integers(0, 2**31 - 1))
def test_magnitude_in_real_arithmetic_equals_complex_evaluation(degree, seed):
    """|P/(A + B e^{-jwT})| from the even/odd parts equals complex Horner evaluation."""
    rng = np.random.default_rng(seed)
    m = ClosedLoopMap(p=rng.normal(size=(3, degree)), tau=np.zeros(3),
                      a=rng.normal(size=(3, degree + 1)), b=rng.normal(size=(3, degree)),
                      delay=rng.random(3) * (seed % 2))
    w = np.geomspace(0.05, 20.0, 37)
    ref = np.abs(m.at(1j * w))
    np.testing.assert_allclose(m.magnitude(w), ref, rtol=1e-11)


def test_lightly_damped_peak_matches_dense_mpmath_scan():
    """A loop whose closed-loop poles have damping about 0.02: Ms from the batched search
    against the maximum of |1/(1 + L)| on a 200 001-point scan, refined by solving
    d|S|/dw = 0 with mpmath (30 digits, bracketing solver) around the best point."""
    n = np.array([[2.0, 1.0]])
    d = P.polyfromroots([0.0, -0.8, complex(-0.05, 4.0), complex(-0.05, -4.0)]).real[None]
    ev = evaluate(batch_loop(n, d, np.array([0.35])), pade=None, time=False,
                  keys=("sensitivity_peak",))
    assert ev.stable[0]
    mpmath.mp.dps = 30

    def mag(w):
        s = mpmath.mpc(0, w)
        ll = 0.35 * mpmath.polyval(list(n[0][::-1]), s) / mpmath.polyval(list(d[0][::-1]), s)
        return abs(1 / (1 + ll))

    grid = np.geomspace(1e-2, 1e2, 200_001)
    s = 1j * grid
    vals = np.abs(1 / (1 + 0.35 * P.polyval(s, n[0]) / P.polyval(s, d[0])))
    j = int(np.argmax(vals))
    best = mpmath.findroot(lambda w: mpmath.diff(mag, w), (grid[j - 1], grid[j + 1]),
                           solver="anderson")
    ref = float(mag(best))
    assert ev.metrics["sensitivity_peak"][0] == pytest.approx(ref, rel=1e-10)


def test_dead_time_batch_in_blocks_equals_each_loop_alone(monkeypatch):
    """Loops with dead time are searched in row blocks (memory and cache bounds: the
    bandwidth in DELAY_BLOCK rows, the peaks' grid pass in CACHE_POINTS points); a batch
    split into blocks of a few rows (3 for the bandwidth, 600 points for the peaks), with
    one delay-free sample among samples with dead time, gives each sample the values it has
    alone."""
    from loopvet.analysis import evaluate as ev_mod
    from loopvet.analysis import frequency as fq_mod

    monkeypatch.setattr(ev_mod, "DELAY_BLOCK", 3)
    monkeypatch.setattr(fq_mod, "CACHE_POINTS", 3 * 200)
    n, d, k = random_batch(11, 7, 4)
    k = np.abs(k) * 0.2
    loop = batch_loop(n, d, k)
    loop = Loop(samples=loop.samples, gain=loop.gain, n=loop.n, d=loop.d,
                delay=np.r_[0.0, np.linspace(0.05, 0.4, loop.samples - 1)], plant=loop.plant,
                controller=loop.controller, sensor=loop.sensor, prefilter=loop.prefilter)
    keys = ("sensitivity_peak", "complementary_sensitivity_peak", "bandwidth",
            "gain_margin_db", "gain_reduction_margin_db")
    batch = evaluate(loop, pade=4, time=False, keys=keys)
    from loopvet.lti.loop import rows

    for i in range(loop.samples):
        alone = evaluate(rows(loop, slice(i, i + 1)), pade=4, time=False, keys=keys)
        assert bool(alone.stable[0]) == bool(batch.stable[i])
        for key in keys:
            a, b = alone.metrics[key][0], batch.metrics[key][i]
            assert (math.isnan(a) and math.isnan(b)) or b == pytest.approx(a, rel=1e-12), \
                (key, i)

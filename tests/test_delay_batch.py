"""The batched dead-time analysis on a batch of random loops, checked against references
that do not share loopvet's method:

* every sample of the batch equals the same sample analysed alone (a batch of one);
* crossings polished independently by mpmath.findroot on D(jw) + K N(jw) e^{-jwT} = 0 at
  30 digits;
* the number of right-half-plane roots between crossings from the argument principle
  (Z = n/2 - Delta arg f(jw) / pi over w in [0, inf), for retarded quasi-polynomials with
  deg N < deg D = n; from memory), sampled with numpy on a grid refined until every phase
  step is small, the tail beyond the grid taken from the roots of D: it must equal the
  start count plus the directions of the crossings passed, which also classifies every
  interval;
* the margins of the arrays against loopvet.analysis.gain.gain_margins applied to the
  tuples.
"""

from __future__ import annotations

import math

import mpmath
import numpy as np
import pytest

from loopvet.analysis import delay as dl
from loopvet.analysis.delay import (
    delay_crossing_arrays,
    delay_gain_intervals,
    delay_stability_margins,
)
from loopvet.analysis.gain import gain_margins

P = np.polynomial.polynomial
KINDS = ("plain", "unstable", "integrator", "pi", "pid", "rhp-zero", "resonant",
         "double-integrator-pi", "undamped")


def _loop(rng: np.random.Generator, kind: str):
    """(n, d, T, gains of interest) of one random loop of order 1..8."""
    top = {"pi": 7, "pid": 6, "double-integrator-pi": 6, "integrator": 7}.get(kind, 8)
    order = int(rng.integers(2 if kind in ("rhp-zero", "undamped", "resonant") else 1,
                             top + 1))
    poles: list[complex] = []
    while len(poles) < order:
        if rng.random() < 0.3 and order - len(poles) >= 2:
            a, b = rng.uniform(0.05, 1.5), rng.uniform(0.3, 4.0)
            poles += [complex(-a, b), complex(-a, -b)]
        else:
            poles.append(-(10 ** rng.uniform(-1.5, 0.7)))
    zeros: list[float] = []
    if kind == "unstable":
        poles[0] = 0.3 * abs(poles[0].real) + 0.05
    if kind == "rhp-zero":
        zeros.append(10 ** rng.uniform(-0.5, 0.5))
    if kind == "resonant":
        poles[-2:] = [complex(-0.02, 2.0), complex(-0.02, -2.0)]
    if kind == "undamped":
        poles[-2:] = [complex(0, 1.5), complex(0, -1.5)]
    den = P.polyfromroots(poles).real
    lead = abs(den[0]) if den[0] != 0 else 1.0
    num = (P.polyfromroots(zeros).real if zeros else np.ones(1)) * lead * rng.uniform(0.5, 2)
    if kind == "integrator":
        den = P.polymul(den, [0.0, 1.0])
    if kind == "pi":
        ti = 10 ** rng.uniform(-0.5, 1.5)
        num, den = P.polymul(num, [1.0, ti]), P.polymul(den, [0.0, ti])
    if kind == "pid":
        ti, td = 10 ** rng.uniform(-0.5, 1.5), 10 ** rng.uniform(-1.5, 0.0)
        num = P.polymul(num, [1.0, ti, ti * td])
        den = P.polymul(den, [0.0, ti, 0.1 * ti * td])
    if kind == "double-integrator-pi":
        num, den = P.polymul(num, [0.5, 1.0]), P.polymul(den, [0.0, 0.0, 1.0])
    t = 10 ** rng.uniform(-1.3, 0.4)
    k = rng.choice([-1.0, 1.0]) * 10 ** rng.uniform(-1.0, 0.5)
    return num, den, t, np.array([k, 0.5 * k, 2.0 * k])


def _batch(seed: int = 7, size: int = 30):
    rng = np.random.default_rng(seed)
    loops = [_loop(rng, KINDS[i % len(KINDS)]) for i in range(size)]
    width = max(max(len(x[0]), len(x[1])) for x in loops)
    n = np.array([np.pad(x[0], (0, width - len(x[0]))) for x in loops])
    d = np.array([np.pad(x[1], (0, width - len(x[1]))) for x in loops])
    return n, d, np.array([x[2] for x in loops]), np.array([x[3] for x in loops])


@pytest.fixture(scope="module")
def batch():
    n, d, t, g = _batch()
    return n, d, t, g, delay_gain_intervals(n, d, t, g), delay_crossing_arrays(n, d, t, g)


def _trim(c):
    return np.trim_zeros(np.asarray(c, dtype=float), "b")


def test_each_sample_equals_the_sample_alone(batch):
    n, d, t, g, res, _ = batch
    for i in range(n.shape[0]):
        one = delay_gain_intervals(n[i:i + 1], d[i:i + 1], t[i:i + 1], g[i:i + 1])[0]
        assert res[i].search_bound == pytest.approx(one.search_bound, rel=1e-9), i
        assert len(res[i].stable) == len(one.stable), (i, res[i].stable, one.stable)
        for a, b in zip(res[i].stable, one.stable, strict=True):
            assert a == pytest.approx(b, rel=1e-9, abs=1e-12), (i, res[i].stable, one.stable)
        assert len(res[i].crossings) == len(one.crossings), i
        for a, b in zip(res[i].crossings, one.crossings, strict=True):
            assert a.gain == pytest.approx(b.gain, rel=1e-9, abs=1e-12), (i, a, b)
            assert a.frequency == pytest.approx(b.frequency, rel=1e-9, abs=1e-12), (i, a, b)


def test_tuples_are_the_arrays(batch):
    _, _, _, _, res, arr = batch
    for i, r in enumerate(res):
        m = int(arr.count[i])
        assert [c.gain for c in r.crossings] == arr.gain[i, :m].tolist()
        assert [c.frequency for c in r.crossings] == arr.frequency[i, :m].tolist()
        assert np.all(np.isnan(arr.gain[i, m:]))
        assert r.stable == tuple(zip(arr.stable_lo[i][~np.isnan(arr.stable_lo[i])].tolist(),
                                     arr.stable_hi[i][~np.isnan(arr.stable_hi[i])].tolist(),
                                     strict=True))
        assert r.search_bound == arr.search_bound[i]
    assert not np.any(arr.undecided)


def test_crossings_match_mpmath(batch):
    """Each crossing (w > 0, K) solves the quasi-polynomial: mpmath.findroot from loopvet's
    value at 30 digits agrees to 1e-9 relative."""
    n, d, t, _, res, _ = batch
    checked = 0
    for i, r in enumerate(res):
        with mpmath.workdps(30):
            checked += _check_with_mpmath(_trim(n[i]), _trim(d[i]), float(t[i]), r, i)
    assert checked > 60


def _check_with_mpmath(nn, dd, t, r, i) -> int:
    tt = mpmath.mpf(t)
    nc = [mpmath.mpf(float(x)) for x in nn]
    dc = [mpmath.mpf(float(x)) for x in dd]

    def f(w, k):
        s = mpmath.mpc(0, 1) * w
        val = mpmath.polyval(dc[::-1], s) + k * mpmath.polyval(nc[::-1], s) * \
            mpmath.exp(-s * tt)
        return [mpmath.re(val), mpmath.im(val)]

    checked = 0
    for c in r.crossings:
        if c.frequency == 0 or c.gain == 0 or abs(c.gain) > 1e6:
            continue
        w_ref, k_ref = mpmath.findroot(f, (mpmath.mpf(c.frequency), mpmath.mpf(c.gain)))
        assert c.frequency == pytest.approx(float(w_ref), rel=1e-9), (i, c)
        assert c.gain == pytest.approx(float(k_ref), rel=1e-9), (i, c)
        checked += 1
    return checked


def oracle_range(n, d, k):
    """R with |K N(jw)| < 1e-3 |D(jw)| for w >= R: with r >= every root magnitude and
    w >= 4r, |N(jw)| <= |n_m| (1.25 w)^m and |D(jw)| >= |d_n| (0.75 w)^n."""
    roots = np.concatenate([P.polyroots(d), P.polyroots(n) if len(n) > 1 else []])
    r = max(np.abs(roots).max(initial=0.0), 1.0)
    m, deg = len(n) - 1, len(d) - 1
    need = 1e3 * abs(k) * abs(n[-1] / d[-1]) * 1.25**m / 0.75**deg
    return max(4 * r, need ** (1 / (deg - m)))


def rhp_count(n, d, t, k):
    """Right-half-plane roots of D + K N e^{-sT} by the argument principle (numpy).

    Delta arg f(jw) over [0, R] on a grid refined until every wrapped phase step is below
    0.3 rad, plus the tail: beyond R, |K N e^{-sT}| < 1e-3 |D| so the remaining change is
    that of D alone, sum over its roots of pi/2 - arg(jR - r), up to 1e-3 rad.
    """
    roots_d = P.polyroots(d)
    big = oracle_range(n, d, k)
    w = np.unique(np.concatenate([np.linspace(0, big, 4000), np.geomspace(1e-6, big, 4000),
                                  np.abs(roots_d.imag)]))

    def f(x):
        s = 1j * x
        return P.polyval(s, d) + k * P.polyval(s, n) * np.exp(-s * t)

    fv = f(w)
    for _ in range(40):
        step = np.angle(fv[1:] / fv[:-1])
        coarse = np.abs(step) > 0.3
        if not coarse.any():
            break
        mid = 0.5 * (w[:-1][coarse] + w[1:][coarse])
        w = np.concatenate([w, mid])
        order = np.argsort(w)
        w, fv = w[order], np.concatenate([fv, f(mid)])[order]
    else:
        raise AssertionError("argument-principle grid did not converge")
    total = np.angle(fv[1:] / fv[:-1]).sum()
    tail = np.sum(np.pi / 2 - np.angle(1j * big - roots_d))
    z = (len(d) - 1) / 2 - (total + tail) / math.pi
    assert abs(z - round(z)) < 0.05, z
    return round(z)


def test_counts_between_crossings_match_argument_principle(batch):
    """At a gain between consecutive crossings (each side of 0), the right-half-plane count
    predicted by the start count and the crossing directions equals the argument-principle
    count, and the gain is in a stable interval exactly when that count is 0."""
    n, d, t, _, res, arr = batch
    checked = 0
    for i, r in enumerate(res):
        nn, dd = _trim(n[i]), _trim(d[i])
        m = int(arr.count[i])
        gains, dirs = arr.gain[i, :m], arr.direction[i, :m]
        for side, start in ((1.0, arr.start_plus[i]), (-1.0, arr.start_minus[i])):
            mags = np.unique(np.abs(gains[gains * side > 0]))
            edges = np.concatenate([[0.0], mags])
            points = [0.5 * (a + b) if a == 0 else math.sqrt(a * b)
                      for a, b in zip(edges[:-1], edges[1:], strict=True)]
            points.append(1.5 * edges[-1] if edges[-1] > 0 else 1.0)
            for mag in points:
                k = side * mag
                if mag > 0.9 * r.search_bound or oracle_range(nn, dd, k) * t[i] > 3e4:
                    continue
                passed = (gains * side > 0) & (np.abs(gains) < mag)
                predicted = int(start + dirs[passed].sum())
                z = rhp_count(nn, dd, float(t[i]), k)
                assert predicted == z, (i, k, predicted, z, r)
                assert (r.interval_containing(k) is not None) == (z == 0), (i, k, r.stable)
                checked += 1
    assert checked > 60


def test_no_crossing_is_missed_below_the_search_bound(batch):
    """A dense scan for sign changes of Im(D(jw) conj(N(jw)) e^{jwT}) (h(jw) real) with
    |D/N| at most the search bound finds exactly the reported crossings at w > 0. The scan
    stops where |D(jw)/N(jw)| >= |d_n/n_m| w^(n-m) / (2^n 1.5^m) (w >= 2 max|root|)
    exceeds the bound; its grid steps by at most 0.02/T and 0.02 of every root's real
    part near its imaginary part."""
    n, d, t, _, res, _ = batch
    checked = 0
    for i, r in enumerate(res):
        nn, dd, tt = _trim(n[i]), _trim(d[i]), float(t[i])
        kb = r.search_bound
        roots = np.concatenate([P.polyroots(dd), P.polyroots(nn) if len(nn) > 1 else []])
        big = 2 * max(np.abs(roots).max(initial=0.0), 1e-3)
        m, deg = len(nn) - 1, len(dd) - 1
        floor = abs(dd[-1] / nn[-1]) / (2.0**deg * 1.5**m)
        w_end = max(big, (kb / floor) ** (1 / (deg - m)))
        if w_end * tt > 2e3:
            continue
        parts = [np.linspace(0, w_end, int(w_end * tt / 0.02) + 2000),
                 np.geomspace(1e-6, w_end, 4000)]
        for root in roots:
            width = max(abs(root.real), 1e-4)
            parts.append(abs(root.imag) + np.linspace(-20, 20, 4001) * width)
        w = np.unique(np.concatenate(parts))
        w = w[w > 0]
        s = 1j * w
        dv, nv = P.polyval(s, dd), P.polyval(s, nn)
        g = np.imag(dv * np.conj(nv) * np.exp(s * tt))
        change = np.nonzero(np.sign(g[1:]) * np.sign(g[:-1]) < 0)[0]
        ratio = np.abs(dv / nv)
        k_at = np.minimum(ratio[change], ratio[change + 1])
        near = (k_at > 1e-6) & (np.abs(k_at / kb - 1) > 1e-3)
        lo, hi = w[change][near], w[change + 1][near]
        keep = k_at[near] < kb
        found = sorted(c.frequency for c in r.crossings
                       if c.gain != 0 and c.frequency > 0 and abs(abs(c.gain) / kb - 1) > 1e-3)
        assert len(found) == int(keep.sum()), (i, found, lo[keep], hi[keep])
        for f in found:
            assert np.any((lo <= f) & (f <= hi)), (i, f)
        checked += 1
    assert checked >= 25


def test_margins_agree_with_gain_margins(batch):
    _, _, _, g, res, arr = batch
    probes = [g[:, 0], g[:, 1], g[:, 2], -g[:, 0]]
    for iv_pick in (0, -1):   # a point inside the first / last stable interval, if any
        pick = []
        for r in res:
            if r.stable:
                lo, hi = r.stable[iv_pick]
                pick.append(0.5 * (lo + hi) if 0.5 * (lo + hi) != 0 else 0.25 * hi)
            else:
                pick.append(1.0)
        probes.append(np.array(pick))
    probes.append(np.array([r.stable[0][1] if r.stable else 1.0 for r in res]))   # an end
    for k in probes:
        stable, gm, grm = delay_stability_margins(arr, k)
        for i, r in enumerate(res):
            ref = gain_margins(r, float(k[i]))
            assert stable[i] == (ref[0] is not None), (i, k[i])
            if ref[0] is None:
                assert np.isnan(gm[i]) and np.isnan(grm[i])
            else:
                assert gm[i] == pytest.approx(ref[0], rel=1e-12), (i, k[i])
                assert grm[i] == pytest.approx(ref[1], rel=1e-12), (i, k[i])
    assert stable.dtype == bool


def test_margin_semantics_on_a_known_interval():
    """K e^{-sT}/s: stable for 0 < K < pi/(2T) (from memory). A side reaching 0 is inf;
    a reverse-acting gain is in no interval."""
    t = 2.0
    arr = delay_crossing_arrays(np.array([[1.0]]), np.array([[0.0, 1.0]]), np.array([t]),
                                np.array([[0.1]]))
    stable, gm, grm = delay_stability_margins(arr, 0.1)
    assert stable[0] and grm[0] == math.inf
    assert gm[0] == pytest.approx(20 * math.log10(math.pi / (2 * t) / 0.1), rel=1e-12)
    stable, gm, grm = delay_stability_margins(arr, np.array([-0.1]))
    assert not stable[0] and np.isnan(gm[0]) and np.isnan(grm[0])


def test_chunks_join_to_the_same_arrays(batch, monkeypatch):
    n, d, t, g, _, arr = batch
    monkeypatch.setattr(dl, "CHUNK", 7)
    parts = delay_crossing_arrays(n, d, t, g)
    for name in ("gain", "frequency", "stable_lo", "stable_hi"):
        a, b = getattr(arr, name), getattr(parts, name)
        assert a.shape == b.shape
        np.testing.assert_allclose(a, b, rtol=1e-9, atol=1e-12, equal_nan=True)
    for name in ("direction", "count", "start_plus", "start_minus"):
        np.testing.assert_array_equal(getattr(arr, name), getattr(parts, name))
    np.testing.assert_allclose(arr.search_bound, parts.search_bound, rtol=1e-9)


def test_delay_free_samples_are_refused():
    with pytest.raises(ValueError, match="dead time"):
        delay_crossing_arrays(np.array([[1.0]]), np.array([[1.0, 1.0]]), np.array([0.0]),
                              np.array([[1.0]]))

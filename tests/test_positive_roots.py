"""Positive real roots by certified bracketing (gain.positive_roots) against mpmath.

Reference: mpmath.polyroots at 50 digits (high-precision roots of the same coefficients).
Descartes' rule of signs is checked on polynomials whose sign changes are known by hand.
"""

from __future__ import annotations

import mpmath
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from loopvet.analysis import gain
from loopvet.analysis.gain import (
    _positive_on_axis,
    positive_root_bound,
    positive_roots,
    sign_changes,
)


def _reference(c: np.ndarray) -> list[float]:
    """Positive real roots of the ascending float coefficients c, by mpmath at 50 digits."""
    desc = [mpmath.mpf(float(v)) for v in np.trim_zeros(c[::-1], "f")]
    low = 0
    while desc and desc[-1] == 0:          # roots at zero
        desc.pop()
        low += 1
    if len(desc) < 2:
        return []
    with mpmath.workdps(50):
        try:
            r = mpmath.polyroots(desc, maxsteps=400, extraprec=400)
        except mpmath.libmp.libhyper.NoConvergence:       # clusters converge slowly
            r = mpmath.polyroots(desc, maxsteps=5000, extraprec=2000)
    return sorted(float(mpmath.re(x)) for x in r
                  if abs(mpmath.im(x)) <= mpmath.mpf(10) ** -30 * abs(x) and mpmath.re(x) > 0)


def _from_roots(real: list[float], pairs: list[complex], scale: float = 1.0) -> np.ndarray:
    r = list(real) + [z for p in pairs for z in (p, p.conjugate())]
    return (scale * np.poly(r)).real[::-1].copy()


def test_sign_changes_by_hand():
    # x^3 - 3x^2 + 0 x + 5: signs + 0 - + (ascending 5, 0, -3, 1) -> 2 changes
    c = np.array([[5.0, 0.0, -3.0, 1.0], [1.0, 2.0, 3.0, 0.0], [0.0, -1.0, 0.0, 2.0]])
    assert sign_changes(c).tolist() == [2, 0, 1]


CASES = {
    "three spread positive, complex pair in the left half": ([0.02, 0.7, 45.0], [-1 + 3j]),
    "complex pair with positive real part (Descartes not sharp)": ([0.5, 8.0], [1 + 3j]),
    "negative roots only": ([-0.3, -2.0, -9.0], []),
    "one positive root among negative": ([-4.0, 1.5, -0.2], [-2 + 1j]),
    "close pair below the grid spacing": ([1.0, 1.02, 30.0], []),
    "wide span, 9 decades": ([1e-4, 1e-1, 3e2, 8e4], [-5 + 1j]),
}


@pytest.mark.parametrize("name", sorted(CASES))
def test_against_mpmath(name):
    real, pairs = CASES[name]
    c = _from_roots(real, pairs, scale=2.5)
    got = positive_roots(c[None, :])[0]
    want = _reference(c)
    got = got[np.isfinite(got)]
    assert got.size == len(want)
    np.testing.assert_allclose(got, want, rtol=1e-9)


def test_roots_at_zero_are_not_positive():
    c = np.concatenate([[0.0, 0.0], _from_roots([2.0, 5.0], [])])   # x^2 (x - 2)(x - 5)
    got = positive_roots(c[None, :])[0]
    np.testing.assert_allclose(got[np.isfinite(got)], [2.0, 5.0], rtol=1e-13)


def test_double_root_is_still_a_candidate():
    # (x - 3)^2 (x + 1): no sign change at 3, so not certified; the eigenvalue fallback
    # returns it as a near-real pair for the caller's own verification
    c = _from_roots([3.0, 3.0, -1.0], [])
    got = positive_roots(c[None, :])[0]
    assert got.size >= 1 and np.all(np.abs(got[np.isfinite(got)] - 3.0) < 1e-6)


def test_batch_rows_are_independent():
    rows = [_from_roots([0.5, 8.0], [1 + 3j]), _from_roots([2.0], [-1 + 1j]),
            _from_roots([-1.0, -2.0, -3.0], [])]
    width = max(r.size for r in rows)
    batch = np.array([np.pad(r, (0, width - r.size)) for r in rows])
    got = positive_roots(batch)
    for i, r in enumerate(rows):
        one = positive_roots(r[None, :])[0]
        np.testing.assert_allclose(got[i][np.isfinite(got[i])], one[np.isfinite(one)],
                                   rtol=1e-14)


roots_st = st.floats(min_value=-3.0, max_value=3.0).map(lambda e: 10.0 ** e)


@settings(max_examples=60, deadline=None)
@given(pos=st.lists(roots_st, min_size=0, max_size=4),
       neg=st.lists(roots_st, min_size=0, max_size=3),
       pair=st.tuples(st.floats(-2.0, 2.0), st.floats(0.1, 3.0)),
       use_pair=st.booleans())
def test_random_polynomials_against_mpmath(pos, neg, pair, use_pair):
    pairs = [complex(pair[0], pair[1])] if use_pair else []
    if not pos + neg + pairs:
        return
    c = _from_roots(pos + [-x for x in neg], pairs)
    want = _reference(c)
    got = positive_roots(c[None, :])[0]
    got = np.sort(got[np.isfinite(got)])
    # every true positive root is found (the fallback may add near-real candidates that
    # the callers' Newton verification removes); multiple roots are accurate to about
    # eps^(1/multiplicity) only, in any method
    srt = np.sort(pos)
    distinct = srt.size < 2 or bool(np.all(srt[1:] > 1.01 * srt[:-1]))
    for w in want:
        assert got.size and np.min(np.abs(got - w)) <= (1e-9 if distinct else 1e-4) * w


def test_loose_descartes_bound_certified_by_amgm_without_eigenvalues(monkeypatch):
    # (x - 2)(x^2 - 2x + 10): V = 3, one positive root; the quotient x^2 - 2x + 10 is
    # positive (AM-GM: 2^2 <= 0.9 * 4 * 1 * 10), so no eigenvalue problem is needed
    def forbidden(a):
        raise AssertionError("eigenvalue fallback used")

    monkeypatch.setattr(gain.poly, "roots_ragged", forbidden)
    c = _from_roots([2.0], [1 + 3j])
    got = positive_roots(c[None, :])[0]
    np.testing.assert_allclose(got, _reference(c), rtol=1e-13)


def test_pair_close_to_the_axis_falls_back_to_eigenvalues(monkeypatch):
    # (x - 2)(x^2 - 2x + 1.01): the pair 1 +- 0.1j is too close to the positive axis for
    # the AM-GM test; the eigenvalue fallback must run and find the root 2
    calls = []
    real = gain.poly.roots_ragged

    def spy(a):
        calls.append(a.shape[0])
        return real(a)

    monkeypatch.setattr(gain.poly, "roots_ragged", spy)
    c = _from_roots([2.0], [1 + 0.1j])
    got = positive_roots(c[None, :])[0]
    assert calls
    assert np.min(np.abs(got - 2.0)) <= 1e-12


@settings(max_examples=200, deadline=None)
@given(coef=st.lists(st.one_of(st.just(0.0), st.floats(min_value=0.01, max_value=10.0),
                               st.floats(min_value=-10.0, max_value=-0.01)),
                     min_size=2, max_size=9))
def test_amgm_positivity_is_sound(coef):
    """Whenever the coefficient test says 'no positive root', mpmath (50 digits) finds none."""
    c = np.array(coef)
    if not np.any(c):
        return
    if bool(_positive_on_axis(c[None, :])[0]):
        assert _reference(c) == []


@settings(max_examples=100, deadline=None)
@given(roots=st.lists(st.floats(min_value=-3.0, max_value=3.0), min_size=1, max_size=7),
       signs=st.lists(st.booleans(), min_size=7, max_size=7))
def test_positive_root_bounds_enclose_the_roots(roots, signs):
    """Kioustelidis' bound (from the coefficients) against the positive roots found by
    mpmath: every positive root x satisfies 1/B(reversed) <= x <= B."""
    r = [(1 if sg else -1) * 10.0 ** e for e, sg in zip(roots, signs, strict=False)]
    c = np.poly(r)[::-1].copy()
    pos = _reference(c)
    if not pos:
        return
    hi = positive_root_bound(c[None, :])[0]
    lo = 1.0 / positive_root_bound(c[None, ::-1])[0]
    assert lo * (1 - 1e-9) <= min(pos) and max(pos) <= hi * (1 + 1e-9)

"""Branch tracing (:mod:`loopvet.analysis.branches`) against independent checks.

Sources, named beside each check:

* "identity": every stored root is a root of D + K N, checked with
  ``numpy.polynomial.polynomial.polyval`` (not loopvet's evaluator) against the coefficient
  scale ``sum |d_k| |r|^k + |K| sum |n_k| |r|^k`` (a root computed in floating point cannot do
  better than that scale times eps; at K = 0 the plain |D(r)| is itself only rounding).
* "textbook construction rule, from memory; recomputed here": branches start at the open-loop
  poles, deg N of them end at the zeros, q = deg D - deg N follow the asymptotes; the angle
  condition gives the departure/arrival angles (recomputed by ``rule_angles``).
* "sympy exact": open-loop zeros and the break-point polynomial N D' - N' D.
Loops and strategies are shared with tests/test_locus_facts.py (one place).
"""

from __future__ import annotations

import cmath
import math

import numpy as np
import numpy.polynomial.polynomial as npp
import pytest
import sympy as sp
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy.optimize import linear_sum_assignment

from loopvet.analysis import locus
from loopvet.analysis.branches import COMPRESSION, Branches, trace

from .test_locus_facts import (
    CASES,
    Case,
    S,
    loops,
    rule_angles,
    rule_asymptotes,
    sympy_breakaway,
)

# --------------------------------------------------------------------------- helpers


def assert_same_roots(got: np.ndarray, want: list, atol: float, msg: str = "") -> None:
    """Equal as multisets (optimal matching), within ``atol``."""
    w = np.array([complex(x) for x in want], dtype=complex)
    assert got.shape == w.shape, msg
    if w.size == 0:
        return
    rows, cols = linear_sum_assignment(np.abs(got[:, None] - w[None, :]))
    err = np.abs(got[rows] - w[cols]).max()
    assert err <= atol, (msg, got, w, err)


def residuals(case: Case, b: Branches) -> np.ndarray:
    """Identity: |D(r) + K N(r)| / (sum |d_k||r|^k + |K| sum |n_k||r|^k), per stored root."""
    r = b.roots
    k = b.gains[:, None]
    value = npp.polyval(r, case.d, tensor=False) + k * npp.polyval(r, case.n, tensor=False)
    mag = np.abs(r)
    scale = (npp.polyval(mag, np.abs(case.d), tensor=False)
             + np.abs(k) * npp.polyval(mag, np.abs(case.n), tensor=False))
    # a root at s = 0 of D with d_0 = 0 at K = 0: value and scale are both exactly zero
    return np.divide(np.abs(value), scale, out=np.zeros(scale.shape), where=scale > 0)


def collision_points(case: Case) -> np.ndarray:
    """Sympy exact N D' - N' D, all its roots (numpy): wherever two branches meet or nearly
    meet, plus the multiple open-loop poles and zeros (roots of D' or N' there)."""
    p = sp.Poly(case.N.as_expr() * sp.diff(case.D.as_expr(), S)
                - sp.diff(case.N.as_expr(), S) * case.D.as_expr(), S)
    out = []
    if not p.is_zero and p.degree() >= 1:
        out.append(np.roots([float(c) for c in p.all_coeffs()]))
    if p.is_zero:        # N proportional to D: L is constant, every root is fixed (and met)
        out.append(np.roots([float(c) for c in sp.Poly(case.D.as_expr(), S).all_coeffs()]))
    return np.concatenate(out) if out else np.zeros(0, dtype=complex)


def compressed(r: np.ndarray, scale: float) -> np.ndarray:
    radius = COMPRESSION * scale
    return r / np.sqrt(1.0 + (np.abs(r) / radius) ** 2)


def check_continuity(case: Case, b: Branches, tol: float) -> None:
    """'Consecutive points of a column are closer than to any other root at the next gain,
    except at break points' — the exemption covers a disc of radius 3 tol scale around every
    root of N D' - N' D (where branches meet or nearly meet), and the one interval of a
    biproper loop where a root passes through infinity."""
    r = compressed(b.roots, b.scale)      # the plot metric: far-away points are compressed
    if r.shape[1] < 2:
        return
    special = compressed(collision_points(case), b.scale)
    rho = 3 * tol * b.scale
    mags = np.abs(b.gains)
    for i in range(r.shape[0] - 1):
        if b.singular_gain is not None and mags[i] < abs(b.singular_gain) < mags[i + 1]:
            continue                  # a root passes through infinity (degree loss)
        dist = np.abs(r[i][:, None] - r[i + 1][None, :])      # (column at i, root at i+1)
        own = np.diag(dist)
        other = np.where(np.eye(r.shape[1], dtype=bool), np.inf, dist).min(axis=1)
        bad = own > other * (1 + 1e-9) + 1e-12 * b.scale
        if special.size:
            near = (np.abs(r[i][:, None] - special[None, :]).min(axis=1) <= rho) | (
                np.abs(r[i + 1][:, None] - special[None, :]).min(axis=1) <= rho)
            bad &= ~near
        assert not bad.any(), (i, b.gains[i], r[i], r[i + 1])


# --------------------------------------------------------------------------- worked loops

NAMES = sorted(CASES)


@pytest.mark.parametrize("name", NAMES)
@pytest.mark.parametrize("negative", [False, True])
def test_traced_roots_solve_the_characteristic_equation(name, negative):
    case = CASES[name]
    b = trace(case.n, case.d, negative=negative)
    assert b.roots.shape == (b.gains.size, len(case.poles))
    assert residuals(case, b).max(initial=0.0) <= 1e-8, name


@pytest.mark.parametrize("name", NAMES)
@pytest.mark.parametrize("negative", [False, True])
def test_schedule_shape_and_resolution(name, negative):
    case = CASES[name]
    tol = 0.02
    b = trace(case.n, case.d, negative=negative, tol=tol)
    assert b.gains[0] == 0.0 and not math.copysign(1.0, b.gains[0]) < 0
    mags = np.abs(b.gains)
    assert np.all(np.diff(mags) > 0), name
    assert np.all(b.gains <= 0) if negative else np.all(b.gains >= 0)
    assert b.gains.size <= 600
    assert b.resolved, name
    step = np.abs(np.diff(compressed(b.roots, b.scale), axis=0)).max(axis=1, initial=0.0)
    ok = step <= tol * b.scale
    if b.singular_gain is not None:     # the interval where a root passes through infinity
        lo, hi = mags[:-1], mags[1:]
        ok |= (lo < abs(b.singular_gain)) & (abs(b.singular_gain) < hi)
    assert ok.all(), (name, step.max())
    assert_same_roots(b.roots[0], case.poles, 1e-12, name)
    check_continuity(case, b, tol)


@pytest.mark.parametrize("name", NAMES)
@pytest.mark.parametrize("negative", [False, True])
def test_branch_ends(name, negative):
    """Textbook construction rule, recomputed: finite ends are the zeros (sympy exact), the
    other q branches follow the asymptote angles of the rule."""
    case = CASES[name]
    b = trace(case.n, case.d, negative=negative)
    finite = np.isfinite(b.ends)
    q = len(case.poles) - len(case.zeros)
    assert int((~finite).sum()) == q, name
    assert_same_roots(b.ends[finite], case.zeros, 1e-9, name)
    assert np.all(np.isnan(b.end_angles_deg[finite]))
    centroid, angles = rule_asymptotes(case, negative)
    np.testing.assert_allclose(np.sort(b.end_angles_deg[~finite]), angles, atol=1e-12)
    assert (b.centroid is None) == (centroid is None)
    if centroid is not None:
        assert b.centroid == pytest.approx(centroid, abs=1e-12)
        # direction of each asymptotic branch at the largest stored gain
        for j in np.flatnonzero(~finite):
            seen = math.degrees(cmath.phase(b.roots[-1, j] - centroid)) % 360.0
            err = abs((seen - b.end_angles_deg[j] + 180.0) % 360.0 - 180.0)
            assert err < 2.0, (name, j, seen, b.end_angles_deg[j])


@pytest.mark.parametrize("name", ["complex-pair", "four-poles-pair", "double-complex",
                                  "complex-breakaway", "fourfold-meeting"])
@pytest.mark.parametrize("negative", [False, True])
def test_branch_leaves_complex_pole_along_departure_angle(name, negative):
    """The traced branch leaving a complex pole at small K has the direction of the departure
    angle (angle condition recomputed here, and loopvet's own) to within a degree."""
    case = CASES[name]
    dep, _ = rule_angles(case, negative)
    facts = locus.angles(case.n, case.d, negative=negative)["departure"]
    b = trace(case.n, case.d, negative=negative)
    for pole in {c for c, _ in dep}:
        expected = sorted(a for c, a in dep if c == pole)
        mine = sorted(e["angle_deg"] for e in facts if complex(*e["pole"]) == pytest.approx(pole))
        assert mine == pytest.approx(expected, abs=1e-9)
        cols = np.flatnonzero(np.abs(b.roots[0] - pole) < 1e-4)
        assert cols.size == len(expected)
        seen = []
        for j in cols:
            dist = np.abs(b.roots[:, j] - pole)
            i = int(np.argmax(dist >= 1e-3 * b.scale))
            assert i > 0 and dist[i] < 0.05 * b.scale
            seen.append(math.degrees(cmath.phase(b.roots[i, j] - pole)))
        for a in expected:
            assert any(abs((a - x + 180) % 360 - 180) < 1.0 for x in seen), (name, a, seen)


@pytest.mark.parametrize("negative", [False, True])
def test_branch_arrives_at_complex_zero_along_arrival_angle(negative):
    case = CASES["complex-zeros"]
    _, arr = rule_angles(case, negative)
    b = trace(case.n, case.d, negative=negative)
    for zero, a in arr:
        j = int(np.flatnonzero(np.isclose(b.ends, zero))[0])
        dist = np.abs(b.roots[:, j] - zero)
        i = int(np.flatnonzero(dist >= 1e-3 * b.scale)[-1])
        seen = math.degrees(cmath.phase(b.roots[i, j] - zero))
        assert abs((a - seen + 180) % 360 - 180) < 1.0, (zero, a, seen)


def test_extra_gains_and_break_point():
    """The breakaway gain of K/(s(s+1)(s+2)) (sympy exact) is stored with its neighbours and
    two roots meet there."""
    case = CASES["three-poles"]
    (point, k), = sympy_breakaway(case, False)
    b = trace(case.n, case.d, extra_gains=[k, -3.0, 0.0, math.inf])
    for g in [k] + [k * (1 + e * t) for e in (1e-3, 1e-2) for t in (-1, 1)]:
        assert np.any(b.gains == g), g
    assert not np.any(b.gains < 0)
    i = int(np.flatnonzero(b.gains == k)[0])
    near = np.sort(np.abs(b.roots[i] - point))
    assert near[1] < 1e-6                       # a double root, accurate to ~sqrt(eps)


def test_k_max_and_determinism():
    case = CASES["break-in"]
    b1 = trace(case.n, case.d, k_max=20.0, extra_gains=[50.0])
    b2 = trace(case.n, case.d, k_max=20.0, extra_gains=[50.0])
    assert b1.gains[-1] == 20.0 and not np.any(b1.gains > 20.0)
    for f in ("gains", "roots", "ends", "end_angles_deg"):
        np.testing.assert_array_equal(getattr(b1, f), getattr(b2, f))
    # the ends are decided beyond k_max (the trace is continued internally)
    assert np.sum(np.isfinite(b1.ends)) == 1 and np.isclose(b1.ends[np.isfinite(b1.ends)], -3)
    with pytest.raises(ValueError):
        b1.gains[0] = 1.0                        # read-only
    coarse = trace(case.n, case.d, tol=0.1)
    fine = trace(case.n, case.d, tol=0.01)
    assert fine.gains.size > coarse.gains.size


def test_biproper_loop_skips_the_degree_loss():
    """(s+2)/(s+1): D + K N = (1+K) s + (1+2K) loses degree at K = -1 = -d_n/n_n; the root
    -(1+2K)/(1+K) passes through infinity there (by hand)."""
    case = Case([-2], [-1], 1)
    b = trace(case.n, case.d, negative=True)
    assert b.singular_gain == -1.0
    assert not np.any(b.gains == -1.0)
    k = b.gains
    np.testing.assert_allclose(b.roots[:, 0], -(1 + 2 * k) / (1 + k), rtol=1e-9)
    assert np.isfinite(b.ends).all() and b.ends[0] == -2
    assert b.centroid is None and b.resolved
    pos = trace(case.n, case.d)
    assert pos.singular_gain is None


def test_max_points_budget():
    case = CASES["complex-breakaway"]
    b = trace(case.n, case.d, max_points=120, tol=1e-4)
    assert b.gains.size <= 120 and not b.resolved
    assert residuals(case, b).max() <= 1e-8


def test_no_branches_for_a_constant_loop():
    b = trace([2.0], [3.0])
    assert b.roots.shape == (b.gains.size, 0) and b.ends.size == 0


# --------------------------------------------------------------------------- properties


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(case=loops(), negative=st.booleans())
def test_property_traced_branches(case, negative):
    """'Every stored root solves D + K N = 0; columns are continuous except where branches
    meet; deg N branches end at the zeros and deg D - deg N go to infinity along the
    asymptotes' — identity check, continuity check, sympy exact zeros."""
    tol = 0.02
    b = trace(case.n, case.d, negative=negative, tol=tol)
    assert residuals(case, b).max(initial=0.0) <= 1e-8
    assert b.resolved
    check_continuity(case, b, tol)
    finite = np.isfinite(b.ends)
    assert int((~finite).sum()) == len(case.poles) - len(case.zeros)
    assert_same_roots(b.ends[finite], case.zeros, 1e-9)
    _, angles = rule_asymptotes(case, negative)
    np.testing.assert_allclose(np.sort(b.end_angles_deg[~finite]), angles, atol=1e-12)

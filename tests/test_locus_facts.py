"""Root-locus facts (:mod:`loopvet.analysis.locus`) against independent recomputation.

Sources, named beside each check:

* "textbook construction rule, from memory; recomputed here": asymptote count
  q = deg D - deg N, centroid (sum p - sum z)/q, angles (2k+1)180/q for K > 0 and 360k/q for
  K < 0; break points where dK/ds = 0 for K = -D/N; the angle condition
  sum arg(s - z) - sum arg(s - p) = 180 (mod 360) for K > 0 (0 for K < 0).
* "sympy exact": polynomials expanded and differentiated in rational arithmetic, roots from
  sympy (exact radicals or 30-digit ``nroots``).
* "mpmath": closed-loop roots of D + eps N for a tiny eps, or of D + K N for a huge K, at 40
  digits (``mpmath.polyroots``), whose directions are the departure/arrival/asymptote angles.

Every expected number below is recomputed in the test from the loop's roots; the table only
records the loops (and, where a value is quoted from memory, it is checked against the
recomputation before use).
"""

from __future__ import annotations

import cmath
import json
import math
from fractions import Fraction

import mpmath
import numpy as np
import pytest
import sympy as sp
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from loopvet.analysis import locus

S = sp.symbols("s")

# --------------------------------------------------------------------------- reference tables
#
# Loops as (zeros, poles, leading gain) with exact rational roots; complex roots as
# (re, im) tuples standing for the pair re +- j im. Source of the quoted values: textbook
# worked examples, from memory; every value is recomputed below before it is compared.

WORKED = {
    # K/(s(s+1)(s+2)): centroid -1, angles 60/180/300; break-away at -1 + 1/sqrt(3),
    # K ~ 0.3849 (from memory)
    "three-poles": ([], [0, -1, -2], 1),
    # K(s+2)/(s(s+1)(s+3)(s+4)): centroid ((0-1-3-4) - (-2))/3 = -2
    "zero-four-poles": ([-2], [0, -1, -3, -4], 1),
    # K(s+3)/(s(s+1)): one break-away between 0 and -1, one break-in left of -3
    "break-in": ([-3], [0, -1], 1),
    # K/((s+1)(s^2+2s+5)): departure from -1 + 2j
    "complex-pair": ([], [-1, (-1, 2)], 1),
    # K/(s(s+3)(s^2+2s+2)): departure from -1 + j about -71.6 deg (from memory)
    "four-poles-pair": ([], [0, -3, (-1, 1)], 1),
    # K/(s(s+4)(s^2+4s+20)): break points at -2 and -2 +- j sqrt(6), both with real K > 0
    # (from memory)
    "complex-breakaway": ([], [0, -4, (-2, 4)], 1),
    # K(s^2+2s+2)/(s(s+3)): arrival at -1 + j
    "complex-zeros": ([(-1, 1)], [0, -3], 1),
    # K/(s^2 (s+3)): the double pole is not a break point; -2 is one, for K < 0
    "double-pole": ([], [0, 0, -3], 1),
    # K/(s+1)^3: no break point at all (the triple pole is where branches leave)
    "triple-pole": ([], [-1, -1, -1], 1),
    # K/((s^2+2s+2)^2): double complex pole, two departure directions each
    "double-complex": ([], [(-1, 1), (-1, 1)], 1),
    # K/((s+1)^4 - 1) = K/(s(s+2)(s^2+2s+2)): four branches meet at -1 for K = 1
    "fourfold-meeting": ([], [0, -2, (-1, 1)], 1),
    # biproper: K(s+1)(s+5)/(s(s+3))
    "biproper": ([-1, -5], [0, -3], 1),
    # leading coefficients of opposite sign: L = -K/(s(s+1)(s+2))
    "negative-lead": ([], [0, -1, -2], -1),
}


def _roots_list(spec: list) -> list[sp.Expr]:
    out: list[sp.Expr] = []
    for r in spec:
        if isinstance(r, tuple):
            re, im = sp.Rational(r[0]), sp.Rational(r[1])
            out += [re + sp.I * im, re - sp.I * im]
        else:
            out.append(sp.Rational(r))
    return out


def _poly_from_roots(roots: list[sp.Expr], lead: sp.Rational) -> sp.Poly:
    expr = lead * sp.prod([S - r for r in roots]) if roots else lead
    return sp.Poly(sp.expand(expr), S)


def _ascending(p: sp.Poly) -> np.ndarray:
    return np.array([float(c) for c in reversed(p.all_coeffs())])


class Case:
    """One loop in exact (sympy) and floating (ascending numpy) form."""

    def __init__(self, zeros: list, poles: list, lead: object):
        self.zeros = _roots_list(zeros)
        self.poles = _roots_list(poles)
        self.N = _poly_from_roots(self.zeros, sp.Rational(lead))
        self.D = _poly_from_roots(self.poles, sp.Integer(1))
        self.n = _ascending(self.N)
        self.d = _ascending(self.D)
        self.lead_sign = 1 if sp.Rational(lead) > 0 else -1
        self.spec = (zeros, poles, lead)

    def __repr__(self) -> str:
        return f"Case(zeros={self.spec[0]!r}, poles={self.spec[1]!r}, lead={self.spec[2]!r})"


CASES = {name: Case(*spec) for name, spec in WORKED.items()}

# --------------------------------------------------------------------------- strategies
#
# Random low-order loops with exact rational roots (halves), stable or not, repeated roots
# and pole/zero coincidences allowed. Shared with tests/test_branches.py.

_real_root = st.integers(-8, 4).map(lambda k: Fraction(k, 2))
_pair_root = st.tuples(st.integers(-6, 3).map(lambda k: Fraction(k, 2)),
                       st.integers(1, 6).map(lambda k: Fraction(k, 2)))
_root_spec = st.one_of(_real_root, _real_root, _pair_root)


def _degree(spec: list) -> int:
    return sum(2 if isinstance(r, tuple) else 1 for r in spec)


@st.composite
def loops(draw: st.DrawFn, max_degree: int = 5) -> Case:
    """A loop K * lead * prod(s - z)/prod(s - p) with 1 <= deg D <= max_degree,
    deg N <= deg D (biproper sometimes), lead in {+-1/2, +-1, +-3}."""
    poles: list = []
    target = draw(st.integers(1, max_degree))
    while _degree(poles) < target:
        r = draw(_root_spec)
        if isinstance(r, tuple) and _degree(poles) + 2 > target:
            r = r[0]
        poles.append(r)
    zeros: list = []
    ztarget = draw(st.integers(0, _degree(poles)))
    while _degree(zeros) < ztarget:
        r = draw(_root_spec)
        if isinstance(r, tuple) and _degree(zeros) + 2 > ztarget:
            r = r[0]
        zeros.append(r)
    lead = draw(st.sampled_from([Fraction(1, 2), Fraction(1), Fraction(3), Fraction(-1, 2),
                                 Fraction(-1), Fraction(-3)]))
    return Case(zeros, poles, lead)


# --------------------------------------------------------------------------- oracles


def rule_asymptotes(case: Case, negative: bool) -> tuple[float | None, list[float]]:
    """Textbook construction rule, from memory; recomputed here from the exact roots."""
    q = len(case.poles) - len(case.zeros)
    if q == 0:
        return None, []
    centroid = float((sum(case.poles, sp.Integer(0)) - sum(case.zeros, sp.Integer(0))) / q)
    positive = (case.lead_sign > 0) != negative
    ang = [((2 * k + 1) * 180.0 / q) % 360 if positive else (360.0 * k / q) for k in range(q)]
    return centroid, sorted(ang)


def sympy_breakaway(case: Case, negative: bool) -> list[tuple[complex, float]]:
    """Sympy exact: distinct roots of N D' - N' D that are not roots of N D, kept where
    K = -D/N (30 digits) is real and of the requested sign."""
    P = sp.Poly(case.N.as_expr() * sp.diff(case.D.as_expr(), S)
                - sp.diff(case.N.as_expr(), S) * case.D.as_expr(), S)
    if P.is_zero or P.degree() < 1:
        return []
    ND = case.N * case.D
    g = sp.gcd(P, ND)
    while g.degree() > 0:
        P = sp.quo(P, g)
        g = sp.gcd(P, ND)
    if P.degree() < 1:
        return []
    out = []
    for r in P.sqf_part().nroots(n=30):
        k = -case.D.eval(r) / case.N.eval(r)
        kre, kim = sp.re(k).evalf(30), sp.im(k).evalf(30)
        if abs(kim) > 1e-20 * max(1, abs(kre)):
            continue
        if (kre < 0) if not negative else (kre > 0):
            continue
        out.append((complex(r), float(kre)))
    out.sort(key=lambda e: _rounded(e[0]))
    return out


def _rounded(c: complex) -> tuple[float, float]:
    """Sort key insensitive to the last digits (so equal real parts tie exactly)."""
    return (round(c.real, 7) + 0.0, round(c.imag, 7) + 0.0)


def rule_angles(case: Case, negative: bool) -> tuple[list, list]:
    """Textbook construction rule (angle condition), from memory; recomputed here with numpy
    angle sums over the exact roots (multiplicity by exact equality)."""
    poles = [complex(p) for p in case.poles]
    zeros = [complex(z) for z in case.zeros]
    base = 180.0 if (case.lead_sign > 0) != negative else 0.0

    def norm(a: float) -> float:
        a = (a + 180.0) % 360.0 - 180.0
        return 180.0 if abs(a + 180.0) < 1e-9 or abs(a - 180.0) < 1e-9 else a

    def at(c: complex, same: list[complex], other: list[complex], dep: bool) -> list[float]:
        m = sum(1 for x in same if x == c) - sum(1 for x in other if x == c)
        if m <= 0:
            return []
        s_same = sum(np.degrees(np.angle(c - x)) for x in same if x != c)
        s_other = sum(np.degrees(np.angle(c - x)) for x in other if x != c)
        if dep:      # -m th + sum arg(p - z) - sum arg(p - p_j) = base
            return sorted(norm((s_other - s_same - base + 360 * k) / m) for k in range(m))
        return sorted(norm((base - s_same + s_other + 360 * k) / m) for k in range(m))

    dep = [(c, a) for c in sorted(set(poles), key=lambda c: (c.real, c.imag)) if c.imag != 0
           for a in at(c, poles, zeros, True)]
    arr = [(c, a) for c in sorted(set(zeros), key=lambda c: (c.real, c.imag)) if c.imag != 0
           for a in at(c, zeros, poles, False)]
    return dep, arr


def _mp_desc(p: sp.Poly) -> list:
    """Descending coefficients of an exact rational polynomial as mpmath numbers."""
    return [mpmath.mpf(int(sp.Rational(c).p)) / int(sp.Rational(c).q) for c in p.all_coeffs()]


def mpmath_directions(case: Case, at: complex, negative: bool) -> list[float]:
    """mpmath: directions arg(r - at) of the closed-loop roots near a pole (tiny |K|) or a
    zero (huge |K|), from D + K N at 40 digits."""
    mpmath.mp.dps = 40
    Dd, Nd = _mp_desc(case.D), _mp_desc(case.N)
    Nd = [mpmath.mpf(0)] * (len(Dd) - len(Nd)) + Nd
    delta = mpmath.mpf("1e-6")
    # choose |K| so that the roots near `at` are about delta away: |K| = |D(at+delta)/N(..)|
    probe = mpmath.mpc(at.real, at.imag) + delta * mpmath.mpc(0.6, 0.8)
    kmag = abs(mpmath.polyval(Dd, probe) / mpmath.polyval(Nd, probe))
    k = -kmag if negative else kmag
    coeffs = [a + k * b for a, b in zip(Dd, Nd, strict=True)]
    while coeffs and coeffs[0] == 0:
        coeffs = coeffs[1:]
    roots = mpmath.polyroots(coeffs, maxsteps=400, extraprec=200)
    near = [complex(r) for r in roots if abs(complex(r) - at) < 100 * float(delta)]
    near = [r for r in near if abs(r - at) > 1e-3 * float(delta)]   # drop a cancelled root
    return sorted(math.degrees(cmath.phase(r - at)) for r in near)


def _angle_close(a: float, b: float, tol: float) -> bool:
    return abs((a - b + 180.0) % 360.0 - 180.0) <= tol


# --------------------------------------------------------------------------- asymptotes


@pytest.mark.parametrize("name", sorted(CASES))
@pytest.mark.parametrize("negative", [False, True])
def test_asymptotes_match_construction_rule(name, negative):
    case = CASES[name]
    centroid, ang = rule_asymptotes(case, negative)
    got = locus.asymptotes(case.n, case.d, negative=negative)
    if centroid is None:
        assert got == {"centroid": None, "angles_deg": []}, name
        return
    assert got["centroid"] == pytest.approx(centroid, rel=1e-13, abs=1e-13), name
    np.testing.assert_allclose(got["angles_deg"], ang, atol=1e-12, err_msg=name)


def test_worked_example_values_from_memory_agree_with_recomputation():
    """The quoted textbook values (from memory) against the recomputation from the roots."""
    c3 = CASES["three-poles"]
    assert rule_asymptotes(c3, False) == (-1.0, [60.0, 180.0, 300.0])
    assert locus.asymptotes(c3.n, c3.d) == {"centroid": -1.0, "angles_deg": [60.0, 180.0, 300.0]}
    cz = CASES["zero-four-poles"]
    assert rule_asymptotes(cz, False)[0] == ((0 - 1 - 3 - 4) - (-2)) / 3
    assert locus.asymptotes(cz.n, cz.d)["centroid"] == pytest.approx(-2.0, abs=1e-14)


def test_opposite_lead_signs_swap_the_angle_rules():
    """Textbook construction rule, recomputed: -K/D for K > 0 is the K < 0 locus of K/D."""
    a, b = CASES["negative-lead"], CASES["three-poles"]
    assert locus.asymptotes(a.n, a.d) == locus.asymptotes(b.n, b.d, negative=True)
    assert locus.asymptotes(a.n, a.d, negative=True) == locus.asymptotes(b.n, b.d)
    assert locus.breakaway(a.n, a.d) == [{"point": e["point"], "gain": -e["gain"]}
                                         for e in locus.breakaway(b.n, b.d, negative=True)]


def test_asymptote_centroids_batched():
    """Batched helper against the single-loop rule (recomputed from the roots)."""
    names = sorted(CASES)
    width = max(max(CASES[k].n.size, CASES[k].d.size) for k in names)
    nb = np.zeros((len(names), width))
    db = np.zeros((len(names), width))
    for i, k in enumerate(names):
        nb[i, : CASES[k].n.size] = CASES[k].n
        db[i, : CASES[k].d.size] = CASES[k].d
    q, c = locus.asymptote_centroids(nb, db)
    for i, k in enumerate(names):
        case = CASES[k]
        assert q[i] == len(case.poles) - len(case.zeros), k
        expected, _ = rule_asymptotes(case, False)
        if expected is None:
            assert math.isnan(c[i]), k
        else:
            assert c[i] == pytest.approx(expected, abs=1e-13), k


# --------------------------------------------------------------------------- breakaway


def test_breakaway_three_poles():
    """Textbook rule dK/ds = 0 (from memory): 3s^2 + 6s + 2 = 0; recomputed with sympy."""
    case = CASES["three-poles"]
    sols = sorted(sp.solve(3 * S**2 + 6 * S + 2, S), key=float)
    assert sp.simplify(sols[1] - (-1 + 1 / sp.sqrt(3))) == 0
    k_exact = [-(r * (r + 1) * (r + 2)) for r in sols]
    assert float(k_exact[1]) == pytest.approx(0.3849, abs=1e-4)        # quoted, from memory
    pos = locus.breakaway(case.n, case.d)
    neg = locus.breakaway(case.n, case.d, negative=True)
    assert len(pos) == 1 and len(neg) == 1
    assert pos[0]["point"][0] == pytest.approx(float(sols[1]), rel=1e-14)
    assert pos[0]["point"][1] == 0.0
    assert pos[0]["gain"] == pytest.approx(float(k_exact[1]), rel=1e-13)
    assert neg[0]["point"][0] == pytest.approx(float(sols[0]), rel=1e-14)
    assert neg[0]["gain"] == pytest.approx(float(k_exact[0]), rel=1e-13)
    assert neg[0]["gain"] < 0


def test_break_in_with_a_zero():
    """Sympy exact roots of N D' - N' D for (s+3)/(s(s+1)); one break-away, one break-in
    (classified independently from numpy closed-loop roots just below/above the gain)."""
    case = CASES["break-in"]
    ref = sympy_breakaway(case, False)
    assert len(ref) == 2 and all(r.imag == 0 and k > 0 for r, k in ref)
    got = locus.breakaway(case.n, case.d)
    assert len(got) == 2
    kinds = []
    for (r, k), e in zip(ref, got, strict=True):
        assert e["point"][0] == pytest.approx(r.real, rel=1e-13)
        assert e["point"][1] == 0.0
        assert e["gain"] == pytest.approx(k, rel=1e-12)
        below = np.roots(np.polyadd(case.d[::-1], k * (1 - 1e-3) * case.n[::-1]))
        above = np.roots(np.polyadd(case.d[::-1], k * (1 + 1e-3) * case.n[::-1]))
        kinds.append((np.all(below.imag == 0), np.all(above.imag == 0)))
    assert sorted(kinds) == [(False, True), (True, False)]       # break-in, break-away
    assert locus.breakaway(case.n, case.d, negative=True) == []


def test_complex_breakaway_points():
    """Sympy exact: K/(s(s+4)(s^2+4s+20)) has break points -2 (K = 64) and -2 +- j sqrt(6)
    (K = 100) (from memory); recomputed."""
    case = CASES["complex-breakaway"]
    ref = sympy_breakaway(case, False)
    assert len(ref) == 3
    got = locus.breakaway(case.n, case.d)
    assert len(got) == 3
    for (r, k), e in zip(ref, got, strict=True):
        assert complex(*e["point"]) == pytest.approx(r, rel=1e-12, abs=1e-12)
        assert e["gain"] == pytest.approx(k, rel=1e-12)
    assert [round(e["gain"]) for e in got] == [100, 64, 100]
    assert got[0]["point"][1] == -got[2]["point"][1]


@pytest.mark.parametrize("name", ["double-pole", "triple-pole", "fourfold-meeting", "biproper",
                                  "complex-pair", "four-poles-pair", "complex-zeros"])
@pytest.mark.parametrize("negative", [False, True])
def test_breakaway_against_sympy(name, negative):
    """Sympy exact (multiple poles excluded, multiple break points listed once)."""
    case = CASES[name]
    ref = sympy_breakaway(case, negative)
    got = locus.breakaway(case.n, case.d, negative=negative)
    assert len(got) == len(ref), (name, got, ref)
    for (r, k), e in zip(ref, got, strict=True):
        assert complex(*e["point"]) == pytest.approx(r, rel=1e-10, abs=1e-10), name
        assert e["gain"] == pytest.approx(k, rel=1e-10), name


def test_multiple_poles_are_not_break_points():
    dp, tp, ff = CASES["double-pole"], CASES["triple-pole"], CASES["fourfold-meeting"]
    assert locus.breakaway(dp.n, dp.d) == []
    assert locus.breakaway(dp.n, dp.d, negative=True) == [{"point": [-2.0, 0.0], "gain": -4.0}]
    assert locus.breakaway(tp.n, tp.d) == [] == locus.breakaway(tp.n, tp.d, negative=True)
    # (s+1)^4 - 1 + K = (s+1)^4 at K = 1: sympy exact
    assert sp.expand(ff.D.as_expr() + 1 - (S + 1) ** 4) == 0
    got = locus.breakaway(ff.n, ff.d)
    assert len(got) == 1
    assert complex(*got[0]["point"]) == pytest.approx(-1.0, abs=1e-12)
    assert got[0]["gain"] == pytest.approx(1.0, rel=1e-12)


# --------------------------------------------------------------------------- angles


@pytest.mark.parametrize("name", ["complex-pair", "four-poles-pair", "complex-zeros",
                                  "double-complex", "complex-breakaway", "fourfold-meeting"])
@pytest.mark.parametrize("negative", [False, True])
def test_angles_match_angle_condition_and_mpmath(name, negative):
    case = CASES[name]
    dep, arr = rule_angles(case, negative)
    got = locus.angles(case.n, case.d, negative=negative)
    assert len(got["departure"]) == len(dep), name
    assert len(got["arrival"]) == len(arr), name
    for (c, a), e in zip(dep, got["departure"], strict=True):
        assert complex(*e["pole"]) == pytest.approx(c, abs=1e-12), name
        assert _angle_close(e["angle_deg"], a, 1e-9), (name, e, a)
        assert -180.0 < e["angle_deg"] <= 180.0
    for (c, a), e in zip(arr, got["arrival"], strict=True):
        assert complex(*e["zero"]) == pytest.approx(c, abs=1e-12), name
        assert _angle_close(e["angle_deg"], a, 1e-9), (name, e, a)
    # mpmath: actual directions of the roots leaving the poles / reaching the zeros
    for key, entries in (("pole", got["departure"]), ("zero", got["arrival"])):
        by_point: dict[tuple[float, float], list[float]] = {}
        for e in entries:
            by_point.setdefault(tuple(e[key]), []).append(e["angle_deg"])
        for (re, im), mine in by_point.items():
            actual = mpmath_directions(case, complex(re, im), negative)
            assert len(actual) == len(mine), (name, key, actual, mine)
            for a in mine:
                assert any(_angle_close(a, b, 0.01) for b in actual), (name, key, a, actual)


def test_departure_angle_worked_examples():
    """K/((s+1)(s^2+2s+5)): 180 - 90 - 90 = 0 deg at -1 + 2j; K/(s(s+3)(s^2+2s+2)):
    180 - (135 + atan(1/2) + 90) ~ -71.57 deg at -1 + j (textbook rule, from memory)."""
    a = locus.angles(CASES["complex-pair"].n, CASES["complex-pair"].d)["departure"]
    upper = [e for e in a if e["pole"][1] > 0]
    assert len(upper) == 1 and upper[0]["angle_deg"] == pytest.approx(0.0, abs=1e-12)
    b = locus.angles(CASES["four-poles-pair"].n, CASES["four-poles-pair"].d)["departure"]
    upper = [e for e in b if e["pole"][1] > 0]
    expected = 180 - (135 + math.degrees(math.atan(0.5)) + 90)
    assert upper[0]["angle_deg"] == pytest.approx(expected, abs=1e-10)
    assert expected == pytest.approx(-71.57, abs=0.01)                 # quoted, from memory


def test_cancelled_pole_has_no_departure():
    """A complex pole cancelled by an equal zero does not move: no departure or arrival."""
    case = Case([(-1, 1)], [0, (-1, 1)], 1)
    got = locus.angles(case.n, case.d)
    assert got == {"departure": [], "arrival": []}


# --------------------------------------------------------------------------- locus_facts


def test_locus_facts_block_is_strict_json():
    case = CASES["complex-breakaway"]
    facts = locus.locus_facts(case.n, case.d, include_negative=True)
    text = json.dumps(facts, allow_nan=False, sort_keys=True)
    assert json.loads(text) == facts
    assert set(facts) == {"open_loop_poles", "open_loop_zeros", "asymptotes", "breakaway",
                          "angles", "negative_gain"}
    assert set(facts["negative_gain"]) == {"asymptotes", "breakaway", "angles"}
    for pair in facts["open_loop_poles"]:
        assert len(pair) == 2 and all(type(x) is float for x in pair)
    exact = sorted((complex(p) for p in case.poles), key=lambda c: (c.real, c.imag))
    np.testing.assert_allclose([complex(*p) for p in facts["open_loop_poles"]], exact,
                               atol=1e-13)
    assert facts["breakaway"] == locus.breakaway(case.n, case.d)
    assert facts["negative_gain"]["breakaway"] == locus.breakaway(case.n, case.d, negative=True)
    assert "negative_gain" not in locus.locus_facts(case.n, case.d, include_negative=False)
    biproper = locus.locus_facts(CASES["biproper"].n, CASES["biproper"].d, True)
    assert biproper["asymptotes"] == {"centroid": None, "angles_deg": []}
    json.dumps(biproper, allow_nan=False)


def test_multiple_open_loop_roots_are_reported_exactly():
    """(s^2+2s+2)^2 and (s+1)^3: repeated roots at one value each (sympy exact roots)."""
    p, z = locus.open_loop(CASES["double-complex"].n, CASES["double-complex"].d)
    np.testing.assert_allclose(p, [-1 - 1j, -1 - 1j, -1 + 1j, -1 + 1j], atol=1e-12)
    assert p[0] == p[1] and p[2] == p[3] and p[0] == np.conj(p[2]) and z.size == 0
    p, _ = locus.open_loop(CASES["triple-pole"].n, CASES["triple-pole"].d)
    np.testing.assert_allclose(p, [-1, -1, -1], atol=1e-12)
    assert np.all(p.imag == 0)


def test_input_validation():
    with pytest.raises(ValueError, match="improper"):
        locus.open_loop([1, 1, 1], [1, 1])
    with pytest.raises(ValueError, match="zero polynomial"):
        locus.open_loop([0.0], [1, 1])
    with pytest.raises(ValueError, match="one loop"):
        locus.open_loop([[1.0], [2.0]], [[1, 1], [1, 2]])
    # padding zeros above the degree are storage, not a degree
    assert locus.asymptotes([1, 0, 0], [0, 2, 3, 1]) == locus.asymptotes([1], [0, 2, 3, 1])


# --------------------------------------------------------------------------- properties


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(case=loops(), negative=st.booleans())
def test_property_breakaway_points(case, negative):
    """'At a break point dK/ds = 0 with K = -D(s)/N(s) real and of the traced sign' — each
    reported point is checked in 30-digit arithmetic against the exact polynomials (sympy),
    and the list is complete against sympy's roots of N D' - N' D."""
    got = locus.breakaway(case.n, case.d, negative=negative)
    P = sp.Poly(case.N.as_expr() * sp.diff(case.D.as_expr(), S)
                - sp.diff(case.N.as_expr(), S) * case.D.as_expr(), S)
    for e in got:
        s = sp.Float(e["point"][0], 30) + sp.I * sp.Float(e["point"][1], 30)
        k = (-case.D.eval(s) / case.N.eval(s)).evalf(30)
        assert abs(sp.im(k)) <= 1e-8 * max(1, abs(k)), e
        assert (sp.re(k) < 0) if negative else (sp.re(k) > 0), e
        assert float(sp.re(k)) == pytest.approx(e["gain"], rel=1e-8), e
        # dK/ds = -(N D' - N' D)/N^2 vanishes: residual of P at s against its scale
        scale = sum(abs(float(c)) * abs(complex(s)) ** i
                    for i, c in enumerate(reversed(P.all_coeffs())))
        assert abs(complex(P.eval(s).evalf(30))) <= 1e-9 * scale, e
    ref = sympy_breakaway(case, negative)
    assert len(got) == len(ref), (got, ref)
    got = sorted(got, key=lambda e: _rounded(complex(*e["point"])))
    for (r, k), e in zip(ref, got, strict=True):
        assert complex(*e["point"]) == pytest.approx(r, rel=1e-7, abs=1e-7)
        assert e["gain"] == pytest.approx(k, rel=1e-7)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(case=loops(), negative=st.booleans())
def test_property_asymptotes_are_the_directions_at_huge_gain(case, negative):
    """'As |K| -> inf, q = deg D - deg N roots go to infinity along the asymptotes' —
    mpmath roots of D + K N at a huge gain, directions seen from the centroid."""
    got = locus.asymptotes(case.n, case.d, negative=negative)
    q = len(case.poles) - len(case.zeros)
    assert len(got["angles_deg"]) == q
    if q == 0:
        return
    mpmath.mp.dps = 60
    scale = max([1.0] + [abs(complex(r)) for r in case.poles + case.zeros])
    lead = abs(float(case.N.LC()))
    kmag = (1e6 * scale) ** q / lead
    k = -kmag if negative else kmag
    Dd = [mpmath.mpf(sp.Rational(c).p) / sp.Rational(c).q for c in case.D.all_coeffs()]
    Nd = [mpmath.mpf(sp.Rational(c).p) / sp.Rational(c).q for c in case.N.all_coeffs()]
    Nd = [mpmath.mpf(0)] * (len(Dd) - len(Nd)) + Nd
    roots = [complex(r) for r in mpmath.polyroots([a + k * b for a, b in zip(Dd, Nd,
                                                                              strict=True)],
                                                  maxsteps=400, extraprec=300)]
    far = [r for r in roots if abs(r) > 1e4 * scale]
    assert len(far) == q
    c = got["centroid"]
    directions = sorted(math.degrees(cmath.phase(r - c)) % 360.0 for r in far)
    for a in got["angles_deg"]:
        assert any(_angle_close(a, b, 1e-3) for b in directions), (a, directions)
    # the centroid: (sum of poles - sum of zeros)/q, exact
    assert c == pytest.approx(rule_asymptotes(case, negative)[0], abs=1e-12)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(case=loops(), negative=st.booleans())
def test_property_angles(case, negative):
    """'Departure/arrival angles follow from the angle condition at the pole/zero' —
    against the rule recomputed here and against mpmath root directions."""
    assume(not any(p == z for p in case.poles for z in case.zeros))
    got = locus.angles(case.n, case.d, negative=negative)
    dep, arr = rule_angles(case, negative)
    def key6(c: complex, a: float) -> tuple[float, float, float]:
        return (round(c.real, 6), round(c.imag, 6), round(a, 6))

    for key, mine, ref in (("pole", got["departure"], dep), ("zero", got["arrival"], arr)):
        assert len(mine) == len(ref), (key, mine, ref)
        mine = sorted(mine, key=lambda e: key6(complex(*e[key]), e["angle_deg"]))
        ref = sorted(ref, key=lambda e: key6(*e))
        for e, (c, a) in zip(mine, ref, strict=True):
            assert complex(*e[key]) == pytest.approx(c, abs=1e-8), (key, e, c)
            assert _angle_close(e["angle_deg"], a, 1e-8), (key, e, a)
    for e in got["departure"][:2]:
        actual = mpmath_directions(case, complex(*e["pole"]), negative)
        assert any(_angle_close(e["angle_deg"], b, 0.05) for b in actual), (e, actual)

"""Parameter sweeps: sampling plans and worst cases.

References: Kharitonov's theorem (1978) - an interval-coefficient polynomial family is
stable iff its four Kharitonov polynomials are (published theorem; the four polynomials are
checked here with the exact Routh-Hurwitz test of tests/routh.py); the gain margin of
K/(s(s+1)(tau s+1)) from the Routh condition K < (tau + 1)/tau in exact arithmetic.
"""

from __future__ import annotations

import math

import pytest
import sympy as sp

from loopvet.analysis.design import check_record
from loopvet.analysis.sweep import make_plan

from .conftest import load_text
from .routh import routh_stable

FAMILY = """\
parameters:
  a3: {{nominal: 1, min: {a3lo}, max: {a3hi}}}
  a2: {{nominal: {a2}, min: {a2lo}, max: {a2hi}}}
  a1: {{nominal: 3, min: 2.5, max: 3.5}}
  a0: {{nominal: 1, min: 0.5, max: 1.5}}
plant: {{transfer: "1/(a3*s^3 + a2*s^2 + a1*s + a0)"}}
controller: {{transfer: "1"}}
requirements:
  stability: {{}}
sweep: {{method: [corners, lhs], samples: 64, seed: 3}}
"""


def _kharitonov_stable(lo: list, hi: list) -> bool:
    """The four Kharitonov polynomials (ascending bounds lo/hi) all Routh-stable."""
    patterns = ["llhh", "hhll", "lhhl", "hllh"]
    for pat in patterns:
        coeffs = [(lo if pat[k % 4] == "l" else hi)[k] for k in range(len(lo))]
        if not routh_stable([sp.nsimplify(c) for c in coeffs[::-1]]):
            return False
    return True


@pytest.mark.parametrize("a2,a2lo,a2hi,a3lo,a3hi,expected", [
    (4, 3.5, 4.5, 0.8, 1.2, True),      # stable family
    (1.2, 0.6, 1.5, 0.8, 1.6, False),   # a vertex violates a2 a1 > a3 (a0 + 1)
])
def test_sweep_agrees_with_kharitonov(a2, a2lo, a2hi, a3lo, a3hi, expected):
    rec = load_text(FAMILY.format(a2=a2, a2lo=a2lo, a2hi=a2hi, a3lo=a3lo, a3hi=a3hi))
    # characteristic polynomial a3 s^3 + a2 s^2 + a1 s + (a0 + 1), ascending bounds
    lo = [1.5, 2.5, a2lo, a3lo]
    hi = [2.5, 3.5, a2hi, a3hi]
    family_stable = _kharitonov_stable(lo, hi)
    assert family_stable == expected, "test family chosen wrongly"
    res = check_record(rec)
    entry = next(e for e in res.requirements if e.key == "stability" and e.scope == "sweep")
    assert (entry.status == "pass") == family_stable
    if not family_stable:
        assert res.sweep["failed_samples"] >= 1 and res.sweep["yield"] < 1


def test_worst_gain_margin_at_the_corner_matches_routh():
    """GM of K/(s(s+1)(tau s+1)) is 20 log10((tau+1)/(tau K)) (Routh: K < (tau+1)/tau),
    falling with tau: the worst case is the corner tau = max."""
    rec = load_text("""\
        parameters:
          tau: {nominal: 1, min: 0.5, max: 2}
        plant: {transfer: "1/(s*(s+1)*(tau*s+1))"}
        controller: {transfer: "0.5"}
        requirements:
          gain_margin_db: {min: 1}
        sweep: {method: corners}
        """)
    res = check_record(rec)
    e = next(x for x in res.requirements if x.key == "gain_margin_db" and x.scope == "sweep")
    tau, k = sp.Rational(2), sp.Rational(1, 2)
    exact = float(20 * sp.log((tau + 1) / (tau * k), 10))
    assert e.value == pytest.approx(exact, rel=1e-10)
    assert e.where["parameters"]["tau"] == 2.0
    assert res.sweep["worst"]["gain_margin_db"]["value"] == pytest.approx(exact, rel=1e-10)


def test_plans_are_deterministic_and_nominal_first():
    rec = load_text("""\
        parameters:
          a: {nominal: 1, tolerance: 20%}
          b: {nominal: 2, min: 1, max: 4}
          c: "a*b"
        plant: {transfer: "c/((a*s+1)*(s+b))"}
        controller: {transfer: "1"}
        gain: {nominal: 1, range: [0.5, 2]}
        sweep: {method: [corners, sobol, lhs, random, grid], samples: 10, levels: 3, seed: 9,
                include_gain: true}
        """)
    p1, p2 = make_plan(rec), make_plan(rec)
    assert p1.samples == 1 + 8 + 10 + 10 + 10 + 27
    assert p1.point(0) == {"a": 1.0, "b": 2.0} and p1.gains[0] == 1.0
    for name in ("a", "b"):
        assert (p1.values[name] == p2.values[name]).all()
    assert p1.values["a"].min() >= 0.8 - 1e-12 and p1.values["a"].max() <= 1.2 + 1e-12
    assert math.isclose(p1.gains.min(), 0.5) and math.isclose(p1.gains.max(), 2.0)


def test_refine_finds_the_corner_between_samples():
    """With lhs samples only, the local search walks from the worst sample towards the
    corner tau = 2 where the exact gain margin (Routh) is lowest, and says so."""
    rec = load_text("""\
        parameters:
          tau: {nominal: 1, min: 0.5, max: 2}
        plant: {transfer: "1/(s*(s+1)*(tau*s+1))"}
        controller: {transfer: "0.5"}
        requirements:
          gain_margin_db: {min: 1}
        sweep: {method: lhs, samples: 6, seed: 4, refine: true}
        """)
    res = check_record(rec)
    e = next(x for x in res.requirements if x.key == "gain_margin_db" and x.scope == "sweep")
    tau, k = sp.Rational(2), sp.Rational(1, 2)
    exact = float(20 * sp.log((tau + 1) / (tau * k), 10))
    assert e.note.startswith("refined")
    assert e.value == pytest.approx(exact, rel=1e-4)
    assert res.sweep["worst"]["gain_margin_db"]["refined"] is True


DEAD_TIME_SWEEP = """\
parameters:
  t: {nominal: 0.5, tolerance: 20%}
plant: {transfer: "1/((s + 1)*(0.2*s + 1))", delay: t}
controller: {pid: {kp: 0.8, ki: 0.5}}
requirements:
  stability: {}
  gain_margin_db: {min: 3}
sweep: {method: lhs, samples: 16, seed: 2}
"""


def test_undecided_crossing_search_is_reported(monkeypatch):
    """Normally the dead-time crossing search decides every frequency interval and no
    finding appears; allowed no bisection round it leaves its intervals open, and the nominal
    analysis and the sweep must then say that stability is not proven there."""
    from loopvet.analysis import delay

    res = check_record(load_text(DEAD_TIME_SWEEP))
    assert not [f for f in res.findings if f.kind == "crossing_search_undecided"]
    monkeypatch.setattr(delay, "_ROUNDS", 0)
    res = check_record(load_text(DEAD_TIME_SWEEP))
    kinds = [f for f in res.findings if f.kind == "crossing_search_undecided"]
    assert len(kinds) == 2                                   # nominal, and the sweep
    assert any("of 17 sweep samples" in f.message for f in kinds)
    assert all(f.severity == "warning" for f in kinds)

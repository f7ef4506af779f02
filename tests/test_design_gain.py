"""Gain-scope requirements and the results blocks of issue-3 analyses, end to end on
records. References: the exact interval of K/(s(s+1)(s+2)) (0 < K < 6, from memory;
recomputed by Routh in tests/test_gain_intervals.py) and numpy roots on a dense gain grid
for the worst pole metric."""

from __future__ import annotations

import math

import numpy as np
import pytest

from loopvet.analysis.design import check_record
from loopvet.run import check_file

from .conftest import ROOT, load_text

TYPE1 = """\
plant: {transfer: "1/(s*(s+1)*(s+2))"}
controller: {transfer: "1"}
gain: {nominal: 1, range: [0.5, %s]}
requirements:
  stability: {over_gain: true}
  gain_margin_db: {min: 6, over_gain: true}
  damping_ratio: {min: 0.2, over_gain: true}
"""


def _entry(result, key, scope):
    return next(e for e in result.requirements if e.key == key and e.scope == scope)


def test_gain_scope_worst_cases():
    res = check_record(load_text(TYPE1 % "2"))
    assert res.status == "pass"
    gm = _entry(res, "gain_margin_db", "gain")
    assert gm.value == pytest.approx(20 * math.log10(6 / 2), rel=1e-10)
    assert gm.where == {"gain": 2.0}
    z = _entry(res, "damping_ratio", "gain")
    ks = np.linspace(0.5, 2, 20001)
    ref = min(min(-r.real / abs(r) for r in np.roots([1, 3, 2, kk])) for kk in ks)
    assert z.value == pytest.approx(ref, rel=1e-6)
    assert z.where["gain"] == pytest.approx(2.0, rel=1e-6)
    assert res.metrics["gain_margin_db"] == pytest.approx(20 * math.log10(6), rel=1e-10)
    assert res.gain["stable_intervals"] == [[0.0, pytest.approx(6.0, rel=1e-12)]]
    assert res.gain["region_intervals"]["damping_ratio"][0][0] == 0.0


def test_range_past_the_ultimate_gain_fails_where_it_goes_unstable():
    res = check_record(load_text(TYPE1 % "8"))
    assert res.status == "fail"
    st = _entry(res, "stability", "gain")
    assert st.status == "fail" and st.where["gain"] == pytest.approx(6.0, rel=1e-12)
    assert _entry(res, "stability", "nominal").status == "pass"
    gm = _entry(res, "gain_margin_db", "gain")
    assert gm.status == "fail" and gm.value is None


def test_unstable_nominal_has_null_margins():
    res = check_record(load_text(TYPE1.replace("nominal: 1,", "nominal: 7,") % "8"))
    assert res.metrics["gain_margin_db"] is None
    assert res.metrics["gain_reduction_margin_db"] is None
    assert _entry(res, "stability", "nominal").status == "fail"
    assert any(f.kind == "unstable" for f in res.findings)


def test_demo_records_carry_every_issue3_block():
    for path in sorted((ROOT / "designs").rglob("*.yaml")):
        res = check_file(str(path))
        assert res.status != "invalid", (path, res.errors)
        assert {"stable_intervals", "crossings", "region_intervals"} <= set(res.gain)
        assert {"open_loop_poles", "open_loop_zeros", "asymptotes", "breakaway",
                "branches"} <= set(res.locus)
        pole_reqs = {r.key for r in res.requirements
                     if r.key in ("damping_ratio", "decay_rate", "natural_frequency")}
        assert pole_reqs == set(res.gain["region_intervals"])


def test_demo_fleet_is_fully_evaluated():
    """Every requirement of every demo record is judged (none left 'not_evaluated') and
    every metric of the requirement table is in `metrics` (None only where it cannot
    exist, e.g. time metrics of an unstable loop)."""
    from loopvet.metrics import METRICS

    for path in sorted((ROOT / "designs").rglob("*.yaml")):
        res = check_file(str(path))
        assert all(e.status in ("pass", "fail") for e in res.requirements), path
        assert set(METRICS) <= set(res.metrics), path
        stable = next(e for e in res.requirements if e.key == "stability"
                      and e.scope == "nominal").status == "pass"
        if stable:
            missing = [k for k, v in res.metrics.items() if v is None]
            assert not missing, (path, missing)


def test_phase_margin_worst_over_gain_range():
    """Worst phase margin over K in [0.5, 2] for K/(s(s+1)(s+2)) against a dense scan of the
    crossover phase (numpy, 4001 gains): the margin falls as K rises."""
    res = check_record(load_text("""\
        plant: {transfer: "1/(s*(s+1)*(s+2))"}
        controller: {transfer: "1"}
        gain: {nominal: 1, range: [0.5, 2]}
        requirements:
          phase_margin_deg: {min: 10, over_gain: true}
        """))
    e = _entry(res, "phase_margin_deg", "gain")
    ks = np.linspace(0.5, 2, 4001)
    ref = []
    for kk in ks:
        w = [r.real for r in np.roots([1, 0, 5, 0, 4, 0, -kk * kk]) if abs(r.imag) < 1e-9
             and r.real > 0][0]
        phase = -90 - math.degrees(math.atan(w)) - math.degrees(math.atan(w / 2))
        ref.append(180 + phase)
    assert e.value == pytest.approx(min(ref), rel=1e-6)
    assert e.where["gain"] == pytest.approx(2.0, rel=1e-6)


def test_demo_steam_header_ultimate_gain_against_mpmath():
    """The demo steam header (state-space plant with dead time): its gain margin is
    20 log10(K_u) with K_u = 1/|L(j w_180)| where arg L(j w_180) = -180 deg, solved with
    mpmath (30 digits) on L = 0.001334 (s + 0.04) e^{-4 s} / (s (s + 0.0667)(s + 0.025)
    (0.5 s + 1)) (C (sI - A)^-1 B multiplied out by hand). A rounding-noise coefficient in
    the state-space numerator once hid this crossing."""
    import mpmath

    mpmath.mp.dps = 30

    def loop(w):
        s = mpmath.mpc(0, w)
        return (mpmath.mpf("0.001334") * (s + mpmath.mpf("0.04")) * mpmath.exp(-4 * s)
                / (s * (s + mpmath.mpf("0.0667")) * (s + mpmath.mpf("0.025"))
                   * (mpmath.mpf("0.5") * s + 1)))

    w180 = mpmath.findroot(lambda w: mpmath.im(loop(w)), (0.05, 0.15), solver="anderson")
    assert mpmath.re(loop(w180)) < 0
    gm_ref = float(20 * mpmath.log10(-1 / mpmath.re(loop(w180))))
    res = check_file(str(ROOT / "designs" / "utilities" / "steam-header-pressure.yaml"))
    assert res.metrics["gain_margin_db"] == pytest.approx(gm_ref, rel=1e-9)

"""Sampled-data loops: z-domain stability intervals, margins, responses, side by side.

Sources beside each check:

* Pole condition of proportional control of the ZOH-discretised first-order lag
  k/(tau s + 1): G(z) = b/(z - a), a = e^{-T/tau}, b = k(1 - a); the closed-loop pole is
  z = a - K b, stable iff |a - K b| < 1, i.e. K in ((a - 1)/b, (a + 1)/b). (Worked by hand
  from the ZOH-equivalent table, e.g. Franklin, Powell & Workman, from memory.)
* Jury's stability test (E. I. Jury, Theory and Application of the z-Transform Method,
  1964; the low-order forms as in Astrom & Wittenmark, Computer-Controlled Systems, and
  Ogata, Discrete-Time Control Systems; from memory). For P(z) = z^2 + a1 z + a0:
  |a0| < 1, P(1) > 0, P(-1) > 0. For P(z) = z^3 + a2 z^2 + a1 z + a0: |a0| < 1, P(1) > 0,
  P(-1) < 0, |a0^2 - 1| > |a0 a2 - a1|.
* Independent simulation: the hybrid loop integrated by ``scipy.integrate.solve_ivp`` with the
  controller's difference equation written out by hand (Tustin PI, bilinear substitution).
* Identities: margins recomputed from L(e^{j w T}) at the reported crossover; Ms against
  a dense unit-circle grid.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from loopvet.analysis import digital as dg
from loopvet.analysis.design import check_record
from loopvet.lti.digital import assemble_digital
from loopvet.record.load import parse_record
from loopvet.record.params import values

P = np.polynomial.polynomial


def _record(text: str):
    return parse_record("mem.yaml", text.encode())


def _loop(text: str):
    rec = _record(text)
    return rec, assemble_digital(rec, values(rec, 1), 1)


LAG = """loopvet: 1
name: lag
revision: 1
plant: {{transfer: "{k}/({tau}*s + 1)"}}
controller: {{transfer: "1"}}
sampling: {{period: {period}}}
gain: {gain}
"""


@pytest.mark.parametrize("k,tau,period", [(2.0, 1.0, 0.1), (0.5, 3.0, 1.0), (4.0, 0.05, 0.2)])
def test_p_control_of_zoh_lag_gain_limit_exact(k: float, tau: float, period: float) -> None:
    """|a - K b| < 1 <=> K in ((a-1)/b, (a+1)/b) (pole condition worked by hand)."""
    rec = _record(LAG.format(k=k, tau=tau, period=period, gain=1.0))
    res = check_record(rec)
    a = math.exp(-period / tau)
    b = k * (1 - a)
    lo, hi = (a - 1) / b, (a + 1) / b
    assert res.gain is not None
    (got_lo, got_hi), = res.gain["stable_intervals"]
    assert got_lo == pytest.approx(lo, rel=1e-11), (k, tau, period)
    assert got_hi == pytest.approx(hi, rel=1e-11), (k, tau, period)
    freqs = {round(c["gain"], 9): c["frequency"] for c in res.gain["crossings"]}
    # the pole leaves through z = -1 (Nyquist frequency) above, through z = 1 (w = 0) below
    assert freqs[round(hi, 9)] == pytest.approx(math.pi / period, rel=1e-12)
    assert freqs[round(lo, 9)] == pytest.approx(0.0, abs=1e-9)
    if hi > 1:      # nominal K = 1 inside the interval
        assert res.metrics["gain_margin_db"] == pytest.approx(20 * math.log10(hi), rel=1e-10)
    else:
        assert res.status == "fail" and res.metrics["gain_margin_db"] is None


def _jury2(c: np.ndarray) -> bool:
    a0, a1 = c[0] / c[2], c[1] / c[2]
    p1, pm1 = 1 + a1 + a0, 1 - a1 + a0
    return abs(a0) < 1 and p1 > 0 and pm1 > 0


def _jury3(c: np.ndarray) -> bool:
    a0, a1, a2 = c[0] / c[3], c[1] / c[3], c[2] / c[3]
    p1 = 1 + a2 + a1 + a0
    pm1 = -1 + a2 - a1 + a0
    return abs(a0) < 1 and p1 > 0 and pm1 < 0 and abs(a0 * a0 - 1) > abs(a0 * a2 - a1)


JURY_CASES = [
    # (plant, controller, period, jury, expected z-degree)
    ("1/(s*(s + 1))", "1", 0.5, _jury2, 2),                      # ZOH servo, P control
    ("3/((s + 1)*(0.5*s + 1))", "1", 0.2, _jury2, 2),
    ("1/(s*(s + 1))", "(2*s + 1)/s", 0.3, _jury3, 3),           # PI by Tustin
    ("2/((s + 1)*(s + 2))", "1", 0.4, None, 3),                  # with computation delay
]


@pytest.mark.parametrize("plant,ctrl,period,jury,deg", JURY_CASES)
def test_intervals_agree_with_jury(plant: str, ctrl: str, period: float, jury, deg: int
                                   ) -> None:
    """Membership of K in the exact stable intervals equals Jury's verdict on D + K N
    (Jury 1964; low-order conditions from memory, see the module notes)."""
    extra = ", computation_delay: 1" if jury is None else ""
    text = (f'loopvet: 1\nname: j\nrevision: 1\nplant: {{transfer: "{plant}"}}\n'
            f'controller: {{transfer: "{ctrl}"}}\nsampling: {{period: {period}{extra}}}\n')
    rec, loop = _loop(text)
    jury = jury or _jury3
    gi = dg.gain_intervals(loop)[0]
    bounds = sorted({c.gain for c in gi.crossings})
    assert bounds, "no crossing found"
    span = max(1.0, max(abs(b) for b in bounds))
    ks = np.linspace(-2 * span, 2 * span, 801)
    checked = 0
    for kk in ks:
        if any(abs(kk - b) <= 1e-6 * span for b in bounds):
            continue
        char = loop.characteristic(kk)[0]
        char = char[: int(np.max(np.nonzero(char)[0])) + 1]
        if char.size - 1 != deg:
            continue
        assert jury(char) == (gi.interval_containing(float(kk)) is not None), (plant, kk)
        checked += 1
    assert checked > 700
    # at each finite crossing gain one of Jury's strict inequalities becomes an equality
    for b in bounds:
        char = loop.characteristic(b)[0]
        if np.max(np.nonzero(char)[0]) != deg:
            continue
        c = char[: deg + 1] / char[deg]
        terms = [abs(c[0]) - 1, P.polyval(1.0, c), P.polyval(-1.0, c)]
        if deg == 3:
            terms.append(abs(c[0] ** 2 - 1) - abs(c[0] * c[2] - c[1]))
        assert min(abs(t) for t in terms) <= 1e-9 * max(1.0, max(abs(t) for t in terms)), b


SERVO = """loopvet: 1
name: servo
revision: 1
plant: {transfer: "4/((s + 1)*(0.2*s + 1))", delay: DELAY}
controller: {pid: {kp: 0.8, ki: 1.5}}
sampling: {period: 0.1, controller_method: tustin, computation_delay: CD}
"""


@pytest.mark.parametrize("delay,cd", [(0.0, 0), (0.13, 0), (0.05, 1)])
def test_responses_match_brute_force_hybrid_simulation(delay: float, cd: int) -> None:
    """Sample-instant and inter-sample output against solve_ivp of the hybrid loop with the
    Tustin PI difference equation written by hand (independent simulation)."""
    rec, loop = _loop(SERVO.replace("DELAY", str(delay)).replace("CD", str(cd)))
    zp = dg.z_poles(loop)
    ref, _, samp = dg.responses(loop, zp)
    period, kp, ki = 0.1, 0.8, 1.5
    q0, q1 = kp + ki * period / 2, -(kp - ki * period / 2)   # u_k = u_{k-1} + q0 e_k + q1 e_{k-1}
    n = 60
    x = np.zeros(2)
    hist_u = [0.0] * (cd + 1)       # computed outputs, applied after cd periods
    applied: list[float] = []
    e_prev = 0.0
    u_prev = 0.0
    ys, mids = [], []

    def rhs(_t, st, v):             # 4/((s+1)(0.2 s+1)) in states (y, y')
        return [st[1], (4 * v - st[0] - 1.2 * st[1]) / 0.2]

    def plant_input(t: float) -> float:
        j = math.floor((t - delay) / period + 1e-12)
        return applied[j] if 0 <= j < len(applied) else 0.0

    for k in range(n):
        y = x[0]
        ys.append(y)
        e = 1.0 - y
        u = u_prev + q0 * e + q1 * e_prev
        e_prev, u_prev = e, u
        hist_u.append(u)
        applied.append(hist_u[-1 - cd])
        t0 = k * period
        cuts = sorted({t0, t0 + period} | ({t0 + (delay % period)} if delay % period else set()))
        for a, b in zip(cuts[:-1], cuts[1:], strict=True):
            v = plant_input(0.5 * (a + b))
            sol = solve_ivp(rhs, (a, b), x, args=(v,), rtol=1e-11, atol=1e-13,
                            dense_output=True)
            if a <= t0 + period / 2 < b:
                mids.append(float(sol.sol(t0 + period / 2)[0]))
            x = sol.y[:, -1]
    ys_arr = np.array(ys)
    np.testing.assert_allclose(samp.y_ref[0, :n], ys_arr, atol=1e-8,
                               err_msg=f"samples, delay={delay} cd={cd}")
    # the continuous output at mid-period (sub-grid point SUBSTEPS/2 of each period)
    t = ref.t[0]
    y = ref.y[0]
    got_mid = np.interp(np.arange(n) * period + period / 2, t, y)
    exact_mid_idx = [int(np.argmin(np.abs(t - (k * period + period / 2)))) for k in range(n)]
    assert np.all(np.abs(t[exact_mid_idx] - (np.arange(n) * period + period / 2)) < 1e-12)
    np.testing.assert_allclose(got_mid, np.array(mids), atol=1e-8,
                               err_msg=f"mid-period, delay={delay} cd={cd}")


def test_margins_and_peak_are_those_of_the_unit_circle() -> None:
    """Identities: |L(e^{j wc T})| = 1 and lag = 180 + arg L there; Ms = max |1/(1+L)| over
    a dense grid up to the Nyquist frequency."""
    rec, loop = _loop(SERVO.replace("DELAY", "0.03").replace("CD", "1"))
    ev = dg.evaluate(loop).base
    wc = ev.crossover_w[0][np.isfinite(ev.crossover_w[0])]
    assert wc.size == 1
    z = np.exp(1j * wc * 0.1)
    lval = P.polyval(z, loop.nz[0]) / P.polyval(z, loop.dz[0])
    np.testing.assert_allclose(np.abs(lval), 1.0, rtol=1e-9)
    lag = math.degrees((math.pi + np.angle(lval[0])) % (2 * math.pi))
    assert ev.metrics["phase_margin_deg"][0] == pytest.approx(lag, abs=1e-7)
    assert ev.metrics["delay_margin_s"][0] == pytest.approx(math.radians(lag) / wc[0],
                                                            rel=1e-9)
    w = np.linspace(1e-4, math.pi / 0.1, 400_001)
    zz = np.exp(1j * w * 0.1)
    ms = np.max(np.abs(1 / (1 + P.polyval(zz, loop.nz[0]) / P.polyval(zz, loop.dz[0]))))
    got = ev.metrics["sensitivity_peak"][0]
    assert ms <= got * (1 + 1e-9)
    assert got <= ms * (1 + 1e-6)


def test_side_by_side_continuous_metrics() -> None:
    """The 'continuous' block equals the analysis of the same record without sampling
    (identity), and the digital phase margin is smaller (hold + computation delay add lag:
    about wc (T/2 + T) rad, common practice)."""
    text = SERVO.replace("DELAY", "0.0").replace("CD", "1")
    res = check_record(_record(text))
    cont = res.extra["continuous"]["metrics"]
    plain = check_record(_record(text.replace(
        "sampling: {period: 0.1, controller_method: tustin, computation_delay: 1}\n", "")))
    for key in ("phase_margin_deg", "gain_margin_db", "crossover_frequency"):
        assert cont[key] == plain.metrics[key], key
    pm_loss = cont["phase_margin_deg"] - res.metrics["phase_margin_deg"]
    wc = cont["crossover_frequency"]
    assert pm_loss == pytest.approx(math.degrees(wc * 0.15), rel=0.25)


def test_z_region_interval_edges_put_a_pole_on_the_boundary() -> None:
    """At every finite edge of a damping-ratio interval some closed-loop pole has exactly
    that damping ratio after s = ln(z)/T (definition of the boundary)."""
    rec, loop = _loop(LAG.format(k=1.0, tau=1.0, period=0.2, gain=1.0).replace(
        'controller: {transfer: "1"}', 'controller: {transfer: "(2*s + 1)/s"}'))
    iv, edges = dg.region_intervals("damping_ratio", 0.5, None, loop.nz[0], loop.dz[0], 0.2)
    assert iv
    finite = [e for e in edges if abs(e) < 1e6 and e > 0]
    assert finite
    for e in finite:
        s = dg.s_equivalent(dg.z_poles(loop, e), 0.2)[0]
        s = s[np.isfinite(s)]
        zeta = -s.real / np.abs(s)
        assert np.min(np.abs(zeta - 0.5)) <= 1e-7, (e, zeta)

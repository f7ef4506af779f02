"""Discretisation: zero-order-hold equivalents and the controller methods.

Reference table (each value with its source):

* ZOH of a/(s+a):  (1 - e^{-aT}) / (z - e^{-aT})
  -- standard ZOH-equivalent table (from memory; e.g. Franklin, Powell & Workman, Digital
  Control of Dynamic Systems, table of ZOH equivalents; Astrom & Wittenmark, Computer-
  Controlled Systems, sampling of first-order systems).
* ZOH of 1/s^2:  T^2 (z + 1) / (2 (z - 1)^2)  -- same tables (from memory).
* ZOH of 1/(s+a) with dead time L = m T + lam, 0 < lam < T (modified z-transform /
  state augmentation):  [(1 - e^{-a(T-lam)}) z + (e^{-a(T-lam)} - e^{-aT})] / (a z^{m+1}
  (z - e^{-aT}))  -- Astrom & Wittenmark, sampling a system with a time delay (from memory).
* Independent numerical reference: ``scipy.signal.cont2discrete(method="zoh")``.
* Tustin with prewarping at w_p: C_z(e^{j w_p T}) = C(j w_p) exactly -- the defining
  property of prewarping (Franklin, Powell & Workman, from memory).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.signal import cont2discrete

from loopvet.lti import discrete as dz
from loopvet.lti import poly

P = np.polynomial.polynomial


def _normalised(num: np.ndarray, den: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Trim and make the denominator monic (ascending coefficients)."""
    dd = den[: int(poly.effective_degree(den[None, :])[0]) + 1]
    nn = num[: max(int(poly.effective_degree(num[None, :])[0]), 0) + 1]
    return nn / dd[-1], dd / dd[-1]


@pytest.mark.parametrize("a,period", [(1.0, 0.1), (5.0, 0.02), (0.3, 2.0)])
def test_zoh_first_order_closed_form(a: float, period: float) -> None:
    """a/(s+a) -> (1 - e^{-aT})/(z - e^{-aT}) (ZOH-equivalent table, from memory)."""
    num, den = dz.zoh(np.array([[a]]), np.array([[a, 1.0]]), 0.0, period)
    nn, dd = _normalised(num[0], den[0])
    e = math.exp(-a * period)
    np.testing.assert_allclose(dd, [-e, 1.0], rtol=1e-13, err_msg=f"a={a} T={period}")
    np.testing.assert_allclose(nn, [1.0 - e], rtol=1e-12, err_msg=f"a={a} T={period}")


@pytest.mark.parametrize("period", [0.01, 0.5, 3.0])
def test_zoh_double_integrator_closed_form(period: float) -> None:
    """1/s^2 -> T^2 (z + 1)/(2 (z - 1)^2) (ZOH-equivalent table, from memory)."""
    num, den = dz.zoh(np.array([[1.0]]), np.array([[0.0, 0.0, 1.0]]), 0.0, period)
    nn, dd = _normalised(num[0], den[0])
    np.testing.assert_allclose(dd, [1.0, -2.0, 1.0], rtol=0, atol=1e-14)
    np.testing.assert_allclose(nn, [period**2 / 2, period**2 / 2], rtol=1e-10)


@pytest.mark.parametrize("a,period,delay", [(1.0, 0.1, 0.25), (2.0, 0.5, 0.2),
                                            (0.5, 1.0, 3.0)])
def test_zoh_fractional_delay_closed_form(a: float, period: float, delay: float) -> None:
    """Modified z-transform of 1/(s+a) e^{-sL} (Astrom & Wittenmark, from memory)."""
    num, den = dz.zoh(np.array([[1.0]]), np.array([[a, 1.0]]), delay, period)
    m = math.floor(delay / period + 1e-9)
    lam = delay - m * period
    e = math.exp(-a * period)
    if lam < 1e-12:
        want_num = np.array([(1 - e) / a])
        want_den = P.polymul(np.r_[np.zeros(m), 1.0], [-e, 1.0])
    else:
        r = math.exp(-a * (period - lam))
        want_num = np.array([(r - e) / a, (1 - r) / a])
        want_den = P.polymul(np.r_[np.zeros(m + 1), 1.0], [-e, 1.0])
    nn, dd = _normalised(num[0], den[0])
    np.testing.assert_allclose(dd, want_den, rtol=1e-13, atol=1e-15,
                               err_msg=f"a={a} T={period} L={delay}")
    np.testing.assert_allclose(nn, want_num, rtol=1e-11, err_msg=f"a={a} T={period} L={delay}")


CASES = [
    # (num ascending, den ascending, period)
    ([2.0, 0.5], [1.0, 3.0, 2.0], 0.1),
    ([4.0], [4.0, 0.8, 1.0], 0.05),                     # lightly damped pair
    ([1.0, -0.5], [0.0, 2.0, 3.0, 1.0], 0.2),           # integrator, RHP zero
    ([1.0, 0.0, 0.3], [1.0, 1.5, 1.0], 0.3),            # biproper
]


@pytest.mark.parametrize("num,den,period", CASES)
def test_zoh_matches_scipy_cont2discrete(num: list[float], den: list[float],
                                         period: float) -> None:
    """Independent reference: scipy.signal.cont2discrete(method='zoh')."""
    got_n, got_d = dz.zoh(np.array([num]), np.array([den]), 0.0, period)
    b, a, _ = cont2discrete((num[::-1], den[::-1]), period, method="zoh")
    ref_n = np.asarray(b, dtype=float).ravel()[::-1]
    ref_d = np.asarray(a, dtype=float).ravel()[::-1]
    gn, gd = _normalised(got_n[0], got_d[0])
    rn, rd = _normalised(np.trim_zeros(ref_n, "b") if np.any(ref_n) else ref_n, ref_d)
    # compare the frequency responses (robust to a common factor z in scipy's form)
    zs = np.exp(1j * np.linspace(0.01, math.pi - 0.01, 50))
    np.testing.assert_allclose(P.polyval(zs, gn) / P.polyval(zs, gd),
                               P.polyval(zs, rn) / P.polyval(zs, rd), rtol=1e-9,
                               err_msg=f"{num}/{den} T={period}")


def test_zoh_batched_equals_one_by_one() -> None:
    """A batch of samples gives each sample's own result (identity)."""
    num = np.array([[1.0], [2.0], [3.0]])
    den = np.array([[1.0, 1.0], [2.0, 1.0], [0.5, 1.0]])
    delay = np.array([0.0, 0.13, 0.3])
    bn, bd = dz.zoh(num, den, delay, 0.1)
    for i in range(3):
        sn, sd = dz.zoh(num[i:i + 1], den[i:i + 1], delay[i], 0.1)
        z = np.exp(1j * np.array([0.3, 1.0, 2.5]))
        np.testing.assert_allclose(P.polyval(z, bn[i]) / P.polyval(z, bd[i]),
                                   P.polyval(z, sn[0]) / P.polyval(z, sd[0]), rtol=1e-13)


@pytest.mark.parametrize("wp,period", [(3.0, 0.1), (40.0, 0.05), (0.5, 4.0)])
def test_tustin_prewarp_exact_at_prewarp_frequency(wp: float, period: float) -> None:
    """C_z(e^{j wp T}) = C(j wp) exactly (defining property of prewarping, from memory)."""
    num = np.array([[5.0, 2.0, 0.1]])           # PID-like lead with a filter pole
    den = np.array([[0.0, 1.0, 0.02]])
    nz, dzz = dz.discretise_controller(num, den, "tustin_prewarp", period, wp)
    z = np.exp(1j * wp * period)
    got = P.polyval(z, nz[0]) / P.polyval(z, dzz[0])
    want = P.polyval(1j * wp, num[0]) / P.polyval(1j * wp, den[0])
    assert abs(got - want) <= 1e-12 * abs(want)
    # plain Tustin does not match there (the warping the prewarp removes)
    tn, td = dz.discretise_controller(num, den, "tustin", period)
    plain = P.polyval(z, tn[0]) / P.polyval(z, td[0])
    assert abs(plain - want) > 1e-6 * abs(want)


def test_tustin_pi_closed_form() -> None:
    """kp + ki/s with s = (2/T)(z-1)/(z+1): ((kp + ki T/2) z - (kp - ki T/2)) / (z - 1)
    (bilinear substitution worked by hand)."""
    kp, ki, period = 1.5, 4.0, 0.05
    nz, dzz = dz.discretise_controller(np.array([[ki, kp]]), np.array([[0.0, 1.0]]),
                                       "tustin", period)
    nn, dd = _normalised(nz[0], dzz[0])
    np.testing.assert_allclose(dd, [-1.0, 1.0], rtol=1e-14)
    np.testing.assert_allclose(nn, [-(kp - ki * period / 2), kp + ki * period / 2], rtol=1e-14)


def test_backward_euler_integrator() -> None:
    """1/s with s = (z-1)/(Tz): T z/(z - 1) (backward rectangle rule, from memory)."""
    nz, dzz = dz.discretise_controller(np.array([[1.0]]), np.array([[0.0, 1.0]]),
                                       "backward_euler", 0.2)
    nn, dd = _normalised(nz[0], dzz[0])
    np.testing.assert_allclose(dd, [-1.0, 1.0])
    np.testing.assert_allclose(nn, [0.0, 0.2], atol=1e-15)


def test_matched_first_order_lag() -> None:
    """a/(s+a): pole e^{-aT}, the zero at infinity to z = -1, DC gain 1:
    (1 - e^{-aT})(z + 1)/(2 (z - e^{-aT})) (matched pole-zero rule, common practice)."""
    a, period = 3.0, 0.1
    nz, dzz = dz.discretise_controller(np.array([[a]]), np.array([[a, 1.0]]), "matched",
                                       period)
    nn, dd = _normalised(nz[0], dzz[0])
    e = math.exp(-a * period)
    np.testing.assert_allclose(dd, [-e, 1.0], rtol=1e-14)
    np.testing.assert_allclose(nn, [(1 - e) / 2, (1 - e) / 2], rtol=1e-13)


def test_w_plane_map_keeps_values() -> None:
    """z = (1+v)/(1-v): P_w(j tan(wT/2)) / Q_w(.) = P(e^{jwT}) / Q(e^{jwT}) (identity)."""
    p = np.array([[0.2, -0.5, 1.0]])
    q = np.array([[0.1, 0.3, -1.2, 1.0]])
    pw, qw = dz.to_w_plane(p, 3), dz.to_w_plane(q, 3)
    w = np.array([0.1, 1.0, 3.0])
    period = 1.0
    v = 1j * dz.omega_to_nu(w, period)
    z = np.exp(1j * w * period)
    np.testing.assert_allclose(P.polyval(v, pw[0]) / P.polyval(v, qw[0]),
                               P.polyval(z, p[0]) / P.polyval(z, q[0]), rtol=1e-13)
    np.testing.assert_allclose(dz.nu_to_omega(dz.omega_to_nu(w, period), period), w)

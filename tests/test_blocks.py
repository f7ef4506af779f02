"""Block conversions against independent references.

* factored (zeros, poles, gain) -> polynomials: scipy.signal.zpk2tf.
* state_space -> transfer function: scipy.signal.ss2tf.
* PID forms: polynomials derived by hand in each test's docstring.
* Pade approximant: scipy.interpolate.pade on the Taylor series of exp(-x).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.signal as sig
from scipy.interpolate import pade as scipy_pade

from loopvet.lti.blocks import block_transfer
from loopvet.lti.rational import pade
from loopvet.record import params
from loopvet.record.errors import RecordInvalid

from .conftest import load_text


def _tf(body: str, role: str = "controller"):
    rec = load_text(body)
    block = getattr(rec, role)
    return block_transfer(rec, block, params.values(rec, 1), 1)


def _desc(a: np.ndarray) -> np.ndarray:
    """Ascending -> descending with leading zeros dropped (scipy's order)."""
    a = np.trim_zeros(a[0][::-1], "f")
    return a


def _same_ratio(num, den, ref_num, ref_den):
    """Compare two rational functions by their normalised coefficient vectors."""
    scale = den[0]
    rscale = ref_den[0]
    np.testing.assert_allclose(den / scale, np.asarray(ref_den) / rscale, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(num / scale, np.asarray(ref_num) / rscale, rtol=1e-12,
                               atol=1e-12)


def test_factored_matches_zpk2tf():
    tf = _tf("""\
        plant: {transfer: "1"}
        controller:
          factored: {zeros: [-0.5, "-1+2j", "-1-2j"], poles: [0, -20, -3, "-4+1j", "-4-1j"],
                     gain: 40}
        """)
    ref_num, ref_den = sig.zpk2tf([-0.5, -1 + 2j, -1 - 2j], [0, -20, -3, -4 + 1j, -4 - 1j], 40)
    _same_ratio(_desc(tf.num), _desc(tf.den), ref_num, ref_den)


def test_factored_rejects_missing_conjugate():
    with pytest.raises(RecordInvalid, match="no matching conjugate"):
        _tf("""\
            plant: {transfer: "1"}
            controller: {factored: {zeros: ["-1+2j"], poles: [-1, -2], gain: 1}}
            """)


@pytest.mark.parametrize("a,b,c,d", [
    ([[-10.0]], [[1.0]], [[10.0]], [[0.0]]),
    ([[0.0, 1.0], [-25.0, -2.0]], [[0.0], [1.0]], [[25.0, 0.0]], [[0.0]]),
    ([[-1.0, 2.0, 0.0], [0.0, -3.0, 1.0], [1.0, 0.0, -5.0]], [[1.0], [0.5], [0.0]],
     [[1.0, -1.0, 2.0]], [[0.3]]),
])
def test_state_space_matches_ss2tf(a, b, c, d):
    body = (f"plant: {{transfer: \"1\"}}\ncontroller: {{state_space: {{A: {a}, B: {b}, "
            f"C: {c}, D: {d}}}}}\n")
    tf = _tf(body)
    ref_num, ref_den = sig.ss2tf(np.array(a), np.array(b), np.array(c), np.array(d))
    ref_num = np.trim_zeros(ref_num[0], "f")
    num = _desc(tf.num)
    den = _desc(tf.den)
    np.testing.assert_allclose(den, ref_den, rtol=1e-10, atol=1e-10)
    # ss2tf leaves rounding noise (about 1e-16) where loopvet writes an exact zero
    num = np.pad(num, (max(ref_num.size - num.size, 0), 0))
    np.testing.assert_allclose(num, ref_num, rtol=1e-10, atol=1e-10)


def test_state_space_numerator_has_no_rounding_noise():
    """C B = 0 (the input reaches the output through two states): the s^1 coefficient of the
    numerator is exactly zero, not rounding noise that would put a spurious zero near 1e14
    (the steam header of the demo: C (sI - A)^-1 B = 0.001334 / det(sI - A), by hand)."""
    body = ("plant: {transfer: \"1\"}\ncontroller: {state_space: {A: [[-0.0667, 0.0], "
            "[0.02, -0.025]], B: [[0.0667], [0.0]], C: [[0.0, 1.0]], D: [[0.0]]}}\n")
    tf = _tf(body)
    assert tf.num[0, 1:].tolist() == [0.0] * (tf.num.shape[1] - 1)
    assert tf.num[0, 0] == pytest.approx(0.0667 * 0.02, rel=1e-12)


def test_parallel_pid_hand_derived():
    """kp + ki/s + kd s/(Tf s + 1) = [(kp Tf + kd) s^2 + (kp + ki Tf) s + ki] / (Tf s^2 + s)
    (derived by hand: common denominator s (Tf s + 1))."""
    kp, ki, kd, tf_ = 2.0, 0.5, 0.1, 0.01
    tf = _tf(f"plant: {{transfer: \"1\"}}\ncontroller: {{pid: {{kp: {kp}, ki: {ki}, kd: {kd}, "
             f"derivative_filter: {tf_}}}}}\n")
    num, den = _desc(tf.num), _desc(tf.den)
    _same_ratio(num, den, [kp * tf_ + kd, kp + ki * tf_, ki], [tf_, 1.0, 0.0])


def test_standard_pid_hand_derived():
    """kc (1 + 1/(ti s) + td s/(Tf s + 1))
    = kc [(ti Tf + ti td) s^2 + (ti + Tf) s + 1] / (ti Tf s^2 + ti s) (by hand)."""
    kc, ti, td, tf_ = 3.0, 4.0, 0.05, 0.01
    tf = _tf(f"plant: {{transfer: \"1\"}}\ncontroller: {{pid: {{kc: {kc}, ti: {ti}, td: {td}, "
             f"derivative_filter: {tf_}}}}}\n")
    _same_ratio(_desc(tf.num), _desc(tf.den),
                [kc * (ti * tf_ + ti * td), kc * (ti + tf_), kc], [ti * tf_, ti, 0.0])


def test_pi_has_no_spurious_filter_pole():
    """kp + ki/s = (kp s + ki)/s: degree 1 over 1, no derivative filter pole (by hand)."""
    tf = _tf("plant: {transfer: \"1\"}\ncontroller: {pid: {kp: 0.9, ki: 6.0}}\n")
    _same_ratio(_desc(tf.num), _desc(tf.den), [0.9, 6.0], [1.0, 0.0])


def test_p_only_standard_form():
    tf = _tf("plant: {transfer: \"1\"}\ncontroller: {pid: {kc: 1.5}}\n")
    _same_ratio(_desc(tf.num), _desc(tf.den), [1.5], [1.0])


@pytest.mark.parametrize("order", [1, 2, 3, 4, 6, 8, 10])
def test_pade_matches_mpmath(order):
    """Diagonal Pade of exp(-x) from its Taylor series at 40 digits (mpmath.pade)."""
    import mpmath

    mpmath.mp.dps = 40
    taylor = [mpmath.mpf(-1) ** k / mpmath.factorial(k) for k in range(2 * order + 1)]
    p, q = mpmath.pade(taylor, order, order)   # ascending, q[0] = 1
    num, den = pade(np.array([1.0]), order)
    np.testing.assert_allclose(num[0], [float(x) for x in p], rtol=1e-13)
    np.testing.assert_allclose(den[0], [float(x) for x in q], rtol=1e-13)


@pytest.mark.parametrize("order", [1, 2, 3, 4])
def test_pade_matches_scipy(order):
    """Diagonal Pade of exp(-x) from its Taylor series (scipy.interpolate.pade)."""
    taylor = [(-1.0) ** k / math.factorial(k) for k in range(2 * order + 1)]
    p, q = scipy_pade(taylor, order)
    num, den = pade(np.array([1.0]), order)
    # scipy returns poly1d (descending); normalise both to den(0) = 1
    np.testing.assert_allclose(num[0][::-1] / den[0][0], p.coeffs / q.coeffs[-1], rtol=1e-10)
    np.testing.assert_allclose(den[0][::-1] / den[0][0], q.coeffs / q.coeffs[-1], rtol=1e-10)


def test_pade_is_all_pass():
    num, den = pade(np.array([0.7]), 5)
    w = np.logspace(-2, 2, 50)
    from loopvet.lti import poly
    ratio = poly.evaluate(num, 1j * w) / poly.evaluate(den, 1j * w)
    np.testing.assert_allclose(np.abs(ratio), 1.0, rtol=1e-12)


def test_improper_block_is_rejected():
    with pytest.raises(RecordInvalid, match="improper block"):
        _tf("plant: {transfer: \"1\"}\ncontroller: {transfer: \"(s+1)^2/(s+3)\"}\n")


def test_negative_delay_is_rejected():
    with pytest.raises(RecordInvalid, match="dead time must be >= 0"):
        _tf("parameters: {T: -1}\nplant: {transfer: \"1/(s+1)\", delay: T}\n"
            "controller: {transfer: \"1\"}\n", role="plant")

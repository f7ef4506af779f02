"""Build Loop values directly from polynomials for unit tests (no record needed)."""

from __future__ import annotations

import numpy as np

from loopvet.lti.loop import Loop
from loopvet.lti.rational import Rational

P = np.polynomial.polynomial


def make_loop(n, d, k: float = 1.0, delay: float = 0.0, controller=None) -> Loop:
    """Loop with plant n/d (ascending coefficients), unity controller unless given as
    (num, den), unity sensor and prefilter, gain k and dead time in the plant."""
    n = np.atleast_2d(np.asarray(n, float))
    d = np.atleast_2d(np.asarray(d, float))
    one = Rational.one(1)
    plant = Rational(n, d, np.array([delay]))
    ctrl = one if controller is None else Rational(np.atleast_2d(controller[0]).astype(float),
                                                   np.atleast_2d(controller[1]).astype(float),
                                                   np.zeros(1))
    from loopvet.lti import poly

    return Loop(samples=1, gain=np.array([k]), n=poly.mul(ctrl.num, n), d=poly.mul(ctrl.den, d),
                delay=np.array([delay]), plant=plant, controller=ctrl, sensor=one,
                prefilter=one)


def from_roots(zeros, poles, gain=1.0):
    n = P.polyfromroots(zeros).real * gain if len(zeros) else np.array([gain])
    return n, P.polyfromroots(poles).real

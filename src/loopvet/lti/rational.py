"""Batched rational functions with dead time: ``num(s) / den(s) * exp(-s * delay)``.

Coefficients ascending, leading sample axis (see :mod:`loopvet.lti.poly`). No common
factor is ever cancelled: products multiply numerators and denominators as they are.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import poly


@dataclass(frozen=True, slots=True)
class Rational:
    """``num / den * exp(-s*delay)`` per sample; num (S, n), den (S, m), delay (S,)."""

    num: np.ndarray
    den: np.ndarray
    delay: np.ndarray

    @property
    def samples(self) -> int:
        return int(max(self.num.shape[0], self.den.shape[0], self.delay.shape[0]))

    @staticmethod
    def one(samples: int = 1) -> Rational:
        return Rational(np.ones((samples, 1)), np.ones((samples, 1)), np.zeros(samples))

    def __mul__(self, other: Rational) -> Rational:
        return Rational(poly.mul(self.num, other.num), poly.mul(self.den, other.den),
                        self.delay + other.delay)

    def __add__(self, other: Rational) -> Rational:
        """Sum of two delay-free rationals (common denominator = product, or shared)."""
        if np.any(self.delay) or np.any(other.delay):
            raise ValueError("sum of rationals with dead time is not rational")
        if self.den.shape == other.den.shape and np.array_equal(self.den, other.den):
            return Rational(poly.add(self.num, other.num), self.den, self.delay)
        return Rational(poly.add(poly.mul(self.num, other.den), poly.mul(other.num, self.den)),
                        poly.mul(self.den, other.den), self.delay)

    def scaled(self, k: np.ndarray | float) -> Rational:
        return Rational(poly.scale(self.num, k), self.den, self.delay)

    def at(self, s: np.ndarray) -> np.ndarray:
        """Value at complex points ``s`` (shape (points,) or (S, points)) -> (S, points)."""
        ss = np.asarray(s, dtype=np.complex128)
        value = poly.evaluate(self.num, ss) / poly.evaluate(self.den, ss)
        return value * np.exp(-ss * self.delay[:, None]) if np.any(self.delay) else value


def pade(delay: np.ndarray, order: int) -> tuple[np.ndarray, np.ndarray]:
    """Diagonal Pade approximant of ``exp(-s*delay)`` of the given order, batched.

    Returns ascending (num, den), each shape (S, order+1), with
    ``den_k = (2n-k)! n! / ((2n)! k! (n-k)!) * delay**k`` and ``num_k = (-1)**k den_k``.

    Notes
    -----
    All-pass: |num(jw)/den(jw)| = 1 exactly; the phase matches ``-w*delay`` with error of
    order (w*delay)**(2n+1); as a rule of thumb (common practice) it is good to a few degrees
    up to ``w*delay`` of about ``n``. A zero delay gives num = den = [1, 0, ...].
    """
    from math import factorial

    t = np.asarray(delay, dtype=np.float64).reshape(-1)
    n = order
    c = np.array([factorial(2 * n - k) * factorial(n)
                  / (factorial(2 * n) * factorial(k) * factorial(n - k)) for k in range(n + 1)])
    den = c[None, :] * t[:, None] ** np.arange(n + 1)[None, :]
    num = den * ((-1.0) ** np.arange(n + 1))[None, :]
    return num, den

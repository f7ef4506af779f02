"""Closed-loop poles, nominal stability and pole-based metrics, batched over samples.

For loops with dead time the poles are those of a diagonal Pade approximation of
``exp(-s T)`` (order chosen by :func:`pade_order` unless the record fixes it).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..lti import poly
from ..lti.blocks import MAX_DEGREE
from ..lti.loop import Loop

#: a closed-loop pole counts as on or right of the imaginary axis when
#: Re p >= -STABILITY_RTOL * max(1, |p|)
STABILITY_RTOL = 1e-10


@dataclass(frozen=True, kw_only=True, slots=True)
class PoleSet:
    """Closed-loop poles (S, n) and how they were obtained."""

    poles: np.ndarray
    pade_order: int | None        # None: no dead time (exact)


def pade_order(loop: Loop, requested: int | None = None) -> int:
    """Pade order for pole-based metrics of a loop with dead time T.

    The order n is the smallest with n >= 3 * w_ref * T + 2, where w_ref is the largest
    magnitude among the finite non-zero open-loop poles and zeros and the gain crossover of
    the delay-free loop; bounded to [2, 10] and by the degree limit. Rule of thumb (common
    practice): a diagonal Pade approximant of order n is accurate to a few degrees of phase
    up to w T of about n, so this keeps the approximation good to beyond three times the
    fastest loop dynamics. ``requested`` (from ``delay_approximation``) wins.
    """
    if requested is not None:
        return requested
    t = float(loop.delay.max())
    if t <= 0:
        return 0
    w_ref = _reference_frequency(loop)
    n = int(math.ceil(3.0 * w_ref * t + 2.0))
    room = MAX_DEGREE - int(poly.effective_degree(loop.d).max())
    return max(2, min(n, 10, max(room, 2)))


def _reference_frequency(loop: Loop) -> float:
    mags: list[float] = []
    for arr in (loop.n[:1], loop.d[:1]):
        deg = int(poly.effective_degree(arr)[0])
        if deg > 0:
            r = poly.roots(arr[:, : deg + 1])[0]
            mags.extend(float(abs(x)) for x in r if abs(x) > 1e-12)
    # gain crossovers of the delay-free loop: |K N(jw)|^2 = |D(jw)|^2, a polynomial in w
    k = float(loop.gain[0])
    w = np.logspace(-6, 6, 1201)
    mag = np.abs(loop.open_loop(1j * w, np.array([k]))[0])
    cross = np.nonzero(np.diff(np.sign(mag - 1.0)))[0]
    if cross.size:
        mags.append(float(w[cross[-1] + 1]))
    return max(mags) if mags else 1.0 / max(float(loop.delay.max()), 1e-12)


def closed_loop_poles(loop: Loop, gain: np.ndarray | float | None = None,
                      order: int | None = None) -> PoleSet:
    """Roots of D + K N (or of its Pade version), shape (S, n).

    Notes
    -----
    Batched companion-matrix eigenvalues (:func:`loopvet.lti.poly.roots`); see there for
    accuracy. Samples whose characteristic polynomial loses degree (the leading coefficient
    of D + K N vanishes, i.e. K equals -d_n/n_n for a biproper loop) raise ValueError: the
    loop is then not well posed.
    """
    if loop.has_delay:
        n = pade_order(loop, order)
        char = loop.characteristic_pade(n, gain)
        dead = loop.delay > 0
        if dead.all():
            return PoleSet(poles=poly.roots(poly.trim_common(char)), pade_order=n)
        # a sweep may reach zero dead time on some samples: those keep their exact poles,
        # padded with NaN (absent) to the batch's width
        free = poly.roots(poly.trim_common(loop.characteristic(gain)[~dead]))
        with_pade = poly.roots(poly.trim_common(char[dead]))
        out = np.full((loop.samples, max(free.shape[1], with_pade.shape[1])), np.nan + 0j)
        out[np.nonzero(~dead)[0], : free.shape[1]] = free
        out[np.nonzero(dead)[0], : with_pade.shape[1]] = with_pade
        return PoleSet(poles=out, pade_order=n)
    return PoleSet(poles=poly.roots(poly.trim_common(loop.characteristic(gain))),
                   pade_order=None)


def is_stable(poles: np.ndarray) -> np.ndarray:
    """Per sample: every pole strictly in the open left half-plane (see STABILITY_RTOL)."""
    if poles.shape[1] == 0:
        return np.ones(poles.shape[0], dtype=bool)
    margin = -STABILITY_RTOL * np.maximum(1.0, np.abs(poles))
    with np.errstate(invalid="ignore"):
        return np.all((poles.real < margin) | np.isnan(poles.real), axis=1)


def pole_metrics(poles: np.ndarray) -> dict[str, np.ndarray]:
    """``damping_ratio`` (min -Re p/|p|), ``decay_rate`` (min -Re p), ``natural_frequency``
    (max |p|) per sample; NaN entries are padding (no pole). A pole at the origin has
    damping ratio taken as 0 (integrating
    mode) for a closed loop; an empty pole set gives inf/inf/0."""
    if poles.shape[1] == 0:
        s = poles.shape[0]
        return {"damping_ratio": np.full(s, np.inf), "decay_rate": np.full(s, np.inf),
                "natural_frequency": np.zeros(s)}
    mag = np.abs(poles)
    absent = np.isnan(mag)                       # padding of a ragged batch
    with np.errstate(invalid="ignore", divide="ignore"):
        zeta = np.where(mag > 0, -poles.real / np.where(mag > 0, mag, 1.0), 0.0)
    return {"damping_ratio": np.where(absent, np.inf, zeta).min(axis=1),
            "decay_rate": np.where(absent, np.inf, -poles.real).min(axis=1),
            "natural_frequency": np.where(absent, 0.0, mag).max(axis=1)}

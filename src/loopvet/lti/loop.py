"""Loop assembly: L(s) = K C(s) G(s) H(s) exp(-s T) and the closed-loop maps.

Writing the delay-free part of C G H as N(s)/D(s), the characteristic function is
``D(s) + K N(s) exp(-s T)``. All arrays carry the leading sample axis; coefficients are
ascending. Nothing is cancelled: a pole of one block that a zero of another nearly
cancels stays in D + K N (and is reported by :func:`near_cancellations`).

Closed-loop maps (r: reference, d: load disturbance at the plant input, y: output,
u: controller output), each as ``P(s) exp(-s tau) / (A(s) + B(s) exp(-s T))``:

* ``reference``   y/r = F K C G / (1 + L)   (prefilter F on the reference path only)
* ``sensitivity`` S   = 1 / (1 + L)
* ``complementary`` T_c = L / (1 + L)      (complementary sensitivity, at the error point)
* ``control``     u/(noise) = K C / (1 + L)
* ``load``        y/d = G / (1 + L)
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from ..record.model import Record
from . import poly
from .blocks import MAX_DEGREE, block_transfer
from .rational import Rational, pade


@dataclass(frozen=True, slots=True)
class ClosedLoopMap:
    """``P(s) exp(-s tau) / (A(s) + B(s) exp(-s T))`` per sample."""

    p: np.ndarray
    tau: np.ndarray
    a: np.ndarray
    b: np.ndarray
    delay: np.ndarray

    def at(self, s: np.ndarray) -> np.ndarray:
        ss = np.asarray(s, dtype=np.complex128)
        den = poly.evaluate(self.a, ss) + poly.evaluate(self.b, ss) * np.exp(
            -ss * self.delay[:, None])
        return poly.evaluate(self.p, ss) * np.exp(-ss * self.tau[:, None]) / den

    def magnitude(self, w: np.ndarray) -> np.ndarray:
        """|m(jw)| at real frequencies ``w`` ((points,) or (S, points)), in real arithmetic
        (:func:`loopvet.lti.poly.on_axis`); the output delay tau does not change it."""
        ar, ai = poly.on_axis(self.a, w)
        br, bi = poly.on_axis(self.b, w)
        pr, pi = (ar, ai) if self.p is self.a else (br, bi) if self.p is self.b else \
            poly.on_axis(self.p, w)
        if np.any(self.delay):
            wt = np.asarray(w, dtype=np.float64) * self.delay[:, None]
            c, sn = np.cos(wt), np.sin(wt)
            ar, ai = ar + br * c + bi * sn, ai + bi * c - br * sn
        else:
            ar, ai = ar + br, ai + bi
        return np.sqrt((pr * pr + pi * pi) / (ar * ar + ai * ai))

    def envelope(self, w: np.ndarray) -> np.ndarray:
        """|P| / (|A| - |B|) at s = jw: an upper bound of |m(jw)| whatever the phase of the
        delay term; inf where |B| >= |A|."""
        pr, pi = poly.on_axis(self.p, w)
        ar, ai = poly.on_axis(self.a, w)
        br, bi = poly.on_axis(self.b, w)
        gap = np.hypot(ar, ai) - np.hypot(br, bi)
        return np.where(gap > 0, np.hypot(pr, pi) / np.where(gap > 0, gap, 1.0), np.inf)

    def rows(self, idx: np.ndarray | slice) -> ClosedLoopMap:
        """The samples ``idx``; P stays the same array as A or B when it was (so an
        evaluation of P, A and B can share it)."""
        a, b = self.a[idx], self.b[idx]
        p = a if self.p is self.a else b if self.p is self.b else self.p[idx]
        return ClosedLoopMap(p=p, tau=self.tau[idx], a=a, b=b, delay=self.delay[idx])

    def loop_ratio(self, w: np.ndarray) -> np.ndarray:
        """|B/A| at s = jw (the loop gain magnitude for these maps)."""
        ar, ai = poly.on_axis(self.a, w)
        br, bi = poly.on_axis(self.b, w)
        return np.hypot(br, bi) / np.hypot(ar, ai)


@dataclass(frozen=True, slots=True)
class Loop:
    """An assembled loop for S samples.

    ``n``/``d``: N and D of the delay-free open loop C G H, shapes (S, .) ascending;
    ``delay``: T_total (S,); ``gain``: nominal K per sample (S,); ``blocks``: per role.
    """

    samples: int
    gain: np.ndarray
    n: np.ndarray
    d: np.ndarray
    delay: np.ndarray
    plant: Rational
    controller: Rational
    sensor: Rational
    prefilter: Rational

    @property
    def has_delay(self) -> bool:
        return bool(np.any(self.delay > 0))

    def characteristic(self, gain: np.ndarray | float | None = None) -> np.ndarray:
        """Delay-free characteristic polynomial D + K N (S, .)."""
        k = self.gain if gain is None else np.broadcast_to(np.asarray(gain, float),
                                                           (self.samples,))
        return poly.add(self.d, poly.scale(self.n, k))

    def characteristic_pade(self, order: int,
                            gain: np.ndarray | float | None = None) -> np.ndarray:
        """D Pd + K N Pn with the order-``order`` Pade approximant Pn/Pd of exp(-s T)."""
        k = self.gain if gain is None else np.broadcast_to(np.asarray(gain, float),
                                                           (self.samples,))
        pn, pd = pade(self.delay, order)
        return poly.add(poly.mul(self.d, pd), poly.scale(poly.mul(self.n, pn), k))

    def open_loop(self, s: np.ndarray, gain: np.ndarray | None = None) -> np.ndarray:
        """L at complex points, delay exact, shape (S, points)."""
        k = self.gain if gain is None else gain
        ss = np.asarray(s, dtype=np.complex128)
        value = poly.evaluate(self.n, ss) / poly.evaluate(self.d, ss) * k[:, None]
        return value * np.exp(-ss * self.delay[:, None])

    def _den(self) -> tuple[np.ndarray, np.ndarray]:
        return self.d, poly.scale(self.n, self.gain)

    def reference(self) -> ClosedLoopMap:
        c, g, h, f = self.controller, self.plant, self.sensor, self.prefilter
        p = poly.scale(poly.mul(poly.mul(poly.mul(f.num, c.num), g.num), h.den), self.gain)
        a, b = self._den()
        return ClosedLoopMap(p=p, tau=f.delay + c.delay + g.delay,
                             a=poly.mul(a, f.den), b=poly.mul(b, f.den), delay=self.delay)

    def sensitivity(self) -> ClosedLoopMap:
        a, b = self._den()
        return ClosedLoopMap(p=self.d, tau=np.zeros(self.samples), a=a, b=b, delay=self.delay)

    def complementary(self) -> ClosedLoopMap:
        a, b = self._den()
        return ClosedLoopMap(p=b, tau=self.delay, a=a, b=b, delay=self.delay)

    def control(self) -> ClosedLoopMap:
        c, g, h = self.controller, self.plant, self.sensor
        p = poly.scale(poly.mul(poly.mul(c.num, g.den), h.den), self.gain)
        a, b = self._den()
        return ClosedLoopMap(p=p, tau=c.delay, a=a, b=b, delay=self.delay)

    def load(self) -> ClosedLoopMap:
        c, g, h = self.controller, self.plant, self.sensor
        p = poly.mul(poly.mul(g.num, c.den), h.den)
        a, b = self._den()
        return ClosedLoopMap(p=p, tau=g.delay, a=a, b=b, delay=self.delay)


def assemble(record: Record, values: Mapping[str, np.ndarray], samples: int,
             gain: np.ndarray | None = None) -> Loop:
    """Build the loop of ``record`` for ``samples`` parameter samples.

    Raises RecordInvalid (located) when a block cannot be formed or the loop exceeds the
    degree limit of the record format.
    """
    blocks = {b.role: block_transfer(record, b, values, samples) for b in record.blocks}
    c, g, h = blocks["controller"], blocks["plant"], blocks["sensor"]
    n = poly.mul(poly.mul(c.num, g.num), h.num)
    d = poly.mul(poly.mul(c.den, g.den), h.den)
    deg = int(poly.effective_degree(d).max())
    if deg > MAX_DEGREE:
        from ..record.errors import RecordInvalid
        from ..record.params import problem

        raise RecordInvalid([problem(record, "plant", f"the assembled loop has degree {deg}; "
                                     f"the record format allows at most {MAX_DEGREE}")])
    k = np.full(samples, record.gain.nominal) if gain is None else np.asarray(gain, float)
    return Loop(samples=samples, gain=k, n=poly.trim_common(n), d=poly.trim_common(d),
                delay=c.delay + g.delay + h.delay, plant=g, controller=c, sensor=h,
                prefilter=blocks["prefilter"])


@dataclass(frozen=True, kw_only=True, slots=True)
class Cancellation:
    pole: complex
    zero: complex
    pole_block: str
    zero_block: str
    distance: float


def near_cancellations(loop: Loop, rtol: float = 1e-3,
                       sample: int = 0) -> list[Cancellation]:
    """Open-loop pole/zero pairs within ``rtol`` of each other.

    A pole p and zero z count as near-cancelling when |p - z| <= rtol * max(|p|, |z|)
    (for roots at the origin: both within 1e-12). Pairs within one block count too: the
    loop keeps both roots, and the cancelled mode stays a closed-loop pole for every K.
    Each zero pairs with at most one pole; conjugate pairs are listed once (upper half
    plane). Evaluated for one sample.
    """
    roles = {"controller": loop.controller, "plant": loop.plant, "sensor": loop.sensor}
    zeros: list[tuple[str, complex]] = []
    poles: list[tuple[str, complex]] = []
    for role, tf in roles.items():
        for arr, bag in ((tf.num, zeros), (tf.den, poles)):
            row = arr[sample:sample + 1]
            if int(poly.effective_degree(row)[0]) > 0:
                row = row[:, : int(poly.effective_degree(row)[0]) + 1]
                bag.extend((role, complex(r)) for r in poly.roots(row)[0])
    out: list[Cancellation] = []
    used: set[int] = set()
    for prole, p in poles:
        for j, (zrole, z) in enumerate(zeros):
            if j in used:
                continue
            dist = abs(p - z)
            scale = max(abs(p), abs(z))
            if dist <= rtol * scale or (scale < 1e-12 and dist < 1e-12):
                if p.imag < 0 or (p.imag == 0 and z.imag < 0):
                    continue
                out.append(Cancellation(pole=p, zero=z, pole_block=prole, zero_block=zrole,
                                        distance=dist))
                used.add(j)
                break
    return out


def with_gains(loop: Loop, gains: np.ndarray) -> Loop:
    """The loop of sample 0 repeated for each gain in ``gains`` (a batch over K)."""
    g = np.asarray(gains, dtype=np.float64).reshape(-1)
    count = g.size

    def rep(a: np.ndarray) -> np.ndarray:
        return np.repeat(a[:1], count, axis=0)

    def rep_tf(tf: Rational) -> Rational:
        return Rational(rep(tf.num), rep(tf.den), rep(tf.delay))

    return Loop(samples=count, gain=g, n=rep(loop.n), d=rep(loop.d), delay=rep(loop.delay),
                plant=rep_tf(loop.plant), controller=rep_tf(loop.controller),
                sensor=rep_tf(loop.sensor), prefilter=rep_tf(loop.prefilter))


def rows(loop: Loop, idx: np.ndarray | slice) -> Loop:
    """The samples ``idx`` of ``loop`` (a sub-batch; blocks are indexed alike)."""

    def tf(r: Rational) -> Rational:
        return Rational(r.num[idx], r.den[idx], r.delay[idx])

    gain = loop.gain[idx]
    return Loop(samples=int(np.asarray(gain).shape[0]), gain=gain, n=loop.n[idx],
                d=loop.d[idx], delay=loop.delay[idx], plant=tf(loop.plant),
                controller=tf(loop.controller), sensor=tf(loop.sensor),
                prefilter=tf(loop.prefilter))

"""Sampled-data loop assembly: L(z) = K C(z) z^-d GH_zoh(z), and its w-plane image.

The continuous part of the loop, plant times sensor with the dead time of the controller,
plant and sensor blocks (a controller block's ``delay`` acts on the held output, i.e. as an
actuator delay), is discretised as ONE block behind a zero-order hold
(:func:`loopvet.lti.discrete.zoh`). The controller is discretised by
``sampling.controller_method`` or taken as written in z; ``computation_delay`` adds z^-d.
The prefilter is discretised like the controller (a prefilter ``delay`` must be a whole
number of periods). Plant and sensor must be written in s.

Polynomials are ascending in z with the leading sample axis. ``w`` is the same loop in the
w-plane (z = (1 + v)/(1 - v)), delay-free, on which the continuous engine runs unchanged.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, replace

import numpy as np

from ..record.errors import RecordInvalid
from ..record.model import Block, Record, Transfer
from ..record.params import problem
from . import discrete, poly
from .blocks import MAX_DEGREE, block_transfer
from .loop import ClosedLoopMap, Loop
from .rational import Rational


@dataclass(frozen=True, slots=True)
class DigitalLoop:
    """A sampled-data loop for S samples (all arrays (S, .), ascending in z).

    ``c_num/c_den``: controller with the computation delay (C(s) discretised, times z^-d);
    ``gh_num/gh_den``: ZOH of plant*sensor with the loop dead time; ``nz = c_num gh_num``,
    ``dz = c_den gh_den``. ``gy_num/gy_den``: ZOH of the plant alone with the controller and
    plant dead time (the output y at the sample instants); ``gl_num``/``gl_shift``: ZOH of
    plant*sensor with the plant and sensor dead time only (load path), whose denominator is
    ``gh_den`` divided by ``z^gl_shift``. ``plant``/``sensor``: continuous blocks (s);
    ``u_delay``, ``d_delay``: dead time from the hold output and from the plant input to y.
    """

    samples: int
    period: float
    gain: np.ndarray
    nz: np.ndarray
    dz: np.ndarray
    c_num: np.ndarray
    c_den: np.ndarray
    gh_num: np.ndarray
    gh_den: np.ndarray
    gy_num: np.ndarray
    gy_den: np.ndarray
    gl_num: np.ndarray
    gl_shift: np.ndarray
    f_num: np.ndarray
    f_den: np.ndarray
    plant: Rational
    sensor: Rational
    u_delay: np.ndarray
    d_delay: np.ndarray

    @property
    def has_delay(self) -> bool:
        return False

    def characteristic(self, gain: np.ndarray | float | None = None) -> np.ndarray:
        k = self.gain if gain is None else np.broadcast_to(np.asarray(gain, float),
                                                           (self.samples,))
        return poly.add(self.dz, poly.scale(self.nz, k))

    def w_degree(self) -> int:
        return max(self.nz.shape[1], self.dz.shape[1]) - 1

    def w_loop(self) -> Loop:
        """The loop in the w-plane: n_w, d_w from the common nominal degree of dz."""
        deg = self.w_degree()
        nw = discrete.to_w_plane(self.nz, deg)
        dw = discrete.to_w_plane(self.dz, deg)
        one = Rational.one(self.samples)
        return Loop(samples=self.samples, gain=self.gain, n=nw, d=dw,
                    delay=np.zeros(self.samples), plant=Rational(nw, dw, np.zeros(self.samples)),
                    controller=one, sensor=one, prefilter=one)

    def w_map(self, p: np.ndarray, a: np.ndarray, b: np.ndarray) -> ClosedLoopMap:
        """P/(A + B) given in z, mapped to the w-plane with one common degree."""
        deg = max(p.shape[1], a.shape[1], b.shape[1]) - 1
        zero = np.zeros(self.samples)
        return ClosedLoopMap(p=discrete.to_w_plane(p, deg), tau=zero,
                             a=discrete.to_w_plane(a, deg), b=discrete.to_w_plane(b, deg),
                             delay=zero)

    def _den(self) -> tuple[np.ndarray, np.ndarray]:
        return self.dz, poly.scale(self.nz, self.gain)

    def sensitivity(self) -> ClosedLoopMap:
        a, b = self._den()
        return self.w_map(self.dz, a, b)

    def complementary(self) -> ClosedLoopMap:
        a, b = self._den()
        return self.w_map(b, a, b)

    def control(self) -> ClosedLoopMap:
        a, b = self._den()
        return self.w_map(poly.scale(poly.mul(self.c_num, self.gh_den), self.gain), a, b)

    def reference(self) -> ClosedLoopMap:
        """y/r at the sample instants: F K C Gy / (1 + L)."""
        a, b = self._den()
        p = poly.scale(poly.mul(poly.mul(poly.mul(self.f_num, self.c_num), self.gh_den),
                                self.gy_num), self.gain)
        outer = poly.mul(self.f_den, self.gy_den)
        return self.w_map(p, poly.mul(a, outer), poly.mul(b, outer))


def _in_z(block: Block) -> bool:
    return isinstance(block.form, Transfer) and block.form.expr.variable == "z"


def _fail(record: Record, key: str, message: str) -> RecordInvalid:
    return RecordInvalid([problem(record, key, message)])


def assemble_digital(record: Record, values: Mapping[str, np.ndarray], samples: int,
                     gain: np.ndarray | None = None) -> DigitalLoop:
    """Build the sampled-data loop of ``record`` (which has ``sampling``) for ``samples``.

    Raises RecordInvalid (located) for a plant or sensor written in z, a prefilter delay
    that is not a whole number of periods, or a z-domain loop above the degree limit.
    """
    sampling = record.sampling
    assert sampling is not None
    period = sampling.period
    for role in ("plant", "sensor"):
        if _in_z(getattr(record, role)):
            raise _fail(record, f"{role}.transfer", f"a {role} written in z is not analysed: "
                        "write the continuous plant and sensor in s; loopvet discretises "
                        "them with a zero-order hold")
    bt = {b.role: block_transfer(record, b, values, samples) for b in record.blocks}
    c, g, h, f = bt["controller"], bt["plant"], bt["sensor"], bt["prefilter"]
    gh_n, gh_d = poly.mul(g.num, h.num), poly.mul(g.den, h.den)
    gh_n, gh_d = poly.trim_common(gh_n), poly.trim_common(gh_d)
    try:
        ghz_n, ghz_d = discrete.zoh(gh_n, gh_d, c.delay + g.delay + h.delay, period)
        gl_n, gl_d = discrete.zoh(gh_n, gh_d, g.delay + h.delay, period)
        gy_n, gy_d = discrete.zoh(poly.trim_common(g.num), poly.trim_common(g.den),
                                  c.delay + g.delay, period)
    except ValueError as exc:
        raise _fail(record, "plant", f"the plant cannot be discretised for these parameter "
                    f"values: {exc}") from None

    def to_z(tf: Rational, block: Block) -> tuple[np.ndarray, np.ndarray]:
        if _in_z(block):
            return tf.num, tf.den
        try:
            return discrete.discretise_controller(tf.num, tf.den, sampling.controller_method,
                                                  period, sampling.prewarp_frequency)
        except ValueError as exc:
            raise _fail(record, block.role, f"cannot discretise: {exc}") from None

    cz_n, cz_d = to_z(c, record.controller)
    cz_n, cz_d = discrete.delay_periods(cz_n, cz_d, sampling.computation_delay)
    fz_n, fz_d = to_z(f, record.prefilter)
    fm, flam = discrete.split_delay(f.delay, period)
    if np.any(flam > 0) or np.any(fm != fm[0]):
        raise _fail(record, "prefilter.delay", "in a sampled loop a prefilter delay must be "
                    "a whole number of sampling periods")
    fz_n, fz_d = discrete.delay_periods(fz_n, fz_d, int(fm[0]))
    nz = poly.trim_common(poly.mul(cz_n, ghz_n))
    dz = poly.trim_common(poly.mul(cz_d, ghz_d))
    deg = int(poly.effective_degree(dz).max())
    if deg > MAX_DEGREE:
        raise _fail(record, "sampling.period", f"the sampled loop has degree {deg} in z (dead "
                    f"time counts one per period); the record format allows at most "
                    f"{MAX_DEGREE}: lengthen the period or shorten the dead time")
    low = lambda a: np.argmax(a != 0, axis=1)  # noqa: E731 - lowest non-zero power
    k = np.full(samples, record.gain.nominal) if gain is None else np.asarray(gain, float)
    return DigitalLoop(samples=samples, period=period, gain=k, nz=nz, dz=dz,
                       c_num=cz_n, c_den=cz_d, gh_num=ghz_n, gh_den=ghz_d, gy_num=gy_n,
                       gy_den=gy_d, gl_num=gl_n, gl_shift=low(ghz_d) - low(gl_d),
                       f_num=fz_n, f_den=fz_d, plant=g, sensor=h,
                       u_delay=c.delay + g.delay, d_delay=g.delay.copy())


def continuous_record(record: Record) -> Record | None:
    """The record's continuous design (sampling removed), or None when a block is in z."""
    if any(_in_z(b) for b in record.blocks):
        return None
    return replace(record, sampling=None)


def with_gains(loop: DigitalLoop, gains: np.ndarray) -> DigitalLoop:
    """Sample 0 of ``loop`` repeated for each gain (a batch over K)."""
    g = np.asarray(gains, dtype=np.float64).reshape(-1)
    return rows(replace(loop, gain=np.full(loop.samples, g[0])), np.zeros(g.size, int),
                gain=g)


def rows(loop: DigitalLoop, idx: np.ndarray | slice, gain: np.ndarray | None = None
         ) -> DigitalLoop:
    """The samples ``idx`` of ``loop``."""

    def tf(r: Rational) -> Rational:
        return Rational(r.num[idx], r.den[idx], r.delay[idx])

    k = loop.gain[idx] if gain is None else gain
    return DigitalLoop(samples=int(np.asarray(k).shape[0]), period=loop.period, gain=k,
                       nz=loop.nz[idx], dz=loop.dz[idx], c_num=loop.c_num[idx],
                       c_den=loop.c_den[idx], gh_num=loop.gh_num[idx],
                       gh_den=loop.gh_den[idx], gy_num=loop.gy_num[idx],
                       gy_den=loop.gy_den[idx], gl_num=loop.gl_num[idx],
                       gl_shift=loop.gl_shift[idx], f_num=loop.f_num[idx],
                       f_den=loop.f_den[idx], plant=tf(loop.plant), sensor=tf(loop.sensor),
                       u_delay=loop.u_delay[idx], d_delay=loop.d_delay[idx])

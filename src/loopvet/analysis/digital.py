"""z-domain analysis of sampled-data loops with the continuous engine, batched over samples.

Method
------
Stability boundary. The closed-loop poles are the roots of D(z) + K N(z); the boundary is
the unit circle. The bilinear map z = (1 + v)/(1 - v) sends the unit circle to the imaginary
axis and its inside to the open left half-plane, and turns D, N (common nominal degree n)
into polynomials D_w, N_w in v (:func:`loopvet.lti.discrete.to_w_plane`). The exact
polynomial elimination of :mod:`loopvet.analysis.gain` then gives every real K with a root
at v = j nu, i.e. at z = e^{j w T} with w = (2/T) atan(nu); a crossing "at infinity" in v is
a root at z = -1, reported at the Nyquist frequency pi/T. Stable intervals are classified by
counting w-plane roots in the closed right half-plane, which equals counting z-roots on or
outside the unit circle. An open-loop pole at z = -1 makes D_w lose degree: its crossing at
K = 0 is not listed (gain margins are unaffected: the interval side that reaches 0 is
unbounded for the margin by the record format's definition).

Frequency metrics. On the unit circle |L|, arg L, |S|, |T|, |K C S| take the same values at
e^{j w T} as the w-plane images at v = j tan(w T/2), so crossovers, lags, peaks and the
-3 dB point are found in the w-plane (:mod:`loopvet.analysis.frequency`, same accuracy) and
the frequencies mapped back; nu -> infinity is the Nyquist frequency, so peaks include it.
The delay margin is lag / w with the physical crossover w. ``bandwidth`` is inf when the
reference response stays above -3 dB up to the Nyquist frequency.

Pole metrics. Each z-pole maps to s = ln(z)/T (principal branch: |Im s| <= pi/T). A pole at
z = 0 (|z| <= 1e-9: a deadbeat mode, s = -infinity) is left out of the three metrics.

Time responses. At the sample instants the loop is a difference equation: the hold input is
u = F K C/(1 + L) r for a reference step and u = -K C GH_load/(1 + L) d for a step load at
the plant input (both exact: a step is piecewise constant, so its effect at the samples is
the ZOH equivalent), computed by a batched recursion. The continuous plant output between
the samples is then obtained exactly by propagating the plant's state over each period in
sub-intervals (SUBSTEPS per period plus the instants where the delayed held input and the
delayed load step switch), each with one matrix exponential; y is evaluated at every
sub-interval start. Time metrics use this continuous output (so inter-sample overshoot
counts). Final values are exact (steady state of the hybrid loop).
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np
from scipy.linalg import expm
from scipy.optimize import brentq

from ..lti import discrete, poly
from ..lti.digital import DigitalLoop
from ..metrics import METRICS
from . import frequency as fq
from .evaluate import FREQUENCY_KEYS, GAIN_KEYS, PEAK_KEYS, TIME_KEYS, Evaluation
from .gain import Crossing, GainIntervals, crossing_arrays, margins_at, stable_gain_intervals
from .poles import pole_metrics
from .regions import holds
from .time import StepResponse, disturbance_metrics, step_metrics

#: a closed-loop z-pole counts as on or outside the unit circle when |z| >= 1 - UNIT_RTOL
UNIT_RTOL = 1e-10
#: |z| at or below which a pole is a deadbeat mode (s = -infinity)
DEADBEAT = 1e-9
#: sub-intervals per sampling period for the continuous output between samples
SUBSTEPS = 8
#: bounds of the simulated number of periods
MIN_PERIODS, MAX_PERIODS = 40, 4000


# ----------------------------------------------------------------------------- stability

def z_poles(loop: DigitalLoop, gain: np.ndarray | float | None = None) -> np.ndarray:
    """Closed-loop poles in z, (S, n) padded with NaN (ragged degrees allowed)."""
    return poly.roots_ragged(loop.characteristic(gain))


def z_stable(poles: np.ndarray) -> np.ndarray:
    with np.errstate(invalid="ignore"):
        return np.all(np.isnan(poles.real) | (np.abs(poles) < 1.0 - UNIT_RTOL), axis=1)


def s_equivalent(poles: np.ndarray, period: float) -> np.ndarray:
    """s = ln(z)/T (principal branch), NaN for padding and deadbeat poles."""
    with np.errstate(divide="ignore", invalid="ignore"):
        s = np.log(np.where(np.abs(poles) > DEADBEAT, poles, np.nan)) / period
    return np.where(np.isfinite(s), s, np.nan + 0j)


def _omega(nu: np.ndarray, period: float) -> np.ndarray:
    return np.where(np.isinf(nu), math.pi / period, discrete.nu_to_omega(nu, period))


def gain_intervals(loop: DigitalLoop) -> list[GainIntervals]:
    """Exact stable intervals of K per sample (see the module notes); crossing frequencies
    are physical (rad/s), pi/T for a root at z = -1."""
    w = loop.w_loop()
    out = []
    for gi in stable_gain_intervals(w.n, w.d):
        cr = tuple(Crossing(gain=c.gain, frequency=float(_omega(np.array(c.frequency),
                                                                loop.period)))
                   for c in gi.crossings)
        out.append(GainIntervals(crossings=cr, stable=gi.stable,
                                 fixed_axis_pole=gi.fixed_axis_pole))
    return out


# ------------------------------------------------------------------------------ regions

def metric_at_gains(key: str, nz: np.ndarray, dz: np.ndarray, gains: np.ndarray,
                    period: float) -> np.ndarray:
    """Pole metric of D + K N (z-domain, 1-D polynomials) at each gain, via s = ln(z)/T."""
    char = poly.add(np.broadcast_to(dz, (gains.size, dz.shape[0])),
                    poly.scale(np.broadcast_to(nz, (gains.size, nz.shape[0])), gains))
    return pole_metrics(s_equivalent(poly.roots_ragged(char), period))[key]


#: points per boundary curve for the sign search of Im(D conj N)
CURVE_POINTS = 4000


def _curves(key: str, bound: float, period: float) -> tuple[list, list[float]]:
    """Boundary curves z(p) (callables on arrays of p in [0, 1]) and real boundary points."""
    t = period
    if key == "decay_rate":
        r = math.exp(-bound * t)
        return [lambda p: r * np.exp(1j * math.pi * p)], [r, -r]
    if key == "damping_ratio":
        zeta = min(max(bound, 1e-9), 1 - 1e-9)
        c = math.sqrt(1 - zeta * zeta)
        top = math.pi / (t * c)
        return ([lambda p: np.exp(top * p * t * (-zeta + 1j * c))],
                [1.0, -math.exp(-zeta * math.pi / c)])
    if key == "natural_frequency":
        wn = bound
        real = [math.exp(wn * t), math.exp(-wn * t)]
        if wn * t <= math.pi:
            return [lambda p: np.exp(wn * t * np.exp(1j * math.pi * p))], real
        phi1 = math.asin(math.pi / (wn * t))
        x = math.sqrt(wn * wn - (math.pi / t) ** 2)
        real += [-math.exp(x * t), -math.exp(-x * t)]
        return ([lambda p: np.exp(wn * t * np.exp(1j * phi1 * p)),
                 lambda p: np.exp(wn * t * np.exp(1j * (math.pi - phi1 + phi1 * p)))], real)
    raise ValueError(key)


def boundary_gains(key: str, bound: float, nz: np.ndarray, dz: np.ndarray,
                   period: float) -> list[float]:
    """Gains at which a closed-loop z-pole lies on the region boundary (mapped through
    s = ln(z)/T). Sign changes of Im(D(z(p)) conj N(z(p))) along each curve on
    CURVE_POINTS points, refined by Brent's method to 1e-14 in p; the real boundary points
    directly. A boundary the locus only touches between two grid points can be missed."""
    curves, real = _curves(key, bound, period)
    out: list[float] = []

    def gain_at(z: complex) -> float | None:
        nv = complex(np.polyval(nz[::-1], z))
        dv = complex(np.polyval(dz[::-1], z))
        if abs(nv) <= 1e-14 * (abs(dv) + 1e-300):
            return None
        k = -dv / nv
        return float(k.real) if abs(k.imag) <= 1e-6 * max(1.0, abs(k.real)) else None

    for zr in real:
        k = gain_at(zr)
        if k is not None:
            out.append(k)
    p = np.linspace(0.0, 1.0, CURVE_POINTS)[1:-1]
    for curve in curves:
        def f(x: float, curve=curve) -> float:
            z = complex(curve(np.array([x]))[0])
            return float((np.polyval(dz[::-1], z) * np.conj(np.polyval(nz[::-1], z))).imag)

        zc = curve(p)
        vals = (poly.evaluate(dz[None, :], zc)[0] * np.conj(poly.evaluate(nz[None, :], zc)[0])
                ).imag
        for j in np.nonzero(np.sign(vals[:-1]) * np.sign(vals[1:]) < 0)[0]:
            x = brentq(f, float(p[j]), float(p[j + 1]), xtol=1e-14)
            k = gain_at(complex(curve(np.array([x]))[0]))
            if k is not None:
                out.append(k)
    dn = int(poly.effective_degree(dz[None, :])[0])
    nn = int(poly.effective_degree(nz[None, :])[0])
    if dn == nn and nn >= 0:
        out.append(float(-dz[dn] / nz[nn]))     # the degree of D + K N drops there
    return sorted(out)


def region_intervals(key: str, req_min: float | None, req_max: float | None,
                     nz: np.ndarray, dz: np.ndarray, period: float
                     ) -> tuple[list[tuple[float, float]], list[float]]:
    """Closed intervals of K where the z-domain pole requirement holds (D-decomposition on
    the mapped region boundary, each interval classified at one interior gain)."""
    from .gain import _test_points

    bound = req_min if key in ("damping_ratio", "decay_rate") else req_max
    assert bound is not None
    edges: list[float] = []
    for g in boundary_gains(key, bound, nz, dz, period):
        if not edges or abs(g - edges[-1]) > 1e-12 * max(1.0, abs(g)):
            edges.append(g)
    pts = np.asarray(_test_points(edges))
    ok = holds(key, metric_at_gains(key, nz, dz, pts, period), req_min, req_max)
    full = [-math.inf, *edges, math.inf]
    out: list[tuple[float, float]] = []
    for j, good in enumerate(ok):
        if good:
            lo, hi = full[j], full[j + 1]
            out = out[:-1] + [(out[-1][0], hi)] if out and out[-1][1] == lo else \
                out + [(lo, hi)]
    return out, edges


# ------------------------------------------------------------------------- time domain

@dataclass(frozen=True, slots=True)
class SampledResponses:
    """Responses at the sample instants and the continuous output between them.

    ``k``: (N,) sample index; ``y_ref``/``y_load``: (S, N) plant output at the samples;
    ``u_ref``/``u_load``: (S, N) held controller output; ``ripple_ref``/``ripple_load``:
    (S,) largest |y(t) - y_final| between samples after the sampled response has entered
    and stayed in the settling band (for the reference step as a fraction of |y_final|),
    NaN when the samples never settle in the horizon.
    """

    period: float
    y_ref: np.ndarray
    u_ref: np.ndarray
    y_load: np.ndarray
    u_load: np.ndarray
    ripple_ref: np.ndarray
    ripple_load: np.ndarray


def _filter(num: np.ndarray, den: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Batched difference equation of num(z)/den(z) (ascending, deg num <= deg den) driven
    by x (S, N), zero initial state."""
    s, n_pts = x.shape
    deg = poly.effective_degree(den)
    n = int(deg.max())
    if np.any(deg != n):
        raise ValueError("denominator degree differs between samples")
    a = den[:, : n + 1][:, ::-1]                      # a[:, j] multiplies z^(n-j) -> delay j
    b = np.zeros((s, n + 1))
    w = min(num.shape[1], n + 1)
    b[:, n + 1 - w:] = num[:, :w][:, ::-1]
    a0 = a[:, 0]
    y = np.zeros((s, n_pts))
    xp = np.concatenate([np.zeros((s, n)), x], axis=1)
    yp = np.zeros((s, n + n_pts))
    for k in range(n_pts):
        acc = np.einsum("ij,ij->i", b, xp[:, k:k + n + 1][:, ::-1])
        if n:
            acc -= np.einsum("ij,ij->i", a[:, 1:], yp[:, k:k + n][:, ::-1])
        yp[:, k + n] = acc / a0
    y[:] = yp[:, n:]
    return y


def _horizon(poles: np.ndarray, loop: DigitalLoop) -> tuple[int, bool]:
    mag = np.nanmax(np.where(np.abs(poles) > DEADBEAT, np.abs(poles), 0.0), axis=1,
                    initial=0.0)
    mag = np.minimum(mag, 1.0 - 1e-12)
    with np.errstate(divide="ignore"):
        need = np.where(mag > 0, 10.0 / -np.log(np.maximum(mag, 1e-300)), 1.0)
    dead = np.max((loop.u_delay + loop.d_delay) / loop.period, initial=0.0)
    n = int(np.ceil(need.max(initial=0.0) + dead)) + 10
    return max(MIN_PERIODS, min(n, MAX_PERIODS)), n > MAX_PERIODS


def _continuous(loop: DigitalLoop, u: np.ndarray, load: bool) -> tuple[np.ndarray, np.ndarray]:
    """Plant output on the sub-grid for held inputs ``u`` (S, N) (plus a unit load step at
    the plant input when ``load``): times (S, N*(SUBSTEPS+2)) and y of the same shape."""
    from ..lti.discrete import realise, split_delay

    t = loop.period
    s, n_per = u.shape
    a, b, c, d = realise(loop.plant.num, loop.plant.den)
    nx = a.shape[1]
    mu, lu = split_delay(loop.u_delay, t)
    md, ld = split_delay(loop.d_delay, t)
    base = np.arange(SUBSTEPS) * t / SUBSTEPS
    offs = np.sort(np.concatenate([np.broadcast_to(base, (s, SUBSTEPS)), lu[:, None],
                                   ld[:, None]], axis=1), axis=1)       # (S, P)
    npts = offs.shape[1]
    lengths = np.diff(np.concatenate([offs, np.full((s, 1), t)], axis=1), axis=1)
    aug = np.zeros((s, npts, nx + 1, nx + 1))
    aug[:, :, :nx, :nx] = a[:, None]
    aug[:, :, :nx, nx:] = b[:, None]
    e = expm(aug * lengths[:, :, None, None]) if nx else np.zeros((s, npts, 1, 1))
    phi, gam = e[:, :, :nx, :nx], e[:, :, :nx, nx]
    x = np.zeros((s, nx))
    y = np.zeros((s, n_per, npts))
    rows = np.arange(s)
    for k in range(n_per):
        for i in range(npts):
            th = offs[:, i]
            j = k - mu - (th < lu - 1e-12 * t).astype(int)
            v = np.where(j >= 0, u[rows, np.clip(j, 0, n_per - 1)], 0.0)
            if load:
                v = v + ((k > md) | ((k == md) & (th >= ld - 1e-12 * t))).astype(float)
            y[:, k, i] = (c[:, 0, :] * x).sum(axis=1) + d * v if nx else d * v
            if nx:
                x = (phi[:, i] @ x[:, :, None])[:, :, 0] + gam[:, i] * v[:, None]
    times = (np.arange(n_per)[None, :, None] * t + offs[:, None, :]).reshape(s, -1)
    return times, y.reshape(s, -1)


def _finals(loop: DigitalLoop) -> tuple[np.ndarray, np.ndarray]:
    """Exact final values of y for a unit reference step and a unit load step (steady
    state: u = K C(1)(F(1) r - H(0) y), y = G(0)(u + d), solved without dividing by an
    infinite gain)."""
    one = np.ones((1, 1))
    c1 = poly.evaluate(loop.c_num, one)[:, 0]
    c0 = poly.evaluate(loop.c_den, one)[:, 0]
    f = poly.evaluate(loop.f_num, one)[:, 0] / poly.evaluate(loop.f_den, one)[:, 0]
    g1, g0 = loop.plant.num[:, 0], loop.plant.den[:, 0]
    h1, h0 = loop.sensor.num[:, 0], loop.sensor.den[:, 0]
    k = loop.gain
    det = c0 * h0 * g0 + k * c1 * h1 * g1
    return k * c1 * h0 * f * g1 / det, c0 * h0 * g1 / det


def responses(loop: DigitalLoop, poles: np.ndarray, band: float = 0.02
              ) -> tuple[StepResponse, StepResponse, SampledResponses]:
    """Reference and load step responses (continuous output; see the module notes)."""
    n_per, limited = _horizon(poles, loop)
    s = loop.samples
    char = loop.characteristic()
    step = np.ones((s, n_per))
    k = loop.gain
    ur_num = poly.scale(poly.mul(poly.mul(loop.f_num, loop.c_num), loop.gh_den), k)
    u_ref = _filter(ur_num, poly.mul(loop.f_den, char), step)
    ul_num = -poly.scale(poly.mul(loop.c_num, loop.gl_num), k)
    shift = int(loop.gl_shift.max(initial=0))
    ul_shifted = np.zeros((s, ul_num.shape[1] + shift))
    for i in range(s):                                   # z^(q - q') per sample
        ul_shifted[i, loop.gl_shift[i]: loop.gl_shift[i] + ul_num.shape[1]] = ul_num[i]
    u_load = _filter(ul_shifted, char, step)
    fr, fl = _finals(loop)
    tr, yr = _continuous(loop, u_ref, load=False)
    tl, yl = _continuous(loop, u_load, load=True)
    trunc = np.full(s, limited)
    ref = StepResponse(t=tr, y=yr, final=fr, truncated=trunc)
    load = StepResponse(t=tl, y=yl, final=fl, truncated=trunc)
    per = SUBSTEPS + 2
    sampled_r, sampled_l = yr[:, ::per], yl[:, ::per]
    samp = SampledResponses(period=loop.period, y_ref=sampled_r, u_ref=u_ref,
                            y_load=sampled_l, u_load=u_load,
                            ripple_ref=_ripple(yr, sampled_r, fr, band, relative=True),
                            ripple_load=_ripple(yl, sampled_l, fl, band, relative=False))
    return ref, load, samp


def _ripple(y: np.ndarray, ys: np.ndarray, final: np.ndarray, band: float,
            relative: bool) -> np.ndarray:
    scale = np.where(relative, np.abs(final), np.maximum(np.abs(ys).max(axis=1), 1e-300))
    outside = np.abs(ys - final[:, None]) > band * scale[:, None]
    last = np.where(outside.any(axis=1), ys.shape[1] - 1 - np.argmax(outside[:, ::-1], axis=1),
                    -1)
    per = y.shape[1] // ys.shape[1]
    start = (last + 1) * per
    settled = last < ys.shape[1] - 1
    idx = np.arange(y.shape[1])[None, :]
    dev = np.where(idx >= start[:, None], np.abs(y - final[:, None]), 0.0).max(axis=1)
    if relative:
        dev = dev / np.where(final != 0, np.abs(final), np.nan)
    return np.where(settled, dev, np.nan)


# ------------------------------------------------------------------------------ metrics

@dataclass(frozen=True, slots=True)
class DigitalEvaluation:
    """:class:`Evaluation` of a sampled loop plus its responses at the samples."""

    base: Evaluation
    sampled: SampledResponses | None
    z_poles: np.ndarray


def evaluate(loop: DigitalLoop, *, band: float = 0.02, time: bool = True,
             intervals: list[GainIntervals] | None = None,
             keys: Iterable[str] | None = None) -> DigitalEvaluation:
    """Every metric of the requirement table for a batch of sampled loops (module notes).

    Same contract as :func:`loopvet.analysis.evaluate.evaluate`; ``crossover_w`` holds
    physical frequencies (rad/s) below the Nyquist frequency, ``poles`` are the
    s-plane equivalents ln(z)/T.
    """
    s = loop.samples
    t = loop.period
    want = set(METRICS if keys is None else keys)
    zp = z_poles(loop)
    out: dict[str, np.ndarray] = {}
    w = loop.w_loop()
    if intervals is not None:
        stable = np.array([iv.interval_containing(float(k)) is not None
                           for iv, k in zip(intervals, loop.gain, strict=True)], dtype=bool)
    else:
        stable = z_stable(zp)
    if want & set(GAIN_KEYS):
        gains, _ = crossing_arrays(w.n, w.d)
        out["gain_margin_db"], out["gain_reduction_margin_db"] = margins_at(gains, loop.gain,
                                                                           stable)
    sp = s_equivalent(zp, t)
    out |= pole_metrics(sp)
    cross_w = np.zeros((s, 0))
    cross_lag = np.zeros((s, 0))
    if want & set(FREQUENCY_KEYS):
        nu = fq.crossover_array(w)
        cross_lag = fq.lag_array(w, nu)
        cross_w = _omega(nu, t)
        out["phase_margin_deg"], out["delay_margin_s"], out["crossover_frequency"] = \
            fq.margin_arrays(cross_w, cross_lag, stable)
        wanted = [k for k in (*PEAK_KEYS, "bandwidth") if k in want]
        if wanted:
            wp = poly.roots_ragged(poly.add(w.d, poly.scale(w.n, loop.gain)))
            gv = fq.sample_grid(w, nu, wp)
            maps = {"sensitivity_peak": loop.sensitivity,
                    "complementary_sensitivity_peak": loop.complementary,
                    "control_sensitivity_peak": loop.control}
            for key in wanted:
                if key == "bandwidth":
                    out[key] = _omega(fq.bandwidth(loop.reference(), gv), t)
                else:
                    out[key] = fq.peak(maps[key](), gv)
                out[key] = np.where(stable, out[key], np.nan)
    ref = load = None
    sampled = None
    if time and want & set(TIME_KEYS):
        for key in TIME_KEYS:
            out[key] = np.full(s, np.nan)
        idx = np.nonzero(stable)[0]
        if idx.size:
            from ..lti.digital import rows

            ref, load, sampled = responses(rows(loop, idx), zp[idx], band)
            sm, dmx = step_metrics(ref, band=band), disturbance_metrics(load)
            for key in TIME_KEYS:
                src = sm if key in sm else dmx
                out[key][idx] = src[key]
    base = Evaluation(metrics=out, stable=stable, intervals=intervals, crossover_w=cross_w,
                      crossover_lag=cross_lag, poles=sp, pade_order=None, reference=ref,
                      load=load)
    return DigitalEvaluation(base=base, sampled=sampled, z_poles=zp)

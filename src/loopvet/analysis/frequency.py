"""Frequency-domain metrics of L(s) = K N(s)/D(s) e^{-sT}, batched over samples.

Gain crossovers
---------------
|L(jw)| = 1 exactly where E(w) = K^2 |N(jw)|^2 - |D(jw)|^2 = 0. E is an even real
polynomial (dead time does not change the magnitude), so its positive roots are the
square roots of the positive real roots x of E(sqrt x), found by companion eigenvalues in
the balanced frequency scale of :func:`loopvet.analysis.gain.frequency_scale`, then polished
by Newton's method on log|L(jw)| and kept when | |L| - 1 | <= 1e-9.

Margins (record format, "Definitions of the margins")
----------------------------------------------------
lag_i = (180 deg + arg L(j w_i)) mod 360 deg at each crossover w_i. Stable loop: phase margin
= min lag_i, delay margin = min lag_i / w_i (radians per rad/s). Unstable loop: phase margin
= min of (180 + arg L) wrapped into (-180, 180], delay margin null. No crossover: both inf.
``crossover_frequency`` is the highest crossover.

Peaks
-----
Ms = sup |S|, Mt = sup |T|, max |K C S| are found on a frequency set built from the loop:
a logarithmic grid (48 points per decade) spanning two decades beyond the smallest and
largest root magnitudes of D, N and the closed-loop characteristic polynomial, 41 points
across every lightly damped root (at b + k|a|/4, k = -20..20, for a root a + jb: a
resonance peak is a few |a| wide), and for dead time a linear grid with spacing pi/(16 T) up
to the frequency beyond which |L| < 1e-3 (so the ripple of period 2 pi/T is sampled 32 times
a period), together with the crossovers. The three largest local maxima of every map are
then refined by golden-section search in log w between their neighbours, to 1e-9 relative
in w, which puts the peak value within about 1e-12 relative (the peak is flat); the value
as w -> infinity is included. This brackets every peak that is wider than the grid
spacing; a peak narrower than that would need a root with damping below about 1e-3 of its
frequency, which the grid resolves explicitly around every root.

``bandwidth`` is the first frequency at which |T_ref(jw)| falls to |T_ref(0)|/sqrt(2) (the
reference-to-output map, prefilter included), refined by Brent's method; inf if it never
does, null if T_ref(0) = 0.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import brentq

from ..lti import poly
from ..lti.loop import ClosedLoopMap, Loop
from .gain import frequency_scale, scaled

_GOLDEN = (math.sqrt(5.0) - 1.0) / 2.0


@dataclass(frozen=True, slots=True)
class Crossover:
    frequency: float
    lag_deg: float          # (180 + arg L) mod 360, in [0, 360)


def gain_crossovers(loop: Loop) -> list[list[float]]:
    """Per sample, the sorted gain-crossover frequencies w > 0 with |L(jw)| = 1."""
    n, d, k = loop.n, loop.d, loop.gain
    ws = frequency_scale(n, d)
    ns, ds = scaled(n, ws), scaled(d, ws)
    nr, ni = poly.on_imaginary_axis(ns)
    dr, di = poly.on_imaginary_axis(ds)
    e = poly.sub(poly.scale(poly.add(poly.mul(nr, nr), poly.mul(ni, ni)), k * k),
                 poly.add(poly.mul(dr, dr), poly.mul(di, di)))
    q = e[:, 0::2]
    out: list[list[float]] = []
    if q.shape[1] < 2:
        return [[] for _ in range(loop.samples)]
    x = poly.roots_ragged(q)
    with np.errstate(invalid="ignore"):
        keep = (np.abs(x.imag) <= 1e-3 * np.abs(x) + 1e-300) & (x.real > 0)
    cand = np.where(keep, np.sqrt(np.abs(x.real)) * ws[:, None], np.nan)
    w = _polish_magnitude(loop, np.nan_to_num(cand, nan=1.0))
    mag = np.abs(loop.open_loop(1j * w)) if w.size else np.zeros_like(w)
    ok = np.isfinite(cand) & np.isfinite(w) & (w > 0) & (np.abs(mag - 1.0) <= 1e-9)
    for i in range(loop.samples):   # ragged assembly; the numerics above are batched
        vals: list[float] = []
        for v in sorted(float(v) for v in w[i][ok[i]]):
            if not vals or v - vals[-1] > 1e-9 * v:
                vals.append(v)
        out.append(vals)
    return out


def _polish_magnitude(loop: Loop, w: np.ndarray, steps: int = 12) -> np.ndarray:
    """Newton's method on log|L(jw)| = 0 for each candidate (S, M)."""
    dn, dd = poly.derivative(loop.n), poly.derivative(loop.d)
    ww = w.copy()
    with np.errstate(all="ignore"):
        for _ in range(steps):
            s = 1j * ww
            nv, dv = poly.evaluate(loop.n, s), poly.evaluate(loop.d, s)
            f = np.log(np.abs(loop.gain[:, None] * nv / dv))
            fp = np.real(1j * (poly.evaluate(dn, s) / nv - poly.evaluate(dd, s) / dv))
            step = f / fp
            ww = ww - np.where(np.isfinite(step), step, 0.0)
    return ww


def lags(loop: Loop, crossovers: list[list[float]]) -> list[list[Crossover]]:
    """(180 + arg L) mod 360 at every crossover, per sample."""
    out: list[list[Crossover]] = []
    for i, ws in enumerate(crossovers):
        if not ws:
            out.append([])
            continue
        w = np.asarray(ws)
        val = _open_loop_one(loop, i, w)
        lag = np.degrees(np.mod(np.pi + np.angle(val), 2 * np.pi))
        lag = np.where(lag >= 360.0, 0.0, lag)
        out.append([Crossover(frequency=float(a), lag_deg=float(b)) for a, b in zip(w, lag,
                                                                                    strict=True)])
    return out


def _open_loop_one(loop: Loop, i: int, w: np.ndarray) -> np.ndarray:
    s = 1j * w[None, :]
    return (loop.gain[i] * poly.evaluate(loop.n[i:i + 1], s) / poly.evaluate(loop.d[i:i + 1], s)
            * np.exp(-s * loop.delay[i]))[0]


def margins(cross: list[Crossover], stable: bool) -> tuple[float | None, float | None]:
    """(phase_margin_deg, delay_margin_s) per the record format's definitions."""
    if not cross:
        return math.inf, math.inf
    if stable:
        pm = min(c.lag_deg for c in cross)
        dm = min(math.radians(c.lag_deg) / c.frequency for c in cross)
        return pm, dm
    wrapped = [c.lag_deg - 360.0 if c.lag_deg > 180.0 else c.lag_deg for c in cross]
    return min(wrapped), None


def phase_crossovers(loop: Loop, i: int, crossing_freqs: list[float]) -> list[dict[str, float]]:
    """Phase crossovers (L(jw) real and negative) with the factor by which K could be
    multiplied there to reach -1: +dB means |L| < 1 (room to rise)."""
    out = []
    for w in crossing_freqs:
        if not (w > 0 and math.isfinite(w)):
            continue
        v = complex(_open_loop_one(loop, i, np.array([w]))[0])
        if v.real < 0 and abs(v.imag) <= 1e-6 * abs(v):
            out.append({"frequency": w, "gain_factor_db": -20.0 * math.log10(abs(v))})
    return out


# ------------------------------------------------------------------------------ peaks

def frequency_grid(loop: Loop, extra: list[float], char_roots: np.ndarray) -> np.ndarray:
    """The shared frequency set of the module notes, for all samples of ``loop``."""
    roots = [r for arr in (loop.n, loop.d) for r in _all_roots(arr)]
    roots += [complex(r) for r in np.ravel(char_roots) if np.isfinite(r)]
    mags = np.array([abs(r) for r in roots if abs(r) > 0] + [w for w in extra if w > 0])
    lo = mags.min() / 100.0 if mags.size else 1e-3
    hi = mags.max() * 100.0 if mags.size else 1e3
    t_max = float(loop.delay.max())
    if t_max > 0:
        lo = min(lo, 0.01 / t_max)
    decades = math.log10(hi / lo)
    pts = [np.geomspace(lo, hi, int(48 * decades) + 2)]
    for r in roots:
        if abs(r.imag) > 0 and abs(r.real) < abs(r.imag):
            width = max(abs(r.real), 1e-9 * abs(r.imag))
            pts.append(abs(r.imag) + width / 4.0 * np.arange(-20, 21))
    if t_max > 0:
        w_tail = _magnitude_below(loop, 1e-3, hi)
        step = math.pi / (16.0 * t_max)
        count = int(min(w_tail / step, 40000))
        pts.append(np.linspace(step, count * step, max(count, 1)))
    pts.append(np.asarray(extra, dtype=float))
    grid = np.unique(np.concatenate(pts))
    return grid[(grid > 0) & np.isfinite(grid)]


def _all_roots(arr: np.ndarray) -> list[complex]:
    out: list[complex] = []
    r = poly.roots_ragged(arr)
    out.extend(complex(x) for x in np.ravel(r) if np.isfinite(x))
    return out


def _magnitude_below(loop: Loop, level: float, start: float) -> float:
    """A frequency beyond which |L| < level for every sample (doubling search with the
    root-magnitude bound of loopvet.analysis.delay), at most 1e12."""
    w = max(start, 1e-12)
    for _ in range(80):
        mag = np.abs(loop.open_loop(1j * np.array([w, 2 * w, 4 * w])))
        if np.all(mag < level):
            return w
        w *= 2.0
        if w > 1e12:
            break
    return w


def peak(m: ClosedLoopMap, grid: np.ndarray) -> np.ndarray:
    """sup over w > 0 of |m(jw)| per sample (grid, refined local maxima, and w -> inf)."""
    mag = np.abs(m.at(1j * grid))                     # (S, G)
    s_count, g = mag.shape
    best = mag.max(axis=1)
    inner = (mag[:, 1:-1] >= mag[:, :-2]) & (mag[:, 1:-1] >= mag[:, 2:])
    score = np.where(inner, mag[:, 1:-1], -np.inf)
    top = np.argsort(-score, axis=1)[:, :3] + 1        # indices of the 3 largest local maxima
    rows = np.repeat(np.arange(s_count), top.shape[1])
    idx = top.ravel()
    valid = np.isfinite(score[rows, idx - 1])
    rows, idx = rows[valid], idx[valid]
    if rows.size:
        a = np.log(grid[idx - 1])
        b = np.log(grid[np.minimum(idx + 1, g - 1)])
        refined = _golden_max(m, rows, a, b)
        np.maximum.at(best, rows, refined)
    far = np.abs(m.at(1j * np.array([grid[-1] * 1e6])))[:, 0]
    return np.maximum(best, np.where(np.isfinite(far), far, 0.0))


def _golden_max(m: ClosedLoopMap, rows: np.ndarray, a: np.ndarray, b: np.ndarray,
                iterations: int = 64) -> np.ndarray:
    """Batched golden-section maximisation of |m(j e^x)| over x in [a, b] per (row)."""

    def f(x: np.ndarray) -> np.ndarray:
        vals = np.empty(x.shape)
        for r in np.unique(rows):                # one evaluation per sample row
            sel = rows == r
            sub = ClosedLoopMap(p=m.p[r:r + 1], tau=m.tau[r:r + 1], a=m.a[r:r + 1],
                                b=m.b[r:r + 1], delay=m.delay[r:r + 1])
            vals[sel] = np.abs(sub.at(1j * np.exp(x[sel])))[0]
        return vals

    c = b - _GOLDEN * (b - a)
    d = a + _GOLDEN * (b - a)
    fc, fd = f(c), f(d)
    for _ in range(iterations):
        left = fc > fd
        b = np.where(left, d, b)
        a = np.where(left, a, c)
        c_new = b - _GOLDEN * (b - a)
        d_new = a + _GOLDEN * (b - a)
        c, d = np.where(left, c_new, d), np.where(left, c, d_new)
        fnew = f(np.where(left, c, d))
        fc, fd = np.where(left, fnew, fd), np.where(left, fc, fnew)
    return np.maximum(fc, fd)


def bandwidth(m: ClosedLoopMap, grid: np.ndarray) -> np.ndarray:
    """First w where |m(jw)| <= |m(0)|/sqrt(2); inf if never, NaN if m(0) = 0."""
    dc = np.abs(m.at(np.array([0.0 + 0j])))[:, 0]
    mag = np.abs(m.at(1j * grid))
    out = np.full(mag.shape[0], np.inf)
    for i in range(mag.shape[0]):   # one scan and one Brent solve per sample
        if not dc[i] > 0:
            out[i] = np.nan
            continue
        level = dc[i] / math.sqrt(2.0)
        below = np.nonzero(mag[i] <= level)[0]
        if below.size == 0:
            continue
        j = int(below[0])
        if j == 0:
            out[i] = float(grid[0])
            continue
        sub = ClosedLoopMap(p=m.p[i:i + 1], tau=m.tau[i:i + 1], a=m.a[i:i + 1],
                            b=m.b[i:i + 1], delay=m.delay[i:i + 1])
        out[i] = brentq(lambda w, s=sub, lv=level: float(abs(s.at(np.array([1j * w]))[0, 0]))
                        - lv, grid[j - 1], grid[j], xtol=1e-14, rtol=1e-13)
    return out

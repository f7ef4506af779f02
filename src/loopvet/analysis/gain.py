"""Exact stable gain intervals: where the roots of D(s) + K N(s) e^{-sT} cross the
imaginary axis, over the whole real K axis, batched over samples.

Method (delay-free loops)
-------------------------
A closed-loop root lies at s = jw exactly when D(jw) + K N(jw) = 0 with K real. Writing
``D(jw) = Dr(w) + j Di(w)`` (likewise N), K is real iff ``P(w) = Dr Ni - Di Nr = 0``. P is a
real polynomial, odd in w, so ``P(w) = w Q(w^2)``; the crossings at w > 0 are the positive
real roots x of Q with w = sqrt(x), K = -D(jw)/N(jw). The crossing at w = 0 is
K = -D(0)/N(0). For biproper loops (deg N = deg D) the leading coefficient of D + K N
vanishes at K = -d_n/n_n: a root passes through infinity there, which is listed as a
crossing with frequency ``inf``. Every candidate is polished by Newton's method on the
complex equation D(jw) + K N(jw) = 0 in the two real unknowns (w, K) and kept only if the
residual is at rounding level, which removes spurious candidates from imaginary-axis zeros
of N (where K would be infinite) and from near-real complex roots of Q.

Between consecutive crossing gains the number of closed-loop roots in the closed right
half-plane is constant; each open interval is classified by counting them at one interior
gain (batched companion-matrix eigenvalues, one call for all samples and intervals).

Accuracy: crossing gains and frequencies are limited by the evaluation of D and N at jw
(relative error about 1e-15 times the condition of the crossing), typically 1e-12 relative
for well-conditioned loops up to order 12. A tangential touch of the axis (double root of
Q) is found as one crossing; the intervals on both sides are then reported separately.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..lti import poly
from .poles import STABILITY_RTOL

_NEWTON_STEPS = 12


@dataclass(frozen=True, slots=True)
class Crossing:
    gain: float
    frequency: float          # rad/s; 0 for a real root at s = 0; inf for a root at infinity


@dataclass(frozen=True, slots=True)
class GainIntervals:
    """Result for one sample: crossings sorted by gain and stable open intervals."""

    crossings: tuple[Crossing, ...]
    stable: tuple[tuple[float, float], ...]
    fixed_axis_pole: bool = False    # a common root of D and N on the axis: never stable
    search_bound: float = np.inf     # |K| up to which crossings were searched (dead time)

    def interval_containing(self, k: float) -> tuple[float, float] | None:
        return next(((lo, hi) for lo, hi in self.stable if lo < k < hi), None)


def newton_crossings(n: np.ndarray, d: np.ndarray, delay: np.ndarray, w: np.ndarray,
                     ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Polish candidate crossing frequencies ``w`` (S, M) into (w, K, ok), batched.

    Solves D(jw) + K N(jw) e^{-jwT} = 0 for real (w, K) by Newton's method from the real K
    that best fits at the candidate w. ``ok`` marks converged solutions whose residual is
    below 1e-10 of the terms' size and whose N(jw) does not vanish.
    """
    dn, dd = poly.derivative(n), poly.derivative(d)
    t = delay[:, None]
    ww = np.array(w, dtype=np.float64)

    def terms(wv: np.ndarray):
        s = 1j * wv
        e = np.exp(-s * t)
        return (poly.evaluate(d, s), poly.evaluate(n, s) * e, poly.evaluate(dd, s),
                (poly.evaluate(dn, s) - t * poly.evaluate(n, s)) * e)

    with np.errstate(all="ignore"):
        dv, ne, _, _ = terms(ww)
        k = -np.real(dv * np.conj(ne)) / np.abs(ne) ** 2
        for _ in range(_NEWTON_STEPS):
            dv, ne, ddv, dne = terms(ww)
            f = dv + k * ne
            fw = 1j * (ddv + k * dne)
            det = fw.real * ne.imag - fw.imag * ne.real
            step_w = -(f.real * ne.imag - f.imag * ne.real) / det
            step_k = -(fw.real * f.imag - fw.imag * f.real) / det
            step_w = np.where(np.isfinite(step_w), step_w, 0.0)
            step_k = np.where(np.isfinite(step_k), step_k, 0.0)
            ww = ww + step_w
            k = k + step_k
            if np.all((np.abs(step_w) <= 1e-15 * np.abs(ww))
                      & (np.abs(step_k) <= 1e-15 * np.abs(k))):
                break                       # converged everywhere: further steps change nothing
        dv, ne, _, _ = terms(ww)
        resid = np.abs(dv + k * ne)
        size = np.abs(dv) + np.abs(k * ne)
        ok = np.isfinite(k) & np.isfinite(ww) & (resid <= 1e-10 * size) & (np.abs(ne) > 0) \
            & (ww > 0)
    return ww, k, ok


def frequency_scale(n: np.ndarray, d: np.ndarray) -> np.ndarray:
    """Per sample, a frequency w_s that balances the coefficients: the largest root magnitude
    of N and D, estimated from the coefficients (Fujiwara's bound, within a factor 2 of it).

    Substituting s = w_s u (coefficients c_k w_s^k) puts the roots within |u| <= 2, which keeps
    companion-matrix eigenvalues accurate for loops whose roots span many decades.
    Vectorised over samples (no per-sample loop).
    """
    return np.maximum(np.maximum(root_bound(n), root_bound(d)), 1e-300)


def root_bound(c: np.ndarray) -> np.ndarray:
    """Per sample, 2 max_k |c_k/c_m|^(1/(m-k)) with m the effective degree (Fujiwara's bound
    on the root magnitudes); 1 for constants. Shape (S,)."""
    c = np.asarray(c, dtype=np.float64)
    samples, width = c.shape
    deg = poly.effective_degree(c)
    lead = np.abs(c[np.arange(samples), np.maximum(deg, 0)])
    k = np.arange(width)[None, :]
    power = deg[:, None] - k
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        ratio = np.abs(c) / lead[:, None]
        term = np.where((power > 0) & (c != 0), ratio ** (1.0 / np.maximum(power, 1)), 0.0)
    best = term.max(axis=1, initial=0.0)
    return np.where((deg > 0) & (best > 0), 2.0 * best, 1.0)


def scaled(c: np.ndarray, ws: np.ndarray) -> np.ndarray:
    """Coefficients of c(w_s u) in u: c_k w_s^k (per sample)."""
    return c * ws[:, None] ** np.arange(c.shape[1])[None, :]


def _positive_axis_candidates(n: np.ndarray, d: np.ndarray) -> np.ndarray:
    """Candidate w > 0 from the positive real roots of Q, (S, M) padded with NaN.

    Works in the scaled variable u = w / w_s (see :func:`frequency_scale`); no coefficient
    is dropped: spurious roots (from rounding in exact cancellations) are removed by the
    Newton verification afterwards.
    """
    ws = frequency_scale(n, d)
    dr, di = poly.on_imaginary_axis(scaled(d, ws))
    nr, ni = poly.on_imaginary_axis(scaled(n, ws))
    p = poly.sub(poly.mul(dr, ni), poly.mul(di, nr))
    q = p[:, 1::2]                                 # P(w) = w Q(w^2)
    if q.shape[1] < 2:
        return np.zeros((n.shape[0], 0))
    x = poly.roots_ragged(q)
    with np.errstate(invalid="ignore"):
        real = np.abs(x.imag) <= 1e-3 * np.abs(x) + 1e-300
        keep = real & (x.real > 0) & np.isfinite(x.real)
    return np.where(keep, np.sqrt(np.abs(x.real)) * ws[:, None], np.nan)


def _dedupe(values: list[tuple[float, float]], rtol: float = 1e-9) -> list[tuple[float, float]]:
    out: list[tuple[float, float]] = []
    for g, w in sorted(values):
        if out and abs(g - out[-1][0]) <= rtol * max(1.0, abs(g)) and (
                w == out[-1][1] or abs(w - out[-1][1]) <= 1e-7 * max(1.0, abs(w))):
            continue
        out.append((g, w))
    return out


def crossing_arrays(n: np.ndarray, d: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Every crossing of D + K N as padded arrays: gains (S, M) and frequencies (S, M), NaN
    where a sample has fewer crossings (not sorted, not deduplicated).

    Columns: the polished positive-axis crossings, then K = -D(0)/N(0) at w = 0 (when
    N(0) != 0), then the root through infinity of a biproper loop (frequency inf).
    """
    samples = max(n.shape[0], d.shape[0])
    n = np.broadcast_to(n, (samples, n.shape[1]))
    d = np.broadcast_to(d, (samples, d.shape[1]))
    cand = _positive_axis_candidates(n, d)
    gains = np.full(cand.shape, np.nan)
    freqs = np.full(cand.shape, np.nan)
    rows, cols = np.nonzero(np.isfinite(cand))       # polish the real candidates only
    if rows.size:
        w, k, ok = newton_crossings(n[rows], d[rows], np.zeros(rows.size),
                                    cand[rows, cols][:, None])
        gains[rows, cols] = np.where(ok[:, 0], k[:, 0], np.nan)
        freqs[rows, cols] = np.where(ok[:, 0], w[:, 0], np.nan)
    with np.errstate(divide="ignore", invalid="ignore"):
        k0 = np.where(n[:, 0] != 0, -d[:, 0] / np.where(n[:, 0] != 0, n[:, 0], 1.0) + 0.0,
                      np.nan)
    degn, degd = poly.effective_degree(n), poly.effective_degree(d)
    rows = np.arange(samples)
    biproper = (degn == degd) & (degd >= 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        kinf = np.where(biproper, -d[rows, np.maximum(degd, 0)]
                        / np.where(biproper, n[rows, np.maximum(degn, 0)], 1.0), np.nan)
    gains = np.concatenate([gains, k0[:, None], kinf[:, None]], axis=1)
    freqs = np.concatenate([freqs, np.where(np.isnan(k0), np.nan, 0.0)[:, None],
                            np.where(np.isnan(kinf), np.nan, np.inf)[:, None]], axis=1)
    return gains, freqs


def delay_free_crossings(n: np.ndarray, d: np.ndarray) -> list[list[Crossing]]:
    """All gains K at which a root of D + K N is on the imaginary axis or at infinity."""
    gains, freqs = crossing_arrays(n, d)
    out: list[list[Crossing]] = []
    for g_row, w_row in zip(gains, freqs, strict=True):   # ragged assembly only
        keep = ~np.isnan(g_row)
        found = [(float(g), float(w)) for g, w in zip(g_row[keep], w_row[keep], strict=True)]
        out.append([Crossing(gain=g, frequency=f) for g, f in _dedupe(found)])
    return out


def margins_at(gains: np.ndarray, k: np.ndarray, stable: np.ndarray
               ) -> tuple[np.ndarray, np.ndarray]:
    """(gain_margin_db, gain_reduction_margin_db) per sample from padded crossing gains.

    The stable interval that holds K is bounded by the nearest crossing gains below and above
    K (stability can change only at a crossing, and at a crossing a root is on the axis), so
    this equals :func:`gain_margins` on the intervals without classifying them. NaN where the
    sample is not stable. Vectorised over samples.
    """
    k = np.asarray(k, dtype=np.float64)
    g = np.where(np.isnan(gains), np.nan, gains)
    with np.errstate(invalid="ignore"):
        above = np.where(g > k[:, None], g, np.inf).min(axis=1, initial=np.inf)
        below = np.where(g < k[:, None], g, -np.inf).max(axis=1, initial=-np.inf)
    return interval_margins(below, above, k, stable)


def interval_margins(lo: np.ndarray, hi: np.ndarray, k: np.ndarray, stable: np.ndarray
                     ) -> tuple[np.ndarray, np.ndarray]:
    """:func:`gain_margins` vectorised: the margins at K of the stable intervals (lo, hi)."""
    pos = k > 0
    low = np.where(pos, lo, -hi)
    high = np.where(pos, hi, -lo)
    mag = np.abs(k)
    with np.errstate(divide="ignore", invalid="ignore"):
        rise = np.where(np.isinf(high), np.inf, 20.0 * np.log10(high / mag))
        fall = np.where(low <= 0, np.inf, 20.0 * np.log10(mag / low))
    ok = np.asarray(stable, dtype=bool)
    return np.where(ok, rise, np.nan), np.where(ok, fall, np.nan)


def _test_points(bounds: list[float]) -> list[float]:
    """One gain inside each open interval cut by the sorted breakpoints ``bounds``."""
    if not bounds:
        return [1.0]
    pts = [bounds[0] - max(1.0, abs(bounds[0]))]
    for lo, hi in zip(bounds[:-1], bounds[1:], strict=True):
        if lo > 0 and hi > 0 or lo < 0 and hi < 0:
            pts.append(float(np.sign(lo) * np.sqrt(lo * hi)))
        else:
            pts.append(0.5 * (lo + hi))
    pts.append(bounds[-1] + max(1.0, abs(bounds[-1])))
    return pts


def _unique_bounds(crossings: list[Crossing]) -> list[float]:
    out: list[float] = []
    for g in sorted(c.gain for c in crossings):
        if not out or abs(g - out[-1]) > 1e-12 * max(1.0, abs(g)):
            out.append(g)
    return out


def _fixed_axis_pole(n: np.ndarray, d: np.ndarray) -> bool:
    """True when D and N share a root on the imaginary axis (a pole no gain can move)."""
    deg_d = int(poly.effective_degree(d[None, :])[0])
    if deg_d <= 0:
        return False
    r = poly.roots(d[None, : deg_d + 1])[0]
    axis = r[np.abs(r.real) <= 1e-9 * np.maximum(1.0, np.abs(r))]
    if axis.size == 0:
        return False
    nv = np.abs(poly.evaluate(n[None, :], 1j * axis.imag)[0])
    scale = np.abs(n).sum() * np.maximum(1.0, np.abs(axis)) ** (n.shape[0] - 1)
    return bool(np.any(nv <= 1e-9 * scale))


def stable_gain_intervals(n: np.ndarray, d: np.ndarray) -> list[GainIntervals]:
    """Stable open intervals of K over the whole real axis for delay-free loops, batched.

    ``n``, ``d``: (S, .) ascending coefficients of N and D. See the module notes.
    """
    samples = max(n.shape[0], d.shape[0])
    n = np.broadcast_to(n, (samples, n.shape[1]))
    d = np.broadcast_to(d, (samples, d.shape[1]))
    crossings = delay_free_crossings(n, d)
    bounds = [_unique_bounds(c) for c in crossings]
    points = [_test_points(b) for b in bounds]
    flat_k = np.concatenate([np.asarray(p) for p in points])
    owner = np.concatenate([np.full(len(p), i) for i, p in enumerate(points)])
    char = poly.add(d[owner], poly.scale(n[owner], flat_k))
    r = poly.roots_ragged(char)
    with np.errstate(invalid="ignore"):
        bad = np.where(np.isnan(r.real), False,
                       r.real >= -STABILITY_RTOL * np.maximum(1.0, np.abs(r)))
    stable_flat = np.asarray(~bad.any(axis=1), dtype=bool)
    out = []
    pos = 0
    for i in range(samples):
        m = len(points[i])
        st = stable_flat[pos:pos + m]
        pos += m
        fixed = _fixed_axis_pole(n[i], d[i])
        edges = [-np.inf, *bounds[i], np.inf]
        stable = tuple((float(edges[j]), float(edges[j + 1])) for j in range(m)
                       if st[j] and not fixed)
        out.append(GainIntervals(crossings=tuple(crossings[i]), stable=stable,
                                 fixed_axis_pole=fixed))
    return out


def gain_margins(intervals: GainIntervals, k: float) -> tuple[float | None, float | None]:
    """(gain_margin_db, gain_reduction_margin_db) at nominal K from the stable interval
    holding K; ``inf`` for an unbounded side, (None, None) when K is not stable.

    "Rise" and "fall" refer to |K|: for a reverse-acting loop (K < 0) the margin to rise is
    to the more negative end. A side that reaches 0 or beyond lets K fall without limit.
    """
    iv = intervals.interval_containing(k)
    if iv is None:
        return None, None
    lo, hi = iv if k > 0 else (-iv[1], -iv[0])
    mag = abs(k)
    rise = np.inf if np.isinf(hi) else 20.0 * np.log10(hi / mag)
    fall = np.inf if lo <= 0 else 20.0 * np.log10(mag / lo)
    return float(rise), float(fall)

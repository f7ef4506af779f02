"""Stable gain intervals of loops with dead time: D(s) + K N(s) e^{-sT} = 0, without Pade.

Method
------
On the imaginary axis put h(jw) = -D(jw) e^{jwT} / N(jw); a closed-loop root sits at jw for
the real gain K = h(jw), i.e. where the phase psi(w) = arg h(jw) is a multiple of pi
(odd multiples: K > 0, even: K < 0), with |K| = |D(jw)/N(jw)|.

*Isolation (the proof that no crossing is missed).* Up to a constant, psi is a sum of
``atan((w - b)/(-a))`` over the roots a + jb of D, minus the same over the roots of N, plus
w T. Each term is monotone in w (increasing for a left-half-plane root of D or a
right-half-plane root of N), so psi = psi_up - psi_down with both parts non-decreasing and
on any [w1, w2]: psi lies in [psi_up(w1) - psi_down(w2), psi_up(w2) - psi_down(w1)]. Each
term's derivative |a|/(a^2 + (w - b)^2) is bounded on [w1, w2] by its values at the
points of the interval nearest to and farthest from b, which bounds psi'. An interval
whose enclosure holds no multiple of pi holds no crossing; an interval on which the bound
proves psi' > 0 (or < 0) holds exactly one crossing per multiple of pi between its end
values, bracketed by a sign change. Every other interval is bisected; the frequency grid
is therefore refined until it is provably fine enough (an interval still undecided at
2^-40 of its original width is reported through ``undecided``). Roots of D or N on the
imaginary axis make psi jump by pi; they split the frequency range.

*Frequency bound.* For w > R = max |root| the ratio |D(jw)/N(jw)| is at least
|d_n/n_m| w^(n-m) (1 - R/w)^n / (1 + R/w)^m, which increases with w; the search stops at
the W where that bound exceeds the gain bound K_B, so every crossing with |K| <= K_B is
found. K_B is twice the largest |K| among the low-frequency crossings, the first crossings
of each sign beyond W0 (below), the nominal gain and the gain range.

*Direction.* At a simple crossing, as |K| grows the root moves into the right half-plane
iff psi'(w) > 0 (from ds/dK = 1/h'(s) and h'(jw) = -j dh/dw). Beyond
W0 = max|b| + sqrt(2 sum|a| / T) (sums over the terms that decrease psi) psi' >= T/2 > 0,
so every crossing there is destabilising: intervals beyond K_B cannot be stable unless no
crossing was found past them (then they are reported up to K_B and flagged).

*Counting.* The number of right-half-plane roots at K = 0+ and 0- is that of D plus, for
roots of D on the axis, the side to which ds/dK = -N e^{-sT}/D' (simple roots) or the
Puiseux expansion (multiple roots) sends them; walking the crossings in order of |K| on
each side adds 2 (w > 0) or 1 (w = 0) in the crossing's direction.

Accuracy: each crossing is polished by Newton's method on D(jw) + K N(jw)e^{-jwT} = 0 in
(w, K), to about 1e-12 relative. The loop over samples in :func:`delay_gain_intervals`
remains because the number of crossings differs per sample; each sample's isolation is
vectorised over its frequency intervals.
"""

from __future__ import annotations

import math

import numpy as np

from ..lti import poly
from .gain import Crossing, GainIntervals, newton_crossings

MAX_CROSSINGS = 4000
_AXIS_RTOL = 1e-9


class _Phase:
    """psi(w) pieces for one sample: monotone decomposition and derivative bounds."""

    def __init__(self, n: np.ndarray, d: np.ndarray, delay: float):
        self.n, self.d, self.t = n, d, delay
        rd = _roots(d)
        rn = _roots(n)
        self.axis_d = rd[np.abs(rd.real) <= _AXIS_RTOL * np.maximum(1.0, np.abs(rd))]
        self.axis_n = rn[np.abs(rn.real) <= _AXIS_RTOL * np.maximum(1.0, np.abs(rn))]
        offd = rd[np.abs(rd.real) > _AXIS_RTOL * np.maximum(1.0, np.abs(rd))]
        offn = rn[np.abs(rn.real) > _AXIS_RTOL * np.maximum(1.0, np.abs(rn))]
        # term sign: +1 increases psi. arg(jw - r) for a root of D enters psi with +,
        # increasing when Re r < 0; roots of N enter with -.
        self.a = np.concatenate([offd.real, offn.real])
        self.b = np.concatenate([offd.imag, offn.imag])
        self.sign = np.concatenate([np.ones(offd.size), -np.ones(offn.size)])
        self.up = (self.sign * -np.sign(self.a)) > 0
        self.roots_all = np.concatenate([rd, rn])

    def parts(self, w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(psi_up, psi_down) at w, both non-decreasing; psi = up - down + const."""
        th = np.arctan((w[..., None] - self.b) / (-self.a)) if self.a.size else \
            np.zeros((*w.shape, 0))
        contrib = th * self.sign   # the term of psi: increasing where self.up, else decreasing
        up = np.where(self.up, contrib, 0.0).sum(axis=-1) + self.t * w
        down = -np.where(~self.up, contrib, 0.0).sum(axis=-1)
        return up, down

    def slope_bounds(self, w1: np.ndarray, w2: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Lower and upper bounds of psi' on [w1, w2] (elementwise)."""
        if not self.a.size:
            return np.full(w1.shape, self.t), np.full(w1.shape, self.t)
        a, b = np.abs(self.a), self.b
        near = np.clip(b, w1[..., None], w2[..., None])
        far = np.where(np.abs(w1[..., None] - b) > np.abs(w2[..., None] - b),
                       w1[..., None], w2[..., None])
        dmax = a / (a**2 + (near - b) ** 2)
        dmin = a / (a**2 + (far - b) ** 2)
        lo = self.t + np.where(self.up, dmin, -dmax).sum(axis=-1)
        hi = self.t + np.where(self.up, dmax, -dmin).sum(axis=-1)
        return lo, hi

    def slope(self, w: np.ndarray) -> np.ndarray:
        if not self.a.size:
            return np.full(w.shape, self.t)
        a, b = self.a, self.b
        terms = self.sign * (-a) / (a**2 + (w[..., None] - b) ** 2)
        return self.t + terms.sum(axis=-1)

    def actual(self, w: np.ndarray) -> np.ndarray:
        """arg h(jw) in (-pi, pi], from the polynomials themselves."""
        s = 1j * w
        h = -poly.evaluate(self.d[None, :], s)[0] * np.exp(s * self.t) / \
            poly.evaluate(self.n[None, :], s)[0]
        return np.angle(h)

    def gain_ratio(self, w: np.ndarray) -> np.ndarray:
        s = 1j * w
        return np.abs(poly.evaluate(self.d[None, :], s)[0] / poly.evaluate(self.n[None, :],
                                                                              s)[0])


def _roots(c: np.ndarray) -> np.ndarray:
    deg = int(poly.effective_degree(c[None, :])[0])
    if deg <= 0:
        return np.zeros(0, dtype=complex)
    return poly.roots(c[None, : deg + 1])[0]


def _isolate(ph: _Phase, lo: float, hi: float, offset: float,
             max_cross: int) -> tuple[list[float], list[float], int]:
    """Crossing frequencies in (lo, hi): psi + offset = k pi. Returns (w, level, undecided)."""
    # initial grid: psi grows by at most (sum of all term variations + T dw); place points
    # so that T dw <= pi/4 and log spacing resolves the root magnitudes
    mags = np.abs(ph.roots_all[np.abs(ph.roots_all) > 0])
    pts = [np.geomspace(max(lo, 1e-9 * (mags.min() if mags.size else 1.0), 1e-300),
                        hi, 200)]
    if ph.t > 0:
        step = math.pi / (4.0 * ph.t)
        count = min(int((hi - lo) / step) + 1, 4 * MAX_CROSSINGS)
        pts.append(np.linspace(lo, hi, count + 1))
    for m in np.abs(ph.b):
        if lo < m < hi:
            pts.append(np.array([m]))
    grid = np.unique(np.concatenate(pts))
    grid = grid[(grid > lo) & (grid < hi)]
    grid = np.concatenate([[lo + (hi - lo) * 1e-12 if lo == 0 else lo * (1 + 1e-12)], grid,
                           [hi]])
    a, b = grid[:-1], grid[1:]
    found_w: list[float] = []
    found_level: list[float] = []
    undecided = 0
    width0 = hi - lo
    for _ in range(60):
        if a.size == 0:
            break
        up_a, dn_a = ph.parts(a)
        up_b, dn_b = ph.parts(b)
        enc_lo = up_a - dn_b + offset
        enc_hi = up_b - dn_a + offset
        k_first = np.ceil(enc_lo / math.pi)
        k_last = np.floor(enc_hi / math.pi)
        has = k_first <= k_last
        slo, shi = ph.slope_bounds(a, b)
        mono = has & ((slo > 0) | (shi < 0))
        if np.any(mono):
            va = up_a[mono] - dn_a[mono] + offset
            vb = up_b[mono] - dn_b[mono] + offset
            for wa, wb, xa, xb in zip(a[mono], b[mono], va, vb, strict=True):
                lo_k, hi_k = sorted((xa, xb))
                for k in range(int(math.ceil(lo_k / math.pi)), int(math.floor(hi_k / math.pi))
                               + 1):
                    if k * math.pi in (xa, xb) and xa != xb and k * math.pi == max(xa, xb):
                        continue   # counted in the neighbouring interval
                    found_w.append(_bisect(ph, wa, wb, offset, k * math.pi))
                    found_level.append(k)
                    if len(found_w) > max_cross:
                        return found_w, found_level, undecided
        split = has & ~mono
        tiny = split & ((b - a) < width0 * 2.0**-40)
        undecided += int(tiny.sum())
        split &= ~tiny
        mid = 0.5 * (a[split] + b[split])
        a, b = np.concatenate([a[split], mid]), np.concatenate([mid, b[split]])
    return found_w, found_level, undecided


def _bisect(ph: _Phase, wa: float, wb: float, offset: float, level: float) -> float:
    fa = _psi(ph, wa) + offset - level
    for _ in range(80):
        wm = 0.5 * (wa + wb)
        fm = _psi(ph, wm) + offset - level
        if fm == 0 or wb - wa <= 1e-15 * max(abs(wm), 1e-300):
            return wm
        if (fm > 0) == (fa > 0):
            wa, fa = wm, fm
        else:
            wb = wm
    return 0.5 * (wa + wb)


def _psi(ph: _Phase, w: float) -> float:
    up, dn = ph.parts(np.array([w]))
    return float(up[0] - dn[0])


def _frequency_bound(n: np.ndarray, d: np.ndarray, k_bound: float, r: float) -> float:
    """W with |D(jw)/N(jw)| > k_bound for every w > W (see module notes), or inf."""
    dn = int(poly.effective_degree(d[None, :])[0])
    nm = int(poly.effective_degree(n[None, :])[0])
    lead = abs(d[dn] / n[nm])
    r = max(r, 1e-300)

    def bound(w: float) -> float:
        return lead * w ** (dn - nm) * (1 - r / w) ** dn / (1 + r / w) ** nm

    if dn == nm and lead <= k_bound:
        return math.inf
    w = 2.0 * r
    while bound(w) <= k_bound:
        w *= 2.0
        if w > 1e300:
            return math.inf
    return w


def _start_counts(ph: _Phase, k_first: float) -> tuple[int, int]:
    """Right-half-plane root counts at K = 0+ and K = 0-.

    Roots of D off the axis keep their side for small |K|. Each m-fold root r of D on the
    axis splits into m roots near r + (K c)^(1/m) e^(2 pi i k/m), c = -N(r) e^{-rT} m!/D^(m)(r)
    (Puiseux); those guesses are polished by Newton's method on the exact quasi-polynomial
    at a small gain eps (far below the first crossing gain ``k_first``), and counted by the
    sign of their real part. This decides the cases where the first-order term alone leaves
    the roots on the axis (a double integrator with PI control, for example).
    """
    rd = _roots(ph.d)
    strict = int(np.sum(rd.real > _AXIS_RTOL * np.maximum(1.0, np.abs(rd))))
    counts = {1.0: strict, -1.0: strict}
    axis = ph.axis_d
    done = np.zeros(axis.size, dtype=bool)
    for i, r in enumerate(axis):
        if done[i]:
            continue
        same = np.abs(axis - r) <= 1e-6 * max(1.0, abs(r))
        done |= same
        m = int(same.sum())
        r = complex(0.0, r.imag)
        dm = poly.evaluate(_nth_derivative(ph.d, m)[None, :], np.array([r]))[0, 0] / \
            math.factorial(m)
        c = -poly.evaluate(ph.n[None, :], np.array([r]))[0, 0] * np.exp(-r * ph.t) / dm
        radius = 1e-3 * max(1.0, abs(r))
        eps = min(1e-6 * k_first, radius**m / max(abs(c), 1e-300))
        for sign in (1.0, -1.0):
            k = sign * eps
            guess = r + (k * c + 0j) ** (1.0 / m) * np.exp(2j * np.pi * np.arange(m) / m)
            roots = _newton_quasi(ph, guess, k)
            counts[sign] += int(np.sum(roots.real >= -1e-9 * np.abs(roots - r)))
    return counts[1.0], counts[-1.0]


def _newton_quasi(ph: _Phase, s: np.ndarray, k: float, steps: int = 30) -> np.ndarray:
    """Newton's method on D(s) + K N(s) e^{-sT} from the starting points ``s``."""
    d1 = _nth_derivative(ph.d, 1)[None, :]
    n1 = _nth_derivative(ph.n, 1)[None, :]
    for _ in range(steps):
        e = np.exp(-s * ph.t)
        nv = poly.evaluate(ph.n[None, :], s)[0]
        f = poly.evaluate(ph.d[None, :], s)[0] + k * nv * e
        fp = poly.evaluate(d1, s)[0] + k * (poly.evaluate(n1, s)[0] - ph.t * nv) * e
        with np.errstate(all="ignore"):
            step = np.where(fp != 0, f / fp, 0.0)
        s = s - np.where(np.isfinite(step), step, 0.0)
    return s


def _nth_derivative(c: np.ndarray, m: int) -> np.ndarray:
    out = c[None, :]
    for _ in range(m):
        out = poly.derivative(out)
    return out[0]


def delay_gain_intervals(n: np.ndarray, d: np.ndarray, delay: np.ndarray,
                         gains_of_interest: np.ndarray) -> list[GainIntervals]:
    """Stable open intervals of K for D + K N e^{-sT}, one result per sample.

    ``gains_of_interest`` (S, G): nominal gain and gain-range ends, which set the least
    gain bound of the search. See the module notes for the method and its guarantees.
    """
    samples = max(n.shape[0], d.shape[0], delay.shape[0])
    n = np.broadcast_to(n, (samples, n.shape[1]))
    d = np.broadcast_to(d, (samples, d.shape[1]))
    out = []
    for i in range(samples):
        out.append(_one(n[i], d[i], float(delay[i]),
                        float(np.max(np.abs(gains_of_interest[i])))))
    return out


def _one(n: np.ndarray, d: np.ndarray, t: float, k_interest: float) -> GainIntervals:
    ph = _Phase(n, d, t)
    mags = np.abs(ph.roots_all)
    r_max = float(mags.max()) if mags.size else 0.0
    neg = ~ph.up
    sum_a = float(np.abs(ph.a[neg]).sum()) if ph.a.size else 0.0
    b_max = float(np.abs(ph.b).max()) if ph.b.size else 0.0
    w0 = b_max + math.sqrt(2.0 * sum_a / t) if sum_a > 0 else b_max
    w1 = max(2.0 * r_max, w0 + 4.0 * math.pi / t, 4.0 * math.pi / t)
    # jump points (axis roots) split the range
    jumps = sorted({float(abs(x.imag)) for x in np.concatenate([ph.axis_d, ph.axis_n])
                    if abs(x.imag) > 0})
    ref = 0.5 * w1 / (1 + len(jumps)) if not jumps else 0.5 * jumps[0]
    offset = float(ph.actual(np.array([ref]))[0] - _psi(ph, ref))

    def search(lo: float, hi: float) -> tuple[list[float], list[float], int]:
        edges = [lo] + [j for j in jumps if lo < j < hi] + [hi]
        ws: list[float] = []
        lv: list[float] = []
        und = 0
        for a, b in zip(edges[:-1], edges[1:], strict=True):
            if b <= a:
                continue
            mid = 0.5 * (a + b)
            off = float(ph.actual(np.array([mid]))[0] - _psi(ph, mid))
            off = offset + round((off - offset) / (2 * math.pi)) * 2 * math.pi \
                if abs(((off - offset) / math.pi) % 2 - 1) > 0.5 else off
            w, level, u = _isolate(ph, a, b, off, MAX_CROSSINGS)
            ws += w
            lv += level
            und += u
        return ws, lv, und

    ws, levels, undecided = search(0.0, w1)
    ratio = ph.gain_ratio(np.asarray(ws)) if ws else np.zeros(0)
    k_b = 2.0 * max([k_interest, 1e-300, *ratio.tolist()])
    w_end = _frequency_bound(n, d, k_b, r_max)
    if math.isfinite(w_end) and w_end > w1:
        more_w, more_l, und2 = search(w1, w_end)
        ws += more_w
        levels += more_l
        undecided += und2
    elif not math.isfinite(w_end):
        k_b = min(k_b, abs(d[int(poly.effective_degree(d[None, :])[0])]
                           / n[int(poly.effective_degree(n[None, :])[0])]))
    w_arr = np.asarray(ws, dtype=np.float64)
    crossings: list[tuple[float, float, int]] = []
    if w_arr.size:
        wp, kp, ok = newton_crossings(n[None, :], d[None, :], np.array([t]), w_arr[None, :])
        slope = ph.slope(wp[0])
        for j in range(w_arr.size):
            w = float(wp[0, j]) if ok[0, j] else float(w_arr[j])
            k = float(kp[0, j]) if ok[0, j] else float(
                ph.gain_ratio(np.array([w]))[0] * (1 if levels[j] % 2 else -1))
            if abs(k) <= k_b:
                crossings.append((k, w, 2 * int(np.sign(slope[j]))))
    # real-axis crossing at s = 0
    if n[0] != 0:
        k0 = float(-d[0] / n[0]) + 0.0
        if k0 != 0:
            hp = -(_deriv_at0(d) + t * d[0]) / n[0] + d[0] * _deriv_at0(n) / n[0] ** 2
            crossings.append((k0, 0.0, int(np.sign(np.sign(k0) * hp))))
    for x in ph.axis_d:
        if abs(x.imag) > 0:
            crossings.append((0.0, float(abs(x.imag)), 0))
    if d[0] == 0 and n[0] != 0:
        crossings.append((0.0, 0.0, 0))
    k_first = min((abs(k) for k, _, _ in crossings if k != 0), default=1.0)
    plus, minus = _start_counts(ph, k_first)
    stable = _walk(crossings, plus, minus, k_b)
    found = tuple(Crossing(gain=k, frequency=w) for k, w, _ in
                  sorted({(k, w, s) for k, w, s in crossings}, key=lambda c: (c[0], c[1])))
    return GainIntervals(crossings=_unique(found), stable=stable, search_bound=k_b,
                         fixed_axis_pole=False) if undecided == 0 else \
        GainIntervals(crossings=_unique(found), stable=stable, search_bound=k_b)


def _deriv_at0(c: np.ndarray) -> float:
    return float(c[1]) if c.shape[0] > 1 else 0.0


def _unique(found: tuple[Crossing, ...]) -> tuple[Crossing, ...]:
    out: list[Crossing] = []
    for c in found:
        if out and abs(c.gain - out[-1].gain) <= 1e-10 * max(1.0, abs(c.gain)) and \
                abs(c.frequency - out[-1].frequency) <= 1e-8 * max(1.0, c.frequency):
            continue
        out.append(c)
    return tuple(out)


def _walk(crossings: list[tuple[float, float, int]], plus: int, minus: int,
          k_b: float) -> tuple[tuple[float, float], ...]:
    """Stable intervals from the start counts and the signed crossing steps."""
    intervals: list[tuple[float, float]] = []
    for side, start in ((1.0, plus), (-1.0, minus)):
        steps = sorted((abs(k), s) for k, _, s in crossings if k * side > 0)
        count = start
        prev = 0.0
        for mag, s in steps:
            if count == 0 and mag > prev:
                intervals.append((prev, mag) if side > 0 else (-mag, -prev))
            count += s
            prev = mag
        if count == 0 and prev < k_b:
            intervals.append((prev, k_b) if side > 0 else (-k_b, -prev))
    intervals.sort()
    merged: list[tuple[float, float]] = []
    zero_is_boundary = any(k == 0 for k, _, _ in crossings)
    for lo, hi in intervals:
        if merged and merged[-1][1] == 0.0 == lo and not zero_is_boundary:
            merged[-1] = (merged[-1][0], hi)
        else:
            merged.append((lo, hi))
    return tuple(merged)

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
2^-40 of its original width is counted in ``DelayCrossings.undecided``). The starting
grid (geometric from 1e-9 of the smallest root magnitude, plus the imaginary parts of the
roots) only sets where the refinement begins; the guarantee does not depend on it. Roots
of D or N on the imaginary axis make psi jump by pi; they split the frequency range.
Each bracketed crossing is solved for psi(w) = level by Newton's method on psi safeguarded
by bisection inside its bracket (psi is provably monotone there, so the root is unique).
At most ``MAX_CROSSINGS`` + 1 crossings are kept per frequency segment.

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
Puiseux expansion polished by Newton's method at a small gain (multiple roots, and simple
ones whose first-order step runs along the axis) sends them; walking the crossings in
order of |K| on each side adds 2 (w > 0) or 1 (w = 0) in the crossing's direction.

Accuracy: each bracket is solved to a relative step of 1e-15 or until psi(w) - level is at
the rounding level of psi; crossings whose |D/N| there exceeds K_B by more than 1e-6
(relative) are dropped; the others are polished by Newton's method on
D(jw) + K N(jw)e^{-jwT} = 0 in (w, K), to about 1e-12 relative. A crossing whose polish
does not converge keeps the solved w, K = +-|D(jw)/N(jw)| (sign from the level) and the
direction of psi' there.

Batching
--------
All samples are processed together: the roots of D and N come from one eigenvalue call
per distinct degree; the phase terms are padded (samples, terms) arrays with a mask; the
isolation works on one flat array of frequency intervals of every sample, each carrying
the frequency segment (and so the sample, offset and width) it belongs to, so a bisection
round is one set of array operations for the whole batch; all brackets are solved
together by a fixed loop of vectorised iterations over the ones not yet converged; the
Newton polish, the start counts (Puiseux cases included) and the walk over the crossings
run on flat arrays of crossings with an owner index. The Python loops that remain run over
bisection rounds, solver iterations, frequency-bound doublings, root positions and
multiplicities (start counts), distinct degrees (roots) and chunks, never over samples,
except in :func:`delay_gain_intervals`, which builds its small per-sample result objects
(tuples of :class:`~loopvet.analysis.gain.Crossing`) from the arrays: those are Python
objects by nature. :func:`delay_crossing_arrays` returns the arrays themselves and
:func:`delay_stability_margins` reads stability and gain margins from them without any
per-sample loop. Batches are cut into chunks of ``CHUNK`` samples to bound memory.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..lti import poly
from .gain import Crossing, GainIntervals, interval_margins, newton_crossings

MAX_CROSSINGS = 4000
CHUNK = 1024
_AXIS_RTOL = 1e-9
_GEO_POINTS = 24          # starting grid points per frequency segment (geometric)
_ROUNDS = 60              # bisection rounds of the isolation (40 suffice: see _isolate)
_SOLVE_BLOCK = 1 << 16   # brackets solved together
_SOLVE_STEPS = 100        # safeguarded Newton steps per bracket (bisection alone needs < 80)
_FIRST_ORDER_RTOL = 1e-6  # |Re c| / |c| below which the first-order direction is not trusted


@dataclass(frozen=True, slots=True)
class DelayCrossings:
    """Crossings and stable intervals of a batch of dead-time loops as padded arrays.

    Per sample i the first ``count[i]`` entries of ``gain``, ``frequency`` and
    ``direction`` hold the crossings sorted by (gain, frequency), the rest is NaN (gain,
    frequency) or 0 (direction). ``direction`` is the change in the number of
    right-half-plane roots as |K| grows through the crossing: +-2 for a pair at w > 0, +-1
    for a real root through s = 0, 0 for the gain-0 entries (roots of D on the axis).
    ``start_plus`` and ``start_minus`` count the right-half-plane roots at K = 0+ and 0-.
    ``stable_lo`` / ``stable_hi`` hold the stable open intervals (sorted, NaN-padded);
    ``search_bound`` is K_B, the |K| up to which crossings were searched; ``undecided``
    counts frequency intervals left undecided at 2^-40 of their frequency (normally 0).
    """

    gain: np.ndarray
    frequency: np.ndarray
    direction: np.ndarray
    count: np.ndarray
    start_plus: np.ndarray
    start_minus: np.ndarray
    stable_lo: np.ndarray
    stable_hi: np.ndarray
    search_bound: np.ndarray
    undecided: np.ndarray

    @property
    def samples(self) -> int:
        return int(self.count.size)


# ------------------------------------------------------------------ phase terms, batched

@dataclass(frozen=True, slots=True)
class _Terms:
    """Off-axis root terms of psi per sample, padded to (S, P).

    Term p of sample i is ``g[i, p] * atan((w - b)/(-a))``, g = +1 for a root of D and -1
    for a root of N (0 where padded). ``su``/``sd`` are g on the terms that increase /
    decrease psi (0 elsewhere); ``vu``/``vd`` are the same masks as 1.0.
    """

    na: np.ndarray     # -a (1 where padded)
    absa: np.ndarray   # |a| (1 where padded)
    b: np.ndarray
    g: np.ndarray
    su: np.ndarray
    sd: np.ndarray
    vu: np.ndarray
    vd: np.ndarray
    t: np.ndarray      # (S,)

    def atan(self, own: np.ndarray, w: np.ndarray) -> np.ndarray:
        return np.arctan((w[:, None] - self.b[own]) / self.na[own])

    def parts(self, own: np.ndarray, w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(psi_up, psi_down) at w for samples ``own``: both non-decreasing in w."""
        th = self.atan(own, w)
        up = (th * self.su[own]).sum(axis=1) + self.t[own] * w
        down = -(th * self.sd[own]).sum(axis=1)
        return up, down

    def psi(self, own: np.ndarray, w: np.ndarray) -> np.ndarray:
        """psi_up - psi_down."""
        return (self.atan(own, w) * self.g[own]).sum(axis=1) + self.t[own] * w

    def slope(self, own: np.ndarray, w: np.ndarray) -> np.ndarray:
        """psi'(w)."""
        a = self.absa[own]
        terms = (self.vu[own] - self.vd[own]) * a / (a * a + (w[:, None] - self.b[own]) ** 2)
        return self.t[own] + terms.sum(axis=1)

    def slope_bounds(self, own: np.ndarray, w1: np.ndarray, w2: np.ndarray,
                     ) -> tuple[np.ndarray, np.ndarray]:
        """Lower and upper bounds of psi' on [w1, w2] (elementwise)."""
        a, b = self.absa[own], self.b[own]
        lo1, hi2 = w1[:, None], w2[:, None]
        near = np.minimum(np.maximum(b, lo1), hi2) - b
        far = np.where(np.abs(lo1 - b) > np.abs(hi2 - b), lo1, hi2) - b
        a2 = a * a
        dmax = a / (a2 + near * near)
        dmin = a / (a2 + far * far)
        vu, vd = self.vu[own], self.vd[own]
        t = self.t[own]
        lo = t + (vu * dmin - vd * dmax).sum(axis=1)
        hi = t + (vu * dmax - vd * dmin).sum(axis=1)
        return lo, hi


def _actual(n: np.ndarray, d: np.ndarray, t: np.ndarray, own: np.ndarray,
            w: np.ndarray) -> np.ndarray:
    """arg h(jw) in (-pi, pi] for samples ``own``, from the polynomials themselves."""
    s = (1j * w)[:, None]
    h = -poly.evaluate(d[own], s)[:, 0] * np.exp(s[:, 0] * t[own]) / \
        poly.evaluate(n[own], s)[:, 0]
    return np.angle(h)


def _gain_ratio(n: np.ndarray, d: np.ndarray, own: np.ndarray, w: np.ndarray) -> np.ndarray:
    s = (1j * w)[:, None]
    return np.abs(poly.evaluate(d[own], s)[:, 0] / poly.evaluate(n[own], s)[:, 0])


def _segment_starts(owner: np.ndarray) -> np.ndarray:
    """Index of the first entry of each entry's run in a sorted owner array."""
    idx = np.arange(owner.size)
    new = np.ones(owner.size, dtype=bool)
    new[1:] = owner[1:] != owner[:-1]
    return np.maximum.accumulate(np.where(new, idx, 0))


# ------------------------------------------------------------------ isolation, batched

def _isolate(tm: _Terms, minmag: np.ndarray, seg_lo: np.ndarray, seg_hi: np.ndarray,
             seg_off: np.ndarray, seg_own: np.ndarray, samples: int,
             ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Crossings psi(w) + off = k pi in every segment (lo, hi], all segments at once.

    Returns (sample, w, level k, undecided per sample). An interval surviving a round is
    halved; an interval narrower than 2^-40 of its upper end is counted as undecided
    instead (the starting intervals span at most a few decades, so the loop ends within
    _ROUNDS rounds).
    """
    nseg = seg_lo.size
    first = np.where(seg_lo == 0, seg_lo + (seg_hi - seg_lo) * 1e-12, seg_lo * (1 + 1e-12))
    start = np.maximum(np.maximum(seg_lo, 1e-9 * minmag[seg_own]), 1e-300)
    u = np.linspace(0.0, 1.0, _GEO_POINTS)
    with np.errstate(divide="ignore", invalid="ignore"):
        geo = start[:, None] * (seg_hi / start)[:, None] ** u[None, :]
    valid_b = (tm.vu + tm.vd)[seg_own] > 0
    bpts = np.where(valid_b, np.abs(tm.b[seg_own]), np.nan)
    cand = np.concatenate([geo, bpts], axis=1)
    inside = (cand > first[:, None]) & (cand < seg_hi[:, None])
    cand = np.sort(np.where(inside, cand, np.nan), axis=1)
    dup = np.zeros(cand.shape, dtype=bool)
    dup[:, 1:] = cand[:, 1:] == cand[:, :-1]
    cand[dup] = np.nan
    pts = np.concatenate([first[:, None], cand, seg_hi[:, None]], axis=1)
    keep = ~np.isnan(pts)
    pw = pts[keep]
    pseg = np.nonzero(keep)[0]
    pu, pd = tm.parts(seg_own[pseg], pw)
    pair = pseg[:-1] == pseg[1:]
    wa, wb = pw[:-1][pair], pw[1:][pair]
    ua, da, ub, db = pu[:-1][pair], pd[:-1][pair], pu[1:][pair], pd[1:][pair]
    seg = pseg[:-1][pair]
    found_count = np.zeros(nseg, dtype=np.int64)
    undecided = np.zeros(samples, dtype=np.int64)
    out_seg: list[np.ndarray] = []
    out_k: list[np.ndarray] = []
    out_br: list[tuple[np.ndarray, ...]] = []
    for _ in range(_ROUNDS):
        if wa.size == 0:
            break
        off = seg_off[seg]
        with np.errstate(invalid="ignore"):
            has = np.ceil((ua - db + off) / math.pi) <= np.floor((ub - da + off) / math.pi)
        h = np.nonzero(has)[0]
        slo, shi = tm.slope_bounds(seg_own[seg[h]], wa[h], wb[h])
        mono_h = (slo > 0) | (shi < 0)
        m = h[mono_h]
        if m.size:
            xa = ua[m] - da[m] + off[m]
            xb = ub[m] - db[m] + off[m]
            vlo, vhi = np.minimum(xa, xb), np.maximum(xa, xb)
            k0 = np.ceil(vlo / math.pi)
            k1 = np.floor(vhi / math.pi)
            # a level at the upper end value is counted in the neighbouring interval
            k1 = np.where((k1 * math.pi == vhi) & (xa != xb), k1 - 1, k1)
            cnt = np.maximum(k1 - k0 + 1, 0).astype(np.int64)
            # at most MAX_CROSSINGS + 1 crossings per segment
            order = np.argsort(seg[m], kind="stable")
            c_sorted = cnt[order]
            s_sorted = seg[m][order]
            cum = np.cumsum(c_sorted)
            before = cum - c_sorted - (cum - c_sorted)[_segment_starts(s_sorted)]
            room = MAX_CROSSINGS + 1 - found_count[s_sorted] - before
            allowed = np.empty_like(cnt)
            allowed[order] = np.clip(room, 0, c_sorted)
            np.add.at(found_count, seg[m], allowed)
            total = int(allowed.sum())
            if total:
                rep = np.repeat(np.arange(m.size), allowed)
                first_of = np.cumsum(allowed) - allowed
                k = k0[rep] + (np.arange(total) - first_of[rep])
                mm = m[rep]
                out_seg.append(seg[mm])
                out_k.append(k)
                out_br.append((wa[mm], wb[mm], xa[rep], xb[rep]))
        split = np.zeros(wa.size, dtype=bool)
        split[h[~mono_h]] = True
        # undecided only once narrower than 2^-40 of its own frequency: a width measured
        # against the segment would stop a segment spanning many decades (a spurious root of
        # N far out, from rounding, makes w1 huge) long before its low-frequency crossings
        tiny = split & ((wb - wa) < wb * 2.0**-40)
        if np.any(tiny):
            np.add.at(undecided, seg_own[seg[tiny]], 1)
        split &= ~tiny & (found_count[seg] <= MAX_CROSSINGS)
        sidx = np.nonzero(split)[0]
        mid = 0.5 * (wa[sidx] + wb[sidx])
        um, dm = tm.parts(seg_own[seg[sidx]], mid)
        wa, wb = np.concatenate([wa[sidx], mid]), np.concatenate([mid, wb[sidx]])
        ua, ub = np.concatenate([ua[sidx], um]), np.concatenate([um, ub[sidx]])
        da, db = np.concatenate([da[sidx], dm]), np.concatenate([dm, db[sidx]])
        seg = np.concatenate([seg[sidx], seg[sidx]])
    if wa.size:                  # still undecided after _ROUNDS rounds: say so, never drop
        np.add.at(undecided, seg_own[seg], 1)
    if not out_seg:
        z = np.zeros(0)
        return np.zeros(0, dtype=np.int64), z, z, undecided
    fseg = np.concatenate(out_seg)
    level = np.concatenate(out_k)
    bwa, bwb, bxa, bxb = (np.concatenate([b[i] for b in out_br]) for i in range(4))
    own = seg_own[fseg]
    target = level * math.pi
    boff = seg_off[fseg]
    w = np.empty(own.size)
    for i in range(0, own.size, _SOLVE_BLOCK):   # bounds memory when crossings abound
        sl = slice(i, i + _SOLVE_BLOCK)
        w[sl] = _solve_levels(tm, own[sl], bwa[sl], bwb[sl], bxa[sl], bxb[sl], boff[sl],
                              target[sl])
    return own, w, level, undecided


def _solve_levels(tm: _Terms, own: np.ndarray, wa: np.ndarray, wb: np.ndarray,
                  xa: np.ndarray, xb: np.ndarray, off: np.ndarray,
                  target: np.ndarray) -> np.ndarray:
    """w in [wa, wb] with psi(w) + off = target, psi monotone on the bracket.

    ``xa``, ``xb``: psi + off at the ends (target lies between them). Newton's method on
    psi from the linear interpolate, replaced by bisection of the current bracket whenever
    it leaves the bracket or its step is not below half the step before the last one.
    Stops when the step is below 1e-15 relative, or when psi + off - target is at the
    rounding level of its terms (the root of the computed psi is then determined only to
    that level, as for a bisection to the last bit).
    """
    sgn = np.where(xb >= xa, 1.0, -1.0)
    ga, gb = sgn * (xa - target), sgn * (xb - target)   # ga <= 0 <= gb
    lo, hi = wa.copy(), wb.copy()
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = np.nan_to_num(np.clip(-ga / (gb - ga), 0.0, 1.0), nan=0.5)
    x = np.where(ga == 0, wa, np.where(gb == 0, wb, lo + (hi - lo) * frac))
    dx = hi - lo
    dx_old = dx.copy()
    act = np.nonzero((ga != 0) & (gb != 0))[0]
    # rounding level of psi + off - target: its terms are below T w + (number of terms) pi/2
    span = (tm.vu + tm.vd).sum(axis=1) * (math.pi / 2)
    noise_0 = 8 * np.finfo(float).eps * (span[own] + np.abs(off) + np.abs(target) + 1.0)
    for _ in range(_SOLVE_STEPS):
        if act.size == 0:
            break
        xs, o = x[act], own[act]
        g = sgn[act] * (tm.psi(o, xs) + off[act] - target[act])
        gp = sgn[act] * tm.slope(o, xs)
        lo_a = np.where(g < 0, xs, lo[act])
        hi_a = np.where(g > 0, xs, hi[act])
        with np.errstate(divide="ignore", invalid="ignore"):
            step = g / gp
        newton = xs - step
        use = (newton >= lo_a) & (newton <= hi_a) & \
            (np.abs(2.0 * step) <= np.abs(dx_old[act]))
        xn = np.where(use, newton, 0.5 * (lo_a + hi_a))
        noise = noise_0[act] + 8 * np.finfo(float).eps * tm.t[o] * np.abs(xs)
        done = (np.abs(g) <= noise) | (np.abs(xn - xs) <= 1e-15 * np.abs(xs))
        xn = np.where(done & (np.abs(g) <= noise), xs, xn)
        dx_old[act] = dx[act]
        dx[act] = np.abs(xn - xs)
        x[act], lo[act], hi[act] = xn, lo_a, hi_a
        act = act[~done]
    return x


# ------------------------------------------------------------------ per-sample helpers

def _frequency_bound(lead: np.ndarray, dn: np.ndarray, nm: np.ndarray, k_bound: np.ndarray,
                     r: np.ndarray) -> np.ndarray:
    """W with |D(jw)/N(jw)| > k_bound for every w > W (see module notes), or inf."""
    r = np.maximum(r, 1e-300)

    def bound(w: np.ndarray) -> np.ndarray:
        with np.errstate(all="ignore"):
            return lead * w ** (dn - nm) * (1 - r / w) ** dn / (1 + r / w) ** nm

    out = np.full(lead.shape, np.inf)
    w = 2.0 * r
    act = ~((dn == nm) & (lead <= k_bound))
    grow = act & (bound(w) <= k_bound)
    while np.any(grow):
        w = np.where(grow, 2.0 * w, w)
        over = grow & (w > 1e300)
        act &= ~over
        grow = act & (bound(w) <= k_bound)
    return np.where(act, w, out)


def _newton_quasi(n: np.ndarray, d: np.ndarray, t: np.ndarray, s: np.ndarray, k: np.ndarray,
                  steps: int = 30) -> np.ndarray:
    """Newton's method on D(s) + K N(s) e^{-sT} from the points ``s``, one row of n, d,
    t and k per point (flat, batched)."""
    d1, n1 = poly.derivative(d), poly.derivative(n)
    for _ in range(steps):
        x = s[:, None]
        e = np.exp(-s * t)
        nv = poly.evaluate(n, x)[:, 0]
        f = poly.evaluate(d, x)[:, 0] + k * nv * e
        fp = poly.evaluate(d1, x)[:, 0] + k * (poly.evaluate(n1, x)[:, 0] - t * nv) * e
        with np.errstate(all="ignore"):
            step = np.where(fp != 0, f / fp, 0.0)
        s = s - np.where(np.isfinite(step), step, 0.0)
    return s


# ------------------------------------------------------------------ the batched analysis

def delay_crossing_arrays(n: np.ndarray, d: np.ndarray, delay: np.ndarray,
                          gains_of_interest: np.ndarray) -> DelayCrossings:
    """Crossings, start counts and stable intervals of D + K N e^{-sT}, batched.

    ``n``, ``d``: (S, .) ascending coefficients (a batch of one broadcasts); ``delay``
    (S,) dead times, all > 0; ``gains_of_interest`` (S, G): nominal gain and gain-range
    ends, which set the least gain bound of the search. See the module notes for the
    method and its guarantees.
    """
    n = np.asarray(n, dtype=np.float64)
    d = np.asarray(d, dtype=np.float64)
    t = np.asarray(delay, dtype=np.float64).reshape(-1)
    goi = np.atleast_2d(np.asarray(gains_of_interest, dtype=np.float64))
    samples = max(n.shape[0], d.shape[0], t.shape[0], goi.shape[0])
    n = np.broadcast_to(n, (samples, n.shape[1]))
    d = np.broadcast_to(d, (samples, d.shape[1]))
    t = np.broadcast_to(t, (samples,))
    goi = np.broadcast_to(goi, (samples, goi.shape[1]))
    if not np.all(t > 0):
        raise ValueError("every sample needs a dead time > 0 (delay-free samples: use "
                         "stable_gain_intervals)")
    parts = [_chunk(n[i:i + CHUNK], d[i:i + CHUNK], t[i:i + CHUNK], goi[i:i + CHUNK])
             for i in range(0, samples, CHUNK)]
    if len(parts) == 1:
        return parts[0]
    return _concat(parts)


def _concat(parts: list[DelayCrossings]) -> DelayCrossings:
    def cat(name: str, fill: float) -> np.ndarray:
        arrs = [getattr(p, name) for p in parts]
        width = max(a.shape[1] for a in arrs)
        return np.concatenate([np.pad(a, ((0, 0), (0, width - a.shape[1])),
                                      constant_values=fill) for a in arrs])

    return DelayCrossings(
        gain=cat("gain", np.nan), frequency=cat("frequency", np.nan),
        direction=cat("direction", 0), count=np.concatenate([p.count for p in parts]),
        start_plus=np.concatenate([p.start_plus for p in parts]),
        start_minus=np.concatenate([p.start_minus for p in parts]),
        stable_lo=cat("stable_lo", np.nan), stable_hi=cat("stable_hi", np.nan),
        search_bound=np.concatenate([p.search_bound for p in parts]),
        undecided=np.concatenate([p.undecided for p in parts]))


def _chunk(n: np.ndarray, d: np.ndarray, t: np.ndarray, goi: np.ndarray) -> DelayCrossings:
    samples = n.shape[0]
    # columns of zeros above every sample's degree only cost time in the evaluations
    n, d = poly.trim_common(n), poly.trim_common(d)
    idx = np.arange(samples)
    k_interest = np.max(np.abs(goi), axis=1)
    rd = poly.roots_ragged(d)
    rn = poly.roots_ragged(n)
    roots = np.concatenate([rd, rn], axis=1)
    kind = np.concatenate([np.ones(rd.shape[1]), -np.ones(rn.shape[1])])
    valid = ~np.isnan(roots.real)
    mag = np.abs(roots)
    with np.errstate(invalid="ignore"):
        axis = valid & (np.abs(roots.real) <= _AXIS_RTOL * np.maximum(1.0, mag))
    off = valid & ~axis
    # phase terms: off-axis roots, D's first then N's, in root order, padded at the end
    order = np.argsort(~off, axis=1, kind="stable")
    width = int(off.sum(axis=1).max(initial=0))
    order = order[:, :width]
    toff = np.take_along_axis(off, order, axis=1)
    tr = np.take_along_axis(roots, order, axis=1)
    g = np.where(toff, kind[order], 0.0)
    a = np.where(toff, tr.real, -1.0)
    b = np.where(toff, tr.imag, 0.0)
    up = toff & (g * -a > 0)
    down = toff & ~up
    tm = _Terms(na=-a, absa=np.abs(a), b=b, g=g, su=np.where(up, g, 0.0),
                sd=np.where(down, g, 0.0), vu=up.astype(np.float64),
                vd=down.astype(np.float64), t=t)
    r_max = np.where(valid, mag, 0.0).max(axis=1, initial=0.0)
    minmag = np.where(valid & (mag > 0), mag, np.inf).min(axis=1, initial=np.inf)
    minmag = np.where(np.isfinite(minmag), minmag, 1.0)
    sum_a = np.where(down, np.abs(a), 0.0).sum(axis=1)
    b_max = np.where(toff, np.abs(b), 0.0).max(axis=1, initial=0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        w0 = np.where(sum_a > 0, b_max + np.sqrt(2.0 * sum_a / t), b_max)
    w1 = np.maximum(np.maximum(2.0 * r_max, w0 + 4.0 * math.pi / t), 4.0 * math.pi / t)
    # roots on the axis split the frequency range
    jumps = np.sort(np.where(axis & (np.abs(roots.imag) > 0), np.abs(roots.imag), np.inf),
                    axis=1)
    if jumps.shape[1]:
        rep = np.zeros(jumps.shape, dtype=bool)
        rep[:, 1:] = jumps[:, 1:] == jumps[:, :-1]
        jumps = np.sort(np.where(rep, np.inf, jumps), axis=1)
        jumps = jumps[:, : int(np.isfinite(jumps).sum(axis=1).max(initial=0))]
    has_jump = np.isfinite(jumps[:, 0]) if jumps.shape[1] else np.zeros(samples, dtype=bool)
    ref = np.where(has_jump, 0.5 * (jumps[:, 0] if jumps.shape[1] else 0.0), 0.5 * w1)
    offset = _actual(n, d, t, idx, ref) - tm.psi(idx, ref)

    def search(lo: np.ndarray, hi: np.ndarray, which: np.ndarray,
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        jj = jumps[which]
        inner = np.where((jj > lo[:, None]) & (jj < hi[:, None]), jj, np.inf)
        edges = np.sort(np.concatenate([lo[:, None], inner, hi[:, None]], axis=1), axis=1)
        e_lo, e_hi = edges[:, :-1], edges[:, 1:]
        ok = np.isfinite(e_hi) & (e_hi > e_lo)
        s_own = np.broadcast_to(which[:, None], ok.shape)[ok]
        s_lo, s_hi = e_lo[ok], e_hi[ok]
        mid = 0.5 * (s_lo + s_hi)
        raw = _actual(n, d, t, s_own, mid) - tm.psi(s_own, mid)
        diff = raw - offset[s_own]
        snap = np.abs(np.mod(diff / math.pi, 2) - 1) > 0.5
        s_off = np.where(snap, offset[s_own] + np.round(diff / (2 * math.pi)) * 2 * math.pi,
                         raw)
        return _isolate(tm, minmag, s_lo, s_hi, s_off, s_own, samples)

    own1, ws1, lv1, und = search(np.zeros(samples), w1, idx)
    ratio = _gain_ratio(n, d, own1, ws1)
    kmax = np.zeros(samples)
    np.maximum.at(kmax, own1, ratio)
    k_b = 2.0 * np.maximum(np.maximum(k_interest, 1e-300), kmax)
    dn = poly.effective_degree(d)
    nm = poly.effective_degree(n)
    lead = np.abs(d[idx, dn] / n[idx, nm])
    w_end = _frequency_bound(lead, dn, nm, k_b, r_max)
    more = np.nonzero(np.isfinite(w_end) & (w_end > w1))[0]
    if more.size:
        own2, ws2, lv2, und2 = search(w1[more], w_end[more], more)
        own1 = np.concatenate([own1, own2])
        ws1 = np.concatenate([ws1, ws2])
        lv1 = np.concatenate([lv1, lv2])
        und = und + und2
    k_b = np.where(np.isfinite(w_end), k_b, np.minimum(k_b, lead))
    # crossings clearly beyond K_B (|D/N| at the bracketed w) need no polish
    near = _gain_ratio(n, d, own1, ws1) <= k_b[own1] * (1 + 1e-6)
    own1, ws1, lv1 = own1[near], ws1[near], lv1[near]
    # polish every crossing on the quasi-polynomial itself
    wp, kp, okp = newton_crossings(n[own1], d[own1], t[own1], ws1[:, None])
    wp, kp, okp = wp[:, 0], kp[:, 0], okp[:, 0]
    w_c = np.where(okp, wp, ws1)
    parity = np.where(np.mod(lv1, 2) == 1, 1.0, -1.0)
    k_c = np.where(okp, kp, _gain_ratio(n, d, own1, w_c) * parity)
    keep = np.abs(k_c) <= k_b[own1]
    c_own, c_k, c_w = own1[keep], k_c[keep], w_c[keep]
    c_dir = 2 * np.sign(tm.slope(c_own, c_w)).astype(np.int64)
    # the real-axis crossing at s = 0 and the gain-0 entries of the roots of D on the axis
    n0, d0 = n[:, 0], d[:, 0]
    d1 = d[:, 1] if d.shape[1] > 1 else np.zeros(samples)
    n1 = n[:, 1] if n.shape[1] > 1 else np.zeros(samples)
    with np.errstate(divide="ignore", invalid="ignore"):
        k0 = -d0 / n0 + 0.0
        hp = -(d1 + t * d0) / n0 + d0 * n1 / n0**2
    real = np.nonzero((n0 != 0) & (k0 != 0))[0]
    ax_i, ax_j = np.nonzero(axis[:, : rd.shape[1]] & (np.abs(rd.imag) > 0))
    origin = np.nonzero((d0 == 0) & (n0 != 0))[0]
    c_own = np.concatenate([c_own, real, ax_i, origin])
    c_k = np.concatenate([c_k, k0[real], np.zeros(ax_i.size + origin.size)])
    c_w = np.concatenate([c_w, np.zeros(real.size), np.abs(rd.imag[ax_i, ax_j]),
                          np.zeros(origin.size)])
    c_dir = np.concatenate([c_dir, np.sign(np.sign(k0[real]) * hp[real]).astype(np.int64),
                            np.zeros(ax_i.size + origin.size, dtype=np.int64)])
    kfirst = np.full(samples, np.inf)
    nz = c_k != 0
    np.minimum.at(kfirst, c_own[nz], np.abs(c_k[nz]))
    kfirst = np.where(np.isfinite(kfirst), kfirst, 1.0)
    plus, minus = _start_counts(n, d, t, rd, axis[:, : rd.shape[1]], kfirst)
    zero_boundary = np.zeros(samples, dtype=bool)
    zero_boundary[c_own[c_k == 0]] = True
    st_lo, st_hi = _walk(c_own, c_k, c_dir, plus, minus, k_b, zero_boundary, samples)
    gain, freq, dirn, count = _display(c_own, c_k, c_w, c_dir, samples)
    return DelayCrossings(gain=gain, frequency=freq, direction=dirn, count=count,
                          start_plus=plus, start_minus=minus, stable_lo=st_lo,
                          stable_hi=st_hi, search_bound=k_b, undecided=und)


def _start_counts(n: np.ndarray, d: np.ndarray, t: np.ndarray, rd: np.ndarray,
                  axis: np.ndarray, k_first: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Right-half-plane root counts at K = 0+ and K = 0- (see the module notes), batched.

    Roots of D off the axis keep their side for small |K|. The roots of D on the axis are
    grouped (within 1e-6, in root order) into m-fold roots r. A simple root moves to
    r + K c, c = -N(r) e^{-rT}/D'(r), and is counted on the side where Re(K c) > 0. An
    m-fold root, or a simple one with |Re c| <= 1e-6 |c| (first order tangent to the
    axis), splits into m roots near r + (K c)^(1/m) e^(2 pi i q/m), c = -N(r) e^{-rT}
    m!/D^(m)(r) (Puiseux); those guesses are polished by Newton's method on the exact
    quasi-polynomial at a small gain eps (far below the first crossing gain ``k_first``)
    and counted by the sign of their real part. This decides the cases where the
    first-order term alone leaves the roots on the axis (a double integrator with PI
    control, for example). Python loops run over root positions and multiplicities only.
    """
    with np.errstate(invalid="ignore"):
        strict = (rd.real > _AXIS_RTOL * np.maximum(1.0, np.abs(rd))) & ~np.isnan(rd.real)
    plus = strict.sum(axis=1).astype(np.int64)
    minus = plus.copy()
    if not np.any(axis):
        return plus, minus
    # group the axis roots: the first root not yet taken gathers all those near it
    done = ~axis
    g_own: list[np.ndarray] = []
    g_root: list[np.ndarray] = []
    g_mult: list[np.ndarray] = []
    for j in range(rd.shape[1]):
        rows = np.nonzero(~done[:, j])[0]
        if rows.size == 0:
            continue
        r = rd[rows, j]
        with np.errstate(invalid="ignore"):
            same = axis[rows] & (np.abs(rd[rows] - r[:, None])
                                 <= 1e-6 * np.maximum(1.0, np.abs(r))[:, None])
        done[rows] |= same
        g_own.append(rows)
        g_root.append(1j * r.imag)
        g_mult.append(same.sum(axis=1))
    own = np.concatenate(g_own)
    root = np.concatenate(g_root)
    mult = np.concatenate(g_mult)
    c = np.zeros(own.size, dtype=np.complex128)
    deriv = d
    for order in range(1, int(mult.max()) + 1):
        deriv = poly.derivative(deriv)
        sel = np.nonzero(mult == order)[0]
        if sel.size == 0:
            continue
        x = root[sel][:, None]
        dm = poly.evaluate(deriv[own[sel]], x)[:, 0] / math.factorial(order)
        with np.errstate(all="ignore"):
            c[sel] = -poly.evaluate(n[own[sel]], x)[:, 0] * np.exp(-root[sel] * t[own[sel]]) / dm
    with np.errstate(invalid="ignore"):
        first = (mult == 1) & np.isfinite(c) & (np.abs(c.real) > _FIRST_ORDER_RTOL * np.abs(c))
    np.add.at(plus, own[first], (c.real[first] > 0).astype(np.int64))
    np.add.at(minus, own[first], (c.real[first] < 0).astype(np.int64))
    rest = np.nonzero(~first)[0]
    if rest.size == 0:
        return plus, minus
    o, r, m, cc = own[rest], root[rest], mult[rest], c[rest]
    radius = 1e-3 * np.maximum(1.0, np.abs(r))
    eps = np.minimum(1e-6 * k_first[o], radius**m / np.maximum(np.abs(cc), 1e-300))
    # one Newton start per (group, side, branch q < m)
    grp = np.repeat(np.arange(rest.size), 2 * m)
    within = np.arange(grp.size) - np.repeat(np.cumsum(2 * m) - 2 * m, 2 * m)
    side = np.where(within < m[grp], 1.0, -1.0)
    q = np.where(within < m[grp], within, within - m[grp])
    k = side * eps[grp]
    with np.errstate(all="ignore"):
        guess = r[grp] + (k * cc[grp] + 0j) ** (1.0 / m[grp]) * \
            np.exp(2j * np.pi * q / m[grp])
    so = o[grp]
    s = _newton_quasi(n[so], d[so], t[so], guess, k)
    right = (s.real >= -1e-9 * np.abs(s - r[grp])).astype(np.int64)
    np.add.at(plus, so[side > 0], right[side > 0])
    np.add.at(minus, so[side < 0], right[side < 0])
    return plus, minus


def _walk(own: np.ndarray, k: np.ndarray, step: np.ndarray, plus: np.ndarray,
          minus: np.ndarray, k_b: np.ndarray, zero_boundary: np.ndarray, samples: int,
          ) -> tuple[np.ndarray, np.ndarray]:
    """Stable intervals from the start counts and the signed crossing steps, batched.

    On each side of K = 0 the crossings are walked in order of |K| (ties: smaller step
    first); an interval (previous |K|, this |K|) is stable when the count before the
    crossing is 0, the last one up to K_B when the final count is 0. Intervals meeting at
    K = 0 are merged unless a crossing lies at K = 0.
    """
    lo_l: list[np.ndarray] = []
    hi_l: list[np.ndarray] = []
    ow_l: list[np.ndarray] = []
    for side, start in ((1.0, plus), (-1.0, minus)):
        sel = np.nonzero(k * side > 0)[0]
        o, mag, s = own[sel], np.abs(k[sel]), step[sel]
        order = np.lexsort((s, mag, o))
        o, mag, s = o[order], mag[order], s[order]
        first = _segment_starts(o)
        cum = np.cumsum(s)
        before = start[o] + (cum - s) - (cum - s)[first]
        prev = np.where(np.arange(o.size) == first, 0.0, np.roll(mag, 1))
        emit = (before == 0) & (mag > prev)
        last_mag = np.zeros(samples)
        final = start.copy()
        if o.size:
            is_last = np.ones(o.size, dtype=bool)
            is_last[:-1] = o[1:] != o[:-1]
            last_mag[o[is_last]] = mag[is_last]
            final[o[is_last]] = (before + s)[is_last]
        tail = (final == 0) & (last_mag < k_b)
        lo = np.concatenate([prev[emit], last_mag[tail]])
        hi = np.concatenate([mag[emit], k_b[tail]])
        ow_l.append(np.concatenate([o[emit], np.nonzero(tail)[0]]))
        if side > 0:
            lo_l.append(lo)
            hi_l.append(hi)
        else:
            lo_l.append(-hi)
            hi_l.append(-lo)
    ow = np.concatenate(ow_l)
    lo = np.concatenate(lo_l)
    hi = np.concatenate(hi_l)
    order = np.lexsort((hi, lo, ow))
    ow, lo, hi = ow[order], lo[order], hi[order]
    # merge (x, 0) with (0, y) unless K = 0 is a crossing
    join = np.zeros(ow.size, dtype=bool)
    if ow.size > 1:
        join[1:] = (ow[1:] == ow[:-1]) & (hi[:-1] == 0.0) & (lo[1:] == 0.0) & \
            ~zero_boundary[ow[1:]]
    src = np.nonzero(join)[0]
    hi[src - 1] = hi[src]
    ow, lo, hi = ow[~join], lo[~join], hi[~join]
    st_lo, st_hi = _pad(ow, [lo, hi], samples, np.nan)
    return st_lo, st_hi


def _pad(own: np.ndarray, values: list[np.ndarray], samples: int, fill: float,
         ) -> tuple[np.ndarray, ...]:
    """Scatter flat entries, sorted by owner, into (samples, max count) arrays."""
    count = np.bincount(own, minlength=samples)
    width = int(count.max(initial=0))
    pos = np.arange(own.size) - _segment_starts(own) if own.size else own
    out = []
    for v in values:
        arr = np.full((samples, width), fill, dtype=v.dtype if fill == 0 else np.float64)
        arr[own, pos] = v
        out.append(arr)
    return tuple(out)


def _display(own: np.ndarray, k: np.ndarray, w: np.ndarray, step: np.ndarray,
             samples: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Crossings sorted by (gain, frequency) without repeats, padded per sample.

    Entries equal to the previous one within 1e-10 in gain and 1e-8 in frequency
    (relative, at least absolute) are dropped.
    """
    order = np.lexsort((step, w, k, own))
    own, k, w, step = own[order], k[order], w[order], step[order]
    rep = np.zeros(own.size, dtype=bool)
    if own.size > 1:
        rep[1:] = (own[1:] == own[:-1]) & \
            (np.abs(k[1:] - k[:-1]) <= 1e-10 * np.maximum(1.0, np.abs(k[1:]))) & \
            (np.abs(w[1:] - w[:-1]) <= 1e-8 * np.maximum(1.0, w[1:]))
    own, k, w, step = own[~rep], k[~rep], w[~rep], step[~rep]
    gain, freq = _pad(own, [k, w], samples, np.nan)
    (dirn,) = _pad(own, [step], samples, 0)
    return gain, freq, dirn, np.bincount(own, minlength=samples)


# ------------------------------------------------------------------ results

def delay_stability_margins(arrays: DelayCrossings, k: np.ndarray | float,
                            ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(stable, gain_margin_db, gain_reduction_margin_db) at gain ``k`` per sample.

    The semantics of :func:`loopvet.analysis.gain.gain_margins` on the stable interval
    holding k, vectorised: NaN margins where k is in no stable interval; "rise" and "fall"
    refer to |K| (for K < 0 the margin to rise is to the more negative end); a side that
    reaches 0 or beyond, or is unbounded, gives inf. ``k`` is a scalar or (S,). At k = 0
    inside a stable interval both margins are inf (where gain_margins divides by zero).
    """
    kk = np.broadcast_to(np.asarray(k, dtype=np.float64).reshape(-1), (arrays.samples,))
    lo_all, hi_all = arrays.stable_lo, arrays.stable_hi
    with np.errstate(invalid="ignore"):
        inside = (lo_all < kk[:, None]) & (kk[:, None] < hi_all)
    stable = inside.any(axis=1)
    j = np.argmax(inside, axis=1) if inside.shape[1] else np.zeros(kk.size, dtype=np.int64)
    rows = np.arange(kk.size)
    lo = lo_all[rows, j] if inside.shape[1] else np.full(kk.size, np.nan)
    hi = hi_all[rows, j] if inside.shape[1] else np.full(kk.size, np.nan)
    rise, fall = interval_margins(lo, hi, kk, np.asarray(stable, dtype=bool))
    return np.asarray(stable, dtype=bool), rise, fall


def delay_gain_intervals(n: np.ndarray, d: np.ndarray, delay: np.ndarray,
                         gains_of_interest: np.ndarray) -> list[GainIntervals]:
    """Stable open intervals of K for D + K N e^{-sT}, one result per sample.

    ``gains_of_interest`` (S, G): nominal gain and gain-range ends, which set the least
    gain bound of the search. See the module notes for the method and its guarantees; the
    numerics are those of :func:`delay_crossing_arrays`, this only builds the tuples.
    """
    arr = delay_crossing_arrays(n, d, delay, gains_of_interest)
    used = np.arange(arr.gain.shape[1]) < arr.count[:, None]
    gains, freqs = arr.gain[used].tolist(), arr.frequency[used].tolist()
    ends = np.cumsum(arr.count).tolist()
    iv = ~np.isnan(arr.stable_lo)
    los, his = arr.stable_lo[iv].tolist(), arr.stable_hi[iv].tolist()
    iv_ends = np.cumsum(iv.sum(axis=1)).tolist()
    out = []
    start = iv_start = 0
    for end, iv_end, kb, und in zip(ends, iv_ends, arr.search_bound.tolist(),
                                    arr.undecided.tolist(), strict=True):
        crossings = tuple(map(Crossing, gains[start:end], freqs[start:end]))
        stable = tuple(zip(los[iv_start:iv_end], his[iv_start:iv_end], strict=True))
        out.append(GainIntervals(crossings=crossings, stable=stable, search_bound=kb,
                                 undecided=int(und)))
        start, iv_start = end, iv_end
    return out

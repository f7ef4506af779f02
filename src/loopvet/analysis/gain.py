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

import math
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
    undecided: int = 0               # dead time: frequency intervals the search left open

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
            if np.all((np.abs(step_w) <= 1e-12 * np.abs(ww))
                      & (np.abs(step_k) <= 1e-12 * np.abs(k))):
                break       # converged everywhere: the error left is of order step^2
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


def root_lower_bound(c: np.ndarray) -> np.ndarray:
    """Per sample, a lower bound of the non-zero root magnitudes of c: Fujiwara's bound
    applied to the reversed polynomial, 0.5 min_k |c_z/c_k|^(1/(k-z)) with c_z the lowest
    non-zero coefficient; inf for polynomials without non-zero roots. Shape (S,)."""
    c = np.asarray(c, dtype=np.float64)
    nz = c != 0
    z = np.where(nz.any(axis=1), np.argmax(nz, axis=1), 0)
    low = np.abs(c[np.arange(c.shape[0]), z])
    k = np.arange(c.shape[1])[None, :]
    power = k - z[:, None]
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        term = np.where((power > 0) & nz, (low[:, None] / np.abs(c))
                        ** (1.0 / np.maximum(power, 1)), np.inf)
    return 0.5 * term.min(axis=1, initial=np.inf)


def sign_changes(c: np.ndarray) -> np.ndarray:
    """Per sample, the number of sign changes in the coefficient sequence, zeros skipped:
    by Descartes' rule of signs an upper bound of the positive real roots (counted with
    multiplicity) that exceeds their number by an even amount. Shape (S,)."""
    sg = np.sign(c)
    pos = np.where(sg != 0, np.arange(c.shape[1])[None, :], 0)
    filled = np.take_along_axis(sg, np.maximum.accumulate(pos, axis=1), axis=1)
    return np.sum(filled[:, 1:] * filled[:, :-1] < 0, axis=1)


def positive_root_bound(c: np.ndarray) -> np.ndarray:
    """Per sample, an upper bound of the positive real roots of c (Kioustelidis' bound):
    2 max |c_k/c_m|^(1/(m-k)) over the coefficients c_k of sign opposite to the leading
    one c_m (m the effective degree); 0 when there is none (no positive root). Applied to
    the reversed coefficients it bounds 1/x, i.e. gives a lower bound 1/B of the positive
    roots. Never above :func:`root_bound` (all roots), often far below. Shape (S,)."""
    c = np.asarray(c, dtype=np.float64)
    samples, width = c.shape
    deg = poly.effective_degree(c)
    lead = c[np.arange(samples), np.maximum(deg, 0)]
    power = deg[:, None] - np.arange(width)[None, :]
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        opposite = (power > 0) & (c * np.sign(lead)[:, None] < 0)
        term = np.where(opposite, (np.abs(c) / np.abs(lead)[:, None])
                        ** (1.0 / np.maximum(power, 1)), 0.0)
    return 2.0 * term.max(axis=1, initial=0.0)


#: grid density of :func:`positive_roots`, points per decade of the variable
BRACKET_PER_DECADE = 8
#: most grid points per sample in :func:`positive_roots` (wider spans fall back)
BRACKET_MAX_POINTS = 2048
_BRACKET_NEWTON = 40


def positive_roots(q: np.ndarray) -> np.ndarray:
    """Positive real roots of each sample's real polynomial, (S, M) ascending per row and
    padded with NaN; for every sample either certified simple roots or eigenvalue roots.

    ``q``: (S, m+1) ascending coefficients, best scaled so that the roots are of order one.

    Method
    ------
    Roots at 0 are divided out. Descartes' rule bounds the number of positive roots by V,
    the coefficient sign changes. All positive roots lie between Kioustelidis' lower and
    upper bounds of the positive roots (:func:`positive_root_bound`); on a log grid of
    BRACKET_PER_DECADE points per decade between them (slightly widened) the sign changes
    of q are counted. Each is a bracket holding an odd number of roots, so when their
    number equals V every bracket holds exactly one simple root and there are no others:
    the sample is certified. Each bracketed root is polished by Newton's method kept inside
    its bracket (bisection in log x when a step leaves it) until every step is below 1e-12
    relative (the last step then leaves a few ulps). V = 0 certifies "no positive root"
    without a grid. With fewer sign changes than V (complex roots with positive real part
    make Descartes' bound loose, as for the gain-crossover polynomial), q divided by the
    roots found is tested for positivity on x > 0 by the arithmetic-geometric mean
    inequality on its coefficients (:func:`_positive_on_axis`); that too certifies the
    sample. Samples that are not certified (close or multiple roots, a grid value that is
    exactly 0 or not finite, a quotient the test cannot prove positive) get the
    companion-matrix eigenvalues of :func:`loopvet.lti.poly.roots_ragged` instead, with
    every root within 1e-3 relative of the positive real axis kept (a double root then
    shows as a near-real pair); callers verify candidates by Newton's method on their own
    equation either way.

    Accuracy: certified roots are exact to the evaluation accuracy of q near the root (a
    few ulps times the root's condition number). Cost: one Horner pass on the grid plus a
    few Newton steps per root, against an eigenvalue problem of size m per sample.
    """
    q = np.asarray(q, dtype=np.float64)
    samples, width = q.shape
    if width < 2:
        return np.zeros((samples, 0))
    nz = q != 0
    low = np.where(nz.any(axis=1), np.argmax(nz, axis=1), 0)       # roots at 0 out
    idx = np.arange(width)[None, :] + low[:, None]
    c = np.where(idx < width, np.take_along_axis(q, np.minimum(idx, width - 1), axis=1), 0.0)
    v = sign_changes(c)
    found = np.full((samples, max(int(v.max(initial=0)), 0)), np.nan)
    todo = np.nonzero(v > 0)[0]
    fallback = np.zeros(samples, dtype=bool)
    if todo.size:
        cc = c[todo]
        with np.errstate(all="ignore"):
            hi = 1.25 * positive_root_bound(cc)
            lo = 0.8 / positive_root_bound(cc[:, ::-1])
            span = np.log10(hi / lo)
        ok = np.isfinite(span) & (span > 0) & (lo > 0)
        decades = float(np.max(np.where(ok, span, 0.0), initial=0.0))
        count = min(int(math.ceil(BRACKET_PER_DECADE * decades)) + 2, BRACKET_MAX_POINTS)
        ok &= span * BRACKET_PER_DECADE <= count
        t = np.linspace(0.0, 1.0, count)[None, :]
        with np.errstate(all="ignore"):
            x = np.exp(np.log(np.where(ok, lo, 1.0))[:, None]
                       + t * np.log(np.where(ok, hi / lo, 2.0))[:, None])
            val = poly.evaluate(cc, x)
        sg = np.sign(val)
        change = sg[:, 1:] * sg[:, :-1] < 0
        ok &= np.all(np.isfinite(val) & (sg != 0), axis=1)
        counted = ok & (change.sum(axis=1) == v[todo])
        rows, cols = np.nonzero(change & ok[:, None])
        if rows.size:
            roots = _newton_in_brackets(cc[rows], x[rows, cols], x[rows, cols + 1],
                                        val[rows, cols], val[rows, cols + 1])
            rank = np.arange(rows.size) - np.searchsorted(rows, rows)   # rows are sorted
            found[todo[rows], rank] = roots
        # fewer sign changes than V: certified still when q divided by the roots found
        # has no positive root at all (AM-GM on its coefficients, see _positive_on_axis)
        extra = np.nonzero(ok & ~counted)[0]
        if extra.size:
            counted[extra] = _positive_on_axis(_deflate(cc[extra], found[todo[extra]]))
        fallback[todo[~counted]] = True
    if fallback.any():
        sub = np.nonzero(fallback)[0]
        r = poly.roots_ragged(c[sub])
        with np.errstate(invalid="ignore"):
            keep = (np.abs(r.imag) <= 1e-3 * np.abs(r) + 1e-300) & (r.real > 0) \
                & np.isfinite(r.real)
        cand = np.sort(np.where(keep, np.abs(r.real), np.nan), axis=1)
        if cand.shape[1] > found.shape[1]:
            found = np.concatenate([found, np.full((samples, cand.shape[1] - found.shape[1]),
                                                   np.nan)], axis=1)
        found[sub] = np.nan
        found[sub, :cand.shape[1]] = cand
    keep_cols = int(np.max(np.sum(np.isfinite(found), axis=1), initial=0))
    return found[:, :keep_cols]


def _deflate(c: np.ndarray, roots: np.ndarray) -> np.ndarray:
    """Row r of ``c`` divided by (x - roots[r, j]) for its finite roots (synthetic
    division; the remainders, zero up to rounding, are dropped), padded coefficients."""
    out = c.copy()
    for j in range(roots.shape[1]):
        r = roots[:, j]
        live = np.isfinite(r)
        if not live.any():
            continue
        rr = np.where(live, r, 0.0)
        quot = np.zeros_like(out)
        for k in range(out.shape[1] - 1, 0, -1):       # b_(k-1) = c_k + r b_k
            quot[:, k - 1] = out[:, k] + rr * quot[:, k]
        out = np.where(live[:, None], quot, out)
    return out


#: share of the AM-GM bound a negative coefficient may use in :func:`_positive_on_axis`
_AMGM_MARGIN = 0.9


def _positive_on_axis(c: np.ndarray) -> np.ndarray:
    """Per row, True when the polynomial is provably positive (or negative) for all x > 0:
    after making the leading coefficient positive, the lowest one is positive, no two
    negative coefficients are adjacent, and each negative c_k satisfies
    c_k^2 <= 0.9 * 4 (c_(k-1)/n_(k-1)) (c_(k+1)/n_(k+1)), n_j the number of negative
    neighbours of c_j: then c_(k-1) x^(k-1)/n_(k-1) + c_k x^k + c_(k+1) x^(k+1)/n_(k+1)
    > 0 for every x > 0 (arithmetic-geometric mean inequality), and the sum of these
    groups and of the remaining positive terms is positive. Sufficient, not necessary;
    the margin 0.9 keeps the proof valid under coefficient rounding."""
    deg = poly.effective_degree(c)
    rows = np.arange(c.shape[0])
    t = c * np.sign(c[rows, np.maximum(deg, 0)])[:, None]
    cols = np.arange(c.shape[1])[None, :]
    inside = cols <= deg[:, None]
    neg = (t < 0) & inside
    nb = np.zeros(t.shape)
    nb[:, 1:] += neg[:, :-1]
    nb[:, :-1] += neg[:, 1:]
    share = np.where(nb > 0, t / np.where(nb > 0, nb, 1.0), 0.0)
    left = np.zeros(t.shape)
    right = np.zeros(t.shape)
    left[:, 1:] = share[:, :-1]
    right[:, :-1] = share[:, 1:]
    with np.errstate(invalid="ignore", over="ignore"):
        fine = ~neg | (t * t <= _AMGM_MARGIN * 4.0 * left * right)
    adjacent = np.any(neg[:, 1:] & neg[:, :-1], axis=1)
    return (deg >= 0) & (t[:, 0] > 0) & ~adjacent & np.all(fine, axis=1)


def _newton_in_brackets(c: np.ndarray, a: np.ndarray, b: np.ndarray, fa: np.ndarray,
                        fb: np.ndarray) -> np.ndarray:
    """The root of row r of ``c`` in (a_r, b_r), where the signs of fa and fb differ:
    Newton's method from the secant point, bisection (geometric mean) whenever a step would
    leave the bracket, which shrinks with every evaluation. Batched; early exit."""
    dc = poly.derivative(c)
    neg_a = fa < 0
    with np.errstate(all="ignore"):
        x = a - fa * (b - a) / (fb - fa)
    x = np.where((x > a) & (x < b), x, np.sqrt(a * b))
    for _ in range(_BRACKET_NEWTON):
        f = poly.evaluate(c, x[:, None])[:, 0]
        fp = poly.evaluate(dc, x[:, None])[:, 0]
        left = (f < 0) == neg_a                       # the root lies above x
        a = np.where(left, x, a)
        b = np.where(left, b, x)
        with np.errstate(all="ignore"):
            nxt = x - f / fp
        inside = np.isfinite(nxt) & (nxt >= a) & (nxt <= b)
        nxt = np.where(f == 0, x, np.where(inside, nxt, np.sqrt(a * b)))
        step = np.abs(nxt - x)
        x = nxt
        if np.all(step <= 1e-12 * x):      # quadratic convergence: now a few ulps off
            break
    return x


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
    return np.sqrt(positive_roots(q)) * ws[:, None]


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

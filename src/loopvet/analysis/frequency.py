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
Ms = sup |S|, Mt = sup |T|, max |K C S| are found on each sample's own frequency set
(:func:`sample_grid`): a logarithmic grid (PER_DECADE = 20 points per decade) from a
hundredth of the smallest to a hundred times the largest root magnitude of D, N (Fujiwara
bounds from the coefficients) and the closed-loop poles, 9 points across every lightly
damped closed-loop pole (at b + k|a|/2, k = -4..4, for a pole a + jb with |a| < |b|: the
resonance it causes is about |a| wide, and the grid there is within 3 % of its top), and
the crossovers. With dead time the map P e^{-s tau}/(A + B e^{-sT}) ripples with period
2 pi/T; |P|/(|A| - |B|) bounds it whatever the phase of the delay term, so a linear grid of
RIPPLE_POINTS = 32 points per period is laid from 0 up to 1.25 times the highest grid
frequency at which that bound still reaches the best value found (or up to where
|B/A| < 1e-3 when the bound never falls), at most RIPPLE_MAX points. Magnitudes are
evaluated in real arithmetic (even and odd parts at s = jw). The largest local maximum,
and the second when its grid value is at least SECOND_PEAK = 0.8 of the largest (a grid
within a few per cent of every peak top cannot let a lower one win), are refined by nested
grids in log w (17 points, 7 rounds, each 8 times narrower), which puts the peak value
within about 1e-14 relative (the peak is flat at the top); the values at w = 0 and as
w -> infinity are included (Mt of an integrating loop has its supremum 1 at w = 0). This
brackets every peak wider than the grid spacing; a narrower one needs a closed-loop pole
near the axis, around which the grid is refined explicitly.

``bandwidth`` is the first frequency at which |T_ref(jw)| falls to |T_ref(0)|/sqrt(2) (the
reference-to-output map, prefilter included; with dead time the ripple grid reaches the
first grid point below that level), narrowed by nested grids to about 1e-15 relative; inf
if it never does, null if T_ref(0) = 0.

Batching: every function here takes the whole batch; padded (S, M) arrays carry the
ragged parts (crossovers per sample) with NaN, and no Python loop runs over samples.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..lti import poly
from ..lti.loop import ClosedLoopMap, Loop
from ..lti.loop import rows as loop_rows
from .gain import frequency_scale, positive_roots, root_bound, root_lower_bound, scaled

_GOLDEN = (math.sqrt(5.0) - 1.0) / 2.0


@dataclass(frozen=True, slots=True)
class Crossover:
    frequency: float
    lag_deg: float          # (180 + arg L) mod 360, in [0, 360)


def crossover_array(loop: Loop) -> np.ndarray:
    """Gain-crossover frequencies w > 0 with |L(jw)| = 1 as an (S, M) array, each row sorted
    ascending and padded with NaN (batched: candidates from :func:`gain.positive_roots` of
    K^2 |N|^2 - |D|^2 in w^2, then Newton on log|L| = 1)."""
    n, d, k = loop.n, loop.d, loop.gain
    ws = frequency_scale(n, d)
    ns, ds = scaled(n, ws), scaled(d, ws)
    nr, ni = poly.on_imaginary_axis(ns)
    dr, di = poly.on_imaginary_axis(ds)
    e = poly.sub(poly.scale(poly.add(poly.mul(nr, nr), poly.mul(ni, ni)), k * k),
                 poly.add(poly.mul(dr, dr), poly.mul(di, di)))
    q = e[:, 0::2]
    if q.shape[1] < 2:
        return np.zeros((loop.samples, 0))
    cand = np.sqrt(positive_roots(q)) * ws[:, None]
    w: np.ndarray = np.full_like(cand, np.nan, dtype=np.float64)
    rows, cols = np.nonzero(np.isfinite(cand))            # polish the real candidates only
    if rows.size:
        sub = loop_rows(loop, rows)
        wp = _polish_magnitude(sub, cand[rows, cols][:, None])
        with np.errstate(all="ignore"):
            mag = np.abs(sub.open_loop(1j * wp))
            ok = np.isfinite(wp) & (wp > 0) & (np.abs(mag - 1.0) <= 1e-9)
        w[rows, cols] = np.where(ok[:, 0], wp[:, 0], np.nan)
    w = np.sort(w, axis=1)                                 # NaN sorts last
    if w.shape[1] > 1:                                    # drop repeats of one crossover
        with np.errstate(invalid="ignore"):
            dup = np.zeros(w.shape, dtype=bool)
            dup[:, 1:] = w[:, 1:] - w[:, :-1] <= 1e-9 * w[:, 1:]
        w = np.sort(np.where(dup, np.nan, w), axis=1)
    width = int(np.max(np.sum(np.isfinite(w), axis=1), initial=0))
    return w[:, :width]


def gain_crossovers(loop: Loop) -> list[list[float]]:
    """Per sample, the sorted gain-crossover frequencies w > 0 with |L(jw)| = 1."""
    return [[float(v) for v in row[np.isfinite(row)]] for row in crossover_array(loop)]


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
            step = np.where(np.isfinite(step), step, 0.0)
            ww = ww - step
            if np.all(np.abs(step) <= 1e-12 * np.abs(ww)):
                break                       # converged everywhere
    return ww


def lag_array(loop: Loop, w: np.ndarray) -> np.ndarray:
    """(180 + arg L(j w)) mod 360 in degrees at the (S, M) frequencies ``w`` (NaN stays NaN)."""
    if w.shape[1] == 0:
        return np.zeros(w.shape)
    with np.errstate(all="ignore"):
        val = loop.open_loop(1j * np.nan_to_num(w, nan=1.0))
        lag = np.degrees(np.mod(np.pi + np.angle(val), 2 * np.pi))
    lag = np.where(lag >= 360.0, 0.0, lag)
    return np.where(np.isnan(w), np.nan, lag)


def lags(loop: Loop, crossovers: list[list[float]]) -> list[list[Crossover]]:
    """(180 + arg L) mod 360 at every crossover, per sample."""
    width = max((len(c) for c in crossovers), default=0)
    w = np.full((loop.samples, width), np.nan)
    for i, ws in enumerate(crossovers):
        w[i, :len(ws)] = ws
    lag = lag_array(loop, w)
    return [[Crossover(frequency=float(a), lag_deg=float(b))
             for a, b in zip(w[i, :len(ws)], lag[i, :len(ws)], strict=True)]
            for i, ws in enumerate(crossovers)]


def margin_arrays(w: np.ndarray, lag: np.ndarray, stable: np.ndarray
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(phase_margin_deg, delay_margin_s, crossover_frequency) per sample, vectorised
    :func:`margins`: inf/inf/NaN without a crossover; NaN delay margin when unstable."""
    has = np.isfinite(w).any(axis=1)
    wrapped = np.where(lag > 180.0, lag - 360.0, lag)
    with np.errstate(invalid="ignore", divide="ignore"):
        pm_st = np.nanmin(np.where(np.isnan(w), np.inf, lag), axis=1, initial=np.inf)
        pm_un = np.nanmin(np.where(np.isnan(w), np.inf, wrapped), axis=1, initial=np.inf)
        dm = np.nanmin(np.where(np.isnan(w), np.inf, np.radians(lag) / w), axis=1,
                       initial=np.inf)
        wc = np.nanmax(np.where(np.isnan(w), -np.inf, w), axis=1, initial=-np.inf)
    pm = np.where(stable, pm_st, pm_un)
    dm = np.where(stable, dm, np.nan)
    pm = np.where(has, pm, np.inf)
    dm = np.where(has, dm, np.inf)
    return pm, dm, np.where(has, wc, np.nan)


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

#: log-grid density of the peak search, points per decade
PER_DECADE = 20
#: grid points placed across each lightly damped closed-loop pole (see the module notes)
RESONANCE_OFFSETS = np.arange(-4, 5) / 2.0
#: largest number of frequency points evaluated at once in the peak search (memory bound)
BLOCK_POINTS = 2_000_000


def sample_grid(loop: Loop, extra: np.ndarray, char_roots: np.ndarray,
                per_decade: int = PER_DECADE) -> np.ndarray:
    """Each sample's own frequency set of the module notes, shape (S, G), rows ascending.

    ``extra`` (S, M): frequencies that must be on the grid (crossovers), NaN-padded;
    ``char_roots`` (S, n): closed-loop poles (NaN allowed). Rows are padded by repeating
    their last point, so all rows have the same length. The dead-time ripple is sampled
    later, where it matters (:func:`_with_ripple`).
    """
    s_count = loop.samples
    ex = np.where(np.isfinite(extra) & (extra > 0), extra, np.nan)
    cr = np.where(np.isfinite(char_roots), char_roots, np.nan)
    mag_cr = np.where(np.abs(cr) > 0, np.abs(cr), np.nan)
    with np.errstate(invalid="ignore", divide="ignore"):
        upper = np.fmax.reduce([root_bound(loop.n), root_bound(loop.d),
                                np.nanmax(np.c_[mag_cr, ex, np.full(s_count, np.nan)], axis=1)])
        lower = np.fmin.reduce([root_lower_bound(loop.n), root_lower_bound(loop.d),
                                np.nanmin(np.c_[mag_cr, ex, np.full(s_count, np.nan)], axis=1)])
    upper = np.where(np.isfinite(upper), upper, 1.0)
    lower = np.where(np.isfinite(lower) & (lower > 0), lower, np.minimum(upper, 1.0))
    lo, hi = lower / 100.0, np.maximum(upper * 100.0, lower)
    t = loop.delay
    lo = np.where(t > 0, np.minimum(lo, 0.01 / np.where(t > 0, t, 1.0)), lo)
    decades = float(np.max(np.log10(hi / lo)))
    count = int(per_decade * decades) + 2
    frac = np.linspace(0.0, 1.0, count)[None, :]
    parts = [np.exp(np.log(lo)[:, None] + frac * np.log(hi / lo)[:, None])]
    light = np.isfinite(cr) & (np.abs(cr.real) < np.abs(cr.imag)) & (cr.imag > 0)
    if light.any():
        width = np.maximum(np.abs(cr.real), 1e-9 * np.abs(cr.imag))
        res = np.abs(cr.imag)[:, :, None] + width[:, :, None] * RESONANCE_OFFSETS
        parts.append(np.where(light[:, :, None], res, np.nan).reshape(s_count, -1))
    parts.append(ex)
    return _merge(parts)


def _merge(parts: list[np.ndarray]) -> np.ndarray:
    """Rows of the concatenated point sets, ascending, without non-positive or NaN points;
    short rows padded by repeating their last point."""
    grid = np.concatenate(parts, axis=1)
    grid = np.where(grid > 0, grid, np.nan)
    grid = np.sort(grid, axis=1)                          # NaN last
    valid = np.isfinite(grid)
    last = np.maximum(valid.sum(axis=1) - 1, 0)
    fill = grid[np.arange(grid.shape[0]), last]
    grid = np.where(valid, grid, fill[:, None])
    width = int(valid.sum(axis=1).max(initial=1))
    return grid[:, :max(width, 1)]


#: points per period 2 pi/T of the dead-time ripple, and the most ripple points per sample
RIPPLE_POINTS = 32
RIPPLE_MAX = 40_000


def _with_ripple(m: ClosedLoopMap, g2: np.ndarray, upto: np.ndarray) -> np.ndarray:
    """``g2`` plus, for samples with dead time, a linear grid of RIPPLE_POINTS points per
    ripple period from 0 up to ``upto`` (per sample; NaN: none), at most RIPPLE_MAX."""
    t = m.delay
    need = (t > 0) & np.isfinite(upto) & (upto > 0)
    if not need.any():
        return g2
    step = np.where(need, 2.0 * math.pi / (RIPPLE_POINTS * np.where(t > 0, t, 1.0)), np.inf)
    count = np.where(need, np.ceil(np.where(need, upto, 0.0) / step), 0.0)
    n_lin = int(min(count.max(), RIPPLE_MAX))
    if n_lin <= 0:
        return g2
    top = np.where(need, np.minimum(upto, n_lin * step), np.nan)
    return _merge([g2, top[:, None] * np.arange(1, n_lin + 1)[None, :] / n_lin])


def _ripple_reach(m: ClosedLoopMap, g2: np.ndarray, best: np.ndarray) -> np.ndarray:
    """Per sample, how far the ripple grid must reach for a peak search: the largest grid
    frequency (times 1.25) where the delay-free envelope |P|/(|A| - |B|), which bounds |m|
    whatever the phase of the delay term, is not below the best value found so far; where
    the envelope never falls (|B| >= |A| at the top of the grid), the frequency beyond which
    |B/A| < 1e-3, doubling from the top of the grid, at most 1e12."""
    with np.errstate(all="ignore"):
        env = m.envelope(g2)
    above = np.where(np.isnan(env), True, env >= best[:, None] * (1.0 - 1e-12))
    last = g2.shape[1] - 1 - np.argmax(above[:, ::-1], axis=1)
    reach = np.where(above.any(axis=1), 1.25 * g2[np.arange(g2.shape[0]), last], np.nan)
    open_top = above[:, -1]
    if open_top.any():
        reach = np.where(open_top, _tail(m, g2[:, -1]), reach)
    return reach


def _tail(m: ClosedLoopMap, start: np.ndarray) -> np.ndarray:
    """Per sample, a frequency beyond which |B/A| < 1e-3 (checked at w, 2w, 4w while
    doubling), at most 1e12."""
    w = np.maximum(np.asarray(start, dtype=np.float64), 1e-12)
    done = np.zeros(w.shape, dtype=bool)
    for _ in range(80):
        pts = w[:, None] * np.array([1.0, 2.0, 4.0])[None, :]
        with np.errstate(all="ignore"):
            ratio = m.loop_ratio(pts)
        done |= np.all(ratio < 1e-3, axis=1) | (w > 1e12)
        if done.all():
            break
        w = np.where(done, w, 2.0 * w)
    return w


def _rows(m: ClosedLoopMap, idx: np.ndarray) -> ClosedLoopMap:
    return ClosedLoopMap(p=m.p[idx], tau=m.tau[idx], a=m.a[idx], b=m.b[idx],
                         delay=m.delay[idx])


def _grid_2d(grid: np.ndarray, samples: int) -> np.ndarray:
    g = np.asarray(grid, dtype=np.float64)
    return np.broadcast_to(g, (samples, g.shape[-1])) if g.ndim == 1 else g


def _blocks(samples: int, points: int) -> list[slice]:
    step = max(1, BLOCK_POINTS // max(points, 1))
    return [slice(i, min(i + step, samples)) for i in range(0, samples, step)]


def _mag(m: ClosedLoopMap, w: np.ndarray) -> np.ndarray:
    with np.errstate(all="ignore"):
        v = m.magnitude(w)
    return np.where(np.isnan(v), -np.inf, v)


def peak(m: ClosedLoopMap, grid: np.ndarray) -> np.ndarray:
    """sup over w > 0 of |m(jw)| per sample (grid, refined local maxima, and w -> inf).

    ``grid`` is shared (G,) or per sample (S, G). Evaluated in row blocks of at most
    BLOCK_POINTS points; the refinement is batched over all samples and maxima.
    """
    s_count = m.p.shape[0]
    g2 = _grid_2d(grid, s_count)
    if np.any(m.delay > 0):
        g2 = _with_ripple(m, g2, _ripple_reach(m, g2, _mag(m, g2).max(axis=1)))
    g = g2.shape[1]
    best = np.empty(s_count)
    rows_l, a_l, b_l = [], [], []
    for blk in _blocks(s_count, g):
        mag = _mag(_rows(m, np.arange(s_count)[blk]), g2[blk])
        best[blk] = mag.max(axis=1)
        if g < 3:
            continue
        inner = (mag[:, 1:-1] >= mag[:, :-2]) & (mag[:, 1:-1] >= mag[:, 2:]) \
            & (g2[blk, 2:] > g2[blk, :-2])
        score = np.where(inner, mag[:, 1:-1], -np.inf)
        r = np.arange(score.shape[0])
        first = np.argmax(score, axis=1)                  # the 2 largest local maxima
        score_2 = score.copy()
        score_2[r, first] = -np.inf
        second = np.argmax(score_2, axis=1)
        rows = np.concatenate([r, r])
        idx = np.concatenate([first, second]) + 1
        # a maximum whose grid value is below SECOND_PEAK of the best cannot win (see notes)
        valid = np.isfinite(score[rows, idx - 1]) & (score[rows, idx - 1]
                                                      >= SECOND_PEAK * best[blk][rows])
        rows, idx = rows[valid], idx[valid]
        rows_l.append(rows + blk.start)
        a_l.append(np.log(g2[blk][rows, idx - 1]))
        b_l.append(np.log(g2[blk][rows, idx + 1]))
    if rows_l and sum(r.size for r in rows_l):
        rows = np.concatenate(rows_l)
        refined = _refine_max(_rows(m, rows), np.concatenate(a_l), np.concatenate(b_l))
        np.maximum.at(best, rows, refined)
    far = _mag(m, g2[:, -1:] * 1e6)[:, 0]             # w -> infinity
    zero = _mag(m, np.zeros((s_count, 1)))[:, 0]        # w = 0 (the supremum may sit there)
    best = np.maximum(best, np.where(np.isfinite(zero), zero, 0.0))
    return np.maximum(best, np.where(np.isfinite(far), far, 0.0))


#: a local maximum of the grid is refined when its value is at least this fraction of the
#: grid's largest value
SECOND_PEAK = 0.8
#: points per round and rounds of the nested-grid refinement of a maximum or a level crossing
REFINE_POINTS = 17
REFINE_ROUNDS = 7


def _refine_max(m: ClosedLoopMap, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Batched maximisation of |m_r(j e^x)| over x in [a_r, b_r] (row r of ``m`` belongs to
    bracket r) by nested grids: REFINE_POINTS points across the bracket, then the two grid
    intervals around the best point become the next bracket (16 times narrower). For a
    unimodal bracket the maximum stays inside; after REFINE_ROUNDS rounds the bracket is
    below 1e-8 of its width, so the peak value (flat at the top) is exact to about 1e-15
    relative. Never less than the best value seen."""
    u = np.linspace(0.0, 1.0, REFINE_POINTS)[None, :]
    best = np.full(a.shape, -np.inf)
    rows = np.arange(a.size)
    for _ in range(REFINE_ROUNDS):
        x = a[:, None] + (b - a)[:, None] * u
        v = _mag(m, np.exp(x))
        j = np.argmax(v, axis=1)
        best = np.maximum(best, v[rows, j])
        a = x[rows, np.maximum(j - 1, 0)]
        b = x[rows, np.minimum(j + 1, REFINE_POINTS - 1)]
    return best


def bandwidth(m: ClosedLoopMap, grid: np.ndarray) -> np.ndarray:
    """First w where |m(jw)| <= |m(0)|/sqrt(2); inf if never, NaN if m(0) = 0.

    The first grid interval where the level is crossed is found per sample, then narrowed
    by nested grids in log w (batched over samples), 16 times per round, to about 1e-15
    relative.
    """
    s_count = m.p.shape[0]
    g2 = _grid_2d(grid, s_count)
    with np.errstate(all="ignore"):
        dc = np.abs(m.at(np.zeros((s_count, 1), dtype=np.complex128)))[:, 0]
    level = dc / math.sqrt(2.0)
    if np.any(m.delay > 0):                       # the ripple up to the first grid point below
        below = _mag(m, g2) <= level[:, None]
        j = np.where(below.any(axis=1), np.argmax(below, axis=1), g2.shape[1] - 1)
        g2 = _with_ripple(m, g2, g2[np.arange(s_count), j])
    first = np.full(s_count, -1)
    for blk in _blocks(s_count, g2.shape[1]):
        below = _mag(_rows(m, np.arange(s_count)[blk]), g2[blk]) <= level[blk, None]
        first[blk] = np.where(below.any(axis=1), np.argmax(below, axis=1), -1)
    out = np.where(first < 0, np.inf, np.nan)
    out = np.where(first == 0, g2[:, 0], out)
    rows = np.nonzero(first > 0)[0]
    if rows.size:
        j = first[rows]
        a, b = np.log(g2[rows, j - 1]), np.log(g2[rows, j])
        sub, lv = _rows(m, rows), level[rows]
        u = np.linspace(0.0, 1.0, REFINE_POINTS)[None, :]
        r = np.arange(rows.size)
        for _ in range(13):
            x = a[:, None] + (b - a)[:, None] * u
            below = _mag(sub, np.exp(x)) <= lv[:, None]
            below[:, -1] = True                  # the bracket's right end is below
            k = np.maximum(np.argmax(below, axis=1), 1)
            a, b = x[r, k - 1], x[r, k]
        out[rows] = np.exp(0.5 * (a + b))
    return np.where(dc > 0, out, np.nan)

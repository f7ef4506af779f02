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
|B/A| < 1e-3 when the bound never falls), at most RIPPLE_MAX points per sample. Magnitudes
are evaluated in real arithmetic (even and odd parts at s = jw, squared; with dead time the
envelope comes from the same parts, and only the ripple points are added to the grid). The
largest local maximum, and the second when its grid value is at least SECOND_PEAK = 0.8 of
the largest (a grid within a few per cent of every peak top cannot let a lower one win),
are refined in log w by safeguarded successive parabolic interpolation on |m|^2
(:func:`_refine_max`: a three-point bracket that always holds the best value seen, closed
when the parabola promises less than PEAK_RTOL = 1e-14 more and its previous promise was
kept to that), which puts the peak value within about 1e-14 relative (the peak is flat at
the top); the values at w = 0 and as w -> infinity are included (Mt of an integrating loop
has its supremum 1 at w = 0). This brackets every peak wider than the grid spacing; a
narrower one needs a closed-loop pole near the axis, around which the grid is refined
explicitly.

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
#: points per row block of the peak search's grid pass: small enough for the working arrays
#: to stay in the processor cache (measured about 2.5 times faster than whole batches)
CACHE_POINTS = 8192


def sample_grid(loop: Loop, extra: np.ndarray, char_roots: np.ndarray,
                per_decade: int = PER_DECADE) -> np.ndarray:
    """Each sample's own frequency set of the module notes, shape (S, G), rows ascending.

    ``extra`` (S, M): frequencies that must be on the grid (crossovers), NaN-padded;
    ``char_roots`` (S, n): closed-loop poles (NaN allowed). Rows are padded by repeating
    their last point, so all rows have the same length. The dead-time ripple is sampled
    later, where it matters (:func:`peak`: :func:`_ripple_points`; :func:`bandwidth`:
    :func:`_with_ripple`).
    """
    s_count = loop.samples
    ex = np.where(np.isfinite(extra) & (extra > 0), extra, np.nan)
    cr = np.where(np.isfinite(char_roots), char_roots, np.nan)
    mag_cr = np.where(np.abs(cr) > 0, np.abs(cr), np.nan)
    known = np.concatenate([mag_cr, ex], axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        upper = np.fmax.reduce([root_bound(loop.n), root_bound(loop.d),
                                np.fmax.reduce(known, axis=1, initial=np.nan)])
        lower = np.fmin.reduce([root_lower_bound(loop.n), root_lower_bound(loop.d),
                                np.fmin.reduce(known, axis=1, initial=np.nan)])
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
    most = int(light.sum(axis=1).max(initial=0))
    if most:
        pick = np.argsort(~light, axis=1, kind="stable")[:, :most]   # the light poles first
        cr = np.take_along_axis(cr, pick, axis=1)
        width = np.maximum(np.abs(cr.real), 1e-9 * np.abs(cr.imag))
        res = np.abs(cr.imag)[:, :, None] + width[:, :, None] * RESONANCE_OFFSETS
        keep = np.take_along_axis(light, pick, axis=1)
        parts.append(np.where(keep[:, :, None], res, np.nan).reshape(s_count, -1))
    parts.append(ex)
    return _merge(parts, dense=1)


def _merge(parts: list[np.ndarray], dense: int = 0) -> np.ndarray:
    """Rows of the concatenated point sets, ascending, without non-positive, infinite or
    NaN points; short rows padded by repeating their last point. The first ``dense`` parts
    are known to hold finite positive points only (not checked again)."""
    clean = parts[:dense] + [np.where((q > 0) & (q < np.inf), q, np.nan) for q in parts[dense:]]
    grid = np.concatenate(clean, axis=1)
    grid.sort(axis=1)                                     # NaN last
    counts = sum(q.shape[1] for q in clean[:dense]) + sum(
        (q > 0).sum(axis=1) for q in clean[dense:])
    counts = np.broadcast_to(np.asarray(counts), (grid.shape[0],))
    width = max(int(counts.max(initial=1)), 1)
    grid = grid[:, :width]
    low = int(counts.min(initial=width))
    if low < width:                                       # pad the short rows
        fill = grid[np.arange(grid.shape[0]), np.maximum(counts - 1, 0)]
        cols = np.arange(low, width)[None, :]
        grid[:, low:] = np.where(cols < counts[:, None], grid[:, low:], fill[:, None])
    return grid


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
    return _merge([g2, top[:, None] * np.arange(1, n_lin + 1)[None, :] / n_lin], dense=1)


def _ripple_reach(m: ClosedLoopMap, g2: np.ndarray, env: np.ndarray, best: np.ndarray
                  ) -> np.ndarray:
    """Per sample, how far the ripple grid must reach for a peak search: the largest grid
    frequency (times 1.25) where the delay-free envelope |P|/(|A| - |B|) (``env`` on
    ``g2``), which bounds |m| whatever the phase of the delay term, is not below the best
    value found so far; where the envelope never falls (|B| >= |A| at the top of the
    grid), the frequency beyond which |B/A| < 1e-3, doubling from the top of the grid, at
    most 1e12."""
    with np.errstate(invalid="ignore"):
        above = np.isnan(env) | (env >= best[:, None] * (1.0 - 1e-12))
    last = g2.shape[1] - 1 - np.argmax(above[:, ::-1], axis=1)
    reach = np.where(above.any(axis=1), 1.25 * g2[np.arange(g2.shape[0]), last], np.nan)
    open_top = above[:, -1]
    if open_top.any():
        reach = np.where(open_top, _tail(m, g2[:, -1]), reach)
    return reach


def _ripple_counts(m: ClosedLoopMap, upto: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per sample, the ripple step 2 pi/(RIPPLE_POINTS T) and the number of ripple points
    from 0 up to ``upto`` (0 without dead time or reach), at most RIPPLE_MAX."""
    t = m.delay
    need = (t > 0) & np.isfinite(upto) & (upto > 0)
    step = np.where(need, 2.0 * math.pi / (RIPPLE_POINTS * np.where(t > 0, t, 1.0)), np.inf)
    count = np.where(need, np.minimum(np.ceil(np.where(need, upto, 0.0) / step),
                                      RIPPLE_MAX), 0.0)
    return step, count.astype(np.int64)


def _ripple_parts(m: ClosedLoopMap, upto: np.ndarray, width: int) -> list[np.ndarray]:
    """Consecutive row groups whose grids of ``width`` points plus their ripple points
    hold at most BLOCK_POINTS values (a single row may exceed it)."""
    count = _ripple_counts(m, upto)[1]
    parts, start, top = [], 0, 0
    for i, c in enumerate(count.tolist()):
        top_i = max(top, c)
        if i > start and (i + 1 - start) * (width + top_i) > BLOCK_POINTS:
            parts.append(np.arange(start, i))
            start, top_i = i, c
        top = top_i
    parts.append(np.arange(start, count.size))
    return parts


def _ripple_points(m: ClosedLoopMap, upto: np.ndarray) -> np.ndarray | None:
    """Each sample's linear ripple grid k * step, k = 1..count (:func:`_ripple_counts`:
    RIPPLE_POINTS per period 2 pi/T up to ``upto``), NaN-padded; None when no sample
    needs one."""
    step, count = _ripple_counts(m, upto)
    n_lin = int(count.max(initial=0))
    if n_lin <= 0:
        return None
    k = np.arange(1, n_lin + 1, dtype=np.float64)[None, :]
    with np.errstate(invalid="ignore"):
        return np.where(k <= count[:, None], k * step[:, None], np.nan)


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


def _grid_2d(grid: np.ndarray, samples: int) -> np.ndarray:
    g = np.asarray(grid, dtype=np.float64)
    return np.broadcast_to(g, (samples, g.shape[-1])) if g.ndim == 1 else g


def _blocks(samples: int, points: int, budget: int = BLOCK_POINTS) -> list[slice]:
    step = max(1, budget // max(points, 1))
    return [slice(i, min(i + step, samples)) for i in range(0, samples, step)]


def _mag(m: ClosedLoopMap, w: np.ndarray) -> np.ndarray:
    """|m(jw)| at ``w`` (S, points) by :func:`_squared`; -inf where undefined."""
    return _no_nan(np.sqrt(_squared(m, w)[0]))


def _squared(m: ClosedLoopMap, w: np.ndarray, envelope: bool = False
             ) -> tuple[np.ndarray, np.ndarray | None]:
    """|m(jw)|^2 at real ``w`` (S, points) from one evaluation of the even and odd parts of
    P, A and B (P shared when it is A or B); with ``envelope``, also the delay-free bound
    |P|/(|A| - |B|) of :meth:`ClosedLoopMap.envelope` (inf where |B| >= |A|) from the same
    parts. NaN where the value is undefined (0/0, overflow). The delay term's cosine and
    sine come from :func:`_cos_sin`; the rest is the arithmetic of
    :meth:`ClosedLoopMap.magnitude`, squared."""
    with np.errstate(all="ignore"):
        x = w * w
        ar, ai = poly.on_axis(m.a, w, x)
        br, bi = poly.on_axis(m.b, w, x)
        pr, pi = (ar, ai) if m.p is m.a else (br, bi) if m.p is m.b else poly.on_axis(m.p, w, x)
        pp = pr * pr + pi * pi
        env = None
        if envelope:
            gap = np.sqrt(ar * ar + ai * ai)
            gap -= np.sqrt(br * br + bi * bi)
            if not np.isfinite(gap).all():          # squares overflowed: the careful way
                gap = np.hypot(ar, ai) - np.hypot(br, bi)
            env = np.where(gap > 0, np.sqrt(pp) / np.where(gap > 0, gap, 1.0), np.inf)
        if np.any(m.delay):
            c, sn = _cos_sin(w * m.delay[:, None])
            qr = ar + br * c + bi * sn
            qi = ai + bi * c - br * sn
        else:
            qr = ar + br
            qi = ai + bi
        qr *= qr
        qi *= qi
        qr += qi
        return pp / qr, env


def _cos_sin(phi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """cos phi and sin phi from t = tan(phi/2): (1 - t^2)/(1 + t^2) and 2t/(1 + t^2).

    numpy vectorises tan but evaluates float64 cos and sin one value at a time, so this is
    about ten times faster on the peak grids. Absolute error at most 2.5e-16 (measured
    against mpmath at 40 digits on 14 000 arguments up to 1e6, including odd multiples of
    pi, where t is largest), against about 6e-17 for numpy's cos and sin: in a map
    P/(A + B e^{-jwT}) that moves |m| by about 2.5e-16 |B|/|A + B e^{-jwT}| relative."""
    t = np.tan(0.5 * phi)
    t2 = t * t
    d = 1.0 / (1.0 + t2)
    return (1.0 - t2) * d, 2.0 * t * d


def _no_nan(v: np.ndarray) -> np.ndarray:
    """``v`` with NaN replaced by -inf (a copy only when there is a NaN)."""
    return np.where(np.isnan(v), -np.inf, v) if np.isnan(v.max(initial=0.0)) else v


def peak(m: ClosedLoopMap, grid: np.ndarray) -> np.ndarray:
    """sup over w > 0 of |m(jw)| per sample (grid, refined local maxima, w = 0, w -> inf).

    ``grid`` is shared (G,) or per sample (S, G). The grid is evaluated in row blocks of
    CACHE_POINTS points, the dead-time ripple points in row groups of at most BLOCK_POINTS;
    the refinement (:func:`_refine_max`) is batched over all samples and maxima. Squared
    magnitudes throughout (one square root per sample at the end).
    """
    s_count = m.p.shape[0]
    g2 = _grid_2d(grid, s_count)
    delay = bool(np.any(m.delay > 0))
    best = np.empty(s_count)
    found: list[tuple[np.ndarray, np.ndarray, np.ndarray]] = []
    for blk in _blocks(s_count, g2.shape[1], CACHE_POINTS):
        rows = np.arange(s_count)[blk]
        sub = m if blk.stop - blk.start == s_count else m.rows(blk)
        g = g2[blk]
        v, env = _squared(sub, g, envelope=delay)
        v = _no_nan(v)
        best[blk] = v.max(axis=1)
        if env is None:
            found.append(_local_maxima(g, v, best[blk], rows))
            continue
        reach = _ripple_reach(sub, g, env, np.sqrt(best[blk]))
        for part in _ripple_parts(sub, reach, g.shape[1]):
            lin = _ripple_points(sub.rows(part), reach[part])
            if lin is None:
                found.append(_local_maxima(g[part], v[part], best[blk][part], rows[part]))
                continue
            vl = _no_nan(_squared(sub.rows(part), lin)[0])
            gm, vm = _merge_values(g[part], v[part], lin, vl)
            best[rows[part]] = np.maximum(best[rows[part]], vl.max(axis=1))
            found.append(_local_maxima(gm, vm, best[rows[part]], rows[part]))
    rows_c = np.concatenate([f[0] for f in found])
    if rows_c.size:
        refined = _refine_max(m.rows(rows_c), np.concatenate([f[1] for f in found]),
                              np.concatenate([f[2] for f in found]))
        np.maximum.at(best, rows_c, refined)
    top = g2[:, -1:]
    ends = _no_nan(_squared(m, np.c_[np.zeros((s_count, 1)), top * 1e6])[0])  # 0, "inf"
    best = np.maximum(best, np.where(np.isfinite(ends), ends, 0.0).max(axis=1))
    return np.sqrt(best)


def _local_maxima(g: np.ndarray, v: np.ndarray, best: np.ndarray, rows: np.ndarray
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The (at most) two largest interior local maxima of each row of ``v`` on ``g`` whose
    value is at least SECOND_PEAK of the row's best (in magnitude): their rows (from
    ``rows``), and the log frequencies and values of each with its two neighbours (K, 3)."""
    empty = (np.zeros(0, dtype=np.int64), np.zeros((0, 3)), np.zeros((0, 3)))
    if g.shape[1] < 3:
        return empty
    mid = v[:, 1:-1]
    inner = (mid >= v[:, :-2]) & (mid >= v[:, 2:]) & (g[:, 2:] > g[:, :-2])
    score = np.where(inner, mid, -np.inf)
    r = np.arange(score.shape[0])
    first = np.argmax(score, axis=1)
    top = score[r, first]
    score[r, first] = -np.inf
    second = np.argmax(score, axis=1)
    sel = np.concatenate([r, r])
    idx = np.concatenate([first, second]) + 1
    value = np.concatenate([top, score[r, second]])
    # a maximum below SECOND_PEAK of the best cannot win (see the module notes)
    keep = np.isfinite(value) & (value >= SECOND_PEAK**2 * best[sel])
    sel, idx = sel[keep], idx[keep]
    cols = idx[:, None] + np.arange(-1, 2)[None, :]
    return rows[sel], np.log(g[sel[:, None], cols]), v[sel[:, None], cols]


def _merge_values(g: np.ndarray, v: np.ndarray, lin: np.ndarray, vl: np.ndarray
                  ) -> tuple[np.ndarray, np.ndarray]:
    """Frequencies and values of two point sets merged per row, ascending (NaN last)."""
    gm = np.concatenate([g, lin], axis=1)
    vm = np.concatenate([v, vl], axis=1)
    order = np.argsort(gm, axis=1, kind="stable")     # two sorted runs: a linear merge
    rows = np.arange(gm.shape[0])[:, None]
    return gm[rows, order], vm[rows, order]


#: a local maximum of the grid is refined when its value is at least this fraction of the
#: grid's largest value
SECOND_PEAK = 0.8
#: points per round of the nested grids that narrow a level crossing (:func:`bandwidth`)
REFINE_POINTS = 17
#: most rounds of the refinement of a maximum (:func:`_refine_max`); a round evaluates
#: three points per bracket still open
PEAK_ROUNDS = 40
#: a bracket is closed when the quadratic model bounds the peak's excess over the best
#: value seen below PEAK_RTOL (relative, in |m|^2), or when it is narrower than PEAK_XTOL
#: in log w
PEAK_RTOL = 1e-14
PEAK_XTOL = 1e-11
#: the stencil half-width of a round, as a fraction of the last vertex step and (at least)
#: of the bracket width
_STEP_OF_MOVE = 0.25
_STEP_OF_WIDTH = 1.0 / 64.0


def _refine_max(m: ClosedLoopMap, x: np.ndarray, f: np.ndarray) -> np.ndarray:
    """Batched maximisation of |m_r(j e^u)|^2 over u in [x_r0, x_r2] (row r of ``m`` belongs
    to bracket r; ``x`` (K, 3) ascending log frequencies, ``f`` their values |m|^2 with the
    middle one highest). Returns the largest value evaluated per bracket, never less than
    f_r1.

    Safeguarded successive parabolic interpolation: each round fits the parabola through
    the bracket's three points, evaluates its vertex v and v -+ h, h = max(|v - c|/4,
    width/64) (c the middle point; points outside the open bracket or on c are skipped),
    and keeps the best of the points with its two neighbours as the next bracket. For a
    unimodal bracket the maximum never leaves it, and every round moves at least one end
    of the bracket inwards (the vertex lies within half a side of the middle point); near
    the top the vertex step converges superlinearly and the stencil shrinks with it.
    A bracket closes when the parabola's excess over the middle value, and the
    miss of the last round's prediction (|f(v) - predicted peak|), are both at most
    PEAK_RTOL times the middle value (the peak value is then exact to about 1e-14
    relative: the model was confirmed one round earlier on a wider stencil), or when it is
    narrower than PEAK_XTOL in log w (a peak of relative width 1e-5, a pole with damping
    1e-5, is then still exact to about 1e-12), after at most PEAK_ROUNDS rounds. Closed
    brackets are dropped once they are a quarter of those left, so a round costs three
    evaluations per open bracket or little more; on the
    benchmark fleet the last bracket of a batch closes after 4 to 10 rounds.
    """
    k = x.shape[0]
    best = f[:, 1].copy()
    pts = np.empty((k, 6))                 # the bracket (columns 0-2) and the new points
    val = np.empty((k, 6))
    pts[:, :3], val[:, :3] = x, f
    miss = np.full(k, np.inf)              # |f(vertex) - promised peak| of the last round
    closed = np.zeros(k, dtype=bool)
    live = np.arange(k)
    rows = live[:, None]
    sub = m
    stencil = np.array([-1.0, 0.0, 1.0])
    neighbours = np.arange(-1, 2)[None, :]
    for _ in range(PEAK_ROUNDS):
        xa, xc, xb = pts[:, 0], pts[:, 1], pts[:, 2]
        fc = val[:, 1]
        with np.errstate(all="ignore"):
            d1, d2 = xc - xa, xb - xc
            g1, g2 = fc - val[:, 0], fc - val[:, 2]
            den = d1 * g2 + d2 * g1                   # > 0: the parabola is concave
            move = 0.5 * (d2 * d2 * g1 - d1 * d1 * g2) / den     # its vertex - xc
            excess = den * move * move / (d1 * d2 * (d1 + d2))   # its peak - fc
            ok = (den > 0) & np.isfinite(excess)
            move = np.where(ok, move, 0.0)
            excess = np.where(ok, excess, np.inf)
            tol = PEAK_RTOL * fc
            closed |= ((excess <= tol) & (miss <= tol)) | (xb - xa <= PEAK_XTOL)
        shut = int(np.count_nonzero(closed))
        if shut == live.size:
            break
        if 4 * shut >= live.size:                     # drop the closed brackets
            keep = ~closed
            live, pts, val = live[keep], pts[keep], val[keep]
            move, excess = move[keep], excess[keep]
            closed = closed[keep]
            rows = np.arange(live.size)[:, None]
            sub = m.rows(live)
            xa, xc, xb = pts[:, 0], pts[:, 1], pts[:, 2]
        h = np.maximum(_STEP_OF_MOVE * np.abs(move), _STEP_OF_WIDTH * (xb - xa))
        u = (xc + move)[:, None] + h[:, None] * stencil
        # points outside the open bracket or on its middle add nothing (NaN: sorted last)
        u = np.where((u > xa[:, None]) & (u < xb[:, None]) & (u != xc[:, None]), u, np.nan)
        fu = _no_nan(_squared(sub, np.exp(u))[0])
        with np.errstate(invalid="ignore"):
            miss = np.where(np.isnan(u[:, 1]), np.inf, np.abs(fu[:, 1] - (val[:, 1] + excess)))
        best[live] = np.maximum(best[live], fu.max(axis=1))
        pts[:, 3:], val[:, 3:] = u, fu
        order = np.argsort(pts, axis=1)
        pts, val = pts[rows, order], val[rows, order]
        pick = np.clip(np.argmax(val, axis=1), 1, 4)[:, None] + neighbours
        pts[:, :3], val[:, :3] = pts[rows, pick], val[rows, pick]
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
    for blk in _blocks(s_count, g2.shape[1], CACHE_POINTS):
        below = _mag(m.rows(np.arange(s_count)[blk]), g2[blk]) <= level[blk, None]
        first[blk] = np.where(below.any(axis=1), np.argmax(below, axis=1), -1)
    out = np.where(first < 0, np.inf, np.nan)
    out = np.where(first == 0, g2[:, 0], out)
    rows = np.nonzero(first > 0)[0]
    if rows.size:
        j = first[rows]
        a, b = np.log(g2[rows, j - 1]), np.log(g2[rows, j])
        sub, lv = m.rows(rows), level[rows]
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

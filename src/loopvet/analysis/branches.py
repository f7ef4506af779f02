"""Root-locus branch tracing for plots: the roots of ``D(s) + K N(s)`` as continuous curves.

Coefficients are **ascending** (``c[k]`` multiplies ``s**k``); one loop, 1-D ``n`` and ``d``
(or a batch of one), ``deg N <= deg D``. The gain schedule is stacked along a leading axis
and all roots at a set of gains come from one batched eigenvalue call.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy.optimize import linear_sum_assignment

from ..lti import poly
from ..lti.poly import ComplexArray, FloatArray
from . import locus

#: points per decade of the initial geometric gain grid
GRID_PER_DECADE = 8
#: the schedule spans GAIN_SPAN_LOW * K_ref ... GAIN_SPAN_HIGH * K_ref (unless k_max is given)
GAIN_SPAN_LOW = 1e-6
GAIN_SPAN_HIGH = 1e6
#: relative offsets placed around every caller-supplied gain
AROUND = (1e-3, 1e-2)
#: relative offsets placed around the gain at which a biproper loop loses degree
SINGULAR_AROUND = (1e-3, 1e-2, 1e-1)
#: movement is measured after the radial compression r / sqrt(1 + (|r| / R)**2),
#: R = COMPRESSION * scale, so that far-away points (off the plot) need no resolution
COMPRESSION = 2.0
#: at most this many refinement passes (each halves the offending intervals)
MAX_PASSES = 60


@dataclass(frozen=True, kw_only=True, slots=True)
class Branches:
    """Traced root-locus branches of one loop (arrays are read-only).

    Attributes
    ----------
    gains : float ndarray, shape (P,)
        K values: ``gains[0] == 0``, then strictly increasing in ``|K|``; all <= 0 when
        ``negative``.
    roots : complex ndarray, shape (P, B)
        ``roots[i, j]`` is on branch j at ``gains[i]``; B = deg D. ``roots[0]`` are the
        open-loop poles exactly as :func:`loopvet.analysis.locus.open_loop` reports them
        (sorted by (re, im); multiple poles merged), so the columns start in that order.
    ends : complex ndarray, shape (B,)
        The open-loop zero that branch j approaches as ``|K| -> inf``, or complex infinity
        ``inf + 0j`` for a branch that goes to infinity (test with ``np.isfinite``).
    end_angles_deg : float ndarray, shape (B,)
        For an asymptotic branch, the angle in [0, 360) of the asymptote it follows (the
        values of :func:`loopvet.analysis.locus.asymptotes`); NaN for finite branches.
    centroid : float or None
        Common point of the asymptotes; None when deg N == deg D.
    negative : bool
        The locus for K <= 0.
    scale : float
        Plot scale ``max(1, max |open-loop pole or zero|)`` used for the step tolerance.
    singular_gain : float or None
        The gain ``-d_n/n_n`` at which a biproper loop loses degree (a root passes through
        infinity), when it lies in the traced range; it is not in ``gains``.
    resolved : bool
        True when every step between neighbouring gains moved each root by at most
        ``tol * scale`` (compressed metric, intervals around ``singular_gain`` and
        intervals at floating-point resolution excepted); False if ``max_points`` ran out.
    """

    gains: FloatArray
    roots: ComplexArray
    ends: ComplexArray
    end_angles_deg: FloatArray
    centroid: float | None
    negative: bool
    scale: float
    singular_gain: float | None
    resolved: bool


def _reference_gain(nn: FloatArray, dd: FloatArray, mags: np.ndarray) -> float:
    """``|D(s*)/N(s*)|`` (geometric mean over three points) at a typical root magnitude."""
    nz = mags[mags > 1e-12]
    rho = float(np.median(nz)) if nz.size else 1.0
    s = rho * np.exp(1j * np.pi * np.array([0.55, 0.7, 0.85]))
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        ratio = np.abs(poly.evaluate(dd, s)[0] / poly.evaluate(nn, s)[0])
    ok = ratio[np.isfinite(ratio) & (ratio > 0)]
    return float(np.exp(np.mean(np.log(ok)))) if ok.size else 1.0


def _compress(r: ComplexArray, radius: float) -> ComplexArray:
    return np.asarray(r / np.sqrt(1.0 + (np.abs(r) / radius) ** 2), dtype=np.complex128)


def _polish(char: FloatArray, r: ComplexArray, steps: int = 2) -> ComplexArray:
    """Batched Newton steps on every root of every row of ``char`` (samples, n+1).

    A step is kept only where it lowers ``|char(r)|`` and is shorter than half the distance
    to the nearest other root of the same row, so clustered (near-multiple) roots, where
    Newton is unreliable, are left as the eigenvalue solver gave them.
    """
    if r.shape[1] == 0:
        return r
    dchar = poly.derivative(char)
    if r.shape[1] > 1:
        gap = np.abs(r[:, :, None] - r[:, None, :])
        gap[:, np.arange(r.shape[1]), np.arange(r.shape[1])] = np.inf
        room = 0.5 * gap.min(axis=2)
    else:
        room = np.full(r.shape, np.inf)
    f = poly.evaluate(char, r)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        for _ in range(steps):
            fp = poly.evaluate(dchar, r)
            step = np.where(fp != 0, f / np.where(fp != 0, fp, 1.0), 0.0)
            cand = r - step
            fc = poly.evaluate(char, cand)
            ok = np.isfinite(cand) & (np.abs(fc) < np.abs(f)) & (np.abs(step) < room)
            r = np.where(ok, cand, r)
            f = np.where(ok, fc, f)
    return np.asarray(r, dtype=np.complex128)


def _roots_at(nn: FloatArray, dd: FloatArray, gains: FloatArray) -> ComplexArray:
    """Unordered roots of D + K N for every K in ``gains``: one batched eigenvalue call,
    then batched Newton polishing."""
    if dd.shape[1] == 1:
        return np.zeros((gains.size, 0), dtype=np.complex128)
    char = poly.add(dd, poly.scale(nn, gains))
    return _polish(char, poly.roots(char))


def _order(raw: ComplexArray, start: ComplexArray | None) -> ComplexArray:
    """Reorder each row so that columns are continuous (optimal assignment row to row).

    Row 0 is sorted by (re, im), or matched to ``start`` when given.
    """
    out = np.empty_like(raw)
    if raw.shape[1] == 0:
        return out
    if start is None:
        first = raw[0][np.lexsort((raw[0].imag, raw[0].real))]
    else:
        _, col = linear_sum_assignment(np.abs(start[:, None] - raw[0][None, :]))
        first = raw[0][col]
    out[0] = first
    for i in range(1, raw.shape[0]):
        _, col = linear_sum_assignment(np.abs(out[i - 1][:, None] - raw[i][None, :]))
        out[i] = raw[i][col]
    return out


def _midpoints(a: FloatArray, b: FloatArray) -> FloatArray:
    """Geometric midpoints of [a, b] (magnitudes, a < b); b/2 when a == 0."""
    return np.where(a > 0, np.sqrt(a * np.maximum(b, 0.0)), 0.5 * b)


def _refine(nn: FloatArray, dd: FloatArray, mags: FloatArray, sign: float,
            start: ComplexArray | None, budget: int, step_tol: float, radius: float,
            singular: float | None,
            at_zero: ComplexArray | None = None) -> tuple[FloatArray, ComplexArray, bool]:
    """Insert midpoints until no root moves more than ``step_tol`` between neighbours.

    ``at_zero`` replaces the computed roots at K = 0 (the polished open-loop poles).
    """
    raw = _roots_at(nn, dd, sign * mags)
    if at_zero is not None and mags.size and mags[0] == 0:
        raw[0] = at_zero
    ordered = _order(raw, start)
    resolved = True
    for _ in range(MAX_PASSES):
        if mags.size < 2 or raw.shape[1] == 0:
            break
        comp = _compress(ordered, radius)
        step = np.abs(np.diff(comp, axis=0)).max(axis=1)
        bad = step > step_tol
        lo, hi = mags[:-1], mags[1:]
        bad &= (hi - lo) > 1e-12 * hi                     # floating-point resolution
        if singular is not None:
            bad &= ~((lo < singular) & (singular < hi))   # a root passes through infinity
        if not bad.any():
            break
        room = budget - mags.size
        if room <= 0:
            resolved = False
            break
        idx = np.flatnonzero(bad)
        idx = idx[np.argsort(-step[idx], kind="stable")][:room]
        idx.sort()
        new = _midpoints(lo[idx], hi[idx])
        keep = (new > lo[idx]) & (new < hi[idx])
        new = new[keep]
        if new.size == 0:
            break
        allm = np.concatenate([mags, new])
        perm = np.argsort(allm, kind="stable")
        mags = allm[perm]
        raw = np.concatenate([raw, _roots_at(nn, dd, sign * new)])[perm]
        ordered = _order(raw, start)
    else:
        resolved = False
    return mags, ordered, resolved


def _around(gains: Sequence[float], offsets: Sequence[float]) -> list[float]:
    """``g`` and ``g (1 +- e)`` for every gain and offset."""
    return [x for g in gains for x in [g] + [g * (1 + e * t) for e in offsets for t in (-1, 1)]]


def _schedule(k_lo: float, k_hi: float, points: Sequence[float],
              singular: float | None, include_zero: bool) -> FloatArray:
    """Geometric grid on [k_lo, k_hi] (magnitudes) plus ``points``, 0 if asked, sorted and
    unique, without the singular gain."""
    decades = max(math.log10(k_hi / k_lo), 1.0)
    grid = np.geomspace(k_lo, k_hi, int(math.ceil(decades * GRID_PER_DECADE)) + 1)
    pts = [grid, np.array([0.0] if include_zero else []), np.asarray(points, dtype=float)]
    m = np.unique(np.concatenate(pts))
    m = m[(m >= 0) & (m <= k_hi) & (m >= (0.0 if include_zero else k_lo))]
    if singular is not None:
        m = m[np.abs(m - singular) > 1e-12 * singular]
    return np.asarray(m, dtype=np.float64)


def trace(n: object, d: object, k_max: float | None = None, negative: bool = False,
          extra_gains: Sequence[float] = (), max_points: int = 600,
          tol: float = 0.02) -> Branches:
    """Trace the root-locus branches of ``D(s) + K N(s) = 0`` for K >= 0 (or K <= 0).

    Parameters
    ----------
    n, d : array_like
        Ascending coefficients of N and D for one loop, ``deg N <= deg D``.
    k_max : float, optional
        Largest ``|K|`` to store (its sign is ignored). Default ``1e6 * K_ref`` (or 100 times
        the largest extra gain if that is larger), where ``K_ref = |D(s*)/N(s*)|`` at points
        ``s*`` of a typical open-loop root magnitude.
    negative : bool
        Trace K from 0 down to ``-k_max``.
    extra_gains : sequence of float
        Gains to include exactly (crossing, breakaway gains), together with
        ``K (1 +- 1e-3)`` and ``K (1 +- 1e-2)``. Gains of the wrong sign, zero, non-finite
        or beyond ``k_max`` are ignored.
    max_points : int
        Largest number of stored gains that refinement may reach.
    tol : float
        Largest movement of any root between neighbouring gains, relative to the plot scale
        ``max(1, max |open-loop pole or zero|)``.

    Returns
    -------
    Branches

    Notes
    -----
    Schedule: K = 0, a geometric grid from ``1e-6 * min(K_ref, k_max)`` to ``k_max``
    (8 points per decade), the extra gains and, for a biproper loop, ``K* (1 +- 1e-3, 1e-2,
    1e-1)`` around the degree-loss gain ``K*``; then, in passes, the geometric midpoint of
    every interval over which some root moves more than ``tol * scale`` is inserted (largest
    movements first) until none is left or ``max_points`` is reached. Movement is measured on
    ``r / sqrt(1 + (|r|/R)**2)``, R = 2 scale: close to the identity on the plot, bounded far
    away, so branches leaving for infinity do not consume the budget. A biproper loop loses
    degree at ``K = -d_n/n_n``; that gain is skipped and the interval around it is not
    refined (the root passes through infinity there).

    Roots: companion-matrix eigenvalues of the stacked characteristic polynomials, one
    ``numpy.linalg.eigvals`` call per pass (:func:`loopvet.lti.poly.roots`), then two batched
    Newton steps (kept only where they lower the residual and stay clear of the neighbouring
    roots). Eigenvalues alone lose relative accuracy on small roots when others are huge
    (large K); after polishing ``|D(r) + K N(r)|`` is of the order of
    ``eps * sum_k |c_k| |r|**k``. Near a multiple root (a breakaway point, or a multiple pole
    at K = 0) individual roots are accurate only to about ``eps**(1/m)``; row 0 holds the
    polished open-loop poles instead. Continuity: columns are matched between neighbouring
    gains by optimal assignment (``scipy.optimize.linear_sum_assignment`` on
    ``|r_i - r_j|``, one small problem per step); at a breakaway point the branches that meet
    may continue either way.

    Ends: when ``k_max`` is below ``1e6 * K_ref`` the trace is continued internally (not
    stored) to that gain. At the last gain the deg N branches nearest to the open-loop zeros
    (optimal assignment) end at those zeros; the others go to infinity and are matched to
    the asymptote angles by the direction of ``r - centroid``. Deterministic.
    """
    nn, dd = locus.single_loop(n, d)
    if max_points < 2:
        raise ValueError(f"max_points: expected at least 2, got {max_points!r}")
    if not tol > 0:
        raise ValueError(f"tol: expected a positive number, got {tol!r}")
    sign = -1.0 if negative else 1.0
    poles, zeros = locus.open_loop(nn, dd)
    allr = np.concatenate([poles, zeros])
    scale = max(1.0, float(np.abs(allr).max(initial=0.0)))
    k_ref = _reference_gain(nn, dd, np.abs(allr))
    extras = sorted({abs(float(g)) for g in extra_gains
                     if math.isfinite(float(g)) and float(g) * sign > 0})
    if k_max is not None:
        k_hi = abs(float(k_max))
        if not (math.isfinite(k_hi) and k_hi > 0):
            raise ValueError(f"k_max: expected a finite non-zero number, got {k_max!r}")
    else:
        k_hi = max(GAIN_SPAN_HIGH * k_ref, 100.0 * max(extras, default=0.0))
    k_big = max(GAIN_SPAN_HIGH * k_ref, k_hi)
    k_lo = GAIN_SPAN_LOW * min(k_ref, k_hi)

    singular: float | None = None
    if nn.shape[1] == dd.shape[1]:
        ks = -dd[0, -1] / nn[0, -1] * sign          # magnitude of K* on our half-line
        singular = float(ks) if ks > 0 else None
    radius = COMPRESSION * scale
    step_tol = tol * scale

    near = _around([g for g in extras if g <= k_hi], AROUND)
    if singular is not None:         # draw the root that leaves for infinity far out
        near += _around([singular], SINGULAR_AROUND)
    mags = _schedule(k_lo, k_hi, near, singular, True)
    mags, ordered, resolved = _refine(nn, dd, mags, sign, None, max_points, step_tol, radius,
                                      singular, at_zero=poles)
    last = ordered[-1]
    if k_big > k_hi * (1 + 1e-12) and ordered.shape[1]:
        tail = _schedule(k_hi, k_big, [], singular, False)
        _, tail_roots, _ = _refine(nn, dd, tail, sign, last, max_points, step_tol, radius,
                                   singular)
        last = tail_roots[-1]

    nb = ordered.shape[1]
    ends = np.full(nb, complex(np.inf, 0.0), dtype=np.complex128)
    end_angles = np.full(nb, np.nan)
    infinite = np.arange(nb)
    if zeros.size and nb:
        rows, cols = linear_sum_assignment(np.abs(zeros[:, None] - last[None, :]))
        ends[cols] = zeros[rows]
        infinite = np.setdiff1d(np.arange(nb), cols)
    asym = locus.asymptotes(nn, dd, negative)
    centroid = asym["centroid"]
    if infinite.size and centroid is not None:
        ang = np.asarray(asym["angles_deg"], dtype=np.float64)
        direction = np.degrees(np.angle(last[infinite] - centroid)) % 360.0
        diff = np.abs((direction[:, None] - ang[None, :] + 180.0) % 360.0 - 180.0)
        rows, cols = linear_sum_assignment(diff)
        end_angles[infinite[rows]] = ang[cols]

    gains = sign * mags + 0.0
    in_range = singular if singular is not None and singular <= k_hi else None
    for arr in (gains, ordered, ends, end_angles):
        arr.setflags(write=False)
    return Branches(gains=gains, roots=ordered, ends=ends, end_angles_deg=end_angles,
                    centroid=centroid, negative=negative, scale=scale,
                    singular_gain=None if in_range is None else sign * in_range,
                    resolved=resolved)

"""Pole-region gain intervals by D-decomposition: the K in which every closed-loop pole
meets a damping, decay or natural-frequency bound.

Method
------
A closed-loop pole lies on a region boundary s(p) exactly when D(s(p)) + K N(s(p)) = 0
with K real, i.e. where Im(D(s(p)) conj N(s(p))) = 0. For the three boundaries that
condition is a real polynomial in the boundary parameter p:

* damping ratio zeta: the rays s = r e^{+-j theta}, theta = pi - acos(zeta), r >= 0
  (coefficients d_k e^{jk theta});
* decay rate sigma: the line s = -sigma + jw (Taylor shift, then s = jw);
* natural frequency w_n: the circle s = w_n (1 + jt)/(1 - jt), t real, after multiplying
  D and N by (1 - jt)^deg, plus the point s = -w_n that the map reaches only at t = inf.

Each real root p gives a boundary gain K = -D(s(p))/N(s(p)); the gain at which D + K N
loses degree (biproper loops) is a boundary too. Between consecutive boundary gains
whether the requirement holds is constant; each interval is classified at one interior
gain from the closed-loop poles (batched eigenvalues). Adjacent holding intervals merge;
results are closed intervals.

Accuracy: boundary gains are roots of polynomials built from the loop coefficients, so
they carry the conditioning of those roots (typically 1e-10 relative or better for
loops up to order 12); a boundary that the locus only touches is reported as a boundary,
which may split an interval without changing what holds.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np

from ..lti import poly
from .gain import _test_points, frequency_scale, scaled
from .poles import pole_metrics


def _imag_product(dc: np.ndarray, nc: np.ndarray) -> np.ndarray:
    """Coefficients of Im(Dc(p) conj Nc(p)) for complex polynomials in a real p."""
    return np.convolve(dc, np.conj(nc)).imag


def _boundary_gains(dc: np.ndarray, nc: np.ndarray, keep: Callable[[np.ndarray], np.ndarray],
                    ) -> list[float]:
    cond = _imag_product(dc, nc)
    if not np.any(cond):
        return []
    deg = int(poly.effective_degree(cond[None, :])[0])
    if deg <= 0:
        return []
    p = poly.roots(cond[None, : deg + 1])[0]
    real = p[np.abs(p.imag) <= 1e-7 * np.maximum(1.0, np.abs(p))].real
    real = real[keep(real)]
    out = []
    for x in real:
        dv = complex(np.polyval(dc[::-1], x))
        nv = complex(np.polyval(nc[::-1], x))
        if abs(nv) > 1e-14 * (abs(dv) + 1e-300):
            k = -dv / nv
            if abs(k.imag) <= 1e-6 * max(1.0, abs(k.real)):
                out.append(float(k.real))
    return out


def _shift(c: np.ndarray, x0: float) -> np.ndarray:
    """Coefficients of c(x + x0) (ascending), by Horner's scheme on polynomials."""
    out = np.zeros(1)
    for coef in c[::-1]:
        out = np.convolve(out, [x0, 1.0])
        out[0] += coef
    return out[: c.shape[0]] if out.shape[0] > c.shape[0] else out


def _pad(c: np.ndarray, n: int) -> np.ndarray:
    return np.concatenate([c, np.zeros(n - c.shape[0])]) if c.shape[0] < n else c


def boundary_gains(key: str, bound: float, n: np.ndarray, d: np.ndarray) -> list[float]:
    """Gains at which a closed-loop pole of D + K N lies on the region boundary."""
    size = max(n.shape[0], d.shape[0])
    n, d = _pad(n, size), _pad(d, size)
    # work in u = s / w_s so that roots spanning decades stay accurate (K is unchanged)
    ws = float(frequency_scale(n[None, :], d[None, :])[0])
    n, d = scaled(n[None, :], np.array([ws]))[0], scaled(d[None, :], np.array([ws]))[0]
    if key != "damping_ratio":
        bound = bound / ws
    k = np.arange(size)
    out: list[float] = []
    if key == "damping_ratio":
        zeta = float(np.clip(bound, -1.0, 1.0))
        theta = math.pi - math.acos(zeta)
        rot = np.exp(1j * k * theta)
        out += _boundary_gains(d * rot, n * rot, lambda r: r > 0)
        if n[0] != 0:
            out.append(float(-d[0] / n[0]) + 0.0)
    elif key == "decay_rate":
        ds, ns = _shift(d, -bound), _shift(n, -bound)
        jk = (1j) ** k
        out += _boundary_gains(ds * jk, ns * jk, lambda w: w >= 0)
    elif key == "natural_frequency":
        w = bound
        num1 = np.array([1.0, 1j])      # 1 + jt
        den1 = np.array([1.0, -1j])     # 1 - jt
        deg = size - 1

        def mapped(c: np.ndarray) -> np.ndarray:
            total = np.zeros(deg + 1, dtype=complex)
            for i, ci in enumerate(c):
                if ci == 0:
                    continue
                term = np.array([ci * w**i], dtype=complex)
                for _ in range(i):
                    term = np.convolve(term, num1)
                for _ in range(deg - i):
                    term = np.convolve(term, den1)
                total[: term.shape[0]] += term
            return total

        out += _boundary_gains(mapped(d), mapped(n), lambda t: np.ones(t.shape, bool))
        nv = np.polyval(n[::-1], -w)
        if nv != 0:
            out.append(float(-np.polyval(d[::-1], -w) / nv))
    else:
        raise ValueError(key)
    dn = int(poly.effective_degree(d[None, :])[0])
    nn = int(poly.effective_degree(n[None, :])[0])
    if dn == nn and nn >= 0:
        out.append(float(-d[dn] / n[nn]))
    return sorted(out)


def holds(key: str, value: np.ndarray, req_min: float | None, req_max: float | None
          ) -> np.ndarray:
    ok = np.ones(value.shape, dtype=bool)
    if req_min is not None:
        ok &= value >= req_min
    if req_max is not None:
        ok &= value <= req_max
    return ok


def metric_at_gains(key: str, n: np.ndarray, d: np.ndarray, gains: np.ndarray) -> np.ndarray:
    """The pole metric of D + K N at each gain (one batched eigenvalue call)."""
    char = poly.add(np.broadcast_to(d, (gains.size, d.shape[0])),
                    poly.scale(np.broadcast_to(n, (gains.size, n.shape[0])), gains))
    r = poly.roots_ragged(char)
    r = np.where(np.isnan(r), -np.inf, r)   # padding never decides a metric
    mags = np.abs(r)
    if key == "natural_frequency":
        return np.where(np.isfinite(mags), mags, 0.0).max(axis=1, initial=0.0)
    if key == "decay_rate":
        return np.where(np.isfinite(r.real), -r.real, np.inf).min(axis=1, initial=np.inf)
    pm = pole_metrics(np.where(np.isfinite(mags), r, -1.0 + 0j))
    return pm["damping_ratio"]


def region_intervals(key: str, req_min: float | None, req_max: float | None,
                     n: np.ndarray, d: np.ndarray) -> tuple[list[tuple[float, float]],
                                                            list[float]]:
    """Closed intervals of K (whole real axis) where the pole requirement holds, and the
    boundary gains found. ``n``, ``d``: 1-D ascending (delay-free or Pade-augmented)."""
    bound = req_min if key in ("damping_ratio", "decay_rate") else req_max
    assert bound is not None
    gains = boundary_gains(key, bound, n, d)
    edges: list[float] = []
    for g in gains:
        if not edges or abs(g - edges[-1]) > 1e-12 * max(1.0, abs(g)):
            edges.append(g)
    pts = np.asarray(_test_points(edges))
    ok = holds(key, metric_at_gains(key, n, d, pts), req_min, req_max)
    full = [-math.inf, *edges, math.inf]
    out: list[tuple[float, float]] = []
    for j, good in enumerate(ok):
        if not good:
            continue
        lo, hi = full[j], full[j + 1]
        if out and out[-1][1] == lo:
            out[-1] = (out[-1][0], hi)
        else:
            out.append((lo, hi))
    return out, edges

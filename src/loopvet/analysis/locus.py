"""Root-locus facts of the delay-free loop ``L(s) = K N(s)/D(s)``.

Coefficients are **ascending** (``c[k]`` multiplies ``s**k``). The single-loop functions take
1-D arrays ``n``, ``d`` (or a batch of one, shape ``(1, degree + 1)``) with ``deg N <= deg D``;
:func:`asymptote_centroids` takes the usual leading sample axis ``(samples, degree + 1)``.
Columns above a polynomial's effective degree that are exactly zero are storage padding and
are ignored; nothing with a non-zero value is ever trimmed.

The root locus is the set of roots of ``D(s) + K N(s)`` as ``K`` runs over ``K >= 0`` (or over
``K <= 0`` with ``negative=True``). Every rule below is written for the gain that multiplies
the monic ratio ``prod(s - z)/prod(s - p)``, i.e. ``K * n_m/d_n``; when the leading
coefficients of N and D have opposite signs the K > 0 locus therefore obeys the rules that a
monic loop obeys for K < 0, and the other way round. This is handled here, not by the caller.

Multiple roots
--------------
Eigenvalue solvers return an m-fold root as m roots scattered around it by about
``(eps * cond)**(1/m)``. A set of m computed roots whose spread about their mean ``c`` is at
most ``max(1, |c|) * MULTIPLICITY_BACKWARD**(1/m)`` is taken as one m-fold root at ``c`` (the
mean of a cluster is far more accurate than its members). Distinct roots closer than that
are numerically indistinguishable from a multiple root (they are within a relative
coefficient perturbation of about ``MULTIPLICITY_BACKWARD``) and are treated as one.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ..lti import poly
from ..lti.poly import ComplexArray, FloatArray

#: relative backward error within which m computed roots are one m-fold root (see module doc)
MULTIPLICITY_BACKWARD = 1e-12
#: a breakaway candidate counts as real-gain when |Im K| <= REAL_GAIN_RTOL * max(1, |K|)
REAL_GAIN_RTOL = 1e-8
#: a root of N D' - N' D within COINCIDE_RTOL * max(1, |p|) of an open-loop pole or zero p is
#: that pole/zero (where branches leave or arrive), not a break point; the same tolerance
#: decides that a pole and a zero cancel when departure/arrival angles are computed
COINCIDE_RTOL = 1e-6

_EPS = float(np.finfo(np.float64).eps)


@dataclass(frozen=True, slots=True)
class _Loop:
    """One loop, trimmed to effective degrees, with grouped poles and zeros."""

    n: FloatArray                           # (1, deg_n + 1)
    d: FloatArray                           # (1, deg_d + 1)
    deg_n: int
    deg_d: int
    lead_sign: int                          # sign of n_m / d_n
    poles: list[tuple[complex, int]]        # (value, multiplicity), sorted by (re, im)
    zeros: list[tuple[complex, int]]


# --------------------------------------------------------------------------- input handling


#: real parts closer than SORT_RTOL * max(1, |re|) count as equal when sorting points, so the
#: (re, im) order does not depend on the last bits of a polished value
SORT_RTOL = 1e-9


def _point_order(points: Sequence[complex], extra: Sequence[float] | None = None) -> list[int]:
    """Indices sorting ``points`` by real part (tolerant, see SORT_RTOL), then imag, extra."""
    by_re = sorted(range(len(points)), key=lambda i: (points[i].real, points[i].imag, i))
    bucket: dict[int, int] = {}
    b, prev = 0, None
    for i in by_re:
        re = points[i].real
        if prev is not None and re - prev > SORT_RTOL * max(1.0, abs(re)):
            b += 1
        bucket[i] = b
        prev = re
    ex = extra if extra is not None else [0.0] * len(points)
    return sorted(range(len(points)), key=lambda i: (bucket[i], points[i].imag, ex[i], i))


def single_loop(n: object, d: object) -> tuple[FloatArray, FloatArray]:
    """Validate one loop and return ``(n, d)`` as batches of one, trimmed to effective degree.

    ``n`` and ``d`` are ascending coefficients, 1-D or shape ``(1, degree + 1)``. Raises
    ValueError for a batch of more than one sample, non-finite coefficients, a zero
    polynomial, or ``deg N > deg D``.
    """
    out = []
    for name, c in (("n", n), ("d", d)):
        a = poly.as_batch(c)
        if a.shape[0] != 1:
            raise ValueError(f"{name}: expected one loop, got {a.shape[0]} samples")
        if not np.all(np.isfinite(a)):
            raise ValueError(f"{name}: coefficients must be finite, got {a[0].tolist()!r}")
        deg = int(poly.effective_degree(a)[0])
        if deg < 0:
            raise ValueError(f"{name}: the zero polynomial is not allowed")
        out.append(np.ascontiguousarray(a[:, : deg + 1]))
    if out[0].shape[1] > out[1].shape[1]:
        raise ValueError(f"improper loop: deg N = {out[0].shape[1] - 1} > deg D = "
                         f"{out[1].shape[1] - 1}")
    return out[0], out[1]


def _prepare(n: object, d: object) -> _Loop:
    nn, dd = single_loop(n, d)
    deg_n, deg_d = nn.shape[1] - 1, dd.shape[1] - 1
    lead = nn[0, -1] / dd[0, -1]
    return _Loop(n=nn, d=dd, deg_n=deg_n, deg_d=deg_d, lead_sign=1 if lead > 0 else -1,
                 poles=polished_roots(dd), zeros=polished_roots(nn))


def _effective_positive(loop: _Loop, negative: bool) -> bool:
    """True when the monic-ratio gain ``K n_m/d_n`` is positive on the requested half-line."""
    return (loop.lead_sign > 0) != negative


# --------------------------------------------------------------------------- root grouping


def group_roots(r: NDArray) -> list[tuple[complex, int]]:
    """Group computed roots of a real polynomial into ``(value, multiplicity)`` pairs.

    Parameters
    ----------
    r : ndarray, shape (m,)
        Roots as returned by an eigenvalue solver (conjugate pairs exact, real roots real).

    Returns
    -------
    list of (complex, int)
        Distinct roots with multiplicities, sorted by (real, imag); multiplicities sum to m.
        Conjugate symmetry is enforced: real multiple roots are exactly real and every complex
        group in the lower half-plane is the mirror of one in the upper half-plane.

    Notes
    -----
    Greedy: for the first unassigned root (in (real, imag) order) the largest set of its
    nearest unassigned neighbours whose spread about its mean ``c`` is within
    ``max(1, |c|) * MULTIPLICITY_BACKWARD**(1/m)`` becomes one m-fold root at the mean. The
    mean of a cluster is accurate to about ``eps * cond`` even when its members are only
    accurate to ``(eps * cond)**(1/m)``. O(m**3); m is small.
    """
    vals = [complex(x) for x in np.asarray(r, dtype=np.complex128).ravel()]
    order = sorted(range(len(vals)), key=lambda i: (vals[i].real, vals[i].imag, i))
    unassigned = list(order)
    groups: list[tuple[complex, int, float]] = []
    while unassigned:
        i = unassigned[0]
        rest = sorted(unassigned[1:], key=lambda j: (abs(vals[j] - vals[i]), j))
        chosen, centre, spread = [i], vals[i], 0.0
        for m in range(len(rest) + 1, 1, -1):
            cand = [i, *rest[: m - 1]]
            c = sum(vals[j] for j in cand) / m
            rad = max(abs(vals[j] - c) for j in cand)
            if rad <= max(1.0, abs(c)) * MULTIPLICITY_BACKWARD ** (1.0 / m):
                chosen, centre, spread = cand, c, rad
                break
        groups.append((centre, len(chosen), spread))
        unassigned = [j for j in unassigned if j not in chosen]
    # conjugate symmetry: snap near-real groups, mirror the upper half-plane
    real: list[tuple[complex, int]] = []
    upper: list[tuple[complex, int]] = []
    lower: list[tuple[complex, int]] = []
    for c, m, spread in groups:
        if c.imag == 0.0 or (m > 1 and abs(c.imag) <= max(spread, _EPS * max(1.0, abs(c)))):
            real.append((complex(c.real, 0.0), m))
        elif c.imag > 0:
            upper.append((c, m))
        else:
            lower.append((c, m))
    if sorted(m for _, m in upper) == sorted(m for _, m in lower):
        lower = [(c.conjugate(), m) for c, m in upper]
    out = real + upper + lower
    return [out[i] for i in _point_order([c for c, _ in out])]


def polished_roots(c: FloatArray) -> list[tuple[complex, int]]:
    """Distinct roots of one ascending polynomial ``c`` (1, k+1) with multiplicities.

    Notes
    -----
    Companion eigenvalues (:func:`loopvet.lti.poly.roots`), grouped by :func:`group_roots`,
    then each real or upper-half-plane group is polished by Newton's method (on the
    (m-1)-th derivative for an m-fold group) and the lower half-plane is mirrored, so
    conjugate pairs stay exact. Simple roots end close to full precision.
    """
    if c.shape[1] <= 1:
        return []
    out: list[tuple[complex, int]] = []
    for r, m in group_roots(poly.roots(c)[0]):
        if r.imag < 0:
            continue
        target = c
        for _ in range(m - 1):              # an m-fold root is a simple root of c^(m-1)
            target = poly.derivative(target)
        x = _newton(target, r)
        out.append((x, m))
        if x.imag != 0:
            out.append((x.conjugate(), m))
    return [out[i] for i in _point_order([c for c, _ in out])]


def _expand(groups: Sequence[tuple[complex, int]]) -> ComplexArray:
    vals = [c for c, m in groups for _ in range(m)]
    return np.array(vals, dtype=np.complex128).reshape(-1)


def _pair(c: complex) -> list[float]:
    return [float(c.real), float(c.imag)]


# --------------------------------------------------------------------------- public API


def open_loop(n: object, d: object) -> tuple[ComplexArray, ComplexArray]:
    """Open-loop poles (roots of D) and zeros (roots of N), each sorted by (real, imag).

    Parameters
    ----------
    n, d : array_like
        Ascending coefficients of N and D (1-D, or shape (1, degree + 1)).

    Returns
    -------
    poles, zeros : complex ndarray, shapes (deg D,) and (deg N,)
        Repeated roots appear once per multiplicity, all copies at the same value.

    Notes
    -----
    Companion-matrix eigenvalues (:func:`loopvet.lti.poly.roots`), then :func:`group_roots`:
    simple roots are accurate to about ``eps * ||c|| / |c_n|`` relative; an m-fold root is
    reported at the mean of its cluster (accurate to about the same order, not
    ``eps**(1/m)``).
    """
    loop = _prepare(n, d)
    return _expand(loop.poles), _expand(loop.zeros)


def asymptote_centroids(n: object, d: object) -> tuple[NDArray[np.int_], FloatArray]:
    """Number of asymptotes ``q = deg D - deg N`` and their centroid, for a batch of loops.

    Parameters
    ----------
    n, d : array_like, shape (samples, .)
        Ascending coefficients; a batch of one broadcasts against a batch of many.

    Returns
    -------
    q : int ndarray, shape (samples,)
    centroid : float ndarray, shape (samples,)
        ``(sum of poles - sum of zeros) / q``; NaN where ``q == 0``.

    Notes
    -----
    From the coefficients, without roots (Vieta): the sum of the roots of a degree-k
    polynomial is ``-c[k-1]/c[k]``. Exact up to one rounding per operation.
    """
    nn, dd = poly.as_batch(n), poly.as_batch(d)
    samples = max(nn.shape[0], dd.shape[0])
    nn = np.broadcast_to(nn, (samples, nn.shape[1]))
    dd = np.broadcast_to(dd, (samples, dd.shape[1]))
    deg_n, deg_d = poly.effective_degree(nn), poly.effective_degree(dd)
    if np.any(deg_n < 0) or np.any(deg_d < 0):
        raise ValueError("the zero polynomial is not allowed")
    if np.any(deg_n > deg_d):
        raise ValueError("improper loop: deg N > deg D in some sample")
    rows = np.arange(samples)

    def root_sum(c: FloatArray, deg: NDArray[np.int_]) -> FloatArray:
        lead = c[rows, deg]
        sub = np.where(deg > 0, c[rows, np.maximum(deg - 1, 0)], 0.0)
        return np.asarray(-sub / lead, dtype=np.float64)

    q = (deg_d - deg_n).astype(np.int_)
    with np.errstate(divide="ignore", invalid="ignore"):
        centroid = np.where(q > 0, (root_sum(dd, deg_d) - root_sum(nn, deg_n))
                            / np.maximum(q, 1), np.nan)
    return q, centroid.astype(np.float64)


def _asymptotes(loop: _Loop, negative: bool) -> dict[str, Any]:
    q = loop.deg_d - loop.deg_n
    if q == 0:
        return {"centroid": None, "angles_deg": []}
    _, centroid = asymptote_centroids(loop.n, loop.d)
    if _effective_positive(loop, negative):
        angles = [(2 * k + 1) * 180.0 / q for k in range(q)]
    else:
        angles = [360.0 * k / q for k in range(q)]
    return {"centroid": float(centroid[0]), "angles_deg": sorted(a % 360.0 for a in angles)}


def asymptotes(n: object, d: object, negative: bool = False) -> dict[str, Any]:
    """Asymptotes of the branches that go to infinity.

    Parameters
    ----------
    n, d : array_like
        Ascending coefficients of N and D for one loop.
    negative : bool
        False: the locus for K >= 0; True: for K <= 0.

    Returns
    -------
    dict
        ``{"centroid": float | None, "angles_deg": list[float]}``. With ``q = deg D - deg N``
        asymptotes the angles are ``(2k+1) 180/q`` (monic-ratio gain > 0) or ``360 k/q``
        (< 0), k = 0..q-1, in [0, 360) and sorted; ``q == 0`` gives ``None`` and ``[]``.

    Notes
    -----
    Centroid from the coefficients (:func:`asymptote_centroids`), exact up to rounding. The
    sign of ``n_m/d_n`` is taken into account (see the module docstring).
    """
    return _asymptotes(_prepare(n, d), negative)


def _newton(c: FloatArray, s: complex, iterations: int = 12) -> complex:
    """Polish a simple root ``s`` of the ascending polynomial ``c`` (1, k+1) by Newton.

    Steps are accepted while ``|c(x)|`` decreases; a result further than
    ``1e-3 * max(1, |s|)`` from the start (a jump towards another root) is discarded.
    A real start stays real.
    """
    dc = poly.derivative(c)
    x: complex | float = s.real if s.imag == 0.0 else s
    fx = abs(complex(poly.evaluate(c, np.array([x]))[0, 0]))
    for _ in range(iterations):
        f = complex(poly.evaluate(c, np.array([x]))[0, 0])
        df = complex(poly.evaluate(dc, np.array([x]))[0, 0])
        if df == 0 or f == 0:
            break
        step = f / df
        nxt: complex | float = x - (step.real if isinstance(x, float) else step)
        fn = abs(complex(poly.evaluate(c, np.array([nxt]))[0, 0]))
        if not fn < fx and fn != 0:
            break
        x, fx = nxt, fn
        if abs(step) <= 4 * _EPS * max(1.0, abs(x)):
            break
    if abs(x - s) > 1e-3 * max(1.0, abs(s)):
        return s
    return complex(x)


def _stationary_polynomial(loop: _Loop) -> FloatArray:
    """``N D' - N' D`` with leading coefficients that vanish up to rounding removed."""
    dn, dd = poly.derivative(loop.n), poly.derivative(loop.d)
    p = poly.sub(poly.mul(loop.n, dd), poly.mul(dn, loop.d))
    # rounding bound of each coefficient (a sum of products): trims structural cancellation,
    # e.g. the top coefficient (deg D - deg N) n_m d_n when deg N == deg D
    bound = poly.add(poly.mul(np.abs(loop.n), np.abs(dd)), poly.mul(np.abs(dn), np.abs(loop.d)))
    bound = bound * (8.0 * _EPS * (loop.deg_n + loop.deg_d + 1))
    k = p.shape[1] - 1
    while k >= 0 and abs(p[0, k]) <= bound[0, k]:
        k -= 1
    return np.ascontiguousarray(p[:, : k + 1]) if k >= 0 else np.zeros((1, 1))


def _near_any(s: complex, groups: Sequence[tuple[complex, int]]) -> bool:
    return any(abs(s - c) <= COINCIDE_RTOL * max(1.0, abs(c)) for c, _ in groups)


def _breakaway(loop: _Loop, negative: bool) -> list[dict[str, Any]]:
    p = _stationary_polynomial(loop)
    if p.shape[1] <= 1:
        return []
    found: list[tuple[complex, float]] = []
    upper: list[tuple[complex, float]] = []
    for s, _ in polished_roots(p):
        if s.imag < 0:
            continue                      # mirrored from the upper half-plane below
        if _near_any(s, loop.poles) or _near_any(s, loop.zeros):
            continue
        sa = np.array([s])
        nv = complex(poly.evaluate(loop.n, sa)[0, 0])
        dv = complex(poly.evaluate(loop.d, sa)[0, 0])
        if nv == 0 or dv == 0:
            continue
        k = -dv / nv
        if abs(k.imag) > REAL_GAIN_RTOL * max(1.0, abs(k)):
            continue
        wanted = k.real < 0 if negative else k.real > 0
        if not wanted:
            continue
        (found if s.imag == 0 else upper).append((s, float(k.real)))
    found += upper + [(s.conjugate(), k) for s, k in upper]
    order = _point_order([s for s, _ in found])
    return [{"point": _pair(found[i][0]), "gain": found[i][1]} for i in order]


def breakaway(n: object, d: object, negative: bool = False) -> list[dict[str, Any]]:
    """Break-away and break-in points: where branches meet and leave, off the poles/zeros.

    Parameters
    ----------
    n, d : array_like
        Ascending coefficients of N and D for one loop.
    negative : bool
        False: points reached with K > 0; True: with K < 0.

    Returns
    -------
    list of dict
        ``{"point": [re, im], "gain": K}`` sorted by real then imaginary part. Each distinct
        point appears once (a point where three or more branches meet is not repeated);
        complex points are listed with their conjugates.

    Notes
    -----
    Candidates are the roots of ``N D' - N' D`` (``dK/ds = 0`` for ``K = -D/N``), built from
    ascending coefficients; leading coefficients within their rounding bound are removed
    first (e.g. the top one of a biproper loop). Roots come from companion eigenvalues,
    grouped as in :func:`group_roots` and polished by Newton's method on the polynomial (on
    its (m-1)-th derivative for an m-fold root), which gives close to full precision for
    simple points. Kept: points with ``|Im K| <= REAL_GAIN_RTOL * max(1, |K|)`` and K of the
    requested sign; dropped: points within ``COINCIDE_RTOL`` of an open-loop pole or zero
    (a multiple pole is where branches leave, not a break point).
    """
    return _breakaway(_prepare(n, d), negative)


def _norm_deg(a: float) -> float:
    """Angle in degrees normalised to (-180, 180]; values within 1e-9 of -180 become 180."""
    r = math.fmod(a, 360.0)
    if r <= -180.0 + 1e-9:
        r += 360.0
    elif r > 180.0 + 1e-9:
        r -= 360.0
    return 180.0 if abs(r - 180.0) <= 1e-9 else float(r) + 0.0   # no negative zero


def _angle_entries(at: Sequence[tuple[complex, int]], same: Sequence[tuple[complex, int]],
                   other: Sequence[tuple[complex, int]], base: float, sign: float,
                   key: str) -> list[dict[str, Any]]:
    """Angles at the complex members of ``at`` (poles for departure, zeros for arrival).

    ``same``: roots of the same polynomial (other poles for departure), ``other``: roots of
    the other one. ``sign`` = -1 for departure (the angle of ``s - p`` enters negatively).
    """
    out: list[tuple[float, float, float]] = []
    for c, m in at:
        if c.imag <= 0:
            continue
        cancelling = sum(mo for co, mo in other if abs(c - co) <= COINCIDE_RTOL * max(1, abs(c)))
        net = m - cancelling
        if net <= 0:
            continue                      # cancelled by a coincident root of the other kind
        total = 0.0
        for co, mo in other:
            if abs(c - co) > COINCIDE_RTOL * max(1.0, abs(c)):
                total -= sign * mo * math.degrees(math.atan2((c - co).imag, (c - co).real))
        for cs, ms in same:
            if cs != c:
                total += sign * ms * math.degrees(math.atan2((c - cs).imag, (c - cs).real))
        # departure (sign -1): -m th + sum arg(p - z) - sum arg(p - p_j) = base   (mod 360)
        # arrival   (sign +1):  m th + sum arg(z - z_i) - sum arg(z - p_j) = base  (mod 360)
        for k in range(net):
            th = _norm_deg((base - total + 360.0 * k) / net) if sign > 0 else \
                _norm_deg((total - base + 360.0 * k) / net)
            out.append((c.real, c.imag, th))
            out.append((c.real, -c.imag, _norm_deg(-th)))
    order = _point_order([complex(re, im) for re, im, _ in out], [th for _, _, th in out])
    return [{key: [float(out[i][0]), float(out[i][1])], "angle_deg": out[i][2]} for i in order]


def _angles(loop: _Loop, negative: bool) -> dict[str, Any]:
    base = 180.0 if _effective_positive(loop, negative) else 0.0
    return {"departure": _angle_entries(loop.poles, loop.poles, loop.zeros, base, -1.0, "pole"),
            "arrival": _angle_entries(loop.zeros, loop.zeros, loop.poles, base, 1.0, "zero")}


def angles(n: object, d: object, negative: bool = False) -> dict[str, Any]:
    """Departure angles at complex open-loop poles and arrival angles at complex zeros.

    Parameters
    ----------
    n, d : array_like
        Ascending coefficients of N and D for one loop.
    negative : bool
        False: the locus for K >= 0; True: for K <= 0.

    Returns
    -------
    dict
        ``{"departure": [{"pole": [re, im], "angle_deg": a}, ...],
        "arrival": [{"zero": [re, im], "angle_deg": a}, ...]}``, angles in degrees in
        (-180, 180]. Every complex pole/zero is listed (both members of a conjugate pair;
        the lower one carries the negated angle); an m-fold one has m entries, one per
        branch, sorted by (re, im, angle). Real poles and zeros are not listed.

    Notes
    -----
    Angle condition ``sum arg(s - z_i) - sum arg(s - p_j) = 180 (mod 360)`` for a positive
    monic-ratio gain (0 for a negative one) applied at ``s = p + eps e^{j theta}``: the
    departure angle at a pole p of multiplicity m is
    ``(180 + sum arg(p - z_i) - sum_{other poles} arg(p - p_j) + 360 k)/m`` and the arrival
    angle at a zero analogously, each root counted with its multiplicity. Multiplicity is
    detected as in :func:`group_roots`; a pole and a zero within ``COINCIDE_RTOL`` of each
    other cancel (only the net multiplicity leaves or arrives). Accuracy: that of the roots,
    degraded near other roots by ``|root error| / distance`` radians.
    """
    return _angles(_prepare(n, d), negative)


def locus_facts(n: object, d: object, include_negative: bool) -> dict[str, Any]:
    """The JSON-ready ``locus`` block of the results format for one loop.

    Parameters
    ----------
    n, d : array_like
        Ascending coefficients of N and D (delay-free part).
    include_negative : bool
        Add a ``"negative_gain"`` sub-dict (asymptotes, breakaway, angles for K < 0).

    Returns
    -------
    dict
        ``open_loop_poles``, ``open_loop_zeros`` (``[re, im]`` pairs of Python floats, sorted
        by (re, im), repeated per multiplicity), ``asymptotes``, ``breakaway``, ``angles``
        (for K > 0) and, optionally, ``negative_gain``. No NaN or infinity appears.

    Notes
    -----
    See :func:`open_loop`, :func:`asymptotes`, :func:`breakaway` and :func:`angles`; the roots
    are computed once.
    """
    loop = _prepare(n, d)
    out: dict[str, Any] = {
        "open_loop_poles": [_pair(c) for c in _expand(loop.poles)],
        "open_loop_zeros": [_pair(c) for c in _expand(loop.zeros)],
        "asymptotes": _asymptotes(loop, False),
        "breakaway": _breakaway(loop, False),
        "angles": _angles(loop, False),
    }
    if include_negative:
        out["negative_gain"] = {"asymptotes": _asymptotes(loop, True),
                                "breakaway": _breakaway(loop, True),
                                "angles": _angles(loop, True)}
    return out

"""Discretisation for sampled-data loops: zero-order hold, controller methods, the w-plane map.

Every polynomial is a batch of ascending coefficients with a leading sample axis, as in
:mod:`loopvet.lti.poly`; here the variable is ``z`` (or ``v`` after :func:`to_w_plane`).
Nothing is cancelled except the exact factor ``z`` that a ZOH equivalent without a fractional
delay would otherwise carry in both numerator and denominator (see :func:`zoh`).

Notes
-----
Zero-order hold (exact). The continuous part ``G(s) exp(-s L)`` is realised in controllable
canonical form (A, B, C, D). With the dead time written as ``L = m T + lam``, ``0 <= lam < T``,
the held input seen by the plant during one period is ``u[k-m-1]`` for the first ``lam``
seconds and ``u[k-m]`` afterwards, so (modified z-transform / state augmentation)

    x[k+1] = Phi x[k] + Gam0 u[k-m] + Gam1 u[k-m-1]
    Phi = e^{A T},  Gam0 = int_0^{T-lam} e^{A t} dt B,
    Gam1 = e^{A (T-lam)} int_0^{lam} e^{A t} dt B

with every integral taken from one matrix exponential of the augmented matrix
``[[A, B], [0, 0]] t`` (``scipy.linalg.expm``, batched). The transfer function is

    G_zoh(z) = [z C adj(zI-Phi) Gam0 + C adj(zI-Phi) Gam1 + D Delta(z)] / (z^(m+1) Delta(z))

(for lam = 0 the common factor z is removed: ``[C adj Gam0 + D Delta] / (z^m Delta)``), with
``Delta = det(zI - Phi)`` from the eigenvalues of Phi and ``C adj(zI-Phi) g`` from
``det(zI - Phi + g C) - det(zI - Phi)`` (the identity used for state-space blocks).
Accuracy: the coefficients of Delta are formed from eigenvalues clustered near z = 1 when
``|p| T`` is small; the coefficients then carry absolute errors of about 1e-16 times their
binomial size, i.e. roots near z = 1 are good to about 1e-16 / (|p| T) relative in
``z - 1``. Periods with ``|p| T`` between 1e-3 and a few are well inside double precision
for loops up to order 8 or so.

Controller methods, for ``C(s) = sum n_k s^k / sum d_k s^k`` of nominal degree N:

* ``tustin``: s = c (z - 1)/(z + 1), c = 2/T (bilinear transform);
* ``tustin_prewarp``: the same with c = w_p / tan(w_p T / 2), so that C_z(e^{j w_p T}) equals
  C(j w_p) exactly;
* ``backward_euler``: s = (z - 1)/(T z);
* ``zoh``: the zero-order-hold equivalent above (no dead time);
* ``matched``: each pole and zero p maps to e^{p T}; zeros at infinity (N - M of them) map
  to z = -1 (common practice); the gain matches s^r C(s) at s = 0 against
  ((z - 1)/T)^r C_z(z) at z = 1, r = (poles at 0) - (zeros at 0).

The w-plane. ``z = (1 + v)/(1 - v)`` maps the unit circle onto the imaginary axis
(``e^{j w T} <-> v = j tan(w T / 2)``) and the inside of the circle onto the left half-plane.
A polynomial P(z) of nominal degree n maps to ``(1 - v)^n P((1 + v)/(1 - v))``; numerator and
denominator of one ratio must use the same n, which keeps the ratio exactly. A root at
z = -1 maps to v = infinity: the mapped polynomial then loses degree (its leading
coefficient is ``(-1)^n P(-1)``), which is never trimmed here (see the analysis notes).
"""

from __future__ import annotations

import math

import numpy as np
from scipy.linalg import expm

from . import poly
from .blocks import charpoly

METHODS = ("tustin", "tustin_prewarp", "zoh", "backward_euler", "matched")


def realise(num: np.ndarray, den: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray,
                                                      np.ndarray]:
    """Controllable canonical realisation of a batch of proper rationals.

    Returns A (S, n, n), B (S, n, 1), C (S, 1, n), D (S,), n the common effective degree of
    ``den`` (ValueError when it differs between samples or the ratio is improper).
    """
    samples = max(num.shape[0], den.shape[0])
    num = np.broadcast_to(num, (samples, num.shape[1]))
    den = np.broadcast_to(den, (samples, den.shape[1]))
    deg = poly.effective_degree(den)
    n = int(deg.max(initial=-1))
    if n < 0 or np.any(deg != n):
        raise ValueError("denominator degree differs between samples")
    if np.any(poly.effective_degree(num) > n):
        raise ValueError("improper transfer function")
    lead = den[:, n]
    a = den[:, : n + 1] / lead[:, None]
    b = np.zeros((samples, n + 1))
    w = min(num.shape[1], n + 1)
    b[:, :w] = num[:, :w] / lead[:, None]
    d = b[:, n].copy()
    c = b[:, :n] - d[:, None] * a[:, :n]
    amat = np.zeros((samples, n, n))
    if n:
        amat[:, :-1, 1:] = np.eye(n - 1)
        amat[:, -1, :] = -a[:, :n]
    bmat = np.zeros((samples, n, 1))
    if n:
        bmat[:, -1, 0] = 1.0
    return amat, bmat, c[:, None, :], d


def _hold_integrals(a: np.ndarray, b: np.ndarray, t: np.ndarray
                    ) -> tuple[np.ndarray, np.ndarray]:
    """(e^{A t}, int_0^t e^{A s} ds B) per sample from one augmented matrix exponential."""
    samples, n, _ = a.shape
    m = np.zeros((samples, n + 1, n + 1))
    m[:, :n, :n] = a
    m[:, :n, n:] = b
    e = expm(m * t[:, None, None])
    return e[:, :n, :n], e[:, :n, n]


def _numerator(phi: np.ndarray, g: np.ndarray, c: np.ndarray, delta: np.ndarray) -> np.ndarray:
    """Coefficients of C adj(zI - Phi) g (degree n - 1, padded to n + 1)."""
    closed = charpoly(phi - g[:, :, None] @ c)
    diff = poly.sub(closed, delta)
    n = phi.shape[1]
    noise = 16.0 * (n + 1) * np.finfo(float).eps * (np.abs(closed) + np.abs(delta))
    return np.where(np.abs(diff) <= noise, 0.0, diff)


def split_delay(delay: np.ndarray, period: float) -> tuple[np.ndarray, np.ndarray]:
    """(m, lam) with delay = m T + lam, 0 <= lam < T; lam within 1e-9 T of 0 or T rounds."""
    q = np.asarray(delay, dtype=np.float64) / period
    m = np.floor(q + 1e-9)
    lam = (q - m) * period
    lam = np.where(np.abs(lam) <= 1e-9 * period, 0.0, np.maximum(lam, 0.0))
    return m.astype(int), lam


def zoh(num: np.ndarray, den: np.ndarray, delay: np.ndarray | float, period: float
        ) -> tuple[np.ndarray, np.ndarray]:
    """Zero-order-hold equivalent of ``num/den * exp(-s delay)``: (num_z, den_z), batched.

    See the module notes for the construction and its accuracy. Output arrays have width
    ``n + max(q) + 1`` where q = m + 1 (fractional delay) or m (whole periods).
    """
    a, b, c, d = realise(num, den)
    samples, n, _ = a.shape
    dl = np.broadcast_to(np.asarray(delay, dtype=np.float64), (samples,))
    m, lam = split_delay(dl, period)
    frac = lam > 0
    if n:
        phi1, gam0 = _hold_integrals(a, b, period - lam)
        phi2, g2 = _hold_integrals(a, b, lam)
        phi = phi1 @ phi2
        gam1 = (phi1 @ g2[:, :, None])[:, :, 0]
        delta = charpoly(phi)
        n0 = _numerator(phi, gam0, c, delta)
        n1 = _numerator(phi, gam1, c, delta)
    else:
        delta = np.ones((samples, 1))
        n0 = np.zeros((samples, 1))
        n1 = np.zeros((samples, 1))
    dd = poly.scale(delta, d)
    whole = poly.add(n0, dd)                                    # lam = 0
    shifted = poly.add(poly.add(poly.mul(n0, poly.variable(samples)), n1), dd)
    num_z = poly.add(np.where(frac[:, None], 0.0, 1.0) * poly._pad(whole, shifted.shape[1]),
                     np.where(frac[:, None], 1.0, 0.0) * shifted)
    q = m + frac.astype(int)
    width = n + int(q.max(initial=0)) + 1
    den_z = np.zeros((samples, width))
    for i in range(samples):                                    # a shift per sample
        den_z[i, q[i]: q[i] + n + 1] = delta[i]
    return num_z, den_z


def _substitute(c: np.ndarray, top: np.ndarray, bottom: np.ndarray, n: int) -> np.ndarray:
    """sum_k c_k top^k bottom^(n-k) for first-order ``top``, ``bottom`` (S, 2)."""
    samples = max(c.shape[0], top.shape[0])
    out = np.zeros((samples, n + 1))
    for k in range(min(c.shape[1], n + 1)):
        if not np.any(c[:, k]):
            continue
        term = poly.mul(poly.power(top, k), poly.power(bottom, n - k))
        out = poly.add(out, poly.scale(term, np.broadcast_to(c[:, k], (samples,))))
    return out


def _pair(num: np.ndarray, den: np.ndarray) -> tuple[np.ndarray, np.ndarray, int]:
    samples = max(num.shape[0], den.shape[0])
    n = max(num.shape[1], den.shape[1]) - 1
    return (np.broadcast_to(num, (samples, num.shape[1])),
            np.broadcast_to(den, (samples, den.shape[1])), n)


def bilinear(num: np.ndarray, den: np.ndarray, c: float) -> tuple[np.ndarray, np.ndarray]:
    """Substitute s = c (z - 1)/(z + 1) (Tustin with c = 2/T)."""
    num, den, n = _pair(num, den)
    top = np.array([[-c, c]])
    bottom = np.array([[1.0, 1.0]])
    return _substitute(num, top, bottom, n), _substitute(den, top, bottom, n)


def backward_euler(num: np.ndarray, den: np.ndarray, period: float
                   ) -> tuple[np.ndarray, np.ndarray]:
    """Substitute s = (z - 1)/(T z)."""
    num, den, n = _pair(num, den)
    top = np.array([[-1.0, 1.0]])
    bottom = np.array([[0.0, period]])
    return _substitute(num, top, bottom, n), _substitute(den, top, bottom, n)


def matched(num: np.ndarray, den: np.ndarray, period: float) -> tuple[np.ndarray, np.ndarray]:
    """Matched pole-zero equivalent (see the module notes). One root solve per sample."""
    num, den, _ = _pair(num, den)
    outs_n, outs_d = [], []
    for i in range(num.shape[0]):
        nn = num[i, : int(poly.effective_degree(num[i:i + 1])[0]) + 1]
        dd = den[i, : int(poly.effective_degree(den[i:i + 1])[0]) + 1]
        zs = poly.roots(nn[None, :])[0] if nn.size > 1 else np.zeros(0, complex)
        ps = poly.roots(dd[None, :])[0] if dd.size > 1 else np.zeros(0, complex)
        origin_z = np.abs(zs) <= 1e-12 * max(1.0, float(np.abs(zs).max(initial=0.0)))
        origin_p = np.abs(ps) <= 1e-12 * max(1.0, float(np.abs(ps).max(initial=0.0)))
        r = int(origin_p.sum()) - int(origin_z.sum())
        k = nn[-1] / dd[-1]
        low = k * np.prod(-zs[~origin_z]) / np.prod(-ps[~origin_p])       # s^r C(s) at 0
        extra = ps.size - zs.size
        zz = np.concatenate([np.exp(zs * period), -np.ones(extra)])
        pz = np.exp(ps * period)
        val = (period ** -r) * np.prod(1 - np.exp(zs[~origin_z] * period)) * 2.0 ** extra \
            / np.prod(1 - np.exp(ps[~origin_p] * period))
        kz = (low / val).real
        outs_n.append(poly.from_roots(zz[None, :], kz)[0])
        outs_d.append(poly.from_roots(pz[None, :])[0])
    width = max(max(a.size for a in outs_n), max(a.size for a in outs_d))
    nz = np.zeros((len(outs_n), width))
    dz = np.zeros((len(outs_n), width))
    for i, (a, b) in enumerate(zip(outs_n, outs_d, strict=True)):
        nz[i, : a.size] = a
        dz[i, : b.size] = b
    return nz, dz


def discretise_controller(num: np.ndarray, den: np.ndarray, method: str, period: float,
                          prewarp: float | None = None) -> tuple[np.ndarray, np.ndarray]:
    """C(s) -> C(z) by one of :data:`METHODS` (see the module notes)."""
    if method == "tustin":
        return bilinear(num, den, 2.0 / period)
    if method == "tustin_prewarp":
        assert prewarp is not None
        return bilinear(num, den, prewarp / math.tan(prewarp * period / 2.0))
    if method == "backward_euler":
        return backward_euler(num, den, period)
    if method == "zoh":
        return zoh(num, den, 0.0, period)
    if method == "matched":
        return matched(num, den, period)
    raise ValueError(f"unknown controller method {method!r}")


def delay_periods(num: np.ndarray, den: np.ndarray, periods: int
                  ) -> tuple[np.ndarray, np.ndarray]:
    """Multiply by z^-periods (the denominator gains the factor z^periods)."""
    if periods == 0:
        return num, den
    out = np.zeros((den.shape[0], den.shape[1] + periods))
    out[:, periods:] = den
    return num, out


def to_w_plane(c: np.ndarray, n: int) -> np.ndarray:
    """(1 - v)^n c((1 + v)/(1 - v)) for a batch c (S, <= n + 1) in z: coefficients in v."""
    samples = c.shape[0]
    top = np.array([[1.0, 1.0]])
    bottom = np.array([[1.0, -1.0]])
    out = np.zeros((samples, n + 1))
    for k in range(min(c.shape[1], n + 1)):
        if not np.any(c[:, k]):
            continue
        term = poly.mul(poly.power(top, k), poly.power(bottom, n - k))
        out = poly.add(out, poly.scale(term, c[:, k]))
    return out


def nu_to_omega(nu: np.ndarray, period: float) -> np.ndarray:
    """Physical frequency w = (2/T) atan(nu) of the w-plane axis point v = j nu."""
    return 2.0 / period * np.arctan(nu)


def omega_to_nu(w: np.ndarray, period: float) -> np.ndarray:
    return np.tan(np.asarray(w) * period / 2.0)

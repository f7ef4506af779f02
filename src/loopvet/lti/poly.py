"""Batched polynomial arithmetic.

Coefficients are in ascending order (``c[..., k]`` multiplies ``s**k``) and every array has a
leading sample axis: shape ``(samples, degree + 1)``. Functions broadcast a batch of one
against a batch of many, so a fixed block can be combined with a swept one.
Nothing here trims zero leading coefficients; :func:`effective_degree` reports them.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

FloatArray = NDArray[np.float64]
ComplexArray = NDArray[np.complex128]


def as_batch(c: object, dtype: type = np.float64) -> NDArray:
    """Return ``c`` as a 2-D array (samples, n); a 1-D input becomes one sample."""
    a: NDArray = np.asarray(c, dtype=dtype)
    if a.ndim == 1:
        a = a[None, :]
    if a.ndim != 2 or a.shape[1] == 0:
        raise ValueError(f"expected polynomial coefficients of shape (samples, n), got {a.shape}")
    return a


def constant(value: float | NDArray, samples: int = 1) -> FloatArray:
    """The constant polynomial ``value`` (scalar or array of shape (samples,))."""
    v = np.asarray(value, dtype=np.float64)
    if v.ndim == 0:
        v = np.broadcast_to(v, (samples,))
    return v.reshape(-1, 1).copy()


def variable(samples: int = 1) -> FloatArray:
    """The polynomial ``s`` for a batch of ``samples``."""
    out = np.zeros((samples, 2))
    out[:, 1] = 1.0
    return out


def _pad(a: NDArray, n: int) -> NDArray:
    if a.shape[1] == n:
        return a
    out = np.zeros((a.shape[0], n), dtype=a.dtype)
    out[:, : a.shape[1]] = a
    return out


def add(a: NDArray, b: NDArray) -> NDArray:
    """Sum of two batches (broadcast over samples)."""
    n = max(a.shape[1], b.shape[1])
    return _pad(a, n) + _pad(b, n)


def sub(a: NDArray, b: NDArray) -> NDArray:
    """Difference ``a - b`` of two batches."""
    n = max(a.shape[1], b.shape[1])
    return _pad(a, n) - _pad(b, n)


def mul(a: NDArray, b: NDArray) -> NDArray:
    """Product of two batches: a batched convolution.

    Notes
    -----
    Exact up to floating-point rounding of the products (no FFT). Cost O(deg_a * deg_b) per
    sample, vectorised over samples by looping over the shorter factor's coefficients.
    """
    if a.shape[1] < b.shape[1]:
        a, b = b, a
    samples = max(a.shape[0], b.shape[0])
    dtype = np.result_type(a, b)
    out = np.zeros((samples, a.shape[1] + b.shape[1] - 1), dtype=dtype)
    for k in range(b.shape[1]):
        out[:, k : k + a.shape[1]] += a * b[:, k : k + 1]
    return out


def power(a: NDArray, n: int) -> NDArray:
    """``a**n`` for an integer ``n >= 0`` by repeated squaring."""
    if n < 0:
        raise ValueError("negative exponent")
    result = np.ones((a.shape[0], 1), dtype=a.dtype)
    base = a
    while n:
        if n & 1:
            result = mul(result, base)
        n >>= 1
        if n:
            base = mul(base, base)
    return result


def scale(a: NDArray, k: object) -> NDArray:
    """Multiply each sample's polynomial by the scalar ``k`` (scalar or shape (samples,))."""
    kk = np.asarray(k)
    if kk.ndim == 0:
        return a * kk
    return a * kk.reshape(-1, 1)


def from_roots(roots: NDArray, gain: object = 1.0) -> NDArray:
    """Polynomial ``gain * prod_i (s - roots[:, i])`` for roots of shape (samples, m).

    Complex roots must come in conjugate pairs for a real result; the imaginary part of the
    product is discarded after a check that it is negligible (|imag| <= 1e-9 * scale).
    """
    r = np.asarray(roots, dtype=np.complex128)
    if r.ndim == 1:
        r = r[None, :]
    samples = r.shape[0]
    out = np.ones((samples, 1), dtype=np.complex128)
    for i in range(r.shape[1]):
        factor = np.stack([-r[:, i], np.ones(samples, dtype=np.complex128)], axis=1)
        out = mul(out, factor)
    g = np.asarray(gain, dtype=np.float64)
    out = out * (g.reshape(-1, 1) if g.ndim else g)
    imag = np.abs(out.imag).max(initial=0.0)
    if imag > 1e-9 * max(1.0, float(np.abs(out.real).max(initial=0.0))):
        raise ValueError("complex roots are not in conjugate pairs")
    return np.ascontiguousarray(out.real)


def evaluate(a: NDArray, x: NDArray) -> NDArray:
    """Evaluate each sample's polynomial at points ``x``.

    ``x`` has shape (points,) (shared) or (samples, points). Horner's scheme, ascending
    coefficients. Returns shape (samples, points).
    """
    xx = np.asarray(x)
    if xx.ndim == 1:
        xx = xx[None, :]
    result = np.zeros(np.broadcast_shapes((a.shape[0], 1), xx.shape), dtype=np.result_type(a, xx))
    for k in range(a.shape[1] - 1, -1, -1):
        result = result * xx + a[:, k : k + 1]
    return result


_ALTERNATING = np.where(np.arange(64) % 2 == 0, 1.0, -1.0)


def on_axis(a: NDArray, w: NDArray, x: NDArray | None = None) -> tuple[NDArray, NDArray]:
    """Real and imaginary parts of each sample's polynomial at s = jw for real ``w``.

    ``w`` has shape (points,) or (samples, points). With x = w^2,
    ``a(jw) = E(x) + j w O(x)``, ``E_m = (-1)^m a_2m``, ``O_m = (-1)^m a_(2m+1)``: two real
    Horner schemes of half the degree, about four times cheaper than complex arithmetic and
    with the same rounding behaviour. Returns two real arrays of shape (samples, points).
    ``x``: w^2 when the caller has it already (several polynomials on one grid).
    """
    ww = np.asarray(w, dtype=np.float64)
    if ww.ndim == 1:
        ww = ww[None, :]
    if x is None:
        x = ww * ww
    shape = np.broadcast_shapes((a.shape[0], 1), ww.shape)

    def horner(c: NDArray) -> NDArray:
        c = c * _ALTERNATING[: c.shape[1]] if c.shape[1] <= _ALTERNATING.size else \
            c * np.where(np.arange(c.shape[1]) % 2 == 0, 1.0, -1.0)
        if c.shape[1] == 1:
            return np.broadcast_to(c, shape)
        out = c[:, -1:] * x + c[:, -2:-1]
        for k in range(c.shape[1] - 3, -1, -1):
            out *= x
            out += c[:, k : k + 1]
        return out

    re = horner(a[:, 0::2])
    im = horner(a[:, 1::2]) * ww if a.shape[1] > 1 else np.zeros(shape)
    return re, im


def derivative(a: NDArray) -> NDArray:
    """Derivative d/ds of each sample's polynomial (degree drops by one, at least a constant)."""
    if a.shape[1] == 1:
        return np.zeros_like(a)
    return a[:, 1:] * np.arange(1, a.shape[1], dtype=np.float64)


def effective_degree(a: NDArray, rtol: float = 0.0) -> NDArray:
    """Per-sample degree ignoring leading coefficients with ``|c| <= rtol * max|c|``.

    With the default ``rtol = 0`` only exact zeros are ignored. The zero polynomial has
    degree -1.
    """
    mag = np.abs(a)
    thresh = rtol * mag.max(axis=1, keepdims=True)
    nz = mag > thresh
    idx = np.where(nz.any(axis=1), a.shape[1] - 1 - np.argmax(nz[:, ::-1], axis=1), -1)
    return idx.astype(int)


def trim_common(a: NDArray) -> NDArray:
    """Drop high-order columns that are exactly zero in every sample (storage only)."""
    deg = int(effective_degree(a).max(initial=0))
    return a[:, : max(deg, 0) + 1]


def roots(a: NDArray) -> ComplexArray:
    """Roots of each sample's polynomial by batched companion-matrix eigenvalues.

    Returns shape (samples, degree) where degree is the common effective degree of the batch.

    Notes
    -----
    The companion matrix of the monic polynomial (coefficients in the first row, ones on
    the subdiagonal, the form of ``numpy.roots``) is built for all samples at once and
    ``numpy.linalg.eigvals`` solves the stack (LAPACK ``geev`` with balancing). Measured
    here, this form solves 1.3-1.9 times faster than the equivalent one with the
    coefficients in the last column (orders 4-14, ``benchmarks/companion_forms.py``). Roots
    at 0 (zero low-order coefficients) are returned exactly and kept out of the matrix, so
    that a huge spurious root from a rounding-level leading coefficient cannot spoil them
    or the small roots next to them. Accuracy is that of a backward-stable eigenvalue
    solve: well-separated roots to about ``1e-15 * ||c||/|c_n|`` relative; an m-fold root
    loses roughly a factor 1/m of the digits; roots far from the origin relative to the
    others lose accuracy as the coefficients spread.
    Samples whose leading coefficient is zero (lower degree than the batch) raise ValueError:
    the caller must decide what a degree drop means.
    """
    deg = effective_degree(a)
    n = int(deg.max(initial=-1))
    if n < 0:
        raise ValueError("the zero polynomial has no roots")
    if np.any(deg != n):
        raise ValueError("polynomial degree differs between samples (a leading coefficient "
                         "is zero)")
    if n == 0:
        return np.zeros((a.shape[0], 0), dtype=np.complex128)
    c = a[:, : n + 1]
    zeros = np.argmax(c != 0, axis=1)               # roots at 0: exact, and left out of
    if not zeros.any():                             # the companion matrix (as numpy.roots)
        return _companion_roots(c)
    out = np.zeros((a.shape[0], n), dtype=np.complex128)
    for z in np.unique(zeros):
        idx = np.nonzero(zeros == z)[0]
        if z < n:
            out[idx, : n - z] = _companion_roots(c[idx, z:])
    return out


def _companion_roots(c: NDArray) -> ComplexArray:
    """Eigenvalues of the companion matrices of the (S, n+1) rows (leading coefficients
    non-zero), coefficients in the first row."""
    n = c.shape[1] - 1
    if n == 0:
        return np.zeros((c.shape[0], 0), dtype=np.complex128)
    comp = np.zeros((c.shape[0], n, n))
    comp[:, 0, :] = -(c[:, n - 1 :: -1] / c[:, n : n + 1])
    idx = np.arange(n - 1)
    comp[:, idx + 1, idx] = 1.0
    return np.linalg.eigvals(comp).astype(np.complex128)


def roots_ragged(a: NDArray) -> ComplexArray:
    """Roots of a batch whose samples may differ in effective degree.

    Returns shape (samples, max_degree), padded with NaN where a sample has fewer roots.
    Samples are grouped by degree and each group is solved by :func:`roots` in one call,
    so the Python loop runs once per distinct degree, not once per sample.
    """
    deg = effective_degree(a)
    top = int(max(deg.max(initial=0), 0))
    out = np.full((a.shape[0], top), np.nan + 0j, dtype=np.complex128)
    for g in np.unique(deg):
        if g <= 0:
            continue
        idx = np.nonzero(deg == g)[0]
        out[idx, :g] = roots(a[idx, : g + 1])
    return out


def on_imaginary_axis(c: NDArray) -> tuple[NDArray, NDArray]:
    """Real and imaginary parts of ``c(jw)`` as real polynomials in w (ascending).

    ``c(jw) = R(w) + j I(w)`` with ``R_k = c_k Re(j^k)`` and ``I_k = c_k Im(j^k)``.
    """
    k = np.arange(c.shape[1]) % 4
    re = np.array([1.0, 0.0, -1.0, 0.0])[k]
    im = np.array([0.0, 1.0, 0.0, -1.0])[k]
    return c * re, c * im

"""Record blocks -> batched rational transfer functions (coefficients ascending).

Every conversion is vectorised over the parameter samples. Problems that depend on
parameter values (improper block, negative delay, zero denominator, conjugate pairs
missing) are raised as :class:`~loopvet.record.errors.RecordInvalid` located at the key.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Mapping

import numpy as np

from ..record.errors import RecordInvalid
from ..record.expr import Expr, ExpressionError
from ..record.model import Block, Factored, Pid, Record, StateSpace, Transfer
from ..record.params import problem
from . import poly
from .rational import Rational

MAX_DEGREE = 40


class _Ctx:
    def __init__(self, record: Record, values: Mapping[str, np.ndarray], samples: int):
        self.record, self.values, self.samples = record, values, samples

    def fail(self, key: str, message: str) -> RecordInvalid:
        return RecordInvalid([problem(self.record, key, message)])

    def number(self, expr: Expr, key: str) -> np.ndarray:
        try:
            out = np.broadcast_to(expr.evaluate(self.values, self.samples), (self.samples,))
        except ExpressionError as exc:
            raise self.fail(key, exc.message) from None
        if not np.all(np.isfinite(out)):
            raise self.fail(key, "evaluates to a value that is not finite")
        return np.array(out, dtype=np.float64)

    def const(self, expr: Expr, key: str) -> Rational:
        v = self.number(expr, key)
        return Rational(v[:, None], np.ones((self.samples, 1)), np.zeros(self.samples))


def block_transfer(record: Record, block: Block, values: Mapping[str, np.ndarray],
                   samples: int) -> Rational:
    """The transfer function of one block for every sample, delay included."""
    ctx = _Ctx(record, values, samples)
    key = block.role
    form = block.form
    if form is None:
        tf = Rational.one(samples)
    elif isinstance(form, Transfer):
        try:
            num, den = form.expr.rational(values, samples)
        except ExpressionError as exc:
            raise ctx.fail(f"{key}.transfer", exc.message) from None
        tf = Rational(_batch(num, samples), _batch(den, samples), np.zeros(samples))
        key = f"{key}.transfer"
    elif isinstance(form, Factored):
        tf = _factored(ctx, form, f"{key}.factored")
        key = f"{key}.factored"
    elif isinstance(form, StateSpace):
        tf = _state_space(ctx, form, f"{key}.state_space")
        key = f"{key}.state_space"
    else:
        tf = _pid(ctx, form, f"{key}.pid")
        key = f"{key}.pid"
    _check(ctx, tf, key)
    if block.delay is not None:
        d = ctx.number(block.delay, f"{block.role}.delay")
        if np.any(d < 0):
            raise ctx.fail(f"{block.role}.delay", f"dead time must be >= 0 s, got {d.min():g}")
        tf = Rational(tf.num, tf.den, d)
    return tf


def _batch(a: np.ndarray, samples: int) -> np.ndarray:
    a = np.asarray(a, dtype=np.float64)
    if a.ndim == 1:
        a = a[None, :]
    return np.broadcast_to(a, (samples, a.shape[1])).copy()


def _check(ctx: _Ctx, tf: Rational, key: str) -> None:
    if not (np.all(np.isfinite(tf.num)) and np.all(np.isfinite(tf.den))):
        raise ctx.fail(key, "coefficients are not finite for these parameter values")
    dn, dd = poly.effective_degree(tf.num), poly.effective_degree(tf.den)
    if np.any(dd < 0):
        raise ctx.fail(key, "the denominator is identically zero")
    if np.any(dn > dd):
        i = int(np.argmax(dn > dd))
        raise ctx.fail(key, f"improper block: numerator degree {dn[i]} exceeds denominator "
                       f"degree {dd[i]} (a physical block needs as many poles as zeros; add "
                       "a filter pole)")
    if np.any(dd > MAX_DEGREE):
        raise ctx.fail(key, f"degree {int(dd.max())} exceeds the limit of {MAX_DEGREE}")


def _roots(ctx: _Ctx, items: tuple[complex | Expr, ...], key: str) -> np.ndarray:
    out = np.zeros((ctx.samples, len(items)), dtype=np.complex128)
    literal: Counter[complex] = Counter()
    for i, item in enumerate(items):
        if isinstance(item, complex):
            out[:, i] = item
            if item.imag != 0:
                literal[item] += 1
        else:
            out[:, i] = ctx.number(item, f"{key}[{i}]")
    for c, count in literal.items():
        if literal[c.conjugate()] != count:
            raise ctx.fail(key, f"complex value {_cfmt(c)} has no matching conjugate "
                           f"{_cfmt(c.conjugate())} in the list; list both of every pair")
    return out


def _cfmt(c: complex) -> str:
    return f"{c.real:g}{c.imag:+g}j"


def _factored(ctx: _Ctx, form: Factored, key: str) -> Rational:
    zeros = _roots(ctx, form.zeros, f"{key}.zeros")
    poles = _roots(ctx, form.poles, f"{key}.poles")
    gain = ctx.number(form.gain, f"{key}.gain")
    num = poly.scale(poly.from_roots(zeros), gain)
    den = poly.from_roots(poles)
    return Rational(num, den, np.zeros(ctx.samples))


def _matrix(ctx: _Ctx, rows: tuple[tuple[Expr, ...], ...], key: str) -> np.ndarray:
    widths = {len(r) for r in rows}
    if len(widths) != 1:
        raise ctx.fail(key, "rows have different lengths")
    out = np.zeros((ctx.samples, len(rows), widths.pop()))
    for i, row in enumerate(rows):
        for j, item in enumerate(row):
            out[:, i, j] = ctx.number(item, f"{key}[{i}][{j}]")
    return out


def charpoly(a: np.ndarray) -> np.ndarray:
    """Characteristic polynomial det(sI - A) of a batch (S, n, n), ascending (S, n+1).

    Notes
    -----
    From the eigenvalues (LAPACK ``geev``), multiplied out; backward stable for the
    eigenvalues, so coefficients carry relative errors of order n * 1e-16 * ||A||**k.
    """
    if a.shape[1] == 0:
        return np.ones((a.shape[0], 1))
    return poly.from_roots(np.linalg.eigvals(a))


def _state_space(ctx: _Ctx, form: StateSpace, key: str) -> Rational:
    a = _matrix(ctx, form.A, f"{key}.A")
    b = _matrix(ctx, form.B, f"{key}.B")
    c = _matrix(ctx, form.C, f"{key}.C")
    d = _matrix(ctx, form.D, f"{key}.D")
    n = a.shape[1]
    if a.shape[2] != n:
        raise ctx.fail(f"{key}.A", f"matrix A must be square, got {n} x {a.shape[2]}")
    if b.shape[1:] != (n, 1):
        raise ctx.fail(f"{key}.B", f"matrix B must be {n} x 1 (one input), got {b.shape[1]} x "
                       f"{b.shape[2]}")
    if c.shape[1:] != (1, n):
        raise ctx.fail(f"{key}.C", f"matrix C must be 1 x {n} (one output), got {c.shape[1]} x "
                       f"{c.shape[2]}")
    if d.shape[1:] != (1, 1):
        raise ctx.fail(f"{key}.D", "matrix D must be 1 x 1 (SISO)")
    # For SISO systems det(sI - A + B C) = det(sI - A) * (1 + C (sI - A)^-1 B), hence
    # C (sI - A)^-1 B + D = [det(sI - A + BC) - det(sI - A) + D det(sI - A)] / det(sI - A).
    den = charpoly(a)
    closed = charpoly(a - b @ c)
    diff = poly.sub(closed, den)                  # s^n terms cancel exactly
    # a coefficient below the rounding error of the subtraction is zero (C A^k B = 0 when a
    # state path skips the output); leaving rounding noise there would add a spurious zero
    # far out in the plane, often in the right half-plane
    noise = 16.0 * (n + 1) * np.finfo(float).eps * (np.abs(closed) + np.abs(den))
    diff = np.where(np.abs(diff) <= noise, 0.0, diff)
    num = poly.add(diff, poly.scale(den, d[:, 0, 0]))
    return Rational(num, den, np.zeros(ctx.samples))


def _pid(ctx: _Ctx, form: Pid, key: str) -> Rational:
    s = ctx.samples
    one = Rational.one(s)

    def filt(tf_key: str) -> Rational:
        assert form.derivative_filter is not None
        tf = ctx.number(form.derivative_filter, f"{key}.{tf_key}")
        if np.any(tf <= 0):
            raise ctx.fail(f"{key}.{tf_key}", "derivative_filter must be > 0 s")
        return Rational(poly.variable(s), np.stack([np.ones(s), tf], axis=1), np.zeros(s))

    if form.form == "parallel":
        total: Rational | None = None
        if form.kp is not None:
            total = ctx.const(form.kp, f"{key}.kp")
        if form.ki is not None:
            ki = ctx.number(form.ki, f"{key}.ki")
            term = Rational(ki[:, None], poly.variable(s), np.zeros(s))
            total = term if total is None else total + term
        if form.kd is not None:
            term = filt("derivative_filter").scaled(ctx.number(form.kd, f"{key}.kd"))
            total = term if total is None else total + term
        assert total is not None
        return total
    assert form.kc is not None
    kc = ctx.number(form.kc, f"{key}.kc")
    total = one
    if form.ti is not None:
        ti = ctx.number(form.ti, f"{key}.ti")
        if np.any(ti <= 0):
            raise ctx.fail(f"{key}.ti", "ti must be > 0 s (omit ti for no integral action)")
        total = total + Rational(np.ones((s, 1)), poly.scale(poly.variable(s), ti), np.zeros(s))
    if form.td is not None:
        total = total + filt("derivative_filter").scaled(ctx.number(form.td, f"{key}.td"))
    return total.scaled(kc)

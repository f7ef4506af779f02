"""Exact stability references in rational arithmetic (sympy): the Routh-Hurwitz criterion
and the Hurwitz determinant condition for imaginary-axis roots.

* Routh-Hurwitz: a real polynomial of degree n with positive leading coefficient has all
  roots in the open left half-plane iff every entry of the first column of its Routh
  array is positive (published criterion; implemented here from its statement).
* Imaginary-axis roots: a real polynomial has a pair of roots summing to zero (in
  particular a pair +-jw) only if its (n-1)-th Hurwitz determinant vanishes (Orlando's
  formula); a root at 0 makes a_0 vanish, and a root through infinity makes a_n vanish. So
  every crossing gain of D + K N is a real root of Delta_{n-1}(K) a_0(K) a_n(K).
"""

from __future__ import annotations

import sympy as sp

S, K = sp.symbols("s K")


def routh_stable(coeffs_desc: list) -> bool:
    """Routh-Hurwitz test in exact arithmetic; a zero in the first column -> not stable."""
    c = [sp.nsimplify(x) for x in coeffs_desc]
    while c and c[0] == 0:
        c = c[1:]
    if c[0] < 0:
        c = [-x for x in c]
    n = len(c)
    if n == 1:
        return True
    width = (n + 1) // 2
    rows = [c[0::2] + [0] * (width - len(c[0::2])), c[1::2] + [0] * (width - len(c[1::2]))]
    for _ in range(n - 2):
        a, b = rows[-2], rows[-1]
        if b[0] == 0:
            return False
        rows.append([(b[0] * a[j + 1] - a[0] * b[j + 1]) / b[0] for j in range(width - 1)]
                    + [0])
    return all(r[0] > 0 for r in rows[:n])


def characteristic(num: sp.Expr, den: sp.Expr) -> sp.Poly:
    """D(s) + K N(s) as a polynomial in s with coefficients polynomial in K."""
    return sp.Poly(sp.expand(den + K * num), S)


def crossing_candidates(num: sp.Expr, den: sp.Expr) -> list[sp.Expr]:
    """Real roots K of Delta_{n-1}(K) * a_0(K) * a_n(K) (exact, sympy)."""
    p = characteristic(num, den)
    a = p.all_coeffs()           # descending: a[0] = a_n
    n = len(a) - 1
    asc = a[::-1]                # asc[k] = coefficient of s^k

    def coef(k: int) -> sp.Expr:
        return asc[k] if 0 <= k <= n else sp.Integer(0)

    size = n - 1
    if size >= 1:
        h = sp.Matrix(size, size, lambda i, j: coef(n - (2 * (j + 1) - (i + 1))))
        delta = sp.expand(h.det())
    else:
        delta = sp.Integer(1)
    prod = sp.Poly(sp.expand(delta * asc[0] * a[0]), K)
    return [r for r in sp.real_roots(prod)] if prod.degree() > 0 else []


def stable_at(num: sp.Expr, den: sp.Expr, k: sp.Rational) -> bool:
    return routh_stable(characteristic(num, den).as_expr().subs(K, k).as_poly(S).all_coeffs())

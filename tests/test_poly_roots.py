"""Batched companion-matrix roots (loopvet.lti.poly.roots / roots_ragged) against mpmath.

Reference: mpmath.polyroots at 50 digits on the same float coefficients.
"""

from __future__ import annotations

import mpmath
import numpy as np

from loopvet.lti import poly


def _mp_roots(c: np.ndarray) -> np.ndarray:
    desc = [mpmath.mpf(float(v)) for v in c[::-1]]
    with mpmath.workdps(50):
        r = mpmath.polyroots(desc, maxsteps=400, extraprec=400)
    return np.array([complex(x) for x in r])


def _match(got: np.ndarray, want: np.ndarray) -> float:
    """Largest relative distance from each reference root to the nearest computed one."""
    return max(float(np.min(np.abs(got - w))) / max(abs(w), 1e-300) if w != 0
               else float(np.min(np.abs(got))) for w in want)


def test_roots_at_zero_are_exact_and_do_not_spoil_the_others():
    # x (x - 1/9) with a rounding-level cubic term -5.29e-14 x^3: a spurious root near
    # -1.77e15; the small roots must stay exact (a 3x3 companion matrix with entries of
    # 1e15 would lose them: about 1e15 * eps absolute error)
    c = np.array([[0.0, 10.392304845413264, -93.53074360871938, -5.290474168462038e-14]])
    r = poly.roots(c)[0]
    assert np.any(r == 0.0)
    want = _mp_roots(c[0, 1:])                    # the non-zero roots
    small = want[np.abs(want) < 1.0]
    assert _match(r, small) <= 1e-12


def test_batch_with_mixed_zero_roots_matches_mpmath():
    rows = np.array([[0.0, 0.0, 2.0, -3.0, 1.0],      # x^2 (x-1)(x-2)
                     [24.0, -50.0, 35.0, -10.0, 1.0],  # (x-1)(x-2)(x-3)(x-4)
                     [0.0, 6.0, 11.0, 6.0, 1.0]])      # x (x+1)(x+2)(x+3)
    got = poly.roots(rows)
    for i, c in enumerate(rows):
        z = int(np.argmax(c != 0))
        assert np.sum(got[i] == 0.0) == z
        assert _match(got[i], _mp_roots(c[z:])) <= 1e-13


def test_ragged_batch_against_mpmath():
    rng = np.random.default_rng(3)
    rows = []
    for deg in (3, 5, 8, 12):
        r = -10 ** rng.uniform(-1, 2, deg)
        rows.append(np.poly(r)[::-1])
    width = max(len(c) for c in rows)
    batch = np.array([np.pad(c, (0, width - len(c))) for c in rows])
    got = poly.roots_ragged(batch)
    for i, c in enumerate(rows):
        g = got[i][np.isfinite(got[i])]
        assert g.size == len(c) - 1
        assert _match(g, _mp_roots(c)) <= 1e-9

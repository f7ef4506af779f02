"""Two equivalent companion matrices, two speeds: LAPACK geev (numpy.linalg.eigvals) on a
stack of companion matrices with the coefficients in the first row (the form of
numpy.roots, used by loopvet.lti.poly.roots) against the form with the coefficients in the
last column. Prints the median time per matrix, the ratio, and the largest relative
difference between the two root sets (both are backward stable; they agree to rounding).

    python benchmarks/companion_forms.py [--samples 257] [--repeats 15]
"""

from __future__ import annotations

import argparse
import statistics
import time

import numpy as np


def _first_row(c: np.ndarray) -> np.ndarray:
    s, width = c.shape
    n = width - 1
    comp = np.zeros((s, n, n))
    comp[:, 0, :] = -(c[:, n - 1::-1] / c[:, n:n + 1])
    idx = np.arange(n - 1)
    comp[:, idx + 1, idx] = 1.0
    return comp


def _last_column(c: np.ndarray) -> np.ndarray:
    s, width = c.shape
    n = width - 1
    comp = np.zeros((s, n, n))
    comp[:, 1:, :-1] = np.eye(n - 1)
    comp[:, :, -1] = -(c[:, :n] / c[:, n:n + 1])
    return comp


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--samples", type=int, default=257)
    ap.add_argument("--repeats", type=int, default=15)
    args = ap.parse_args()
    rng = np.random.default_rng(7)
    print(f"{'order':>5} {'first row us':>13} {'last column us':>15} {'ratio':>6} "
          f"{'max rel. diff':>14}")
    for order in (4, 6, 8, 10, 12, 14):
        # stable real poles and lightly damped pairs spread over three decades (synthetic)
        pairs = order // 3
        reals = order - 2 * pairs
        roots = np.concatenate([
            -10 ** rng.uniform(-1, 2, (args.samples, reals)),
            *(z[:, None] for p in range(pairs)
              for z in (lambda w, zeta: (-zeta * w + 1j * w * np.sqrt(1 - zeta ** 2),
                                         -zeta * w - 1j * w * np.sqrt(1 - zeta ** 2)))(
                  10 ** rng.uniform(-1, 2, args.samples), rng.uniform(0.05, 0.9,
                                                                      args.samples)))],
            axis=1)
        c = np.array([np.poly(r).real[::-1] for r in roots])
        times = {}
        found = {}
        for name, build in (("first", _first_row), ("last", _last_column)):
            mats = build(c)
            ts = []
            for _ in range(args.repeats):
                t0 = time.perf_counter()
                found[name] = np.linalg.eigvals(mats)
                ts.append(time.perf_counter() - t0)
            times[name] = statistics.median(ts) / args.samples * 1e6
        a = np.sort_complex(found["first"])
        b = np.sort_complex(found["last"])
        diff = float(np.max(np.abs(a - b) / np.maximum(np.abs(a), 1e-300)))
        print(f"{order:>5} {times['first']:>13.2f} {times['last']:>15.2f} "
              f"{times['last'] / times['first']:>6.2f} {diff:>14.1e}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

"""Compact curves for the report, computed with the analysis so that renderers only draw.

* :func:`frequency_block`: the open-loop frequency response L(jw) (magnitude in dB, phase
  in degrees, continuous) on FREQUENCY_POINTS log-spaced frequencies, Nyquist points near
  the critical point, and for every gain and phase crossover the curve's own values there
  (where to draw the margin marks).
* :func:`envelope`: the band (lowest and highest value at each time) of the step and load
  responses over up to ENVELOPE_SAMPLES evenly spread sweep samples.
* :func:`scatter`: the swept requirement with the least headroom against the uncertain
  parameter that influences it most (largest absolute rank correlation).

Every number is rounded to 5 significant digits; everything is deterministic.

Notes
-----
The phase is a sum of per-root angles ``arg(jw - z) - arg(jw - p)`` (each continuous in w
by construction), the sign of ``K n_m/d_n`` (0 or -180 deg) and the exact dead-time term
``-w T``; so it never jumps by 360 deg however fast the dead time turns it. Should the
roots be too inaccurate for that sum to agree with ``arg L(jw)`` (to 1 deg), the phase of
the rational part is unwrapped from ``arg L(jw)`` instead.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from ..lti import poly
from ..lti.digital import DigitalLoop
from ..lti.loop import Loop, assemble
from ..record import params
from ..record.model import Record
from ..verdict import headroom_array

#: log-spaced frequencies of the stored frequency response
FREQUENCY_POINTS = 300
#: frequencies tried for the Nyquist points; those with |L| <= NYQUIST_RADIUS are kept
NYQUIST_POINTS = 900
NYQUIST_RADIUS = 6.0
NYQUIST_KEEP = 500
#: sweep samples simulated for the response envelope (evenly spread over the plan)
ENVELOPE_SAMPLES = 12
#: step budget of each envelope response: the band is drawn at the nominal response's ~400
#: display points, so a grid of twice as many steps over the horizon is ample. Without dead time
#: the simulation is exact at its steps whatever the step; with dead time the hold error is
#: O(h^2) (see :mod:`loopvet.analysis.time`), invisible at display resolution.
ENVELOPE_STEPS = 800
#: points kept in the sweep scatter
SCATTER_POINTS = 400


def r5(x: float) -> float | None:
    """``x`` to 5 significant digits; NaN -> None (infinities stay, the results writer
    spells them)."""
    x = float(x)
    if math.isnan(x):
        return None
    return x if math.isinf(x) else float(f"{x:.5g}")


def _r5s(values: Any) -> list[float | None]:
    """:func:`r5` of every value (one %-format of the whole array when all are finite:
    the same digits as the per-value path, several times faster)."""
    arr = np.asarray(values, dtype=np.float64).ravel()
    if arr.size and np.all(np.isfinite(arr)):
        text = ("%.5g " * arr.size) % tuple(arr.tolist())
        return [float(t) for t in text.split()]
    return [r5(v) for v in arr.tolist()]


def _pairs(items: list[list[float]]) -> np.ndarray:
    return np.array([complex(re, im) for re, im in items], dtype=complex)


def _span(loop: Loop, roots: np.ndarray, marks: list[float], first_pc: float | None
          ) -> tuple[float, float]:
    """Frequency window: 20 times beyond the corner frequencies and crossovers, at most
    six decades, and for dead time at most one delay turn past the crossovers."""
    corners = [abs(r) for r in roots if abs(r) > 0] + [w for w in marks if w > 0]
    if first_pc:
        corners.append(first_pc)
    if not corners:
        corners = [1.0]
    lo, hi = min(corners) / 20.0, max(corners) * 20.0
    delay = float(loop.delay[0])
    focus = [w for w in marks if w > 0] + ([first_pc] if first_pc else [])
    if delay > 0:
        hi = min(hi, max([10.0 * max(focus, default=0.0), 2.0 * math.pi / delay]))
    centre = math.exp(float(np.mean(np.log(focus)))) if focus else math.sqrt(lo * hi)
    lo, hi = max(lo, centre / 1e3), min(hi, centre * 1e3)
    if not hi > lo:
        lo, hi = centre / 100.0, centre * 100.0
    return lo, hi


def _phase(loop: Loop, zeros: np.ndarray, poles: np.ndarray, w: np.ndarray) -> np.ndarray:
    """Continuous phase of L(jw) in degrees (see the module notes); ``w`` ascending."""
    s = 1j * w
    rational = np.zeros_like(w)
    for z in zeros:
        rational += np.unwrap(np.angle(s - z))
    for p in poles:
        rational -= np.unwrap(np.angle(s - p))
    n, d = loop.n[:1], loop.d[:1]
    lead = n[0, int(poly.effective_degree(n)[0])] / d[0, int(poly.effective_degree(d)[0])]
    sign = 0.0 if lead * float(loop.gain[0]) > 0 else -math.pi
    rational = rational + sign
    exact = np.angle(loop.gain[0] * poly.evaluate(n, s)[0] / poly.evaluate(d, s)[0])
    miss = np.angle(np.exp(1j * (exact - rational)))
    if np.max(np.abs(miss), initial=0.0) > math.radians(1.0):
        rational = np.unwrap(exact)
    return np.degrees(rational - w * float(loop.delay[0]))


def frequency_block(loop: Loop, locus: dict[str, Any], frequency: dict[str, Any]
                    ) -> dict[str, Any]:
    """``frequency`` (crossovers of the results) with ``response``, ``nyquist`` and, on every
    crossover, the curve's values there: ``phase_deg`` and ``critical_phase_deg`` (the odd
    multiple of 180 deg nearest to it) and ``margin_deg`` (the phase from there to the
    curve, the lag wrapped into (-180, 180]) for gain crossovers, ``magnitude_db`` and
    ``phase_deg`` for phase crossovers."""
    poles = _pairs(locus.get("open_loop_poles", []))
    zeros = _pairs(locus.get("open_loop_zeros", []))
    gc = [dict(c) for c in frequency.get("gain_crossovers", [])]
    pc = [dict(c) for c in frequency.get("phase_crossovers", [])]
    marks = [c["frequency"] for c in gc]
    lo, hi = _span(loop, np.concatenate([poles, zeros]), marks,
                   pc[0]["frequency"] if pc else None)
    extra = [c["frequency"] for c in gc + pc if lo <= c["frequency"] <= hi]
    w = np.unique(np.concatenate([np.geomspace(lo, hi, FREQUENCY_POINTS), extra]))
    value = loop.open_loop(1j * w)[0]
    phase = _phase(loop, zeros, poles, w)
    return _annotated(frequency, gc, pc, w, value, phase, _nyquist(loop, lo, hi, marks))


def digital_frequency_block(loop: DigitalLoop, frequency: dict[str, Any]) -> dict[str, Any]:
    """:func:`frequency_block` for a sampled loop: L(e^{jwT}) = K N(z)/D(z) on the unit
    circle from 1/1000 of the lowest crossover up to the Nyquist frequency pi/T (the phase
    unwrapped along that dense grid)."""
    gc = [dict(c) for c in frequency.get("gain_crossovers", [])]
    pc = [dict(c) for c in frequency.get("phase_crossovers", [])]
    nyq = math.pi / loop.period
    marks = [c["frequency"] for c in gc + pc if 0 < c["frequency"] < nyq]
    lo = min(marks + [nyq]) / 1000.0

    def at(w: np.ndarray) -> np.ndarray:
        z = np.exp(1j * w * loop.period)
        return (loop.gain[0] * poly.evaluate(loop.nz[:1], z) / poly.evaluate(loop.dz[:1], z))[0]

    w = np.unique(np.concatenate([np.geomspace(lo, nyq * (1 - 1e-9), FREQUENCY_POINTS),
                                  marks]))
    value = at(w)
    phase = np.degrees(np.unwrap(np.angle(value)))
    wn = np.unique(np.concatenate([np.geomspace(lo, nyq * (1 - 1e-9), NYQUIST_POINTS), marks]))
    return _annotated(frequency, gc, pc, w, value, phase, _nyquist_points(wn, at(wn)))


def _annotated(frequency: dict[str, Any], gc: list[dict[str, Any]], pc: list[dict[str, Any]],
               w: np.ndarray, value: np.ndarray, phase: np.ndarray,
               nyquist: dict[str, Any]) -> dict[str, Any]:
    with np.errstate(divide="ignore"):
        mag = 20.0 * np.log10(np.abs(value))
    at = {float(x): i for i, x in enumerate(w)}
    for c in gc:
        i = at.get(float(c["frequency"]))
        if i is not None:
            ph = float(phase[i])
            c["phase_deg"] = r5(ph)
            lag = c["lag_deg"] if c["lag_deg"] <= 180.0 else c["lag_deg"] - 360.0
            c["critical_phase_deg"] = -180.0 + 360.0 * round((ph - lag + 180.0) / 360.0)
            c["margin_deg"] = r5(lag)
    for c in pc:
        i = at.get(float(c["frequency"]))
        if i is not None:
            c["magnitude_db"], c["phase_deg"] = r5(mag[i]), r5(phase[i])
    return {**frequency, "gain_crossovers": gc, "phase_crossovers": pc,
            "response": {"w": _r5s(w), "magnitude_db": _r5s(mag), "phase_deg": _r5s(phase)},
            "nyquist": nyquist}


def _nyquist(loop: Loop, lo: float, hi: float, marks: list[float]) -> dict[str, Any]:
    w = np.unique(np.concatenate([np.geomspace(lo / 10.0, hi, NYQUIST_POINTS), marks]))
    return _nyquist_points(w, loop.open_loop(1j * w)[0])


def _nyquist_points(w: np.ndarray, value: np.ndarray) -> dict[str, Any]:
    """L at ascending w > 0 where |L| <= NYQUIST_RADIUS, with one point beyond each edge so
    the curve runs out of the view; at most NYQUIST_KEEP points."""
    near = np.abs(value) <= NYQUIST_RADIUS
    keep = near | np.roll(near, 1) | np.roll(near, -1)
    idx = np.nonzero(keep)[0]
    if idx.size > NYQUIST_KEEP:
        idx = idx[np.unique(np.linspace(0, idx.size - 1, NYQUIST_KEEP).round().astype(int))]
    return {"w": _r5s(w[idx]), "re": _r5s(value.real[idx]), "im": _r5s(value.imag[idx])}


def _interp(t: np.ndarray, tt: np.ndarray, yy: np.ndarray, final: float) -> np.ndarray:
    return np.interp(t, tt, yy, right=final)


def envelope(record: Record, plan: Any, responses: dict[str, Any]) -> dict[str, Any] | None:
    """Lowest and highest step and load responses over evenly spread sweep samples, on the
    nominal responses' time points (unstable samples are left out and counted)."""
    from .evaluate import evaluate
    from .time import step_response

    if not responses or plan.samples < 2:
        return None
    idx = np.unique(np.linspace(0, plan.samples - 1, min(plan.samples, ENVELOPE_SAMPLES))
                    .round().astype(int))
    values = params.values(record, idx.size, {k: v[idx] for k, v in plan.values.items()})
    loop = assemble(record, values, idx.size, gain=plan.gains[idx])
    stable = np.nonzero(evaluate(loop, pade=record.pade_order, keys=(), time=False).stable)[0]
    out: dict[str, Any] = {"samples": int(idx.size), "unstable": int(idx.size - stable.size)}
    if stable.size == 0:
        return out
    for kind, m in (("reference", loop.reference()), ("load", loop.load())):
        if kind not in responses:
            continue
        t = np.asarray(responses[kind]["t"], dtype=float)
        sub = m.rows(stable)
        r = step_response(sub, horizon=np.array([t[-1]]) if t[-1] > 0 else None, points=300,
                          max_steps=ENVELOPE_STEPS)
        ys = np.array([_interp(t, r.t[i], r.y[i], float(r.final[i]))
                       for i in range(stable.size)])
        out[kind] = {"t": _r5s(t), "low": _r5s(ys.min(axis=0)), "high": _r5s(ys.max(axis=0))}
    return out


def _ranks(x: np.ndarray) -> np.ndarray:
    order = np.argsort(x, kind="stable")
    ranks = np.empty(x.size)
    ranks[order] = np.arange(x.size)
    return ranks


def scatter(plan: Any, metrics: dict[str, np.ndarray], reqs: list[Any]) -> dict[str, Any] | None:
    """The swept requirement with the least headroom, its values per sample against the
    axis (uncertain parameter, or K) with the largest absolute Spearman rank correlation."""
    best = None
    for req in reqs:
        if req.key not in metrics:
            continue
        h = headroom_array(metrics[req.key], req)
        if best is None or float(h.min()) < best[0]:
            best = (float(h.min()), req, int(np.argmin(h)))
    if best is None:
        return None
    _, req, worst = best
    y = np.asarray(metrics[req.key], dtype=float)
    axes = dict(plan.values)
    if "K" in plan.names:
        axes["K"] = plan.gains
    ok = np.isfinite(y)
    influence: dict[str, float] = {}
    for name, x in axes.items():
        xs, ys = np.asarray(x, dtype=float)[ok], y[ok]
        rho = 0.0
        if xs.size > 2 and np.ptp(xs) > 0 and np.ptp(ys) > 0:
            rho = float(np.corrcoef(_ranks(xs), _ranks(ys))[0, 1])
        influence[name] = r5(abs(rho)) or 0.0
    if not influence:
        return None
    param = max(influence, key=lambda k: influence[k])
    x = np.asarray(axes[param], dtype=float)
    idx = np.unique(np.concatenate([np.linspace(0, x.size - 1, min(x.size, SCATTER_POINTS))
                                    .round().astype(int), [0, worst]]))
    return {"key": req.key, "bound": dict(req.bound), "parameter": param,
            "influence": influence, "x": _r5s(x[idx]), "y": _r5s(y[idx]),
            "nominal": [r5(x[0]), r5(y[0])], "worst": [r5(x[worst]), r5(y[worst])]}

"""Every metric of the requirement table for a batch of loops (samples on the first axis).

Used for the nominal loop (one sample), for the worst case over the gain range (one sample
per gain) and for parameter sweeps (one sample per parameter point). Gain intervals are
exact (root-locus crossings); pole metrics use the closed-loop poles (Pade for dead time);
frequency metrics treat dead time exactly; time metrics simulate it exactly.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..lti import poly
from ..lti.loop import ClosedLoopMap, Loop
from . import frequency as fq
from .delay import delay_gain_intervals
from .gain import GainIntervals, gain_margins, stable_gain_intervals
from .poles import closed_loop_poles, pole_metrics
from .time import StepResponse, disturbance_metrics, step_metrics, step_response

FREQUENCY_KEYS = ("phase_margin_deg", "delay_margin_s", "sensitivity_peak",
                  "complementary_sensitivity_peak", "control_sensitivity_peak",
                  "crossover_frequency", "bandwidth")
TIME_KEYS = ("overshoot_pct", "undershoot_pct", "rise_time_s", "settling_time_s",
             "steady_state_error", "disturbance_peak", "disturbance_iae")


@dataclass(frozen=True, slots=True)
class Evaluation:
    """Metrics per sample (NaN where a metric does not exist) and what they came from."""

    metrics: dict[str, np.ndarray]
    stable: np.ndarray
    intervals: list[GainIntervals]
    crossovers: list[list[fq.Crossover]]
    poles: np.ndarray
    pade_order: int | None
    reference: StepResponse | None = None
    load: StepResponse | None = None
    grid: np.ndarray = field(default_factory=lambda: np.zeros(0))


def intervals_of(loop: Loop, gains_of_interest: np.ndarray) -> list[GainIntervals]:
    if loop.has_delay:
        return delay_gain_intervals(loop.n, loop.d, loop.delay, gains_of_interest)
    return stable_gain_intervals(loop.n, loop.d)


def evaluate(loop: Loop, *, pade: int | None, band: float = 0.02,
             gains_of_interest: np.ndarray | None = None, time: bool = True,
             intervals: list[GainIntervals] | None = None) -> Evaluation:
    """All metrics for every sample of ``loop`` (its own gain per sample)."""
    s = loop.samples
    goi = gains_of_interest if gains_of_interest is not None else loop.gain[:, None]
    ivs = intervals if intervals is not None else intervals_of(loop, goi)
    stable = np.array([iv.interval_containing(float(k)) is not None
                       for iv, k in zip(ivs, loop.gain, strict=True)])
    out: dict[str, np.ndarray] = {}
    gm = np.array([gain_margins(iv, float(k)) for iv, k in zip(ivs, loop.gain, strict=True)],
                  dtype=object).reshape(s, 2)
    out["gain_margin_db"] = _num(gm[:, 0])
    out["gain_reduction_margin_db"] = _num(gm[:, 1])
    ps = closed_loop_poles(loop, order=pade)
    out |= pole_metrics(ps.poles)
    cross = fq.gain_crossovers(loop)
    lags = fq.lags(loop, cross)
    pm = np.full(s, np.nan)
    dm = np.full(s, np.nan)
    wc = np.full(s, np.nan)
    for i in range(s):
        p, d = fq.margins(lags[i], bool(stable[i]))
        pm[i] = np.nan if p is None else p
        dm[i] = np.nan if d is None else d
        wc[i] = max(cross[i]) if cross[i] else np.nan
    out["phase_margin_deg"], out["delay_margin_s"], out["crossover_frequency"] = pm, dm, wc
    extra = sorted({w for c in cross for w in c})
    grid = fq.frequency_grid(loop, extra, ps.poles)
    sens, comp, ctrl = loop.sensitivity(), loop.complementary(), loop.control()
    unstable = ~stable
    for key, m in (("sensitivity_peak", sens), ("complementary_sensitivity_peak", comp),
                   ("control_sensitivity_peak", ctrl)):
        v = fq.peak(m, grid)
        out[key] = np.where(unstable, np.nan, v)
    out["bandwidth"] = np.where(unstable, np.nan, fq.bandwidth(loop.reference(), grid))
    ref = load = None
    if time:
        ref, load = _responses(loop, stable)
        if ref is not None and load is not None:
            sm = step_metrics(ref, band=band)
            dmx = disturbance_metrics(load)
            for key in TIME_KEYS:
                src = sm if key in sm else dmx
                out[key] = _scatter(src[key], stable, s)
        else:
            for key in TIME_KEYS:
                out[key] = np.full(s, np.nan)
    return Evaluation(metrics=out, stable=stable, intervals=ivs, crossovers=lags,
                      poles=ps.poles, pade_order=ps.pade_order, reference=ref, load=load,
                      grid=grid)


def _num(col: np.ndarray) -> np.ndarray:
    return np.array([np.nan if v is None else float(v) for v in col])


def _scatter(values: np.ndarray, stable: np.ndarray, s: int) -> np.ndarray:
    out = np.full(s, np.nan)
    out[np.nonzero(stable)[0]] = values
    return out


def _subset(m: ClosedLoopMap, idx: np.ndarray) -> ClosedLoopMap:
    return ClosedLoopMap(p=m.p[idx], tau=m.tau[idx], a=m.a[idx], b=m.b[idx], delay=m.delay[idx])


def _responses(loop: Loop, stable: np.ndarray) -> tuple[StepResponse | None,
                                                        StepResponse | None]:
    """Step responses of the stable samples only (an unstable loop is never simulated)."""
    idx = np.nonzero(stable)[0]
    if idx.size == 0:
        return None, None
    ref = step_response(_subset(loop.reference(), idx))
    load = step_response(_subset(loop.load(), idx))
    return ref, load


def char_degree(loop: Loop) -> int:
    return int(poly.effective_degree(loop.characteristic()).max())

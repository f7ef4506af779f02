"""Every metric of the requirement table for a batch of loops (samples on the first axis).

Used for the nominal loop (one sample), for the worst case over the gain range (one sample
per gain) and for parameter sweeps (one sample per parameter point). Gain intervals are
exact (root-locus crossings); pole metrics use the closed-loop poles (Pade for dead time);
frequency metrics treat dead time exactly; time metrics simulate it exactly.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np

from ..lti import poly
from ..lti.loop import Loop
from ..lti.loop import rows as loop_rows
from ..metrics import METRICS
from . import frequency as fq
from .delay import delay_crossing_arrays, delay_stability_margins
from .gain import GainIntervals, crossing_arrays, gain_margins, margins_at
from .poles import closed_loop_poles, is_stable, pole_metrics
from .time import StepResponse, disturbance_metrics, step_metrics, step_response

FREQUENCY_KEYS = ("phase_margin_deg", "delay_margin_s", "sensitivity_peak",
                  "complementary_sensitivity_peak", "control_sensitivity_peak",
                  "crossover_frequency", "bandwidth")
TIME_KEYS = ("overshoot_pct", "undershoot_pct", "rise_time_s", "settling_time_s",
             "steady_state_error", "disturbance_peak", "disturbance_iae")
ALL_KEYS = tuple(METRICS)


GAIN_KEYS = ("gain_margin_db", "gain_reduction_margin_db")
PEAK_KEYS = ("sensitivity_peak", "complementary_sensitivity_peak", "control_sensitivity_peak")


@dataclass(frozen=True, slots=True)
class Evaluation:
    """Metrics per sample (NaN where a metric does not exist) and what they came from.

    ``crossover_w``/``crossover_lag``: gain crossovers and their lags (S, M), NaN-padded;
    ``intervals``: per-sample stable gain intervals when they were computed (dead time, or
    given by the caller), else None (delay-free batches use the crossing arrays directly);
    ``undecided``: per sample, the frequency intervals the dead-time crossing search left
    undecided (0 normally, and for delay-free samples).
    """

    metrics: dict[str, np.ndarray]
    stable: np.ndarray
    intervals: list[GainIntervals] | None
    crossover_w: np.ndarray
    crossover_lag: np.ndarray
    poles: np.ndarray
    pade_order: int | None
    reference: StepResponse | None = None
    load: StepResponse | None = None
    undecided: np.ndarray | None = None

    def crossovers(self, i: int) -> list[fq.Crossover]:
        """Sample ``i``'s gain crossovers with their lags, by frequency."""
        keep = np.isfinite(self.crossover_w[i])
        return [fq.Crossover(frequency=float(w), lag_deg=float(lag)) for w, lag in
                zip(self.crossover_w[i][keep], self.crossover_lag[i][keep], strict=True)]


def evaluate(loop: Loop, *, pade: int | None, band: float = 0.02,
             gains_of_interest: np.ndarray | None = None, time: bool = True,
             intervals: list[GainIntervals] | None = None,
             keys: Iterable[str] | None = None) -> Evaluation:
    """Metrics for every sample of ``loop`` (its own gain per sample), batched.

    ``keys``: the metrics wanted (default: every metric of the requirement table); only
    what they need is computed, so a sweep pays for its swept requirements only. Stability
    comes from ``intervals`` when given, else per sample from the batched exact dead-time
    analysis (samples with dead time) or from the closed-loop poles (delay-free samples; the
    gain margins then use the nearest crossing gains, see :func:`gain.margins_at`).
    Every step is vectorised over the samples.
    """
    s = loop.samples
    want = set(ALL_KEYS if keys is None else keys)
    ps = closed_loop_poles(loop, order=pade)
    out: dict[str, np.ndarray] = {}
    if intervals is not None:
        stable = np.array([iv.interval_containing(float(k)) is not None
                           for iv, k in zip(intervals, loop.gain, strict=True)], dtype=bool)
        undecided = np.array([iv.undecided for iv in intervals], dtype=np.int64)
        if want & set(GAIN_KEYS):
            gm = np.array([gain_margins(iv, float(k)) for iv, k in
                           zip(intervals, loop.gain, strict=True)], dtype=object).reshape(s, 2)
            out["gain_margin_db"] = _num(gm[:, 0])
            out["gain_reduction_margin_db"] = _num(gm[:, 1])
    else:
        goi = gains_of_interest if gains_of_interest is not None else loop.gain[:, None]
        stable, rise, fall, undecided = _stability(loop, ps.poles, goi,
                                                   bool(want & set(GAIN_KEYS)))
        if want & set(GAIN_KEYS):
            out["gain_margin_db"], out["gain_reduction_margin_db"] = rise, fall
    out |= pole_metrics(ps.poles)
    unstable = ~stable
    freq_keys = want & set(FREQUENCY_KEYS)
    cross_w = np.zeros((s, 0))
    cross_lag = np.zeros((s, 0))
    if freq_keys:
        cross_w = fq.crossover_array(loop)
        cross_lag = fq.lag_array(loop, cross_w)
        out["phase_margin_deg"], out["delay_margin_s"], out["crossover_frequency"] = \
            fq.margin_arrays(cross_w, cross_lag, stable)
    if freq_keys & {*PEAK_KEYS, "bandwidth"}:
        wanted = [k for k in (*PEAK_KEYS, "bandwidth") if k in want]
        _peaks(loop, cross_w, ps.poles, wanted, out)
        for key in wanted:
            out[key] = np.where(unstable, np.nan, out[key])
    ref = load = None
    if time and want & set(TIME_KEYS):
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
    return Evaluation(metrics=out, stable=stable, intervals=intervals, crossover_w=cross_w,
                      crossover_lag=cross_lag, poles=ps.poles, pade_order=ps.pade_order,
                      reference=ref, load=load, undecided=undecided)


def _stability(loop: Loop, poles: np.ndarray, goi: np.ndarray, margins: bool
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """(stable, gain_margin_db, gain_reduction_margin_db, undecided) per sample without building
    per-sample interval objects: delay-free samples from the closed-loop poles and the
    nearest crossing gains, samples with dead time from the batched exact analysis."""
    s = loop.samples
    stable = np.zeros(s, dtype=bool)
    rise = np.full(s, np.nan)
    fall = np.full(s, np.nan)
    undecided = np.zeros(s, dtype=np.int64)
    dead = loop.delay > 0
    free = np.nonzero(~dead)[0]
    if free.size:
        stable[free] = is_stable(poles[free])
        if margins:
            gains, _ = crossing_arrays(loop.n[free], loop.d[free])
            rise[free], fall[free] = margins_at(gains, loop.gain[free], stable[free])
    idx = np.nonzero(dead)[0]
    if idx.size:
        arrays = delay_crossing_arrays(loop.n[idx], loop.d[idx], loop.delay[idx], goi[idx])
        stable[idx], rise[idx], fall[idx] = delay_stability_margins(arrays, loop.gain[idx])
        undecided[idx] = arrays.undecided
    return stable, rise, fall, undecided


#: samples per block of the bandwidth search for loops with dead time, whose frequency sets
#: hold a linear ripple grid of up to 40 000 points (memory bound; the peak search bounds
#: its own blocks by points, see :func:`frequency.peak`)
DELAY_BLOCK = 128


def _peaks(loop: Loop, cross_w: np.ndarray, poles: np.ndarray, keys: list[str],
           out: dict[str, np.ndarray]) -> None:
    """Peaks and bandwidth into ``out`` (the bandwidth in row blocks for loops with dead
    time)."""
    s = loop.samples
    grid = fq.sample_grid(loop, cross_w, poles)
    maps = {"sensitivity_peak": loop.sensitivity,
            "complementary_sensitivity_peak": loop.complementary,
            "control_sensitivity_peak": loop.control}
    for key in keys:
        if key != "bandwidth":
            out[key] = fq.peak(maps[key](), grid)
            continue
        step = DELAY_BLOCK if loop.has_delay else max(s, 1)
        out[key] = np.full(s, np.nan)
        for start in range(0, s, step):
            blk = slice(start, min(start + step, s))
            sub = loop_rows(loop, blk) if step < s else loop
            out[key][blk] = fq.bandwidth(sub.reference(), grid[blk])


def _num(col: np.ndarray) -> np.ndarray:
    return np.array([np.nan if v is None else float(v) for v in col])


def _scatter(values: np.ndarray, stable: np.ndarray, s: int) -> np.ndarray:
    out = np.full(s, np.nan)
    out[np.nonzero(stable)[0]] = values
    return out


def _responses(loop: Loop, stable: np.ndarray) -> tuple[StepResponse | None,
                                                        StepResponse | None]:
    """Step responses of the stable samples only (an unstable loop is never simulated)."""
    idx = np.nonzero(stable)[0]
    if idx.size == 0:
        return None, None
    ref = step_response(loop.reference().rows(idx))
    load = step_response(loop.load().rows(idx))
    return ref, load


def char_degree(loop: Loop) -> int:
    return int(poly.effective_degree(loop.characteristic()).max())

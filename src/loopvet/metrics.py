"""The catalogue of metrics a record can require: bound sides, better direction, units.

One place for what the record format's requirement table says, used by the validator,
the verdicts, the baseline drift rules and the reports.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True, kw_only=True, slots=True)
class MetricInfo:
    key: str
    label: str
    unit: str
    bounds: tuple[str, ...]   # which bound sides the requirement table allows
    family: str               # gain | pole | frequency | time
    better: str               # "higher" | "lower" | "" (two-sided)


def _m(key: str, label: str, unit: str, bounds: tuple[str, ...], family: str) -> MetricInfo:
    better = "higher" if bounds == ("min",) else "lower" if bounds == ("max",) else ""
    return MetricInfo(key=key, label=label, unit=unit, bounds=bounds, family=family,
                      better=better)


METRICS: dict[str, MetricInfo] = {m.key: m for m in (
    _m("gain_margin_db", "gain margin (rise)", "dB", ("min",), "gain"),
    _m("gain_reduction_margin_db", "gain margin (reduction)", "dB", ("min",), "gain"),
    _m("phase_margin_deg", "phase margin", "deg", ("min",), "frequency"),
    _m("delay_margin_s", "delay margin", "s", ("min",), "frequency"),
    _m("sensitivity_peak", "sensitivity peak Ms", "", ("max",), "frequency"),
    _m("complementary_sensitivity_peak", "complementary sensitivity peak Mt", "", ("max",),
       "frequency"),
    _m("control_sensitivity_peak", "control sensitivity peak", "", ("max",), "frequency"),
    _m("crossover_frequency", "gain crossover frequency", "rad/s", ("min", "max"), "frequency"),
    _m("bandwidth", "closed-loop bandwidth", "rad/s", ("min", "max"), "frequency"),
    _m("damping_ratio", "smallest damping ratio", "", ("min",), "pole"),
    _m("decay_rate", "slowest decay rate", "1/s", ("min",), "pole"),
    _m("natural_frequency", "largest natural frequency", "rad/s", ("max",), "pole"),
    _m("overshoot_pct", "overshoot", "%", ("max",), "time"),
    _m("undershoot_pct", "undershoot", "%", ("max",), "time"),
    _m("rise_time_s", "rise time 10-90 %", "s", ("max",), "time"),
    _m("settling_time_s", "settling time", "s", ("max",), "time"),
    _m("steady_state_error", "steady-state error", "", ("max",), "time"),
    _m("disturbance_peak", "load-disturbance peak", "", ("max",), "time"),
    _m("disturbance_iae", "load-disturbance IAE", "", ("max",), "time"),
)}

STABILITY = "stability"
REQUIREMENT_KEYS: tuple[str, ...] = (STABILITY, *METRICS)
POLE_KEYS: tuple[str, ...] = tuple(k for k, m in METRICS.items() if m.family == "pole")

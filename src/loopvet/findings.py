"""The catalogue of findings: small frozen values with fixed message templates.

A finding is something a reviewer should know about a loop that is not a requirement
verdict: a doubtful-but-computed result, an approximation used, a cancelled mode.
Renderers print ``message`` as it is; they never compose their own.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

Severity = Literal["info", "warning", "error"]


@dataclass(frozen=True, kw_only=True, slots=True)
class Finding:
    kind: str
    severity: Severity
    message: str
    key: str = ""

    def to_json(self) -> dict[str, str]:
        out = {"kind": self.kind, "severity": self.severity, "message": self.message}
        if self.key:
            out["key"] = self.key
        return out


def _c(z: complex) -> str:
    return f"{z.real:.6g}" if z.imag == 0 else f"{z.real:.6g}{z.imag:+.6g}j"


def near_cancellation(pole: complex, zero: complex, pole_block: str, zero_block: str,
                      distance: float) -> Finding:
    where = (f"the {pole_block}" if pole_block == zero_block
             else f"the {pole_block} pole and {zero_block} zero")
    risk = ("; the pole is unstable, so the loop is internally unstable whatever the gain"
            if pole.real >= 0 else
            "; that mode stays in the closed loop and shows in the load-disturbance response")
    return Finding(kind="near_cancellation", severity="warning",
                   message=f"pole {_c(pole)} nearly cancels zero {_c(zero)} in {where} "
                           f"(distance {distance:.3g}){risk}")


def pade_used(delay: float, order: int, chosen: bool) -> Finding:
    how = "chosen by loopvet from the delay and the loop's fastest dynamics" if chosen \
        else "set by delay_approximation"
    return Finding(kind="pade_approximation", severity="info",
                   message=f"dead time {delay:.6g} s: closed-loop poles use a Pade "
                           f"approximation of order {order} ({how})")


def unstable(count: int, pade_order: int | None) -> Finding:
    note = f" (with the order-{pade_order} Pade approximation of the dead time)" \
        if pade_order else ""
    return Finding(kind="unstable", severity="error", key="stability",
                   message=f"the closed loop is unstable at the nominal gain: {count} "
                           f"closed-loop pole(s) on or right of the imaginary axis{note}")


def metric_undefined(key: str, reason: str) -> Finding:
    return Finding(kind="metric_undefined", severity="warning", key=key,
                   message=f"{key} cannot be evaluated: {reason}")


def ill_posed(message: str) -> Finding:
    return Finding(kind="ill_posed", severity="error", message=message)


def pade_disagrees(order: int, exact_stable: bool) -> Finding:
    exact = "stable" if exact_stable else "unstable"
    approx = "unstable" if exact_stable else "stable"
    return Finding(kind="pade_disagrees", severity="warning", key="stability",
                   message=f"the exact dead-time analysis finds the loop {exact} but the "
                           f"order-{order} Pade model is {approx}; pole-based metrics are "
                           "doubtful: raise delay_approximation.pade")


def fixed_axis_pole() -> Finding:
    return Finding(kind="fixed_axis_pole", severity="error", key="stability",
                   message="a pole on the imaginary axis is cancelled by a zero of the loop: "
                           "it stays a closed-loop pole for every gain, so no gain stabilises "
                           "the loop")


def gain_search_bound(bound: float) -> Finding:
    return Finding(kind="gain_search_bound", severity="info",
                   message=f"dead time: crossings were searched for |K| up to {bound:.6g}, "
                           "which bounds every reported interval; beyond it only "
                           "destabilising crossings occur")


def crossing_search_undecided(intervals: int, samples: int = 1, of: int = 1) -> Finding:
    where = "" if of == 1 else f" in {samples} of {of} sweep samples"
    return Finding(kind="crossing_search_undecided", severity="warning",
                   message=f"dead time: the crossing search left {intervals} frequency "
                           f"interval(s) undecided{where} (still unresolved at 2^-40 of "
                           "their frequency); a crossing of the imaginary axis there cannot "
                           "be excluded, so stability and gain margins are not proven for "
                           "them; check the loop (a root of N or D very near the axis?)")


def response_truncated() -> Finding:
    return Finding(kind="response_truncated", severity="warning",
                   message="the step-response simulation reached its step budget before the "
                           "response settled; time metrics may be less accurate than 0.2 %")


def classic_gain_margin_differs(classic_db: float, exact_db: float) -> Finding:
    c = "inf" if math.isinf(classic_db) else f"{classic_db:.4g} dB"
    return Finding(kind="classic_gain_margin_differs", severity="info", key="gain_margin_db",
                   message=f"the classic phase-crossover gain margin ({c}) differs from the "
                           f"stability-interval margin ({exact_db:.4g} dB): with several "
                           "phase crossovers, open-loop unstable poles or a conditionally "
                           "stable loop, only the interval says how far K may rise")


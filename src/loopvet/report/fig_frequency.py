"""Frequency response (magnitude and phase) and Nyquist figures, drawn from a design's
``frequency`` results block (curve, crossovers and the curve's values at them), its
``sensitivity_peak`` and the approved design's curves in ``baseline.curves``."""

from __future__ import annotations

from typing import Any

from matplotlib.figure import Figure
from matplotlib.patches import Circle
from matplotlib.ticker import LogLocator, MultipleLocator, NullFormatter

from .figures import (
    APPROVED_LINE,
    BOUND_LINE,
    CURRENT_LINE,
    GUIDE_LINE,
    INK,
    LABEL_BOX,
    PLUM,
    floats,
    render,
)
from .view import as_float

#: Nyquist view around the critical point -1 (equal scales)
NYQUIST_VIEW = ((-2.6, 1.3), (-1.9, 1.9))


def _approved(d: dict[str, Any]) -> dict[str, Any]:
    return ((d.get("baseline") or {}).get("curves") or {})


def _labels(d: dict[str, Any]) -> tuple[str, str]:
    rev = _approved(d).get("revision")
    return f"current r{d.get('revision')}", f"approved r{rev}"


def frequency_figure(d: dict[str, Any]) -> dict[str, str] | None:
    freq = d.get("frequency") or {}
    resp = freq.get("response")
    if not resp or not resp.get("w"):
        return None
    old = _approved(d).get("frequency", {}).get("response")
    now_label, old_label = _labels(d)

    def draw(fig: Figure) -> bool:
        mag, ph = fig.subplots(2, 1, sharex=True)
        w = floats(resp["w"])
        if old:
            mag.semilogx(floats(old["w"]), floats(old["magnitude_db"]), **APPROVED_LINE,
                         label=old_label)
            ph.semilogx(floats(old["w"]), floats(old["phase_deg"]), **APPROVED_LINE)
        mag.semilogx(w, floats(resp["magnitude_db"]), **CURRENT_LINE, label=now_label)
        ph.semilogx(w, floats(resp["phase_deg"]), **CURRENT_LINE)
        mag.axhline(0.0, **GUIDE_LINE)
        lo, hi = w[0], w[-1]
        for c in freq.get("gain_crossovers", []):
            if "critical_phase_deg" not in c or not lo <= c["frequency"] <= hi:
                continue
            wc, crit, phase = c["frequency"], c["critical_phase_deg"], c["phase_deg"]
            mag.plot([wc], [0.0], marker="o", color=INK, markersize=5, linestyle="none")
            ph.axhline(crit, **BOUND_LINE)
            ph.annotate("", xy=(wc, phase), xytext=(wc, crit),
                        arrowprops={"arrowstyle": "->", "color": PLUM, "lw": 1.3})
            ph.annotate(f"phase margin {c['margin_deg']:.1f}°", xy=(wc, (phase + crit) / 2),
                        xytext=(6, 0), textcoords="offset points", color=PLUM,
                        va="center", fontsize=8, bbox=LABEL_BOX)
        shown = 0
        for c in freq.get("phase_crossovers", []):
            if ("magnitude_db" not in c or not lo <= c["frequency"] <= hi or shown == 2
                    or abs(c["gain_factor_db"]) > 40.0):
                continue
            shown += 1
            wp, m = c["frequency"], c["magnitude_db"]
            mag.annotate("", xy=(wp, 0.0), xytext=(wp, m),
                         arrowprops={"arrowstyle": "->", "color": PLUM, "lw": 1.3})
            mag.annotate(f"{c['gain_factor_db']:+.1f} dB to −1", xy=(wp, m / 2),
                         xytext=(6, 0), textcoords="offset points", color=PLUM,
                         va="center", fontsize=8, bbox=LABEL_BOX)
        for ax in (mag, ph):      # fewer minor ticks: quicker to lay out, still readable
            ax.xaxis.set_minor_locator(LogLocator(base=10.0, subs=(2.0, 5.0)))
            ax.xaxis.set_minor_formatter(NullFormatter())
        mag.set_ylabel("magnitude |L| (dB)")
        ph.set_ylabel("phase of L (deg)")
        ph.set_xlabel("frequency ω (rad/s)")
        crits = [c["critical_phase_deg"] for c in freq.get("gain_crossovers", [])
                 if "critical_phase_deg" in c and lo <= c["frequency"] <= hi]
        low, high = ph.get_ylim()
        if crits:
            low, high = min([low, *(x - 20.0 for x in crits)]), max([high, *(x + 20.0
                                                                               for x in crits)])
            ph.set_ylim(low, high)
        span = high - low
        ph.yaxis.set_major_locator(MultipleLocator(45 if span <= 270 else 90 if span <= 720
                                                   else 180 if span <= 1440 else 360))
        mag.set_title("Open-loop frequency response L(jω)")
        mag.legend(loc="upper right")
        return True

    svg = render(draw, "fig-frequency", "open-loop frequency response", 6.2, 5.2)
    return None if svg is None else {
        "id": "fig-frequency", "title": "Frequency response", "svg": svg,
        "caption": ("Magnitude and phase of the sampled loop L(e^(jωT)) on the unit circle, "
                    "up to the Nyquist frequency π/T. " if d.get("sampling") else
                    "Magnitude and phase of the loop L(jω) = K C G H e^(−sT), dead time "
                    "exact. ") +
                   "Arrows: the phase margin at each gain crossover, measured from the "
                   "nearest odd multiple of 180°, and the gain change that would take the "
                   "phase crossovers within 40 dB to −1."}


def nyquist_figure(d: dict[str, Any]) -> dict[str, str] | None:
    ny = (d.get("frequency") or {}).get("nyquist")
    if not ny or not ny.get("re"):
        return None
    old = _approved(d).get("frequency", {}).get("nyquist")
    ms = as_float((d.get("metrics") or {}).get("sensitivity_peak"))
    now_label, old_label = _labels(d)

    def draw(fig: Figure) -> bool:
        ax = fig.subplots()
        if old and old.get("re"):
            re_o, im_o = floats(old["re"]), floats(old["im"])
            ax.plot(re_o, im_o, **APPROVED_LINE, label=old_label)
            ax.plot(re_o, [-v for v in im_o], **{**APPROVED_LINE, "alpha": 0.45})
        re, im = floats(ny["re"]), floats(ny["im"])
        ax.plot(re, im, **CURRENT_LINE, label=f"{now_label}, ω > 0")
        ax.plot(re, [-v for v in im], **{**CURRENT_LINE, "linewidth": 1.0, "alpha": 0.5},
                label="mirror, ω < 0")
        mid = len(re) // 2
        if 0 < mid < len(re) - 1:
            ax.annotate("", xy=(re[mid + 1], im[mid + 1]), xytext=(re[mid], im[mid]),
                        arrowprops={"arrowstyle": "-|>", "color": INK, "lw": 1.2})
        ax.add_patch(Circle((0.0, 0.0), 1.0, fill=False, **GUIDE_LINE))
        if ms is not None and ms > 0 and ms != float("inf"):
            ax.add_patch(Circle((-1.0, 0.0), 1.0 / ms, fill=False, **BOUND_LINE,
                                label=f"distance 1/Ms from −1 (Ms = {ms:.3g})"))
        ax.plot([-1.0], [0.0], marker="P", color=PLUM, markersize=8, linestyle="none",
                label="critical point −1")
        ax.axhline(0.0, **GUIDE_LINE)
        ax.axvline(0.0, **GUIDE_LINE)
        (x0, x1), (y0, y1) = NYQUIST_VIEW
        ax.set_xlim(x0, x1)
        ax.set_ylim(y0, y1)
        ax.set_aspect("equal")
        ax.set_xlabel("Re L(jω)")
        ax.set_ylabel("Im L(jω)")
        ax.set_title("Nyquist plot near the critical point")
        ax.legend(loc="best", fontsize=7.5)
        return True

    svg = render(draw, "fig-nyquist", "Nyquist plot near the critical point", 5.2, 4.9)
    return None if svg is None else {
        "id": "fig-nyquist", "title": "Nyquist plot", "svg": svg,
        "caption": "L(jω) near −1. The dotted circle has radius 1/Ms: the closest the "
                   "curve comes to the critical point. Grey: the unit circle."}

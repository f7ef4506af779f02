"""Time-response and sweep figures, drawn from a design's ``responses``, the sweep's
``envelope`` and ``scatter`` and the approved design's responses in ``baseline.curves``."""

from __future__ import annotations

from typing import Any

from matplotlib.figure import Figure

from .figures import APPROVED_LINE, BAND, BOUND_LINE, CURRENT_LINE, GUIDE, INK, PLUM, floats, render
from .view import label, unit

_PANELS = (("reference", "Unit step of the reference", "output y"),
           ("load", "Unit step of the load at the plant input", "output y"))


def responses_figure(d: dict[str, Any]) -> dict[str, str] | None:
    responses = d.get("responses") or {}
    if not any(k in responses for k, _, _ in _PANELS):
        return None
    curves = (d.get("baseline") or {}).get("curves") or {}
    old = curves.get("responses") or {}
    env = (d.get("sweep") or {}).get("envelope") or {}

    def draw(fig: Figure) -> bool:
        axes = fig.subplots(1, 2)
        for ax, (kind, title, ylabel) in zip(axes, _PANELS, strict=True):
            r = responses.get(kind)
            if r is None:
                ax.set_axis_off()
                continue
            band = env.get(kind)
            if band:
                ax.fill_between(floats(band["t"]), floats(band["low"]), floats(band["high"]),
                                color=BAND, linewidth=0,
                                label=f"sweep envelope ({env.get('samples')} samples)")
            if kind in old:
                ax.plot(floats(old[kind]["t"]), floats(old[kind]["y"]), **APPROVED_LINE,
                        label=f"approved r{curves.get('revision')}")
            ax.plot(floats(r["t"]), floats(r["y"]), **CURRENT_LINE,
                    label=f"current r{d.get('revision')}")
            ax.axhline(float(r["final"]), color=GUIDE, linewidth=0.8, linestyle=(0, (4, 3)))
            ax.set_title(title)
            ax.set_xlabel("time (s)")
            ax.set_ylabel(ylabel)
            ax.legend(loc="best")
        return True

    svg = render(draw, "fig-responses", "step and load-disturbance responses", 10.0, 3.8)
    return None if svg is None else {
        "id": "fig-responses", "title": "Time responses", "svg": svg, "wide": "1",
        "caption": "Nominal responses, dead time exact; dashed grey: the final value. "
                   + (f"The band spans {env.get('samples')} sweep samples spread over the "
                      "plan" + (f" ({env['unstable']} unstable, not simulated)"
                                if env.get("unstable") else "") + "."
                      if env else "")}


def sweep_figure(d: dict[str, Any]) -> dict[str, str] | None:
    sc = (d.get("sweep") or {}).get("scatter")
    if not sc or not sc.get("x"):
        return None
    key, param = sc["key"], sc["parameter"]
    influence = sc.get("influence") or {}

    def draw(fig: Figure) -> bool:
        ax = fig.subplots()
        ax.plot(floats(sc["x"]), floats(sc["y"]), linestyle="none", marker="o", markersize=5,
                color=INK, alpha=0.55, markeredgewidth=0, label="sweep samples")
        ax.plot([sc["nominal"][0]], [sc["nominal"][1]], linestyle="none", marker="D",
                markersize=7, markerfacecolor="white", markeredgecolor=INK,
                markeredgewidth=1.5, label="nominal")
        ax.plot([sc["worst"][0]], [sc["worst"][1]], linestyle="none", marker="v",
                markersize=8, color=PLUM, label="worst sample")
        for side in ("min", "max"):
            if side in sc.get("bound", {}):
                ax.axhline(sc["bound"][side], **BOUND_LINE, label=f"required {side}")
        ax.set_xlabel(param)
        ax.set_ylabel(label(key) + (f" ({unit(key)})" if unit(key) else ""))
        ax.set_title(f"{label(key)} across the sweep")
        ax.legend(loc="best")
        return True

    ranked = ", ".join(f"{k} {v:.2f}" for k, v in sorted(influence.items(),
                                                         key=lambda kv: (-kv[1], kv[0])))
    svg = render(draw, "fig-sweep", "worst swept metric against its most influential "
                 "parameter", 5.6, 4.0)
    return None if svg is None else {
        "id": "fig-sweep", "title": "Sweep", "svg": svg,
        "caption": f"The swept requirement with the least headroom ({key}) against the "
                   f"parameter it follows most closely ({param}). Rank correlation |ρ| per "
                   f"parameter: {ranked}."}

"""Root-locus figure, drawn from a design's ``locus`` (traced branches, poles, zeros, break
points), ``gain`` (range, crossings), ``poles``, pole-region requirements and the approved
design's branches and poles in ``baseline.curves``. A second panel zooms on the slowest
closed-loop poles when they sit far inside the whole picture."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from matplotlib.axes import Axes
from matplotlib.figure import Figure
from matplotlib.patches import PathPatch, Polygon, Rectangle
from matplotlib.path import Path
from matplotlib.transforms import Affine2D

from ..metrics import POLE_KEYS
from .figures import AMBER, BRANCH, GUIDE_LINE, INK, LABEL_BOX, PLUM, SHADE, floats, render
from .locus_window import Window, box, crossing_point, crossings, points, z_plane, zoom
from .view import num

_HATCH: dict[str, Any] = {"facecolor": "#f1f2f4", "edgecolor": SHADE, "hatch": "////",
                          "linewidth": 0.0}


def _outside(ax: Axes, radius: float, big: float) -> None:
    """Hatch everything outside the circle |p| = radius."""
    outer = Path.unit_rectangle().transformed(Affine2D().scale(2 * big).translate(-big, -big))
    inner = Path.circle((0, 0), radius)
    hole = Path(np.asarray(inner.vertices)[::-1], inner.codes)
    ax.add_patch(PathPatch(Path.make_compound_path(outer, hole), **_HATCH, zorder=0))


def _regions(ax: Axes, d: dict[str, Any], big: float) -> None:
    if z_plane(d):              # sampled loop: outside the unit circle is unstable
        _outside(ax, 1.0, big)
        return
    ax.add_patch(Rectangle((0.0, -big), big, 2 * big, **_HATCH, zorder=0))
    for e in d.get("requirements") or []:
        if e["key"] not in POLE_KEYS or e["scope"] != "nominal":
            continue
        b = e["bound"]
        if e["key"] == "damping_ratio" and "min" in b:
            t = math.acos(max(-1.0, min(1.0, b["min"])))
            ax.add_patch(Polygon([(0, 0), (-big * math.cos(t), big * math.sin(t)), (big, big),
                                  (big, -big), (-big * math.cos(t), -big * math.sin(t))],
                                 closed=True, **_HATCH, zorder=0))
        elif e["key"] == "decay_rate" and "min" in b:
            ax.add_patch(Rectangle((-b["min"], -big), big, 2 * big, **_HATCH, zorder=0))
        elif e["key"] == "natural_frequency" and "max" in b:
            _outside(ax, b["max"], big)


def _branches(ax: Axes, branches: dict[str, Any], rng: list[float] | None, old: bool) -> None:
    for side in branches.values():
        g = np.asarray(floats(side["gains"]))
        for re, im in zip(side["re"], side["im"], strict=True):
            x, y = np.asarray(floats(re)), np.asarray(floats(im))
            if old:
                ax.plot(x, y, color=AMBER, linewidth=1.0, linestyle=(0, (4, 2.5)), alpha=0.8)
                continue
            ax.plot(x, y, color=BRANCH, linewidth=1.0)
            if rng:
                mask = (g >= rng[0]) & (g <= rng[1])
                ax.plot(x[mask], y[mask], color=INK, linewidth=3.2, solid_capstyle="round")


def _inside(x: float, y: float, win: Window | None) -> bool:
    return win is not None and win[0] <= x <= win[1] and win[2] <= y <= win[3]


def _panel(ax: Axes, d: dict[str, Any], win: Window, old: dict[str, Any],
           zoom: Window | None = None) -> None:
    """One locus panel; marks inside ``zoom`` (drawn larger in the next panel) keep their
    marker but not their label."""
    locus, gain = d.get("locus") or {}, d.get("gain") or {}
    branches = locus["branches"]
    big = 20 * max(abs(v) for v in win)
    _regions(ax, d, big)
    ax.axhline(0.0, **GUIDE_LINE)
    ax.axvline(0.0, **GUIDE_LINE)
    if old.get("branches"):
        _branches(ax, old["branches"], None, old=True)
    _branches(ax, branches, gain.get("range"), old=False)
    ol_p = np.array(locus.get("open_loop_poles") or np.zeros((0, 2)), dtype=float)
    ol_z = np.array(locus.get("open_loop_zeros") or np.zeros((0, 2)), dtype=float)
    ax.plot(ol_p[:, 0], ol_p[:, 1], "x", color=INK, markersize=8, mew=1.8)
    ax.plot(ol_z[:, 0], ol_z[:, 1], "o", color=INK, markersize=7, mfc="white", mew=1.5)
    if old.get("poles"):
        op = np.array(old["poles"], dtype=float)
        ax.plot(op[:, 0], op[:, 1], "D", markersize=6, mfc="white", mec=AMBER, mew=1.4)
    cp = np.array(d.get("poles") or np.zeros((0, 2)), dtype=float)
    ax.plot(cp[:, 0], cp[:, 1], "D", color=INK, markersize=6, mec="white", mew=0.8)
    x0, x1, y0, y1 = win
    for c in crossings(d, branches):
        p = crossing_point(d, c)
        if x0 <= p.real <= x1 and y0 <= p.imag <= y1:
            ax.plot([p.real, p.real], [p.imag, -p.imag], "^", color=PLUM, markersize=7)
            if _inside(p.real, p.imag, zoom):
                continue
            ax.annotate(f"K = {num(c['gain'])}", (p.real, p.imag), xytext=(6, 4),
                        textcoords="offset points", color=PLUM, fontsize=7.5, bbox=LABEL_BOX)
    for i, b in enumerate(locus.get("breakaway", [])):
        x, y = b["point"]
        if x0 <= x <= x1 and y0 <= y <= y1:
            ax.plot([x], [y], "s", mfc="white", mec=PLUM, markersize=6, mew=1.4)
            if _inside(x, y, zoom):
                continue
            ax.annotate(f"K = {num(b['gain'])}", (x, y), xytext=(-4, -13 if i % 2 else 7),
                        textcoords="offset points", color=PLUM, fontsize=7.5, ha="right",
                        bbox=LABEL_BOX)
    ax.set_xlim(x0, x1)
    ax.set_ylim(y0, y1)
    ax.set_aspect("equal", adjustable="box")
    if z_plane(d):
        ax.set_xlabel("real part of z")
        ax.set_ylabel("imaginary part of z")
    else:
        ax.set_xlabel("real part (1/s)")
        ax.set_ylabel("imaginary part (rad/s)")


def _legend(ax: Axes, d: dict[str, Any], old: dict[str, Any]) -> None:
    rng = (d.get("gain") or {}).get("range")
    handles = [ax.plot([], [], color=BRANCH, linewidth=1.0, label="locus, K ≥ 0")[0]]
    if rng:
        handles.append(ax.plot([], [], color=INK, linewidth=3.2,
                               label=f"K in [{num(rng[0])}, {num(rng[1])}]")[0])
    handles.append(ax.plot([], [], "D", color=INK, label="closed loop at nominal K")[0])
    if old.get("branches"):
        handles.append(ax.plot([], [], color=AMBER, linestyle=(0, (4, 2.5)),
                               label=f"approved r{old.get('revision')}")[0])
    handles.append(ax.plot([], [], "^", color=PLUM, label="crossing (K)")[0])
    ax.legend(handles=handles, loc="upper left", fontsize=7.5)


def locus_figure(d: dict[str, Any]) -> dict[str, str] | None:
    branches = (d.get("locus") or {}).get("branches")
    if not branches:
        return None
    old = (d.get("baseline") or {}).get("curves") or {}
    pts = points(d, branches)
    whole = box(pts)
    near = zoom(pts, d, whole)

    def draw(fig: Figure) -> bool:
        axes = fig.subplots(1, 2 if near else 1, squeeze=False)[0]
        _panel(axes[0], d, whole, old, near)
        axes[0].set_title("Root locus")
        if near:
            _panel(axes[1], d, near, old)
            axes[1].set_title("Near the slowest closed-loop poles")
        _legend(axes[0], d, old)
        return True

    delay = d.get("delay") or 0
    svg = render(draw, "fig-locus", "root locus", 10.0 if near else 6.4, 4.5 if near else 5.2)
    hatched = ("outside the unit circle (the sampled loop is analysed in the z-plane)"
               if z_plane(d) else
               "the right half-plane and the regions the pole requirements exclude")
    return None if svg is None else {
        "id": "fig-locus", "title": "Root locus", "svg": svg, "wide": "1" if near else "",
        "caption": "Closed-loop roots of D + K N as K grows: thick where K lies in the "
                   "allowed range; ✕ open-loop poles, ○ zeros, ◆ closed-loop poles at the "
                   "nominal K, ▲ stability crossings and □ break points with their K; hatched: "
                   + hatched + "."
                   + (f" The dead time ({num(delay)} s) is not on this locus of the delay-free "
                      "part; the crossings marked on the imaginary axis are the exact ones "
                      "with it, and the closed-loop poles use its Pade approximation."
                      if delay else "")}

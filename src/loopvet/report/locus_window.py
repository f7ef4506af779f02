"""Where the root-locus figure looks: the points that matter (poles, zeros, break points,
marked crossings and the branches over the allowed gain range), a window around them, and a
zoom on the slowest closed-loop poles when they sit far inside it. Layout only."""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from .figures import floats

Window = tuple[float, float, float, float]


def points(d: dict[str, Any], branches: dict[str, Any]) -> list[complex]:
    locus, gain = d.get("locus") or {}, d.get("gain") or {}
    pts = [complex(*p) for p in locus.get("open_loop_poles", []) + locus.get(
        "open_loop_zeros", []) + (d.get("poles") or [])]
    pts += [complex(*b["point"]) for b in locus.get("breakaway", [])]
    pts += [crossing_point(d, c) for c in crossings(d, branches)]
    rng = gain.get("range")
    for side in branches.values():
        g = np.asarray(floats(side["gains"]))
        mask = (g >= rng[0]) & (g <= rng[1]) if rng else np.zeros(g.size, bool)
        for re, im in zip(side["re"], side["im"], strict=True):
            pts += [complex(a, b) for a, b in zip(np.asarray(floats(re))[mask],
                                                   np.asarray(floats(im))[mask], strict=True)]
    return [p for p in pts if math.isfinite(p.real) and math.isfinite(p.imag)]


def z_plane(d: dict[str, Any]) -> bool:
    """True for a sampled loop, whose locus lies in the z-plane (boundary: unit circle)."""
    return (d.get("locus") or {}).get("plane") == "z"


def crossing_point(d: dict[str, Any], c: dict[str, Any]) -> complex:
    """Where a stability crossing sits in the locus plane: j w, or e^{j w T} in the z-plane."""
    if z_plane(d):
        period = float((d.get("sampling") or {}).get("period") or 0.0)
        return complex(math.cos(c["frequency"] * period), math.sin(c["frequency"] * period))
    return complex(0.0, c["frequency"])


#: crossings are marked up to this factor beyond the largest |K| of the record (40 dB)
CROSSING_REACH = 100.0


def crossings(d: dict[str, Any], branches: dict[str, Any]) -> list[dict[str, Any]]:
    """Crossings on the drawn sides of the locus, within CROSSING_REACH of the gains the
    record uses."""
    gain = d.get("gain") or {}
    scale = max(abs(g) for g in [gain.get("nominal") or 1.0, *(gain.get("range") or [])])
    return [c for c in gain.get("crossings", [])
            if isinstance(c["frequency"], float | int) and c["gain"] != 0
            and (c["gain"] > 0 or "negative" in branches)
            and abs(c["gain"]) <= CROSSING_REACH * scale]


#: width/height of the drawn window, close to a panel's, so equal scales waste no space
RATIO = 1.2


def box(pts: list[complex]) -> Window:
    """A window around ``pts`` and the origin, symmetric about the real axis, with a margin
    and the shape RATIO."""
    xs = [p.real for p in pts] + [0.0]
    ys = [abs(p.imag) for p in pts] + [0.0]
    x0, x1, y = min(xs), max(xs), max(ys)
    width = max(x1 - x0, 1e-9 * max(1.0, abs(x0))) * 1.2
    height = max(2 * y * 1.15, width / RATIO)
    width = max(width, height * RATIO)
    xc = (x0 + x1) / 2
    return (xc - width / 2, xc + width / 2, -height / 2, height / 2)


def zoom(pts: list[complex], d: dict[str, Any], whole: Window) -> Window | None:
    poles = [complex(*p) for p in d.get("poles") or []]
    scale = next((abs(p) for p in poles if abs(p) > 0), 0.0)
    if scale == 0.0:
        return None
    near = [p for p in pts if abs(p) <= 3.0 * scale]
    found = box(near)
    return found if (found[1] - found[0]) * 6 < (whole[1] - whole[0]) else None

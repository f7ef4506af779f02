"""Readable text analysis of one loop (``loopvet show``), from its DesignResult alone."""

from __future__ import annotations

import math
from typing import Any

from ..results import DesignResult


def _num(x: Any, digits: int = 6) -> str:
    if x is None:
        return "-"
    if isinstance(x, str):
        return x
    if isinstance(x, float) and math.isinf(x):
        return "inf" if x > 0 else "-inf"
    return f"{x:.{digits}g}"


def _pt(p: list[float]) -> str:
    re, im = p
    return _num(re) if im == 0 else f"{_num(re)} {'+' if im > 0 else '-'} {_num(abs(im))}j"


def _interval(iv: list[float], closed: bool = False) -> str:
    a, b = ("[", "]") if closed else ("(", ")")
    return f"{a}{_num(iv[0])}, {_num(iv[1])}{b}"


def render(d: DesignResult) -> str:
    out = [f"{d.name}  revision {d.revision}  ({d.path})"]
    if d.title:
        out.append(d.title)
    if d.status == "invalid":
        out += ["", "INVALID:"] + [f"  {e}" for e in d.errors]
        return "\n".join(out) + "\n"
    g = d.gain or {}
    rng = g.get("range")
    out += ["", f"status: {d.status}", f"nominal gain K = {_num(g.get('nominal'))}"
            + (f", allowed range [{_num(rng[0])}, {_num(rng[1])}]" if rng else "")]
    out += ["", "stable gain intervals (open):"]
    out += [f"  {_interval(iv)}" for iv in g.get("stable_intervals", [])] or ["  none"]
    if "search_bound" in g:
        out.append(f"  (dead time: crossings searched for |K| <= {_num(g['search_bound'])})")
    m = d.metrics
    out.append(f"gain margin {_num(m.get('gain_margin_db'), 4)} dB (rise), "
               f"{_num(m.get('gain_reduction_margin_db'), 4)} dB (reduction)")
    out += ["", f"{'crossing gain K':>18}  {'frequency rad/s':>16}"]
    out += [f"{_num(c['gain'], 10):>18}  {_num(c['frequency'], 10):>16}"
            for c in g.get("crossings", [])] or ["  none"]
    locus = d.locus or {}
    out += ["", "open-loop poles: " + (", ".join(_pt(p) for p in locus.get("open_loop_poles",
                                                                            [])) or "none"),
            "open-loop zeros: " + (", ".join(_pt(p) for p in locus.get("open_loop_zeros",
                                                                            [])) or "none")]
    asym = locus.get("asymptotes", {})
    if asym.get("angles_deg"):
        out.append(f"asymptotes (K > 0): centroid {_num(asym.get('centroid'))}, angles "
                   + ", ".join(f"{_num(a, 4)} deg" for a in asym["angles_deg"]))
    for b in locus.get("breakaway", []):
        out.append(f"break point {_pt(b['point'])} at K = {_num(b['gain'])}")
    for a in locus.get("angles", {}).get("departure", []):
        out.append(f"departure from pole {_pt(a['pole'])}: {_num(a['angle_deg'], 4)} deg")
    for a in locus.get("angles", {}).get("arrival", []):
        out.append(f"arrival at zero {_pt(a['zero'])}: {_num(a['angle_deg'], 4)} deg")
    out += ["", f"closed-loop poles at nominal K{_pade(d)}:",
            f"  {'pole':>30}  {'damping':>8}  {'natural freq':>12}"]
    for p in d.poles or []:
        mag = math.hypot(*p)
        zeta = -p[0] / mag if mag > 0 else 0.0
        out.append(f"  {_pt(p):>30}  {zeta:8.4f}  {_num(mag, 6):>12}")
    regions = g.get("region_intervals", {})
    if regions:
        out += ["", "gain intervals where pole requirements hold (closed):"]
        for key, ivs in regions.items():
            out.append(f"  {key}: " + (", ".join(_interval(iv, True) for iv in ivs) or "none"))
    out += ["", "requirements:"]
    for e in d.requirements:
        where = f" at K = {_num(e.where['gain'])}" if e.where and "gain" in e.where else ""
        value = _num(e.value) if not isinstance(e.value, bool) else (
            "stable" if e.value else "unstable")
        out.append(f"  {e.status:<13} {e.key:<28} {e.scope:<8} {value}{where}")
    if d.findings:
        out += ["", "findings:"] + [f"  [{f.severity}] {f.message}" for f in d.findings]
    return "\n".join(out) + "\n"


def _pade(d: DesignResult) -> str:
    order = d.extra.get("pade_order")
    return f" (dead time as Pade order {order})" if order else ""

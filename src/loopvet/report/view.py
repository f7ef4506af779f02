"""Shared wording and ordering for the HTML, JUnit and Markdown reports.

Everything here reads one design's entry of results.json (``FleetResult.to_json()``, with
infinities spelled "inf"/"-inf") and only selects, orders and formats what is there.
"""

from __future__ import annotations

import math
import re
from collections.abc import Sequence
from typing import Any

from ..metrics import METRICS

Design = dict[str, Any]

CAUTION = ("loopvet supports, and never replaces, qualified engineering review. A model is only "
           "as good as its identification; safety-related loops follow the applicable "
           "standards and local codes.")

SCOPES = {"nominal": "nominal", "gain": "worst over gain range", "sweep": "worst over sweep"}
#: order of attention on the fleet index: what needs a reviewer first
_STATUS_RANK = {"invalid": 0, "fail": 1, "pass": 2}
_DRIFT_RANK = {"degraded": 0, "removed": 1, "changed": 2, "improved": 3, "new": 4,
               "unchanged": 5}


def as_float(x: Any) -> float | None:
    """A results number as a float ("inf" strings included); None stays None."""
    if isinstance(x, bool) or not isinstance(x, int | float | str):
        return None
    if isinstance(x, str):
        return {"inf": math.inf, "-inf": -math.inf}.get(x)
    return float(x)


def num(x: Any, digits: int = 4) -> str:
    """A results value for people: 4 significant digits, inf as the sign, null as a dash."""
    if x is None:
        return "–"
    if isinstance(x, bool):
        return "stable" if x else "unstable"
    f = as_float(x)
    if f is None:
        return x if isinstance(x, str) else "–"
    if math.isinf(f):
        return "∞" if f > 0 else "−∞"
    return f"{f:.{digits}g}".replace("-", "−")


def signed(x: Any, digits: int = 4) -> str:
    f = as_float(x)
    if f is None:
        return "–"
    return ("+" if f > 0 else "") + num(f, digits)


def headroom_text(h: Any) -> str:
    """Headroom (a signed fraction of the bound) as a percentage."""
    f = as_float(h)
    if f is None:
        return "–"
    if math.isinf(f):
        return "∞"
    return ("+" if f > 0 else "") + f"{100 * f:.1f} %".replace("-", "−")


def label(key: str) -> str:
    if key == "stability":
        return "closed-loop stability"
    info = METRICS.get(key)
    return info.label if info else key


def unit(key: str) -> str:
    info = METRICS.get(key)
    return info.unit if info else ""


def bound_text(entry: dict[str, Any]) -> str:
    bound = entry.get("bound") or {}
    if entry.get("key") == "stability":
        return "stable for every K in range" if bound.get("over_gain") else "stable"
    parts = []
    if "min" in bound:
        parts.append(f"≥ {num(bound['min'])}")
    if "max" in bound:
        parts.append(f"≤ {num(bound['max'])}")
    return " and ".join(parts) + (f" {unit(entry['key'])}" if unit(entry["key"]) else "")


def where_text(entry: dict[str, Any]) -> str:
    where = entry.get("where") or {}
    parts = []
    if "gain" in where:
        parts.append(f"K = {num(where['gain'])}")
    for name, value in (where.get("parameters") or {}).items():
        parts.append(f"{name} = {num(value)}")
    return ", ".join(parts)


def value_text(entry: dict[str, Any]) -> str:
    v = entry.get("value")
    text = num(v)
    return text + (f" {unit(entry['key'])}" if unit(entry["key"]) and v is not None
                   and not isinstance(v, bool) else "")


def tightest(d: Design) -> dict[str, Any] | None:
    """The requirement entry with the least headroom: a failing entry without a headroom
    (unstable, or a metric that does not exist) first, then the smallest headroom."""
    entries = d.get("requirements") or []
    failing = [e for e in entries if e["status"] == "fail" and as_float(e["headroom"]) is None]
    if failing:
        return failing[0]
    scored = [e for e in entries if as_float(e.get("headroom")) is not None]
    return min(scored, key=lambda e: as_float(e["headroom"]) or 0.0) if scored else None


def drifted(d: Design) -> list[dict[str, Any]]:
    """Changes beyond tolerance against the approved baseline."""
    return [c for c in (d.get("baseline") or {}).get("changes", [])
            if c["verdict"] != "unchanged"]


def drift_status(d: Design) -> str | None:
    return (d.get("baseline") or {}).get("status")


def approved_of(d: Design, entry: dict[str, Any]) -> dict[str, Any] | None:
    """The approved side of a requirement entry: the change record of its value, or, for
    an approved design without one, the same value (nothing changed)."""
    b = d.get("baseline") or {}
    if b.get("status") in (None, "new", "removed"):
        return None
    for c in b.get("changes", []):
        if c["key"] == entry["key"] and c["scope"] == entry["scope"]:
            return c
    return {"old": entry.get("value"), "delta": None, "verdict": "unchanged"}


def revision_text(d: Design) -> str:
    b = d.get("baseline") or {}
    now = f"r{d['revision']}" if d.get("revision") is not None else "r?"
    old = b.get("approved_revision")
    if b.get("status") == "removed":
        return f"r{old} (removed)"
    if old is None:
        return now + (" (new)" if b else "")
    return now if old == d.get("revision") else f"r{old} → {now}"


def attention(d: Design) -> tuple[int, int, float, str]:
    """Sort key of the fleet index: invalid, failing, degraded, drifted first; then the
    least headroom; then the name."""
    t = tightest(d)
    h = as_float(t["headroom"]) if t else None
    b = d.get("baseline") or {}
    stale = b.get("content_changed") and not b.get("revision_bumped") and b.get(
        "status") not in ("new", "removed")
    drift = -1 if stale else _DRIFT_RANK.get(drift_status(d) or "", 6)
    return (_STATUS_RANK.get(d["status"], 3), drift, math.inf if h is None else h, d["name"])


_SLUG = re.compile(r"[^a-z0-9._-]+")


def page_names(designs: Sequence[Design]) -> list[str]:
    """A file name per design page, unique and safe whatever a broken record is called."""
    out: list[str] = []
    used: set[str] = set()
    for d in designs:
        base = _SLUG.sub("-", str(d["name"]).lower()).strip(".-") or "record"
        name, i = base, 2
        while name in used:
            name, i = f"{base}-{i}", i + 1
        used.add(name)
        out.append(name + ".html")
    return out

"""Plain-text fleet summary for the terminal: one line per design (with its drift against
the approved baseline under it), then a summary line."""

from __future__ import annotations

from typing import Any

from ..drift import MetricChange
from ..results import DesignResult, FleetResult
from .diffview import metric_line

_MARK = {"pass": "ok  ", "fail": "FAIL", "invalid": "BAD "}
_INDENT = " " * 6


def _detail(d: DesignResult) -> str:
    if d.status == "invalid":
        first = str(d.errors[0]) if d.errors else "invalid"
        more = f" (+{len(d.errors) - 1} more)" if len(d.errors) > 1 else ""
        return first + more
    failed = [e for e in d.requirements if e.status == "fail"]
    if failed:
        parts = []
        for e in failed[:3]:
            if e.key == "stability":
                parts.append("unstable" if e.scope == "nominal" else "unstable within gain range")
            else:
                val = "none" if e.value is None else f"{e.value:.4g}"
                bound = ", ".join(f"{k} {v:g}" for k, v in e.bound.items())
                parts.append(f"{e.key} = {val} ({bound})")
        return "; ".join(parts)
    pending = sum(e.status == "not_evaluated" for e in d.requirements)
    met = sum(e.status == "pass" for e in d.requirements)
    note = f"{met} requirement(s) met"
    return note + (f", {pending} not evaluated yet" if pending else "")


def _drift(d: DesignResult, b: dict[str, Any]) -> list[str]:
    """Lines under a design: how it drifted from the approved state, and which record
    values caused it (directional changes in full, the others counted)."""
    status, approved = b["status"], b.get("approved_revision")
    if status == "new":
        return [f"{_INDENT}new: not in the approved baseline yet"]
    out = []
    if b.get("content_changed") and not b.get("revision_bumped"):
        out.append(f"{_INDENT}record changed since approved r{approved} but its revision "
                   f"is still r{d.revision}: bump the revision")
    if status in ("unchanged", "removed"):
        return out
    out.append(f"{_INDENT}drift since approved r{approved}: {status}")
    changes = [MetricChange(**c) for c in b.get("changes", ())]
    out += [f"{_INDENT}  {metric_line(c)}" for c in changes
            if c.verdict in ("degraded", "improved")]
    others = sum(c.verdict == "changed" for c in changes)
    if others:
        out.append(f"{_INDENT}  {others} other result(s) changed beyond tolerance "
                   "(no requirement on them)")
    out += [f"{_INDENT}  record: {c['message']}" for c in b.get("record_changes", ())]
    return out


def render(fleet: FleetResult, results_path: str | None) -> str:
    width = max((len(d.name) for d in fleet.designs), default=10)
    lines = []
    for d in fleet.designs:
        rev = f"r{d.revision}" if d.revision is not None else "r?"
        b = d.baseline
        if b and b["status"] == "removed":
            lines.append(f"gone  {d.name:<{width}}  {rev:<4} record removed since approval "
                         f"({d.path})")
            continue
        lines.append(f"{_MARK[d.status]}  {d.name:<{width}}  {rev:<4} {_detail(d)}")
        if b:
            lines += _drift(d, b)
    s = fleet.summary
    if fleet.baseline and not fleet.baseline.get("comparable"):
        lines.append(f"baseline {fleet.baseline['path']} not compared: "
                     f"{fleet.baseline.get('reason', '')}; approve again to compare")
    drift = ""
    if fleet.baseline and fleet.baseline.get("comparable"):
        drift = (f"; against {fleet.baseline['path']}: {s.degraded} degraded, "
                 f"{s.revision_not_bumped} without revision bump, {s.removed} removed")
    tail = f"; results in {results_path}" if results_path else ""
    lines.append(f"{s.designs} designs: {s.passed} pass, {s.failed} fail, {s.invalid} invalid"
                 f"{drift}{tail}; exit {s.exit_code}")
    return "\n".join(lines) + "\n"

"""Plain-text fleet summary for the terminal: one line per design, then a summary line."""

from __future__ import annotations

from ..results import DesignResult, FleetResult

_MARK = {"pass": "ok  ", "fail": "FAIL", "invalid": "BAD "}


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


def render(fleet: FleetResult, results_path: str | None) -> str:
    width = max((len(d.name) for d in fleet.designs), default=10)
    lines = []
    for d in fleet.designs:
        rev = f"r{d.revision}" if d.revision is not None else "r?"
        lines.append(f"{_MARK[d.status]}  {d.name:<{width}}  {rev:<4} {_detail(d)}")
    s = fleet.summary
    tail = f"; results in {results_path}" if results_path else ""
    lines.append(f"{s.designs} designs: {s.passed} pass, {s.failed} fail, {s.invalid} invalid"
                 f"{tail}; exit {s.exit_code}")
    return "\n".join(lines) + "\n"

"""Record diffs for people (text), for pull-request comments (Markdown) and as JSON.

Renderers format the given change values only. Record text reaches them inside messages
already escaped with ``repr``; Markdown additionally escapes HTML and Markdown syntax.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

from ..diff import RecordDiff
from ..drift import MetricChange

_WORDS = {"improved": "better", "degraded": "WORSE", "changed": "changed, no requirement",
          "unchanged": "within tolerance"}


def value(x: Any) -> str:
    if x is None:
        return "none"
    if isinstance(x, bool):
        return "stable" if x else "unstable"
    if isinstance(x, float) and math.isinf(x):
        return "inf" if x > 0 else "-inf"
    return f"{x:.4g}" if isinstance(x, float | int) else str(x)


def metric_line(c: MetricChange) -> str:
    """'phase_margin_deg: 62.03 -> 55.47 (-6.563, WORSE; tolerance 0.1)'."""
    parts = []
    if c.delta is not None:
        parts.append(f"{c.delta:+.4g}" if math.isfinite(c.delta) else value(c.delta))
    parts.append(_WORDS[c.verdict])
    tail = f"; tolerance {c.tolerance:.3g}" if c.tolerance is not None else ""
    return f"{c.label}: {value(c.old)} -> {value(c.new)} ({', '.join(parts)}{tail})"


def _rev(d: RecordDiff) -> str:
    old = d.old.result.revision if d.old else None
    new = d.new.result.revision if d.new else None
    if d.status == "added":
        return f"added, r{new}"
    if d.status == "removed":
        return f"removed, was r{old}"
    return f"r{old} -> r{new}"


def _problems(d: RecordDiff) -> list[str]:
    out = []
    for which, side in (("old", d.old), ("new", d.new)):
        if side is not None and side.result.status == "invalid":
            out += [f"{which} record invalid: {e}" for e in side.result.errors]
    return out


def text(diffs: Sequence[RecordDiff], old: str, new: str, unchanged: int) -> str:
    lines = [f"records: {old} -> {new}"]
    for d in diffs:
        where = (d.new or d.old)
        assert where is not None
        lines += ["", f"{d.name}  {_rev(d)}  ({where.label})"]
        lines += [f"  ! {p}" for p in _problems(d)]
        if d.record:
            lines.append("  record:")
            lines += [f"    {c.message}" for c in d.record]
        shown = [c for c in d.metrics if c.verdict != "unchanged"]
        if shown:
            lines.append("  results:")
            lines += [f"    {metric_line(c)}" for c in shown]
        if d.verdicts:
            lines.append("  requirements:")
            lines += [f"    {v.message}" for v in d.verdicts]
        if d.old and d.new and d.old.result.status != d.new.result.status:
            lines.append(f"  status: {d.old.result.status} -> {d.new.result.status}")
    lines += ["", _summary(diffs, unchanged)]
    return "\n".join(lines) + "\n"


def _summary(diffs: Sequence[RecordDiff], unchanged: int) -> str:
    n = {s: sum(d.status == s for d in diffs) for s in ("changed", "added", "removed")}
    return (f"{n['changed']} changed, {n['added']} added, {n['removed']} removed, "
            f"{unchanged} unchanged")


def to_json(diffs: Sequence[RecordDiff], old: str, new: str, unchanged: int) -> dict[str, Any]:
    return {"loopvet": 1, "kind": "diff", "old": old, "new": new,
            "records": [d.to_json() for d in diffs],
            "summary": {"changed": sum(d.status == "changed" for d in diffs),
                        "added": sum(d.status == "added" for d in diffs),
                        "removed": sum(d.status == "removed" for d in diffs),
                        "unchanged": unchanged}}


#: every line we write starts with our own marker ('- ', '| ', '#'), so record text only
#: ever sits inside a line: escaping inline syntax, table pipes and HTML is enough
_MD_SPECIAL = str.maketrans({c: "\\" + c for c in "\\`*_[]|~"}
                            | {"<": "&lt;", "&": "&amp;", "\n": " ", "\r": " "})


def md(s: str) -> str:
    """Text made inert in Markdown (and in the HTML a Markdown renderer lets through)."""
    return s.translate(_MD_SPECIAL)


def markdown(diffs: Sequence[RecordDiff], old: str, new: str, unchanged: int) -> str:
    lines = [f"### loopvet: records {md(old)} -> {md(new)}", "",
             md(_summary(diffs, unchanged))]
    for d in diffs:
        lines += ["", f"#### {md(d.name)} ({md(_rev(d))})", ""]
        lines += [f"- :warning: {md(p)}" for p in _problems(d)]
        if d.record:
            lines += ["Record changes:", ""] + [f"- {md(c.message)}" for c in d.record] + [""]
        shown = [c for c in d.metrics if c.verdict != "unchanged"]
        if shown:
            lines += ["| result | approved/old | new | delta | verdict |",
                      "| --- | ---: | ---: | ---: | --- |"]
            for c in shown:
                delta = "" if c.delta is None else (f"{c.delta:+.4g}" if math.isfinite(c.delta)
                                                    else value(c.delta))
                verdict = _WORDS[c.verdict]
                verdict = f"**{verdict.lower()}**" if c.verdict == "degraded" else verdict
                label = f"`{c.key}`{md(c.label[len(c.key):])}"      # keys are ours
                lines.append(f"| {label} | {md(value(c.old))} | {md(value(c.new))} | "
                             f"{md(delta)} | {verdict} |")
            lines.append("")
        lines += [f"- {md(v.message)}" for v in d.verdicts]
    return "\n".join(lines).rstrip("\n") + "\n"

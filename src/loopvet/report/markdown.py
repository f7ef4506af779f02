"""``summary.md``: a compact Markdown table for pull-request comments and CI job summaries,
from results.json data only. Record text is made inert with :func:`.diffview.md`."""

from __future__ import annotations

from typing import Any

from . import view
from .diffview import md
from .view import CAUTION

_STATUS = {"pass": "pass", "fail": "**FAIL**", "invalid": "**INVALID**"}
_EXIT = {0: "every requirement met, nothing degraded", 1: "a requirement is not met",
         3: "a record is invalid", 4: "requirements met, but something drifted"}


def _row(d: dict[str, Any]) -> str:
    t = view.tightest(d)
    if d["status"] == "invalid":
        req, head = md(str(d["errors"][0]["message"]) if d.get("errors") else "invalid"), "–"
    elif t:
        req = f"`{t['key']}` {view.SCOPES[t['scope']]}: {md(view.value_text(t))}"
        head = view.headroom_text(t["headroom"])
    else:
        req, head = "–", "–"
    b = d.get("baseline") or {}
    drift = b.get("status") or "–"
    moved = view.drifted(d)
    if moved:
        worse = sum(c["verdict"] == "degraded" for c in moved)
        drift += f", {len(moved)} beyond tolerance" + (f" ({worse} worse)" if worse else "")
    if b.get("content_changed") and not b.get("revision_bumped") and b.get(
            "status") not in ("new", "removed"):
        drift += ", **revision not bumped**"
    drift = f"**{drift}**" if b.get("status") == "degraded" else drift
    return (f"| {_STATUS.get(d['status'], d['status'])} | {md(d['name'])} | "
            f"{md(view.revision_text(d))} | {req} | {head} | {drift} |")


def _worse(d: dict[str, Any], changes: list[dict[str, Any]]) -> str:
    parts = [f"`{c['key']}`{'' if c['scope'] == 'nominal' else ' (' + c['scope'] + ')'} "
             f"{view.num(c['old'])} → {view.num(c['new'])}" for c in changes[:4]]
    more = f", and {len(changes) - 4} more" if len(changes) > 4 else ""
    return f"- {md(d['name'])} got worse: " + ", ".join(parts) + more


_HEAD = ["| status | loop | revision | tightest requirement | headroom | since approval |",
         "| --- | --- | --- | --- | ---: | --- |"]


def render(data: dict[str, Any]) -> str:
    s = data["summary"]
    designs = sorted(data["designs"], key=view.attention)
    b = data.get("baseline") or {}
    counts = (f"{s['designs']} loop{'s' if s['designs'] != 1 else ''}: {s['pass']} pass, "
              f"{s['fail']} fail, {s['invalid']} invalid")
    if b.get("comparable"):
        counts += (f"; {s['degraded']} degraded, {s['revision_not_bumped']} without revision "
                   f"bump, {s['removed']} removed")
    lines = [f"### loopvet: exit {s['exit_code']} ({_EXIT.get(s['exit_code'], '')})", "",
             counts + "."]
    if b and not b.get("comparable"):
        lines += ["", f"Baseline `{md(str(b.get('path')))}` not compared: "
                      f"{md(str(b.get('reason', '')))}."]
    focus = [d for d in designs if view.attention(d)[:2] < (2, 5)]
    rest = len(designs) - len(focus)
    lines.append("")
    if focus:
        lines += _HEAD + [_row(d) for d in focus]
        lines.append("")
        worse = [(d, [c for c in view.drifted(d) if c["verdict"] == "degraded"])
                 for d in focus]
        lines += [_worse(d, cs) for d, cs in worse if cs]
        lines += [""] if any(cs for _, cs in worse) else []
    if rest:
        lines.append(f"{rest} other loop{'s pass' if rest != 1 else ' passes'} with nothing "
                     "to report since approval.")
        lines += ["", f"<details><summary>all {len(designs)} loops</summary>", ""]
        lines += _HEAD + [_row(d) for d in designs] + ["", "</details>"]
    lines += ["", f"> {CAUTION}"]
    return "\n".join(lines) + "\n"

"""``loopvet approve``: record the current results of records as the approved baseline.

Stages: read the baseline (refuse a corrupt one unless told to start afresh) -> read and
check the records -> refuse invalid records, and failing ones unless accepted -> build the
new store (entries of the given paths replaced, approved records gone from those paths
dropped, every other entry kept as it is) -> one atomic write. Nothing is written when
anything is refused, and an unchanged record keeps its entry (and approval time) as it is.

Exit codes: 0 written or already up to date; 1 failing records without --accept-failing;
2 usage, unusable baseline file, settings mismatch, or the file cannot be written;
3 invalid records.
"""

from __future__ import annotations

import getpass
import os
import subprocess
import sys
import time
from dataclasses import dataclass

from . import baseline as bl
from .run import Settings, check_fleet, read_fleet


@dataclass(frozen=True, kw_only=True, slots=True)
class ApproveSettings:
    paths: tuple[str, ...] = ("designs",)
    baseline: str = os.path.join("reports", "baseline.json")
    by: str | None = None
    note: str = ""
    accept_failing: bool = False
    discard_corrupt: bool = False
    jobs: int = 1


def approver(given: str | None) -> str:
    """--by, else git's user.name, else the login name."""
    if given:
        return given
    try:
        name = subprocess.run(["git", "config", "user.name"], capture_output=True, text=True,
                              timeout=10, check=False).stdout.strip()
    except (OSError, subprocess.SubprocessError):
        name = ""
    if name:
        return name
    try:
        return getpass.getuser()
    except (OSError, KeyError):
        return "unknown"


def now_utc() -> str:
    """UTC ISO 8601 time of approval; SOURCE_DATE_EPOCH (seconds) fixes it for
    reproducible files such as the demo baseline."""
    fixed = os.environ.get("SOURCE_DATE_EPOCH", "").strip()
    seconds = int(fixed) if fixed.isdigit() else int(time.time())
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(seconds))


def _say(message: str) -> None:
    print(message, file=sys.stderr)


def run_approve(s: ApproveSettings) -> int:
    try:
        store = bl.read_store(s.baseline)
    except bl.BaselineError as exc:
        if not s.discard_corrupt:
            _say(f"loopvet: {exc}\nloopvet: nothing written; repair {s.baseline} (or restore "
                 "it from version control), or run with --discard-corrupt to start afresh")
            return 2
        _say(f"loopvet: discarding the unusable baseline ({'; '.join(exc.problems)})")
        store = None
    read = read_fleet(s.paths)
    fleet = check_fleet(Settings(paths=s.paths, jobs=s.jobs), read=read)
    invalid = [d for d in fleet.designs if d.status == "invalid"]
    if invalid:
        for d in invalid:
            _say(f"loopvet: cannot approve {d.path}: "
                 + (str(d.errors[0]) if d.errors else "invalid"))
        _say("loopvet: nothing approved: fix the invalid records first")
        return 3
    failing = [d for d in fleet.designs if d.status == "fail"]
    if failing and not s.accept_failing:
        for d in failing:
            keys = sorted({e.key for e in d.requirements if e.status == "fail"})
            _say(f"loopvet: {d.name} fails {', '.join(keys)}")
        _say("loopvet: nothing approved: failing records are approved only with "
             "--accept-failing (and are recorded as failing)")
        return 1
    settings = bl.fingerprint()
    present = {d.name for d in fleet.designs}
    dropped = [a.name for a in store.designs if a.name not in present
               and bl.in_scope(a.path, s.paths)] if store else []
    if store is not None and store.settings.get("key") != settings["key"]:
        left = [a.name for a in store.designs if a.name not in present and a.name not in dropped]
        if left:
            _say(f"loopvet: {s.baseline} was made under other settings ("
                 f"{'; '.join(bl.differences(store.settings, settings))}); approve every "
                 f"design in it again, including {', '.join(left)}, so that one file holds one "
                 "kind of result")
            return 2
    sources = {path: bl.source_of(path, data) for path, data in
               (r for r in read if isinstance(r, tuple))}
    same = store is not None and store.settings.get("key") == settings["key"]
    by, at = approver(s.by), now_utc()
    entries, kept = [], []
    for d in fleet.designs:
        old = store.get(d.name) if store else None
        src = sources[d.path]
        if same and old is not None and old.record_sha256 == src.sha256 and \
                old.path == bl.portable(d.path):
            kept.append(d.name)
            continue
        entries.append(bl.approve(d, src, by=by, at=at, note=s.note))
    new = bl.updated(store, settings, entries, dropped)
    for a in entries:
        was = store.get(a.name) if store else None
        history = f" (was r{was.revision})" if was and was.revision != a.revision else ""
        flag = "  [failing, accepted]" if a.failing_accepted else ""
        _say(f"approved  {a.name}  r{a.revision}{history}{flag}")
    for name in dropped:
        _say(f"dropped   {name}  (its record is gone)")
    if kept:
        _say(f"unchanged {len(kept)} design(s) keep their approval")
    if store is not None and bl.dumps(new) == bl.dumps(store):
        _say(f"{s.baseline} is already up to date")
        return 0
    try:
        bl.write_store(s.baseline, new)
    except OSError as exc:
        _say(f"loopvet: cannot write {s.baseline}: {exc.strerror}; the previous baseline "
             "is unchanged")
        return 2
    _say(f"wrote {s.baseline}")
    return 0

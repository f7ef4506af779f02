"""``loopvet diff``: what changed in records, and what it did to their results.

Three pairings of an old and a new version of each record:
* two record files (``loopvet diff OLD NEW``);
* the working tree against a git revision (``--rev REV``; pairs by path);
* the working tree against the records stored in the approved baseline (``--approved``;
  pairs by name, then by path).
Only pairs whose bytes differ are analysed (both sides, with this loopvet), so the metric
deltas never mix results of different settings. Exit codes: 0 shown, 2 usage or an
unusable baseline / git revision / file.
"""

from __future__ import annotations

import os
import sys
from collections.abc import Mapping
from dataclasses import dataclass

from . import baseline as bl
from .diff import RecordDiff, Side, compare
from .record.errors import RecordInvalid
from .record.load import parse_record
from .results import dumps
from .run import check_data, discover


@dataclass(frozen=True, kw_only=True, slots=True)
class DiffSettings:
    paths: tuple[str, ...] = ()
    rev: str | None = None
    approved: bool = False
    baseline: str = os.path.join("reports", "baseline.json")
    format: str = "text"


class DiffError(Exception):
    pass


def _read(path: str) -> bytes:
    try:
        with open(path, "rb") as fh:
            return fh.read(8 * 1024 * 1024)
    except OSError as exc:
        raise DiffError(f"cannot read {path}: {exc.strerror}") from None


def _current(paths: tuple[str, ...]) -> dict[str, bytes]:
    found, problems = discover(paths or ("designs",))
    if problems:
        raise DiffError(f"{problems[0].path}: {problems[0].message}")
    return {p: _read(p) for p in found}


def _name(path: str, data: bytes) -> str:
    try:
        return parse_record(path, data).name
    except RecordInvalid:
        return os.path.splitext(os.path.basename(path))[0]


Pair = tuple[tuple[str, bytes] | None, tuple[str, bytes] | None]


def _pairs(s: DiffSettings) -> tuple[list[Pair], str, str]:
    if s.rev is not None:
        from .gitrev import GitError, commit_of, records_at

        try:
            commit = commit_of(s.rev)
            old = records_at(commit, s.paths or ("designs",))
        except GitError as exc:
            raise DiffError(str(exc)) from None
        new = _current(s.paths)
        pairs: list[Pair] = [((f"{s.rev}:{p}", old[p]) if p in old else None,
                              (p, new[p]) if p in new else None)
                             for p in sorted(set(old) | set(new))]
        return pairs, f"{s.rev} ({commit[:12]})", "working tree"
    if s.approved:
        try:
            store = bl.read_store(s.baseline, required=True)
        except bl.BaselineError as exc:
            raise DiffError(str(exc)) from None
        assert store is not None
        new = _current(s.paths)
        by_name = {_name(p, d): p for p, d in new.items()}
        by_path = {bl.portable(p): p for p in new}
        pairs, used = [], set()
        for a in store.designs:
            if not bl.in_scope(a.path, s.paths or ("designs",)):
                continue
            match = by_name.get(a.name) or by_path.get(a.path)
            old_side = (f"approved r{a.revision}:{a.path}", a.record_text.encode("utf-8"))
            pairs.append((old_side, (match, new[match]) if match else None))
            used.add(match)
        pairs += [(None, (p, new[p])) for p in sorted(new) if p not in used]
        return pairs, f"approved in {s.baseline}", "working tree"
    if len(s.paths) != 2:
        raise DiffError("give two record files (OLD NEW), or --rev REV, or --approved")
    old_path, new_path = s.paths
    return [((old_path, _read(old_path)), (new_path, _read(new_path)))], old_path, new_path


def _side(item: tuple[str, bytes] | None) -> Side | None:
    if item is None:
        return None
    path, data = item
    return Side(label=path, text=data.decode("utf-8", "replace"), result=check_data(path, data))


def diffs(pairs: list[Pair]) -> tuple[list[RecordDiff], int]:
    """Analyse and compare every pair whose bytes differ; also count the identical ones."""
    out, unchanged = [], 0
    for old, new in pairs:
        if old is not None and new is not None and old[1] == new[1]:
            unchanged += 1
            continue
        tolerance: Mapping[str, float] = bl.source_of(*new).tolerance if new else {}
        out.append(compare(_side(old), _side(new), dict(tolerance)))
    return out, unchanged


def run_diff(s: DiffSettings) -> int:
    from .report import diffview

    try:
        pairs, old_label, new_label = _pairs(s)
    except DiffError as exc:
        print(f"loopvet: {exc}", file=sys.stderr)
        return 2
    found, unchanged = diffs(pairs)
    if s.format == "json":
        sys.stdout.write(dumps(diffview.to_json(found, old_label, new_label, unchanged)))
    elif s.format == "markdown":
        sys.stdout.write(diffview.markdown(found, old_label, new_label, unchanged))
    else:
        sys.stdout.write(diffview.text(found, old_label, new_label, unchanged))
    return 0

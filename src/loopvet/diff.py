"""Record diffs as a control engineer reads them: frozen change values, no rendering.

:func:`record_changes` compares two record texts value by value (parsed with the same
bounded, execution-free YAML reader as the records themselves): parameter, controller,
requirement values old -> new, blocks and keys added or removed. Lists (zeros, poles,
ranges, matrices) are compared as whole values. A text change that changes no value is one
``format`` change. :func:`compare` adds what the changes cause: metric deltas under the
drift rules and requirement verdict changes.

Messages are fixed templates built here; strings from a record appear through ``repr``
(control characters escaped), so a renderer can print them as they are.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any, Literal

import yaml

from .baseline import Outcome, outcome_of
from .drift import MetricChange, VerdictChange, metric_changes, verdict_changes
from .record.yamlio import YamlProblem, read_document
from .results import DesignResult

Kind = Literal["added", "removed", "changed", "format", "unreadable"]

BLOCKS = ("plant", "controller", "sensor", "prefilter")
_PLAIN = re.compile(r"[A-Za-z0-9_.+\-]+")
_SHOW_CHARS = 60


@dataclass(frozen=True, kw_only=True, slots=True)
class Change:
    """One changed value of a record: dotted key path, kind, old and new plain values."""

    key: str
    kind: Kind
    old: Any = None
    new: Any = None
    message: str

    def to_json(self) -> dict[str, Any]:
        return {"key": self.key, "change": self.kind, "old": self.old, "new": self.new,
                "message": self.message}


def show(value: Any) -> str:
    """A YAML value in a message: numbers as written, strings quoted and escaped."""
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        return repr(value)
    if isinstance(value, list):
        return "[" + ", ".join(show(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{_part(k)}: {show(v)}" for k, v in value.items()) + "}"
    text = str(value)
    if len(text) > _SHOW_CHARS:
        return repr(text[:_SHOW_CHARS - 3] + "...")
    return repr(text)


def _part(key: Any) -> str:
    text = str(key)
    return text if _PLAIN.fullmatch(text) else repr(text)


def label(path: list[str]) -> str:
    """'parameters.tau.nominal' -> 'parameter tau nominal'; a whole block -> 'sensor block'."""
    words = [_part(p) for p in path]
    if words[0] == "parameters":
        words[0] = "parameter"
    elif words[0] == "requirements":
        words[0] = "requirement"
    elif words[0] == "baseline_tolerance":
        words[0] = "drift tolerance"
    elif words[0] in BLOCKS and len(words) == 1:
        words[0] += " block"
    return " ".join(words)


def _change(path: list[str], kind: Kind, old: Any, new: Any) -> Change:
    name = label(path)
    if kind == "added":
        message = f"{name} added: {show(new)}"
    elif kind == "removed":
        message = f"{name} removed (was {show(old)})"
    elif isinstance(old, str) and isinstance(new, str) and (
            "\n" in old + new or max(len(old), len(new)) > _SHOW_CHARS):
        message = f"{name} edited (free text)"
    else:
        message = f"{name}: {show(old)} -> {show(new)}"
    return Change(key=".".join(str(p) for p in path), kind=kind, old=old, new=new,
                  message=message)


def _plain(node: yaml.Node) -> Any:
    from .record.schema import scalar_value

    if isinstance(node, yaml.MappingNode):
        return {str(_plain(k)): _plain(v) for k, v in node.value}
    if isinstance(node, yaml.SequenceNode):
        return [_plain(v) for v in node.value]
    try:
        return scalar_value(node)      # type: ignore[arg-type]
    except ValueError:
        return node.value


def _same(a: Any, b: Any) -> bool:
    if isinstance(a, bool) or isinstance(b, bool):
        return type(a) is type(b) and a == b
    if isinstance(a, list) and isinstance(b, list):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b, strict=True))
    if isinstance(a, dict) and isinstance(b, dict):
        return a.keys() == b.keys() and all(_same(a[k], b[k]) for k in a)
    return bool(a == b) and isinstance(a, str) == isinstance(b, str)


def _walk(old: Any, new: Any, path: list[str], out: list[Change]) -> None:
    if isinstance(old, dict) and isinstance(new, dict):
        for k, v in new.items():
            if k not in old:
                out.append(_change([*path, k], "added", None, v))
            else:
                _walk(old[k], v, [*path, k], out)
        out.extend(_change([*path, k], "removed", v, None) for k, v in old.items()
                   if k not in new)
    elif not _same(old, new):
        out.append(_change(path, "changed", old, new))


def record_changes(old_text: str, new_text: str) -> tuple[Change, ...]:
    """What changed from one record text to another, in the new record's key order."""
    if old_text == new_text:
        return ()
    try:
        old = _plain(read_document("old", old_text.encode("utf-8")).root)
        new = _plain(read_document("new", new_text.encode("utf-8")).root)
    except YamlProblem as exc:
        return (Change(key="", kind="unreadable", message="the record texts cannot be compared "
                       f"value by value: {exc.problem.message}"),)
    out: list[Change] = []
    if isinstance(old, dict) and isinstance(new, dict):
        _walk(old, new, [], out)
    elif not _same(old, new):
        out.append(Change(key="", kind="changed", old=old, new=new,
                          message="the record is not a mapping on one side"))
    if not out:
        out.append(Change(key="", kind="format", message="only formatting or comments "
                          "changed: every value is the same"))
    return tuple(out)


# ------------------------------------------------------------------- one record, two sides

@dataclass(frozen=True, kw_only=True, slots=True)
class Side:
    """One version of a record: where it came from, its text and its checked result."""

    label: str               # 'designs/x.yaml', 'HEAD~1:designs/x.yaml', 'approved r3'
    text: str
    result: DesignResult


@dataclass(frozen=True, kw_only=True, slots=True)
class RecordDiff:
    name: str
    status: Literal["added", "removed", "changed"]
    old: Side | None
    new: Side | None
    record: tuple[Change, ...] = ()
    metrics: tuple[MetricChange, ...] = ()
    verdicts: tuple[VerdictChange, ...] = ()

    def to_json(self) -> dict[str, Any]:
        def side(s: Side | None) -> dict[str, Any] | None:
            if s is None:
                return None
            out: dict[str, Any] = {"source": s.label, "revision": s.result.revision,
                                   "status": s.result.status}
            if s.result.status == "invalid":
                out["errors"] = [e.to_json() for e in s.result.errors]
            return out

        return {"name": self.name, "status": self.status, "old": side(self.old),
                "new": side(self.new), "record_changes": [c.to_json() for c in self.record],
                "metric_changes": [c.to_json() for c in self.metrics],
                "verdict_changes": [v.to_json() for v in self.verdicts]}


def compare(old: Side | None, new: Side | None, tolerance: dict[str, float]) -> RecordDiff:
    """The diff of two versions of one record (either may be missing: added/removed)."""
    if old is None or new is None:
        present = new or old
        assert present is not None
        return RecordDiff(name=present.result.name, status="added" if old is None else
                          "removed", old=old, new=new)
    changes = record_changes(old.text, new.text)
    metrics: tuple[MetricChange, ...] = ()
    verdicts: tuple[VerdictChange, ...] = ()
    if "invalid" not in (old.result.status, new.result.status):
        before: Outcome = outcome_of(old.result)
        after = outcome_of(new.result)
        metrics = metric_changes(before, after, tolerance)
        verdicts = verdict_changes(before, after)
    return RecordDiff(name=new.result.name, status="changed", old=old, new=new,
                      record=changes, metrics=metrics, verdicts=verdicts)

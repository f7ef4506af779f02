"""Result values of a check run and their strict-JSON form (results-format v1).

Renderers (text, JSON, HTML, JUnit, Markdown) read these values; nothing here computes
an analysis. Infinite numbers become ``"inf"``/``"-inf"``, NaN becomes null.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from typing import Any, Literal

from . import __version__
from .findings import Finding
from .record.errors import RecordProblem
from .verdict import Entry

DesignStatus = Literal["pass", "fail", "invalid"]


@dataclass(frozen=True, kw_only=True, slots=True)
class DesignResult:
    name: str
    revision: int | None
    path: str
    status: DesignStatus
    errors: tuple[RecordProblem, ...] = ()
    title: str = ""
    gain: dict[str, Any] | None = None
    locus: dict[str, Any] | None = None
    poles: list[list[float]] | None = None
    metrics: dict[str, Any] = field(default_factory=dict)
    requirements: tuple[Entry, ...] = ()
    findings: tuple[Finding, ...] = ()
    sweep: dict[str, Any] | None = None
    baseline: dict[str, Any] | None = None
    extra: dict[str, Any] = field(default_factory=dict)

    def to_json(self) -> dict[str, Any]:
        out: dict[str, Any] = {"name": self.name, "revision": self.revision, "path": self.path,
                               "status": self.status}
        if self.title:
            out["title"] = self.title
        if self.status == "invalid":
            out["errors"] = [e.to_json() for e in self.errors]
        for key in ("gain", "locus", "poles"):
            value = getattr(self, key)
            if value is not None:
                out[key] = value
        if self.status != "invalid":
            out["metrics"] = dict(self.metrics)
            out["requirements"] = [_entry(e) for e in self.requirements]
        out["findings"] = [f.to_json() for f in self.findings]
        if self.sweep is not None:
            out["sweep"] = self.sweep
        if self.baseline is not None:
            out["baseline"] = self.baseline
        out.update(self.extra)
        return out


def _entry(e: Entry) -> dict[str, Any]:
    out: dict[str, Any] = {"key": e.key, "status": e.status, "value": e.value,
                           "bound": e.bound, "headroom": e.headroom, "scope": e.scope,
                           "where": e.where}
    if e.note:
        out["note"] = e.note
    return out


@dataclass(frozen=True, kw_only=True, slots=True)
class Summary:
    designs: int
    passed: int
    failed: int
    invalid: int
    degraded: int = 0
    revision_not_bumped: int = 0
    removed: int = 0          # approved designs whose record is gone (never an exit reason)

    @property
    def exit_code(self) -> int:
        """The exit code of ``loopvet check`` (results-format "Exit codes").

        3 if any record is invalid, else 1 if any requirement fails, else 4 if anything
        degraded beyond tolerance or changed without a revision bump, else 0.
        """
        if self.invalid:
            return 3
        if self.failed:
            return 1
        if self.degraded or self.revision_not_bumped:
            return 4
        return 0

    def to_json(self) -> dict[str, int]:
        return {"designs": self.designs, "pass": self.passed, "fail": self.failed,
                "invalid": self.invalid, "degraded": self.degraded,
                "revision_not_bumped": self.revision_not_bumped, "removed": self.removed,
                "exit_code": self.exit_code}


@dataclass(frozen=True, kw_only=True, slots=True)
class FleetResult:
    designs: tuple[DesignResult, ...]
    settings: dict[str, Any] = field(default_factory=dict)
    baseline: dict[str, Any] | None = None   # which baseline was compared, and whether it could be

    @property
    def summary(self) -> Summary:
        ds = [d for d in self.designs if not (d.baseline and
                                              d.baseline.get("status") == "removed")]
        degraded = sum(1 for d in ds if d.baseline and d.baseline.get("status") == "degraded")
        stale = sum(1 for d in ds if d.baseline and d.baseline.get("content_changed")
                    and not d.baseline.get("revision_bumped"))
        return Summary(designs=len(ds), passed=sum(d.status == "pass" for d in ds),
                       failed=sum(d.status == "fail" for d in ds),
                       invalid=sum(d.status == "invalid" for d in ds), degraded=degraded,
                       revision_not_bumped=stale, removed=len(self.designs) - len(ds))

    def to_json(self) -> dict[str, Any]:
        out: dict[str, Any] = {"loopvet": 1, "tool_version": __version__}
        if self.settings:
            out["settings"] = self.settings
        if self.baseline is not None:
            out["baseline"] = self.baseline
        out["designs"] = [d.to_json() for d in self.designs]
        out["summary"] = self.summary.to_json()
        return out


def strict(value: Any) -> Any:
    """Replace non-finite floats for RFC 8259 JSON: +-inf -> "inf"/"-inf", NaN -> None."""
    if isinstance(value, float):
        if math.isnan(value):
            return None
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return value
    if isinstance(value, dict):
        return {str(k): strict(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [strict(v) for v in value]
    if hasattr(value, "item") and callable(value.item):   # numpy scalars
        return strict(value.item())
    return value


def dumps(data: Any, *, sort_keys: bool = False) -> str:
    """Strict JSON text with two-space indent and one trailing newline.

    Lists of plain numbers (pole pairs, intervals) stay on one line so that the file reads
    well in a diff; everything else is indented.
    """
    return _dump(strict(data), 0, sort_keys) + "\n"


def _dump(value: Any, level: int, sort_keys: bool) -> str:
    pad, inner = "  " * level, "  " * (level + 1)
    if isinstance(value, dict):
        if not value:
            return "{}"
        keys = sorted(value) if sort_keys else list(value)
        items = [f"{inner}{json.dumps(k, ensure_ascii=False)}: "
                 f"{_dump(value[k], level + 1, sort_keys)}" for k in keys]
        return "{\n" + ",\n".join(items) + "\n" + pad + "}"
    if isinstance(value, list):
        if not value:
            return "[]"
        if all(not isinstance(v, dict | list) for v in value) or all(
                isinstance(v, list) and all(not isinstance(x, dict | list) for x in v)
                for v in value) and len(value) <= 2:
            return json.dumps(value, allow_nan=False, ensure_ascii=False)
        items = [inner + _dump(v, level + 1, sort_keys) for v in value]
        return "[\n" + ",\n".join(items) + "\n" + pad + "]"
    return json.dumps(value, allow_nan=False, ensure_ascii=False)

"""The approved baseline (results-format v1, "Baseline file"): values, validation, text, write.

Layout of the file (JSON, sorted keys, two-space indent, one trailing newline)::

    {
      "designs": {"<name>": <entry>, ...},
      "kind": "baseline",
      "loopvet": 1,
      "settings": {"analysis": {...}, "key": "<16 hex digits>", "results_format": 1,
                   "tool_version": "0.1.0"}
    }

An entry holds ``approved_at`` (UTC ISO 8601), ``approved_by``, ``note`` (optional),
``failing_accepted`` (true when a failing record was approved on purpose), ``path``,
``revision``, ``record_sha256`` (of the file bytes), ``record_lines`` (the record text split
at "\\n": joined with "\\n" they are the file text exactly, so the hash can be checked and a
pull request shows a record change line by line), ``status``, ``metrics``, ``requirements``
(key, scope, status, value, bound) and, for swept records, ``sweep`` (samples,
failed_samples, yield, worst). Numbers follow the results format: "inf"/"-inf", null.

Everything here is a pure function of values except :func:`read_store` (reads the file)
and :func:`write_store` (one atomic write: temporary file beside it, then rename).
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from . import __version__
from .record.errors import RecordInvalid
from .record.load import parse_record
from .results import DesignResult, strict

FORMAT = 1
KIND = "baseline"
_NAME = re.compile(r"[a-z0-9][a-z0-9._-]{0,63}")
_SHA = re.compile(r"[0-9a-f]{64}")

#: analysis options that shape the numbers (module, constant); part of the settings key
ANALYSIS_OPTIONS: tuple[tuple[str, str], ...] = (
    ("design", "RANGE_SAMPLES"), ("design", "GAIN_SAMPLES"), ("design", "REFINE_EVALUATIONS"),
    ("frequency", "PER_DECADE"), ("frequency", "REFINE_POINTS"), ("frequency", "PEAK_ROUNDS"),
    ("frequency", "PEAK_RTOL"), ("frequency", "PEAK_XTOL"),
    ("time", "SETTLE_TOL"),
)


class BaselineError(Exception):
    """A baseline file that cannot be used; ``problems`` says every thing wrong with it."""

    def __init__(self, path: str, problems: Sequence[str]):
        super().__init__("\n".join(f"{path}: {p}" for p in problems))
        self.path = path
        self.problems = tuple(problems)


@dataclass(frozen=True, kw_only=True, slots=True)
class Verdict:
    """One requirement entry as judged: key, scope, status, value, bound."""

    key: str
    scope: str
    status: str
    value: Any
    bound: Mapping[str, Any]


@dataclass(frozen=True, kw_only=True, slots=True)
class Outcome:
    """What drift compares: nominal metrics and requirement verdicts of one design."""

    status: str
    metrics: Mapping[str, Any] = field(default_factory=dict)
    requirements: tuple[Verdict, ...] = ()


@dataclass(frozen=True, kw_only=True, slots=True)
class Approved:
    """One approved design of the baseline."""

    name: str
    path: str
    revision: int
    record_sha256: str
    record_text: str
    approved_at: str
    approved_by: str
    note: str = ""
    failing_accepted: bool = False
    outcome: Outcome
    sweep: Mapping[str, Any] | None = None


@dataclass(frozen=True, kw_only=True, slots=True)
class Store:
    settings: Mapping[str, Any]
    designs: tuple[Approved, ...] = ()

    def get(self, name: str) -> Approved | None:
        return next((a for a in self.designs if a.name == name), None)


@dataclass(frozen=True, kw_only=True, slots=True)
class Source:
    """The bytes a design was analysed from, as the baseline needs them."""

    path: str
    sha256: str
    text: str                                   # exact text (a BOM stays in it)
    tolerance: Mapping[str, float] = field(default_factory=dict)


def source_of(path: str, data: bytes) -> Source:
    """Hash, text and ``baseline_tolerance`` of a record file's bytes (no file access)."""
    try:
        tolerance = dict(parse_record(path, data).baseline_tolerance)
    except RecordInvalid:
        tolerance = {}
    return Source(path=path, sha256=hashlib.sha256(data).hexdigest(),
                  text=data.decode("utf-8", errors="replace"), tolerance=tolerance)


# --------------------------------------------------------------------------- settings key

def fingerprint() -> dict[str, Any]:
    """Everything that changes the numbers of a check, and its key.

    The tool version, the results-format version and the analysis options (sampling and
    refinement constants of the analysis). The command-line options of ``check`` do not
    change results (``--jobs``/``--cluster`` give identical bytes; ``--out``/``--format``
    only choose where and how), and per-record options are in the record, whose hash is
    stored. Library versions (numpy, scipy) are left out on purpose: their rounding-level
    differences are what the drift tolerances absorb.
    """
    from importlib import import_module

    analysis = {}
    for module, name in ANALYSIS_OPTIONS:
        mod = import_module(f"loopvet.analysis.{module}")
        analysis[f"{module}.{name.lower()}"] = getattr(mod, name, None)
    body = {"analysis": analysis, "results_format": 1, "tool_version": __version__}
    return {**body, "key": settings_key(body)}


def settings_key(body: Mapping[str, Any]) -> str:
    text = json.dumps(strict({k: v for k, v in body.items() if k != "key"}), sort_keys=True,
                      separators=(",", ":"))
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def differences(old: Mapping[str, Any], new: Mapping[str, Any]) -> list[str]:
    """Readable differences between two fingerprints ('tool_version 0.0.9 -> 0.1.0')."""
    out = []
    flat_old, flat_new = _flat(old), _flat(new)
    for k in sorted(set(flat_old) | set(flat_new)):
        if k != "key" and flat_old.get(k) != flat_new.get(k):
            out.append(f"{k} {flat_old.get(k)!r} -> {flat_new.get(k)!r}")
    return out or ["settings key differs"]


def _flat(d: Mapping[str, Any], prefix: str = "") -> dict[str, Any]:
    out: dict[str, Any] = {}
    for k, v in d.items():
        if isinstance(v, Mapping):
            out.update(_flat(v, f"{prefix}{k}."))
        else:
            out[f"{prefix}{k}"] = v
    return out


# ------------------------------------------------------------------------------ building

def outcome_of(result: DesignResult) -> Outcome:
    return Outcome(status=result.status, metrics=dict(result.metrics), requirements=tuple(
        Verdict(key=e.key, scope=e.scope, status=e.status, value=e.value, bound=dict(e.bound))
        for e in result.requirements))


def approve(result: DesignResult, source: Source, *, by: str, at: str, note: str = ""
            ) -> Approved:
    """The baseline entry for a checked, valid record."""
    assert result.status != "invalid" and result.revision is not None
    sweep: dict[str, Any] | None = None
    if result.sweep is not None:
        sweep = {k: result.sweep[k] for k in ("samples", "failed_samples", "yield", "worst")
                 if k in result.sweep}
    return Approved(name=result.name, path=portable(result.path), revision=result.revision,
                    record_sha256=source.sha256, record_text=source.text, approved_at=at,
                    approved_by=by, note=note, failing_accepted=result.status == "fail",
                    outcome=outcome_of(result), sweep=sweep)


def updated(store: Store | None, settings: Mapping[str, Any], approved: Iterable[Approved],
            dropped: Iterable[str] = ()) -> Store:
    """``store`` with ``approved`` entries put in and ``dropped`` names taken out; every
    other entry is kept as it is."""
    entries = {a.name: a for a in (store.designs if store else ())}
    for name in dropped:
        entries.pop(name, None)
    for a in approved:
        entries[a.name] = a
    return Store(settings=dict(settings), designs=tuple(entries[n] for n in sorted(entries)))


def portable(path: str) -> str:
    """A path as stored: normalised, with forward slashes."""
    return os.path.normpath(path).replace(os.sep, "/")


def in_scope(path: str, scope: Sequence[str]) -> bool:
    """Whether a stored record path lies in one of the checked paths (files or folders)."""
    target = os.path.abspath(path)
    for p in scope:
        root = os.path.abspath(p)
        if target == root or target.startswith(root.rstrip(os.sep) + os.sep):
            return True
    return False


# ------------------------------------------------------------------------- text and disk

def to_json(store: Store) -> dict[str, Any]:
    designs = {}
    for a in store.designs:
        entry: dict[str, Any] = {
            "approved_at": a.approved_at, "approved_by": a.approved_by,
            "failing_accepted": a.failing_accepted, "path": a.path, "revision": a.revision,
            "record_sha256": a.record_sha256, "record_lines": a.record_text.split("\n"),
            "status": a.outcome.status, "metrics": dict(a.outcome.metrics),
            "requirements": [{"key": v.key, "scope": v.scope, "status": v.status,
                              "value": v.value, "bound": dict(v.bound)}
                             for v in a.outcome.requirements],
        }
        if a.note:
            entry["note"] = a.note
        if a.sweep is not None:
            entry["sweep"] = dict(a.sweep)
        designs[a.name] = entry
    return {"designs": designs, "kind": KIND, "loopvet": FORMAT, "settings": dict(store.settings)}


def dumps(store: Store) -> str:
    """The file text: strict JSON, sorted keys, two-space indent, one trailing newline."""
    return json.dumps(strict(to_json(store)), indent=2, sort_keys=True, ensure_ascii=False,
                      allow_nan=False) + "\n"


def write_store(path: str, store: Store) -> None:
    from .report.files import write_atomic

    write_atomic(path, dumps(store))


def read_store(path: str, *, required: bool = False) -> Store | None:
    """The baseline at ``path``; None when there is none and none was required.

    Raises :class:`BaselineError` when the file is missing but required, unreadable, or
    not a valid baseline (see :func:`parse_store`)."""
    try:
        with open(path, "rb") as fh:
            data = fh.read()
    except FileNotFoundError:
        if required:
            raise BaselineError(path, ["no such file (create it with 'loopvet approve')"]) \
                from None
        return None
    except OSError as exc:
        raise BaselineError(path, [f"cannot read the file: {exc.strerror}"]) from None
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise BaselineError(path, [f"not UTF-8 text (byte {exc.start})"]) from None
    return parse_store(path, text)


def parse_store(path: str, text: str) -> Store:
    """Validate baseline text; every problem is collected and raised together."""
    try:
        doc = json.loads(text, parse_constant=_reject_constant)
    except ValueError as exc:
        raise BaselineError(path, [f"not valid JSON ({exc})"]) from None
    if not isinstance(doc, dict):
        raise BaselineError(path, [f"expected a JSON object at the top, got {_kind(doc)}"])
    if doc.get("kind") != KIND:
        if "summary" in doc:
            raise BaselineError(path, ["this looks like a results.json, not a baseline "
                                       "(baselines are written by 'loopvet approve')"])
        raise BaselineError(path, [f"'kind' must be 'baseline', got {doc.get('kind')!r}"])
    if doc.get("loopvet") != FORMAT:
        raise BaselineError(path, [f"baseline format version {doc.get('loopvet')!r} is not "
                                   f"known; this loopvet reads version {FORMAT}"])
    problems: list[str] = []
    settings = doc.get("settings")
    if not isinstance(settings, dict) or not isinstance(settings.get("key"), str):
        problems.append("settings: missing, or without its 'key'")
        settings = {}
    elif settings_key(settings) != settings["key"]:
        problems.append("settings: the key does not match the settings (hand-edited?)")
    designs = doc.get("designs")
    entries: list[Approved] = []
    if not isinstance(designs, dict):
        problems.append(f"designs: expected an object keyed by design name, got "
                        f"{_kind(designs)}")
    else:
        for name in sorted(designs):
            entry = _entry(name, designs[name], problems)
            if entry is not None:
                entries.append(entry)
    unknown = sorted(set(doc) - {"designs", "kind", "loopvet", "settings"})
    problems += [f"{k}: unknown key" for k in unknown]
    if problems:
        raise BaselineError(path, problems)
    return Store(settings=settings, designs=tuple(entries))


def _reject_constant(name: str) -> Any:
    raise ValueError(f"{name} is not strict JSON; write infinities as \"inf\"")


def _kind(value: Any) -> str:
    return {dict: "an object", list: "a list", str: "a string", bool: "a boolean",
            type(None): "null"}.get(type(value), "a number")


def _entry(name: str, raw: Any, problems: list[str]) -> Approved | None:
    where = f"designs.{name}"
    if not _NAME.fullmatch(name):
        problems.append(f"{where}: {name!r} is not a design name")
        return None
    if not isinstance(raw, dict):
        problems.append(f"{where}: expected an object, got {_kind(raw)}")
        return None
    before = len(problems)

    def get(key: str, types: tuple[type, ...], what: str, optional: bool = False) -> Any:
        if key not in raw:
            if not optional:
                problems.append(f"{where}: missing '{key}'")
            return None
        value = raw[key]
        if not isinstance(value, types) or (isinstance(value, bool) and bool not in types):
            problems.append(f"{where}.{key}: expected {what}, got {_kind(value)}")
            return None
        return value

    revision = get("revision", (int,), "a whole number")
    sha = get("record_sha256", (str,), "a hex digest")
    lines = get("record_lines", (list,), "a list of lines")
    path = get("path", (str,), "a path")
    at = get("approved_at", (str,), "a UTC time")
    by = get("approved_by", (str,), "a name")
    note = get("note", (str,), "text", optional=True) or ""
    failing = get("failing_accepted", (bool,), "true or false")
    status = get("status", (str,), "'pass' or 'fail'")
    metrics = get("metrics", (dict,), "an object")
    reqs = get("requirements", (list,), "a list")
    sweep = get("sweep", (dict,), "an object", optional=True)
    unknown = sorted(set(raw) - {"revision", "record_sha256", "record_lines", "path",
                                 "approved_at", "approved_by", "note", "failing_accepted",
                                 "status", "metrics", "requirements", "sweep"})
    problems += [f"{where}.{k}: unknown key" for k in unknown]
    if status is not None and status not in ("pass", "fail"):
        problems.append(f"{where}.status: expected 'pass' or 'fail', got {status!r}")
    if revision is not None and revision < 1:
        problems.append(f"{where}.revision: expected a positive whole number, got {revision}")
    text = None
    if lines is not None:
        if all(isinstance(x, str) for x in lines):
            text = "\n".join(lines)
        else:
            problems.append(f"{where}.record_lines: expected a list of strings")
    if sha is not None and not _SHA.fullmatch(sha):
        problems.append(f"{where}.record_sha256: expected 64 lower-case hex digits")
    elif sha is not None and text is not None and \
            hashlib.sha256(text.encode("utf-8")).hexdigest() != sha:
        problems.append(f"{where}: the stored record does not match its record_sha256 "
                        "(the baseline was edited by hand or damaged)")
    verdicts = _verdicts(where, reqs or [], problems)
    values = {}
    for k, v in (metrics or {}).items():
        values[k] = _number(v, f"{where}.metrics.{k}", problems)
    if len(problems) > before:
        return None
    return Approved(name=name, path=path, revision=revision, record_sha256=sha,
                    record_text=text or "", approved_at=at, approved_by=by, note=note,
                    failing_accepted=failing,
                    outcome=Outcome(status=status, metrics=values, requirements=verdicts),
                    sweep=sweep)


def _verdicts(where: str, raw: list[Any], problems: list[str]) -> tuple[Verdict, ...]:
    out = []
    for i, r in enumerate(raw):
        at = f"{where}.requirements[{i}]"
        if not isinstance(r, dict) or not all(k in r for k in ("key", "scope", "status",
                                                                 "value", "bound")):
            problems.append(f"{at}: expected an object with key, scope, status, value, bound")
            continue
        if not (isinstance(r["key"], str) and isinstance(r["scope"], str)
                and isinstance(r["status"], str) and isinstance(r["bound"], dict)):
            problems.append(f"{at}: key, scope and status must be text and bound an object")
            continue
        value = r["value"] if isinstance(r["value"], bool) else \
            _number(r["value"], f"{at}.value", problems)
        out.append(Verdict(key=r["key"], scope=r["scope"], status=r["status"], value=value,
                           bound=r["bound"]))
    return tuple(out)


def _number(value: Any, at: str, problems: list[str]) -> float | None:
    """A stored number: a JSON number, "inf"/"-inf", or null (the metric does not exist)."""
    if value is None:
        return None
    if value in ("inf", "-inf"):
        return math.inf if value == "inf" else -math.inf
    if isinstance(value, int | float) and not isinstance(value, bool):
        return float(value)
    problems.append(f"{at}: expected a number, \"inf\", \"-inf\" or null, got {value!r}")
    return None

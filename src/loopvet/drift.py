"""Drift against the approved baseline (results-format v1, "Drift"): pure functions on values.

For every value present on both sides (the nominal ``metrics``, the worst values of the
``gain`` and ``sweep`` requirement entries, and every ``stability`` entry) ``delta = new - old``;
a change within tolerance is ``unchanged``. Tolerances: ``baseline_tolerance`` of the current
record for that key (absolute), else 0.1 for ``_deg`` keys, 0.05 for ``_db`` keys, else 0.5 %
of the approved value with an absolute floor of 1e-9.

Direction comes from the requirement's bound on that key: the current record's, or, when the
current record no longer has one, the approved record's (so that deleting a requirement does
not hide a degradation). Better means more headroom (``verdict.headroom``): larger for a
``min`` bound, smaller for a ``max`` bound, further inside for a two-sided bound. Keys
without a bound on either side are ``changed``, never ``degraded``.

Values that are not finite numbers:
* ``inf`` on one side only (a margin that became finite, or unbounded) is always beyond
  tolerance; its delta is +-inf and the bound decides the direction (finite -> inf on a
  ``min`` bound is an improvement).
* null on one side only (the metric came into or out of existence, e.g. a phase margin once
  |L| stops crossing 1) has delta null; with a bound, null is the worse side, since a
  requirement on a metric that does not exist fails.
* stability (true/false): false is the worse side.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from typing import Any, Literal

from .baseline import Approved, Outcome, Source, Store, in_scope, outcome_of
from .metrics import STABILITY
from .record.model import Requirement
from .results import DesignResult, FleetResult
from .verdict import headroom

Direction = Literal["unchanged", "changed", "improved", "degraded"]

SCOPE_WORDS = {"nominal": "", "gain": " (worst over gain range)", "sweep": " (worst over sweep)"}


@dataclass(frozen=True, kw_only=True, slots=True)
class MetricChange:
    key: str
    scope: str
    old: Any
    new: Any
    delta: float | None
    tolerance: float | None
    verdict: Direction

    @property
    def label(self) -> str:
        return self.key + SCOPE_WORDS.get(self.scope, f" ({self.scope})")

    def to_json(self) -> dict[str, Any]:
        return {"key": self.key, "scope": self.scope, "old": self.old, "new": self.new,
                "delta": self.delta, "tolerance": self.tolerance, "verdict": self.verdict}


@dataclass(frozen=True, kw_only=True, slots=True)
class VerdictChange:
    """A requirement entry whose pass/fail status changed, appeared or disappeared."""

    key: str
    scope: str
    old: str | None        # pass | fail | not_evaluated, None: no such entry
    new: str | None

    @property
    def message(self) -> str:
        where = self.key + SCOPE_WORDS.get(self.scope, f" ({self.scope})")
        if self.old is None:
            return f"requirement {where} added: {self.new}"
        if self.new is None:
            return f"requirement {where} removed (was {self.old})"
        return f"requirement {where}: {self.old} -> {self.new}"

    def to_json(self) -> dict[str, Any]:
        return {"key": self.key, "scope": self.scope, "old": self.old, "new": self.new,
                "message": self.message}


def tolerance(key: str, old: float, overrides: Mapping[str, float]) -> float:
    if key in overrides:
        return float(overrides[key])
    if key.endswith("_deg"):
        return 0.1
    if key.endswith("_db"):
        return 0.05
    return max(0.005 * abs(old), 1e-9)


def compare_value(key: str, scope: str, old: Any, new: Any, bound: Mapping[str, Any] | None,
                  overrides: Mapping[str, float]) -> MetricChange | None:
    """The change of one value, or None when both sides are the same."""
    if old == new and type(old) is type(new):
        return None
    if isinstance(old, bool) or isinstance(new, bool):     # stability
        verdict: Direction = "improved" if new is True else "degraded"
        return MetricChange(key=key, scope=scope, old=old, new=new, delta=None,
                            tolerance=None, verdict=verdict)
    if old is None or new is None:
        verdict = "changed" if bound is None else "degraded" if new is None else "improved"
        return MetricChange(key=key, scope=scope, old=old, new=new, delta=None,
                            tolerance=None, verdict=verdict)
    old_f, new_f = float(old), float(new)
    if old_f == new_f:
        return None
    delta = new_f - old_f
    if math.isfinite(old_f):
        tol: float | None = tolerance(key, old_f, overrides)
    else:
        tol = None                                   # inf -> finite: always beyond it
    if tol is not None and math.isfinite(delta) and abs(delta) <= tol:
        verdict = "unchanged"
    elif bound is None:
        verdict = "changed"
    else:
        req = Requirement(key=key, min=bound.get("min"), max=bound.get("max"))
        before, after = headroom(old_f, req), headroom(new_f, req)
        verdict = "improved" if after > before else "degraded" if after < before else "changed"
    return MetricChange(key=key, scope=scope, old=old_f, new=new_f,
                        delta=delta if not math.isnan(delta) else None, tolerance=tol,
                        verdict=verdict)


def _bounds(outcome: Outcome) -> dict[str, Mapping[str, Any]]:
    return {v.key: v.bound for v in outcome.requirements
            if v.key != STABILITY and ("min" in v.bound or "max" in v.bound)}


def metric_changes(old: Outcome, new: Outcome, overrides: Mapping[str, float]
                   ) -> tuple[MetricChange, ...]:
    """Every value that differs between two outcomes, in a stable order: nominal metrics in
    catalogue order, then stability and the gain/sweep worst values in entry order."""
    bounds = {**_bounds(old), **_bounds(new)}
    out = []
    for key, value in new.metrics.items():
        if key in old.metrics:
            c = compare_value(key, "nominal", old.metrics[key], value, bounds.get(key), overrides)
            if c is not None:
                out.append(c)
    before = {(v.key, v.scope): v for v in old.requirements}
    for v in new.requirements:
        if v.scope == "nominal" and v.key != STABILITY:
            continue                        # the same value as in metrics
        was = before.get((v.key, v.scope))
        if was is not None:
            c = compare_value(v.key, v.scope, was.value, v.value,
                              None if v.key == STABILITY else bounds.get(v.key), overrides)
            if c is not None:
                out.append(c)
    return tuple(out)


def verdict_changes(old: Outcome, new: Outcome) -> tuple[VerdictChange, ...]:
    before = {(v.key, v.scope): v.status for v in old.requirements}
    after = {(v.key, v.scope): v.status for v in new.requirements}
    out = [VerdictChange(key=k, scope=s, old=before.get((k, s)), new=st)
           for (k, s), st in after.items() if before.get((k, s)) != st]
    out += [VerdictChange(key=k, scope=s, old=st, new=None)
            for (k, s), st in before.items() if (k, s) not in after]
    return tuple(out)


def overall(changes: Sequence[MetricChange], content_changed: bool) -> str:
    """Design drift status: degraded beats improved beats changed beats unchanged."""
    verdicts = {c.verdict for c in changes}
    for status in ("degraded", "improved", "changed"):
        if status in verdicts:
            return status
    return "changed" if content_changed else "unchanged"


# ------------------------------------------------------------------------ fleet stage

def design_block(result: DesignResult, approved: Approved | None, source: Source | None
                 ) -> dict[str, Any]:
    """The ``baseline`` block of one current design (results-format v1)."""
    if approved is None:
        return {"status": "new", "approved_revision": None, "revision_bumped": False,
                "content_changed": False, "changes": []}
    content_changed = source is None or source.sha256 != approved.record_sha256
    bumped = result.revision is not None and result.revision > approved.revision
    block: dict[str, Any] = {"approved_revision": approved.revision, "revision_bumped": bumped,
                             "content_changed": content_changed,
                             "approved_at": approved.approved_at,
                             "approved_by": approved.approved_by}
    if result.status == "invalid":
        block.update(status="changed" if content_changed else "unchanged", changes=[])
        return block
    new = outcome_of(result)
    changes = metric_changes(approved.outcome, new, source.tolerance if source else {})
    block["status"] = overall(changes, content_changed)
    block["changes"] = [c.to_json() for c in changes]
    verdicts = verdict_changes(approved.outcome, new)
    if verdicts:
        block["verdict_changes"] = [v.to_json() for v in verdicts]
    if content_changed and source is not None:
        from .diff import record_changes

        block["record_changes"] = [c.to_json() for c in
                                   record_changes(approved.record_text, source.text)]
    return block


def removed_result(approved: Approved) -> DesignResult:
    """A design entry for an approved record that no longer exists."""
    return DesignResult(name=approved.name, revision=approved.revision, path=approved.path,
                        status="fail" if approved.outcome.status == "fail" else "pass",
                        baseline={"status": "removed", "approved_revision": approved.revision,
                                  "revision_bumped": False, "content_changed": False,
                                  "approved_at": approved.approved_at,
                                  "approved_by": approved.approved_by, "changes": []})


def apply(fleet: FleetResult, store: Store, sources: Mapping[str, Source], *,
          scope: Sequence[str], path: str, settings: Mapping[str, Any]) -> FleetResult:
    """``fleet`` with the drift against ``store`` filled in.

    ``sources`` maps each result's path to what it was analysed from; ``scope`` (the
    checked paths) decides which approved designs count as removed when they are missing:
    only those whose stored path lies inside it. A store made under other ``settings``
    is not comparable: no per-design blocks, and the fleet-level note says why.
    """
    note: dict[str, Any] = {"path": path, "settings_key": store.settings.get("key")}
    if store.settings.get("key") != settings.get("key"):
        from .baseline import differences

        note.update(comparable=False, reason="made under other settings: "
                    + "; ".join(differences(store.settings, settings)))
        return replace(fleet, baseline=note)
    note["comparable"] = True
    designs = [replace(d, baseline=design_block(d, store.get(d.name), sources.get(d.path)))
               for d in fleet.designs]
    present = {d.name for d in fleet.designs}
    designs += [removed_result(a) for a in store.designs
                if a.name not in present and in_scope(a.path, scope)]
    return replace(fleet, designs=tuple(designs), baseline=note)


__all__ = ["MetricChange", "VerdictChange", "apply", "compare_value", "metric_changes",
           "tolerance", "verdict_changes"]

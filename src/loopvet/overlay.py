"""Approved curves for the report's overlays (a stage after the drift comparison).

For every design whose record changed since approval, the record text stored in the
baseline is analysed again by this loopvet (nominal loop only: its sweep is left out) and
the curves the report draws for the approved design go into the design's
``baseline.curves``: locus branches, nominal closed-loop poles, the frequency response and
Nyquist points with the gain crossovers, and the step and load responses. A record that did
not change needs none (its approved curves are the current ones). An approved record that
this loopvet can no longer analyse gets ``baseline.curves_note`` instead.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import replace
from typing import Any

from .baseline import Approved, Store
from .results import DesignResult, FleetResult


def curves_of(path: str, text: str) -> dict[str, Any]:
    """The overlay curves of one approved record text (raises on an unusable record)."""
    from .analysis.design import check_record
    from .record.load import parse_record

    record = parse_record(path, text.encode("utf-8"))
    result = check_record(replace(record, sweep=None))
    freq = result.extra.get("frequency", {})
    return {"revision": record.revision,
            "branches": (result.locus or {}).get("branches", {}),
            "poles": result.poles or [],
            "frequency": {k: freq[k] for k in ("response", "nyquist", "gain_crossovers")
                          if k in freq},
            "responses": result.extra.get("responses", {})}


def _safe(item: tuple[str, str]) -> dict[str, Any] | str:
    try:
        return curves_of(*item)
    except Exception as exc:  # noqa: BLE001 - an old record must not stop the report
        return f"the approved record could not be analysed by this loopvet ({exc})"


def _wanted(d: DesignResult, store: Store) -> Approved | None:
    b = d.baseline
    if d.status == "invalid" or not b or not b.get("content_changed"):
        return None
    if b.get("status") in ("new", "removed"):
        return None
    return store.get(d.name)


def attach(fleet: FleetResult, store: Store, jobs: int = 1) -> FleetResult:
    """``fleet`` with ``baseline.curves`` on every changed design (see the module notes)."""
    todo = [(i, a) for i, d in enumerate(fleet.designs)
            if (a := _wanted(d, store)) is not None]
    if not todo:
        return fleet
    work = [(a.path, a.record_text) for _, a in todo]
    done = _map(work, jobs)
    designs = list(fleet.designs)
    for (i, _), curves in zip(todo, done, strict=True):
        d = designs[i]
        key = "curves" if isinstance(curves, dict) else "curves_note"
        designs[i] = replace(d, baseline={**(d.baseline or {}), key: curves})
    return replace(fleet, designs=tuple(designs))


def _map(work: Sequence[tuple[str, str]], jobs: int) -> list[dict[str, Any] | str]:
    if jobs <= 1 or len(work) <= 1:
        return [_safe(w) for w in work]
    from concurrent.futures import ProcessPoolExecutor

    with ProcessPoolExecutor(max_workers=min(jobs, len(work))) as pool:
        return list(pool.map(_safe, work, chunksize=1))

"""One record -> one :class:`DesignResult`: assemble the nominal loop, analyse, judge."""

from __future__ import annotations

from typing import Any

import numpy as np

from .. import findings as fd
from ..lti import poly
from ..lti.loop import Loop, assemble, near_cancellations
from ..metrics import POLE_KEYS
from ..record import params
from ..record.errors import RecordInvalid
from ..record.model import Record
from ..results import DesignResult
from ..verdict import Entry, judge, judge_stability, not_evaluated
from .poles import closed_loop_poles, is_stable, pole_metrics


def pairs(values: np.ndarray) -> list[list[float]]:
    """Complex values as [re, im] pairs, rightmost (slowest) first, then by imaginary part."""
    vals = sorted((complex(v) for v in np.ravel(values)), key=lambda c: (-c.real, c.imag))
    return [[float(c.real), float(c.imag)] for c in vals]


def _roots_of(a: np.ndarray) -> np.ndarray:
    deg = int(poly.effective_degree(a[:1])[0])
    if deg <= 0:
        return np.zeros(0, dtype=complex)
    return poly.roots(a[:1, : deg + 1])[0]


def digital_not_yet(record: Record) -> RecordInvalid:
    return RecordInvalid([params.problem(
        record, "sampling", "digital loops are not analysed yet: this version of loopvet "
        "validates the sampling block but analyses continuous-time loops only; remove "
        "sampling to check the continuous design")])


def check_record(record: Record) -> DesignResult:
    """Analyse the nominal loop of a valid record. Raises RecordInvalid if it cannot be
    assembled (for example an improper block or a derived parameter that divides by 0)."""
    if record.sampling is not None:
        raise digital_not_yet(record)
    values = params.values(record, 1)
    loop = assemble(record, values, 1)
    found: list[fd.Finding] = [fd.near_cancellation(c.pole, c.zero, c.pole_block,
                                                    c.zero_block, c.distance)
                               for c in near_cancellations(loop)]
    try:
        pole_set = closed_loop_poles(loop, order=record.pade_order)
    except ValueError:
        raise RecordInvalid([params.problem(
            record, "gain", "the loop is not well posed at the nominal gain: 1 + L(s) "
            "vanishes as s -> infinity, so D + K N loses its leading term; change the gain "
            "or make a block strictly proper")]) from None
    poles = pole_set.poles
    stable = bool(is_stable(poles)[0])
    if pole_set.pade_order:
        found.append(fd.pade_used(float(loop.delay[0]), pole_set.pade_order,
                                  chosen=record.pade_order is None))
    if not stable:
        unstable_count = int(np.sum(poles[0].real >= -1e-10 * np.maximum(1, abs(poles[0]))))
        found.append(fd.unstable(unstable_count, pole_set.pade_order))
    metrics: dict[str, Any] = {k: float(v[0]) for k, v in pole_metrics(poles).items()}
    entries = _judge(record, stable, metrics, found)
    failed = any(e.status == "fail" for e in entries)
    return DesignResult(
        name=record.name, revision=record.revision, path=record.path,
        status="fail" if failed else "pass",
        title=record.title,
        gain={"nominal": record.gain.nominal,
              "range": list(record.gain.range) if record.gain.range else None},
        locus=_locus(loop),
        poles=pairs(poles[0]),
        metrics=metrics, requirements=tuple(entries), findings=tuple(found),
        extra={"delay": float(loop.delay[0]),
               "pade_order": pole_set.pade_order},
    )


def _locus(loop: Loop) -> dict[str, Any]:
    return {"open_loop_poles": pairs(_roots_of(loop.d)),
            "open_loop_zeros": pairs(_roots_of(loop.n))}


def _judge(record: Record, stable: bool, metrics: dict[str, Any],
           found: list[fd.Finding]) -> list[Entry]:
    entries: list[Entry] = []
    for req in record.requirements:
        if req.key == "stability":
            entries.append(judge_stability(req, stable))
        elif req.key in POLE_KEYS:
            entries.append(judge(req, metrics[req.key]))
        else:
            entries.append(not_evaluated(req))
            found.append(fd.not_evaluated(req.key))
        if req.over_gain:
            entries.append(not_evaluated(req, scope="gain",
                                         note="worst case over gain.range not evaluated yet"))
    return entries

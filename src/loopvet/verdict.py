"""Requirements -> requirement entries (pass, fail, not_evaluated) with headroom."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np

from .record.model import Requirement

Status = Literal["pass", "fail", "not_evaluated"]


@dataclass(frozen=True, kw_only=True, slots=True)
class Entry:
    """One row of a design's requirement table (results-format ``requirements``)."""

    key: str
    status: Status
    value: Any                       # float, bool for stability, None when not evaluated
    bound: dict[str, Any]
    headroom: float | None
    scope: Literal["nominal", "gain", "sweep"] = "nominal"
    where: dict[str, Any] | None = None
    note: str = ""


def headroom(value: float, req: Requirement) -> float:
    """(value - bound)/|bound| signed, worst side; for a zero bound the plain difference."""
    parts = []
    if req.min is not None:
        parts.append((value - req.min) / (abs(req.min) if req.min else 1.0))
    if req.max is not None:
        parts.append((req.max - value) / (abs(req.max) if req.max else 1.0))
    return min(parts) if parts else math.inf


def headroom_array(values: np.ndarray, req: Requirement) -> np.ndarray:
    """:func:`headroom` for an array of values; NaN (metric missing) scores -inf."""
    v = np.asarray(values, dtype=np.float64)
    out = np.full(v.shape, np.inf)
    with np.errstate(invalid="ignore"):
        if req.min is not None:
            out = np.minimum(out, (v - req.min) / (abs(req.min) if req.min else 1.0))
        if req.max is not None:
            out = np.minimum(out, (req.max - v) / (abs(req.max) if req.max else 1.0))
    return np.where(np.isnan(v), -np.inf, out)


def judge(req: Requirement, value: float | None, *, scope: str = "nominal",
          where: dict[str, Any] | None = None, note: str = "") -> Entry:
    """Entry for a numeric requirement. ``None`` (the metric does not exist) fails."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return Entry(key=req.key, status="fail", value=None, bound=req.bound, headroom=None,
                     scope=scope, where=where,  # type: ignore[arg-type]
                     note=note or "the metric does not exist for this loop")
    h = headroom(value, req)
    return Entry(key=req.key, status="pass" if h >= 0 else "fail", value=value,
                 bound=req.bound, headroom=h, scope=scope, where=where,  # type: ignore[arg-type]
                 note=note)


def judge_stability(req: Requirement, stable: bool, *, scope: str = "nominal",
                    where: dict[str, Any] | None = None, note: str = "") -> Entry:
    return Entry(key=req.key, status="pass" if stable else "fail", value=stable,
                 bound={"over_gain": req.over_gain}, headroom=None, scope=scope,  # type: ignore[arg-type]
                 where=where, note=note)

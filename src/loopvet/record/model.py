"""The validated, frozen form of a loop record.

Everything downstream (parameters, loop assembly, analyses) reads these values, never the
YAML. Expressions are kept parsed (:class:`~loopvet.record.expr.Expr`); numbers that may
depend on parameters are expressions too, so sweeps re-evaluate them per sample.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

from .expr import Expr

Root = complex | Expr


@dataclass(frozen=True, kw_only=True, slots=True)
class Parameter:
    """A named value: fixed, uncertain over [low, high], or derived from others."""

    name: str
    kind: Literal["fixed", "uncertain", "derived"]
    nominal: float | None = None      # fixed and uncertain
    low: float | None = None          # uncertain only
    high: float | None = None
    expr: Expr | None = None          # derived only


@dataclass(frozen=True, kw_only=True, slots=True)
class Transfer:
    expr: Expr


@dataclass(frozen=True, kw_only=True, slots=True)
class Factored:
    zeros: tuple[Root, ...]
    poles: tuple[Root, ...]
    gain: Expr


@dataclass(frozen=True, kw_only=True, slots=True)
class StateSpace:
    A: tuple[tuple[Expr, ...], ...]
    B: tuple[tuple[Expr, ...], ...]
    C: tuple[tuple[Expr, ...], ...]
    D: tuple[tuple[Expr, ...], ...]


@dataclass(frozen=True, kw_only=True, slots=True)
class Pid:
    """PID in parallel form (kp, ki, kd) or standard form (kc, ti, td); absent terms None."""

    form: Literal["parallel", "standard"]
    kp: Expr | None = None
    ki: Expr | None = None
    kd: Expr | None = None
    kc: Expr | None = None
    ti: Expr | None = None
    td: Expr | None = None
    derivative_filter: Expr | None = None


Form = Transfer | Factored | StateSpace | Pid


@dataclass(frozen=True, kw_only=True, slots=True)
class Block:
    """One block of the loop; ``role`` is plant, controller, sensor or prefilter."""

    role: str
    form: Form | None            # None: the default unity block
    delay: Expr | None = None


@dataclass(frozen=True, kw_only=True, slots=True)
class Gain:
    nominal: float = 1.0
    range: tuple[float, float] | None = None


@dataclass(frozen=True, kw_only=True, slots=True)
class Sampling:
    period: float
    controller_method: str = "tustin"
    prewarp_frequency: float | None = None
    computation_delay: int = 0


@dataclass(frozen=True, kw_only=True, slots=True)
class Requirement:
    key: str
    min: float | None = None
    max: float | None = None
    over_gain: bool = False
    sweep: bool = True
    band: float | None = None     # settling_time_s only
    declared: bool = True         # False for the implicit nominal stability requirement

    @property
    def bound(self) -> dict[str, float]:
        out: dict[str, float] = {}
        if self.min is not None:
            out["min"] = self.min
        if self.max is not None:
            out["max"] = self.max
        return out


@dataclass(frozen=True, kw_only=True, slots=True)
class SweepPlan:
    methods: tuple[str, ...]
    samples: int = 64
    levels: int = 3
    seed: int | None = None
    include_gain: bool = False
    refine: bool = False


@dataclass(frozen=True, kw_only=True, slots=True)
class Record:
    """A validated loop record. ``positions`` maps key paths to (line, column)."""

    path: str
    name: str
    revision: int
    text: str
    sha256: str
    title: str = ""
    owner: str = ""
    notes: str = ""
    parameters: tuple[Parameter, ...] = ()
    plant: Block
    controller: Block
    sensor: Block
    prefilter: Block
    gain: Gain = field(default_factory=Gain)
    sampling: Sampling | None = None
    pade_order: int | None = None
    requirements: tuple[Requirement, ...] = ()
    sweep: SweepPlan | None = None
    baseline_tolerance: tuple[tuple[str, float], ...] = ()
    positions: tuple[tuple[str, int, int], ...] = ()

    def position(self, key: str) -> tuple[int, int]:
        """(line, column) of ``key`` or of its nearest enclosing key; (0, 0) if unknown."""
        table = {k: (line, col) for k, line, col in self.positions}
        while key:
            if key in table:
                return table[key]
            key = key.rpartition(".")[0] if "." in key else ""
        return (0, 0)

    @property
    def blocks(self) -> tuple[Block, Block, Block, Block]:
        return (self.plant, self.controller, self.sensor, self.prefilter)

    def requirement(self, key: str) -> Requirement | None:
        return next((r for r in self.requirements if r.key == key), None)

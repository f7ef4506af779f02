"""Parameter values: nominal point and batches of samples, derived parameters in order."""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from .errors import RecordInvalid, RecordProblem
from .expr import ExpressionError
from .model import Parameter, Record
from .schema import suggest


def derived_order(record: Record) -> tuple[str, ...]:
    """Evaluation order of derived parameters; a cycle or unknown name raises RecordInvalid."""
    params = {p.name: p for p in record.parameters}
    derived = {p.name: p for p in record.parameters if p.kind == "derived"}
    problems: list[RecordProblem] = []
    for p in derived.values():
        assert p.expr is not None
        for name in sorted(p.expr.names - params.keys()):
            problems.append(_problem(record, f"parameters.{p.name}",
                                     f"unknown parameter '{name}'" + _did_you_mean(name, params)))
    if problems:
        raise RecordInvalid(problems)
    order: list[str] = []
    state: dict[str, int] = {}   # 1 = on the stack, 2 = done

    def visit(name: str, stack: list[str]) -> None:
        if state.get(name) == 2:
            return
        if state.get(name) == 1:
            cycle = stack[stack.index(name):] + [name]
            raise RecordInvalid([_problem(record, f"parameters.{stack[stack.index(name)]}",
                                          "derived parameters form a cycle: "
                                          + " -> ".join(cycle)
                                          + "; give one of them a number")])
        state[name] = 1
        stack.append(name)
        expr = derived[name].expr
        assert expr is not None
        for dep in sorted(expr.names):
            if dep in derived:
                visit(dep, stack)
        stack.pop()
        state[name] = 2
        order.append(name)

    for name in derived:
        visit(name, [])
    return tuple(order)


def uncertain(record: Record) -> tuple[Parameter, ...]:
    """The sweep axes: parameters with a range, in record order."""
    return tuple(p for p in record.parameters if p.kind == "uncertain")


def values(record: Record, samples: int = 1,
           axes: Mapping[str, np.ndarray] | None = None) -> dict[str, np.ndarray]:
    """Every parameter's value for ``samples`` samples, shape (samples,) each.

    Uncertain parameters take ``axes[name]`` when given, else their nominal value; derived
    parameters are evaluated in dependency order on the whole batch at once.
    """
    out: dict[str, np.ndarray] = {}
    for p in record.parameters:
        if p.kind == "derived":
            continue
        if axes is not None and p.name in axes:
            out[p.name] = np.asarray(axes[p.name], dtype=np.float64).reshape(samples)
        else:
            out[p.name] = np.full(samples, float(p.nominal if p.nominal is not None else 0.0))
    params = {p.name: p for p in record.parameters}
    for name in derived_order(record):
        expr = params[name].expr
        assert expr is not None
        try:
            out[name] = np.broadcast_to(expr.evaluate(out, samples), (samples,)).copy()
        except ExpressionError as exc:
            raise RecordInvalid([_problem(record, f"parameters.{name}", exc.message)]) from None
    return out


def _did_you_mean(name: str, choices: Mapping[str, object]) -> str:
    return suggest(name, list(choices)) or " (declare it under parameters)"


def _problem(record: Record, key: str, message: str) -> RecordProblem:
    line, col = record.position(key)
    return RecordProblem(path=record.path, line=line, column=col, key=key, message=message)


def problem(record: Record, key: str, message: str) -> RecordProblem:
    """A problem located at ``key`` of ``record`` (for checks after validation)."""
    return _problem(record, key, message)

"""Declaration of loop-record format version 1 and the build of a :class:`Record` from it.

The declaration (:data:`RECORD`) is the single source for validation and for the JSON
Schema that ``loopvet schema`` prints. Checks that tie several keys together live in the
``_check_*`` functions attached to the declaration; checks that need parameter values
(derived parameters, block properness) happen in :mod:`loopvet.record.params` and
:mod:`loopvet.lti.blocks`.
"""

from __future__ import annotations

import re
from typing import Any

import yaml

from ..metrics import METRICS, REQUIREMENT_KEYS, STABILITY
from . import expr as exprmod
from .model import (
    Block,
    Factored,
    Gain,
    Parameter,
    Pid,
    Record,
    Requirement,
    Sampling,
    StateSpace,
    SweepPlan,
    Transfer,
)
from .schema import (
    BAD,
    Boolean,
    ByKind,
    Choice,
    Expression,
    Fields,
    Integer,
    ListOf,
    NamedMap,
    Number,
    Spec,
    Text,
    Walk,
    describe,
    fail_expression,
    join_key,
    scalar_value,
)

NAME_PATTERN = r"[a-z0-9][a-z0-9._-]{0,63}"
PARAM_PATTERN = r"[A-Za-z_][A-Za-z0-9_]{0,63}"
MAX_STATES = 40
SWEEP_METHODS = ("corners", "grid", "lhs", "sobol", "random")
RANDOM_METHODS = ("lhs", "sobol", "random")
CONTROLLER_METHODS = ("tustin", "tustin_prewarp", "zoh", "backward_euler", "matched")
MAX_CORNER_PARAMETERS = 12
_COMPLEX = re.compile(r"^[0-9eE.+\-]*j$")


# ----------------------------------------------------------------------------- leaf specs

class Tolerance(Spec):
    """Absolute tolerance (a number) or relative ('25%')."""

    expected = "a number or a percentage such as '25%'"

    def load(self, node: yaml.Node, w: Walk, key: str) -> Any:
        value = self._scalar(node, w, key)
        if value is BAD:
            return BAD
        if isinstance(value, str) and value.strip().endswith("%"):
            try:
                pct = float(value.strip()[:-1])
            except ValueError:
                return w.fail(node, key, f"expected a percentage such as '25%', got "
                              f"{describe(node)}")
            if not (0 <= pct < 100):
                return w.fail(node, key, f"a relative tolerance must be from 0% to below 100%, "
                              f"got {value.strip()}")
            return ("relative", pct / 100.0)
        number = Number(minimum=0.0).load(node, w, key)
        return BAD if number is BAD else ("absolute", number)

    def json_schema(self) -> dict[str, Any]:
        return {"anyOf": [{"type": "number", "minimum": 0},
                          {"type": "string", "pattern": r"^\s*[0-9.]+(e[+-]?[0-9]+)?\s*%\s*$"}],
                "description": "absolute (number) or relative ('25%') tolerance"}


class RootValue(Spec):
    """A zero or pole: a number, a complex literal '-1+2j', or a parameter expression."""

    expected = "a number, a complex number such as '-1+2j', or a parameter expression"

    def load(self, node: yaml.Node, w: Walk, key: str) -> Any:
        value = self._scalar(node, w, key)
        if value is BAD:
            return BAD
        if isinstance(value, str) and "j" in value and _COMPLEX.match(value.replace(" ", "")):
            try:
                c = complex(value.replace(" ", ""))
            except ValueError:
                return w.fail(node, key, f"{describe(node)} is not a complex number; write it "
                              "as '-1+2j'")
            if c.real != c.real or abs(c) == float("inf"):
                return w.fail(node, key, "expected a finite complex number")
            return c
        if isinstance(value, int | float) and not isinstance(value, bool):
            number = Number().load(node, w, key)
            return BAD if number is BAD else complex(number)
        return Expression(allow_variable=False).load(node, w, key)

    def json_schema(self) -> dict[str, Any]:
        return {"anyOf": [{"type": "number"}, {"type": "string"}],
                "description": "real number, complex '-1+2j' (list conjugates too), or a "
                               "parameter expression"}


def param_expr(description: str = "") -> Expression:
    return Expression(allow_variable=False, description=description)


MATRIX = ListOf(item=ListOf(item=param_expr(), min_items=1, max_items=MAX_STATES),
                min_items=1, max_items=MAX_STATES)


# --------------------------------------------------------------------------- cross checks

def _check_parameter(value: dict[str, Any], node: yaml.MappingNode, w: Walk, key: str) -> None:
    nominal = value["nominal"]
    has_range = "min" in value or "max" in value
    if has_range and "tolerance" in value:
        w.fail(node, key, "give either min/max or tolerance, not both")
        return
    if has_range and not ("min" in value and "max" in value):
        w.fail(node, key, "an uncertain parameter needs both min and max (or a tolerance)")
        return
    if has_range and not value["min"] <= nominal <= value["max"]:
        w.fail(node, key, f"need min <= nominal <= max, got min {value['min']:g}, nominal "
               f"{nominal:g}, max {value['max']:g}")


def _check_block(value: dict[str, Any], node: yaml.MappingNode, w: Walk, key: str) -> None:
    forms = [f for f in ("transfer", "factored", "state_space", "pid") if f in value]
    if len(forms) != 1:
        got = ", ".join(forms) if forms else "none"
        w.fail(node, key, f"a block needs exactly one of transfer, factored, state_space, pid "
               f"(got {got}); a pure dead time is 'transfer: 1' with 'delay: T'")


def _check_pid(value: dict[str, Any], node: yaml.MappingNode, w: Walk, key: str) -> None:
    parallel = [k for k in ("kp", "ki", "kd") if k in value]
    standard = [k for k in ("kc", "ti", "td") if k in value]
    if parallel and standard:
        w.fail(node, key, f"mixes the parallel form ({', '.join(parallel)}) with the standard "
               f"form ({', '.join(standard)}); use kp/ki/kd or kc/ti/td")
    elif not parallel and not standard:
        w.fail(node, key, "needs kp/ki/kd (parallel form) or kc with optional ti/td "
               "(standard form)")
    elif standard and "kc" not in value:
        w.fail(node, key, "the standard form needs kc (ti and td are optional)")
    elif ("kd" in value or "td" in value) and "derivative_filter" not in value:
        w.fail(node, key, "a derivative term needs derivative_filter (the filter time "
               "constant, seconds): an unfiltered derivative is improper")
    elif "derivative_filter" in value and "kd" not in value and "td" not in value:
        w.fail(node, key, "derivative_filter is given but there is no derivative term "
               "(kd or td)")


def _check_gain(value: dict[str, Any], node: yaml.MappingNode, w: Walk, key: str) -> None:
    nominal = value.get("nominal", 1.0)
    if nominal == 0:
        w.fail(node, join_key(key, "nominal"), "the nominal loop gain must not be 0 "
               "(that opens the loop)")
    rng = value.get("range")
    if rng is not None and not rng[0] <= nominal <= rng[1]:
        w.fail(node, join_key(key, "range"), f"need range[0] <= nominal <= range[1], got "
               f"[{rng[0]:g}, {rng[1]:g}] with nominal {nominal:g}")


def _check_sampling(value: dict[str, Any], node: yaml.MappingNode, w: Walk, key: str) -> None:
    method = value.get("controller_method", "tustin")
    if method == "tustin_prewarp" and "prewarp_frequency" not in value:
        w.fail(node, key, "controller_method tustin_prewarp needs prewarp_frequency (rad/s)")
    if "prewarp_frequency" in value and method != "tustin_prewarp":
        w.fail(node, join_key(key, "prewarp_frequency"), "prewarp_frequency is used only "
               "with controller_method: tustin_prewarp")
    wp = value.get("prewarp_frequency")
    if wp is not None and wp * value["period"] >= 3.141592653589793:
        w.fail(node, join_key(key, "prewarp_frequency"), "prewarp_frequency must be below "
               "the Nyquist frequency pi/period")


def _check_sweep(value: dict[str, Any], node: yaml.MappingNode, w: Walk, key: str) -> None:
    methods = value["method"] if isinstance(value["method"], list) else [value["method"]]
    if len(set(methods)) != len(methods):
        w.fail(node, join_key(key, "method"), "a sampling method is listed twice")
    if any(m in RANDOM_METHODS for m in methods) and "seed" not in value:
        w.fail(node, key, "lhs, sobol and random need a seed (any whole number) so that runs "
               "repeat exactly")


def _requirement(key: str) -> Spec:
    if key == STABILITY:
        return Fields(fields={"over_gain": Boolean(), "sweep": Boolean()},
                      description="closed-loop stability; over_gain: for every K in gain.range")
    info = METRICS[key]
    fields: dict[str, Spec] = {side: Number() for side in info.bounds}
    fields |= {"over_gain": Boolean(), "sweep": Boolean()}
    if key == "settling_time_s":
        fields["band"] = Number(exclusive_minimum=0.0, maximum=0.5,
                                description="settling band as a fraction (default 0.02)")

    def check(value: dict[str, Any], node: yaml.MappingNode, w: Walk, path: str) -> None:
        if not any(side in value for side in info.bounds):
            sides = " and/or ".join(info.bounds)
            w.fail(node, path, f"needs a {sides} bound, e.g. {{{info.bounds[0]}: ...}}")
        if "min" in value and "max" in value and value["min"] > value["max"]:
            w.fail(node, path, f"min {value['min']:g} is above max {value['max']:g}")

    return _BoundFields(fields=fields, check=check, metric=key,
                        description=f"{info.label}" + (f" [{info.unit}]" if info.unit else ""))


class _BoundFields(Fields):
    """Requirement bounds: a wrong bound side gets its own message."""

    def __init__(self, *, metric: str, **kw: Any):
        super().__init__(**kw)
        self.metric = metric

    def load(self, node: yaml.Node, w: Walk, key: str) -> Any:
        if isinstance(node, yaml.MappingNode):
            info = METRICS[self.metric]
            for knode, _ in node.value:
                side = getattr(knode, "value", None)
                if side in ("min", "max") and side not in info.bounds:
                    better = "larger" if info.better == "higher" else "smaller"
                    w.fail(knode, join_key(key, str(side)), f"{self.metric} takes a "
                           f"{info.bounds[0]} bound ({better} is better), not {side}")
                    return BAD
        return super().load(node, w, key)


def _check_top(value: dict[str, Any], node: yaml.MappingNode, w: Walk, key: str) -> None:
    if value["loopvet"] != 1:
        w.fail_at("loopvet", f"record-format version {value['loopvet']} is not known; "
                  "this loopvet reads version 1")
    params = value.get("parameters", {})
    for name in params:
        if name in exprmod.RESERVED:
            w.fail_at(f"parameters.{name}", f"'{name}' is reserved (s, z, pi, e and the "
                      "function names); choose another parameter name")
    uncertain = [n for n, p in params.items() if isinstance(p, dict)]
    gain = value.get("gain")
    has_range = isinstance(gain, dict) and gain.get("range") is not None
    requirements = value.get("requirements", {})
    for rkey, req in requirements.items():
        if req.get("over_gain") and not has_range:
            w.fail_at(f"requirements.{rkey}.over_gain", "over_gain needs gain.range, e.g. "
                      "gain: {nominal: 1, range: [0.5, 2]}")
    sweep = value.get("sweep")
    if sweep is not None:
        methods = sweep["method"] if isinstance(sweep["method"], list) else [sweep["method"]]
        if not uncertain and not sweep.get("include_gain"):
            w.fail_at("sweep", "the record has no uncertain parameter to sweep; give a "
                      "parameter min/max or a tolerance, or set include_gain: true")
        if sweep.get("include_gain") and not has_range:
            w.fail_at("sweep.include_gain", "include_gain needs gain.range")
        axes = len(uncertain) + (1 if sweep.get("include_gain") else 0)
        if "corners" in methods and axes > MAX_CORNER_PARAMETERS:
            w.fail_at("sweep.method", f"corners of {axes} uncertain axes would be 2^{axes} "
                      f"samples; more than {MAX_CORNER_PARAMETERS} axes need lhs or sobol")
    sampled = "sampling" in value
    for role in ("plant", "controller", "sensor", "prefilter"):
        block = value.get(role)
        if isinstance(block, dict) and "transfer" in block:
            var = block["transfer"].variable
            if var == "z" and not sampled:
                w.fail_at(f"{role}.transfer", "an expression in z needs sampling.period "
                          "(a sampled-data loop); write continuous blocks in s")


BLOCK = Fields(
    fields={
        "transfer": Expression(allow_variable=True,
                               description="rational expression in s (or z with sampling)"),
        "factored": Fields(fields={"zeros": ListOf(item=RootValue(), max_items=40),
                                   "poles": ListOf(item=RootValue(), max_items=40),
                                   "gain": param_expr()},
                           required=("gain",),
                           description="gain * prod(s - zero) / prod(s - pole)"),
        "state_space": Fields(fields={"A": MATRIX, "B": MATRIX, "C": MATRIX, "D": MATRIX},
                              required=("A", "B", "C", "D"), description="SISO state space"),
        "pid": Fields(fields={k: param_expr() for k in
                              ("kp", "ki", "kd", "kc", "ti", "td", "derivative_filter")},
                      check=_check_pid,
                      description="kp + ki/s + kd s/(Tf s + 1) or "
                                  "kc (1 + 1/(ti s) + td s/(Tf s + 1))"),
        "delay": param_expr("dead time of this block, seconds, >= 0"),
    },
    check=_check_block,
    description="one of transfer, factored, state_space, pid; optional delay",
)

PARAMETER = ByKind(
    scalar=param_expr("fixed value, or a derived expression of other parameters"),
    mapping=Fields(fields={"nominal": Number(), "min": Number(), "max": Number(),
                           "tolerance": Tolerance()},
                   required=("nominal",), check=_check_parameter,
                   description="uncertain parameter"),
    expected_text="a number, an expression, or {nominal, min, max} / {nominal, tolerance}",
)

RECORD = Fields(
    fields={
        "loopvet": Integer(description="record-format version (1)"),
        "name": Text(pattern=NAME_PATTERN, max_length=64,
                     hint="use lower-case letters, digits, '.', '_' and '-', starting with a "
                          "letter or digit, at most 64 characters"),
        "revision": Integer(minimum=1, description="bump whenever the loop changes"),
        "title": Text(max_length=200),
        "owner": Text(max_length=200),
        "notes": Text(max_length=10000),
        "parameters": NamedMap(value=PARAMETER, pattern=PARAM_PATTERN,
                               hint="a parameter name is a letter or '_' followed by letters, "
                                    "digits or '_'"),
        "plant": BLOCK,
        "controller": BLOCK,
        "sensor": BLOCK,
        "prefilter": BLOCK,
        "gain": ByKind(scalar=Number(),
                       mapping=Fields(fields={"nominal": Number(),
                                              "range": ListOf(item=Number(), min_items=2,
                                                              max_items=2)},
                                      check=_check_gain),
                       expected_text="a number or {nominal: K, range: [low, high]}"),
        "sampling": Fields(fields={"period": Number(exclusive_minimum=0.0),
                                   "controller_method": Choice(choices=CONTROLLER_METHODS),
                                   "prewarp_frequency": Number(exclusive_minimum=0.0),
                                   "computation_delay": Integer(minimum=0, maximum=100)},
                           required=("period",), check=_check_sampling),
        "delay_approximation": Fields(fields={"pade": Integer(minimum=1, maximum=12)},
                                      required=("pade",)),
        "requirements": Fields(fields={k: _requirement(k) for k in REQUIREMENT_KEYS}),
        "sweep": Fields(fields={"method": ByKind(scalar=Choice(choices=SWEEP_METHODS),
                                                 sequence=ListOf(item=Choice(
                                                     choices=SWEEP_METHODS), min_items=1,
                                                     max_items=5),
                                                 expected_text="a method or a list of them"),
                                "samples": Integer(minimum=1, maximum=100000),
                                "levels": Integer(minimum=2, maximum=50),
                                "seed": Integer(minimum=0, maximum=2**32 - 1),
                                "include_gain": Boolean(), "refine": Boolean()},
                        required=("method",), check=_check_sweep),
        "baseline_tolerance": Fields(fields={k: Number(minimum=0.0) for k in METRICS}),
    },
    required=("loopvet", "name", "revision", "plant", "controller"),
    check=_check_top,
    description="loopvet loop record, format version 1",
)


def json_schema() -> dict[str, Any]:
    """The JSON Schema (2020-12) of record format v1, from :data:`RECORD`."""
    schema = RECORD.json_schema()
    schema["properties"]["loopvet"] = {"const": 1, "description": "record-format version"}
    return {"$schema": "https://json-schema.org/draft/2020-12/schema",
            "$id": "https://loopvet.invalid/schema/record-v1.json",
            "title": "loopvet loop record, version 1", **schema}


# ------------------------------------------------------------------------------- builders

def _form(value: dict[str, Any]) -> Any:
    if "transfer" in value:
        return Transfer(expr=value["transfer"])
    if "factored" in value:
        f = value["factored"]
        return Factored(zeros=tuple(f.get("zeros", [])), poles=tuple(f.get("poles", [])),
                        gain=f["gain"])
    if "state_space" in value:
        m = value["state_space"]
        return StateSpace(**{k: tuple(tuple(row) for row in m[k]) for k in "ABCD"})
    p = value["pid"]
    return Pid(form="standard" if "kc" in p else "parallel", **p)


def _block(role: str, value: dict[str, Any] | None) -> Block:
    if value is None:
        return Block(role=role, form=None)
    return Block(role=role, form=_form(value), delay=value.get("delay"))


def _parameter(name: str, value: Any) -> Parameter:
    if isinstance(value, dict):
        nominal = value["nominal"]
        if "tolerance" in value:
            kind, tol = value["tolerance"]
            half = abs(nominal) * tol if kind == "relative" else tol
            low, high = nominal - half, nominal + half
        else:
            low, high = value["min"], value["max"]
        if low == high:
            return Parameter(name=name, kind="fixed", nominal=nominal)
        return Parameter(name=name, kind="uncertain", nominal=nominal, low=low, high=high)
    if not value.names:
        return Parameter(name=name, kind="fixed", nominal=float(value.evaluate({}, 1)[0]))
    return Parameter(name=name, kind="derived", expr=value)


def build_record(value: dict[str, Any], w: Walk, *, text: str, sha256: str) -> Record:
    """Freeze a validated mapping into a :class:`Record` (no further checks)."""
    gain = value.get("gain", 1.0)
    if isinstance(gain, dict):
        rng = gain.get("range")
        g = Gain(nominal=gain.get("nominal", 1.0), range=tuple(rng) if rng else None)
    else:
        g = Gain(nominal=gain)
    reqs = [Requirement(key=k, min=r.get("min"), max=r.get("max"),
                        over_gain=r.get("over_gain", False), sweep=r.get("sweep", True),
                        band=r.get("band"))
            for k, r in value.get("requirements", {}).items()]
    if not any(r.key == STABILITY for r in reqs):
        reqs.insert(0, Requirement(key=STABILITY, declared=False))
    order = {k: i for i, k in enumerate(REQUIREMENT_KEYS)}
    reqs.sort(key=lambda r: order[r.key])
    samp = value.get("sampling")
    sweep = value.get("sweep")
    plan = None
    if sweep is not None:
        methods = sweep["method"] if isinstance(sweep["method"], list) else [sweep["method"]]
        plan = SweepPlan(methods=tuple(methods), samples=sweep.get("samples", 64),
                         levels=sweep.get("levels", 3), seed=sweep.get("seed"),
                         include_gain=sweep.get("include_gain", False),
                         refine=sweep.get("refine", False))
    return Record(
        path=w.path, name=value["name"], revision=value["revision"], text=text, sha256=sha256,
        title=value.get("title", ""), owner=value.get("owner", ""), notes=value.get("notes", ""),
        parameters=tuple(_parameter(n, p) for n, p in value.get("parameters", {}).items()),
        plant=_block("plant", value["plant"]), controller=_block("controller",
                                                                 value["controller"]),
        sensor=_block("sensor", value.get("sensor")),
        prefilter=_block("prefilter", value.get("prefilter")),
        gain=g,
        sampling=Sampling(**samp) if samp else None,
        pade_order=value.get("delay_approximation", {}).get("pade"),
        requirements=tuple(reqs), sweep=plan,
        baseline_tolerance=tuple(sorted(value.get("baseline_tolerance", {}).items())),
        positions=tuple((k, line, col) for k, (line, col) in sorted(w.positions.items())),
    )


__all__ = ["RECORD", "build_record", "json_schema", "fail_expression", "scalar_value"]

"""A small declarative schema for YAML node trees.

The same declaration validates a record (with precise positions and did-you-mean
suggestions) and exports a JSON Schema (2020-12) for editors, so the two never drift apart.
Each spec's :meth:`Spec.load` turns a YAML node into plain Python values (``dict``,
``list``, ``float``, ``int``, ``str``, ``bool`` or parsed expressions) and reports problems
into a :class:`Walk`; it returns :data:`BAD` where a value is unusable.
"""

from __future__ import annotations

import difflib
import math
import re
from abc import ABC, abstractmethod
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import yaml

from . import expr as exprmod
from .errors import RecordProblem

BAD: Any = type("Bad", (), {"__repr__": lambda self: "BAD"})()
MAX_NODES = 20000
_SAFE = yaml.SafeLoader("")
_PLAIN_TAGS = ("tag:yaml.org,2002:seq", "tag:yaml.org,2002:map")
_BOOL_HINT = " (YAML reads yes/no/on/off/true/false as true or false; write a number)"
_FLOAT_TEXT = re.compile(r"^[+-]?(\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?$")


#: words people write for a key of ours, checked before spelling similarity
SYNONYMS = {"value": "nominal", "nom": "nominal", "mean": "nominal", "tol": "tolerance",
            "low": "min", "lower": "min", "high": "max", "upper": "max", "tf": "transfer",
            "zpk": "factored", "ss": "state_space", "delay_s": "delay", "deadtime": "delay",
            "dead_time": "delay", "tau_f": "derivative_filter", "tf_filter": "derivative_filter",
            "filter": "derivative_filter", "n": "derivative_filter", "k": "nominal",
            "methods": "method", "n_samples": "samples", "requirement": "requirements",
            "params": "parameters", "feedback": "sensor", "compensator": "controller"}


def suggest(word: str, choices: Sequence[str]) -> str:
    """A ' (did you mean 'x'?)' suffix, or '' when nothing is close."""
    options = list(choices)
    lower = {c.lower(): c for c in options}
    if word.lower() in lower:
        return f" (did you mean '{lower[word.lower()]}'?)"
    if SYNONYMS.get(word.lower()) in options:
        return f" (did you mean '{SYNONYMS[word.lower()]}'?)"
    close = difflib.get_close_matches(word, options, n=1, cutoff=0.6)
    return f" (did you mean '{close[0]}'?)" if close else ""


def join_key(base: str, part: str | int) -> str:
    if isinstance(part, int):
        return f"{base}[{part}]"
    return f"{base}.{part}" if base else part


@dataclass
class Walk:
    """State of one validation: file name, problems found, positions of every key."""

    path: str
    problems: list[RecordProblem] = field(default_factory=list)
    positions: dict[str, tuple[int, int]] = field(default_factory=dict)
    nodes: int = 0

    def fail(self, node: yaml.Node | None, key: str, message: str) -> Any:
        line, col = (node.start_mark.line + 1, node.start_mark.column + 1) if node else (0, 0)
        self.problems.append(RecordProblem(path=self.path, line=line, column=col, key=key,
                                           message=message))
        return BAD

    def fail_at(self, key: str, message: str, offset: int = 0) -> None:
        line, col = self.positions.get(key, (0, 0))
        self.problems.append(RecordProblem(path=self.path, line=line, column=col + offset if line
                                           else 0, key=key, message=message))

    def visit(self, node: yaml.Node, key: str) -> bool:
        self.nodes += 1
        self.positions.setdefault(key, (node.start_mark.line + 1, node.start_mark.column + 1))
        if not isinstance(node, yaml.ScalarNode) and node.tag not in _PLAIN_TAGS:
            self.fail(node, key, f"the YAML tag {node.tag!r} is not allowed in a record; write a "
                      "plain value")
            return False
        if self.nodes > MAX_NODES:
            if self.nodes == MAX_NODES + 1:
                self.fail(node, key, f"record has more than {MAX_NODES} values (YAML aliases "
                          "expanding?); a loop record needs a few hundred at most")
            return False
        return True


def scalar_value(node: yaml.ScalarNode) -> Any:
    """Python value of a plain YAML scalar under the YAML 1.1 safe rules."""
    tag = node.tag
    if tag == "tag:yaml.org,2002:str":
        return node.value
    if tag == "tag:yaml.org,2002:null":
        return None
    if tag == "tag:yaml.org,2002:bool":
        return _SAFE.construct_yaml_bool(node)
    if tag == "tag:yaml.org,2002:int":
        return _SAFE.construct_yaml_int(node)
    if tag == "tag:yaml.org,2002:float":
        return _SAFE.construct_yaml_float(node)
    raise ValueError(tag)


def describe(node: yaml.Node) -> str:
    """How a value is named in messages: 'true', "'abc'", 'a list', 'a mapping'."""
    if isinstance(node, yaml.MappingNode):
        return "a mapping"
    if isinstance(node, yaml.SequenceNode):
        return "a list"
    try:
        value = scalar_value(node)  # type: ignore[arg-type]
    except ValueError:
        return f"a value tagged {node.tag}"
    if value is None:
        return "nothing (null)"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        shown = value if len(value) <= 40 else value[:37] + "..."
        return repr(shown)
    return repr(value)


class Spec(ABC):
    """Base of all schema nodes."""

    expected = "a value"

    @abstractmethod
    def load(self, node: yaml.Node, w: Walk, key: str) -> Any:
        """Validate ``node`` at ``key``; return its value or :data:`BAD`."""

    @abstractmethod
    def json_schema(self) -> dict[str, Any]:
        """The JSON Schema (2020-12) fragment of this spec."""

    def _described(self, out: dict[str, Any]) -> dict[str, Any]:
        text = getattr(self, "description", "")
        if text:
            out["description"] = text
        return out

    def _scalar(self, node: yaml.Node, w: Walk, key: str) -> Any:
        if not isinstance(node, yaml.ScalarNode):
            return w.fail(node, key, f"expected {self.expected}, got {describe(node)}")
        try:
            return scalar_value(node)
        except ValueError:
            return w.fail(node, key, f"the YAML tag {node.tag!r} is not allowed in a record; "
                          "write a plain value")


def _bounded(out: dict[str, Any], minimum: float | None, maximum: float | None
             ) -> dict[str, Any]:
    if minimum is not None:
        out["minimum"] = minimum
    if maximum is not None:
        out["maximum"] = maximum
    return out


@dataclass
class Number(Spec):
    """A finite real number; numeric strings such as '1e-3' are accepted (YAML 1.1 reads them
    as text)."""

    minimum: float | None = None
    maximum: float | None = None
    exclusive_minimum: float | None = None
    description: str = ""
    expected = "a number"

    def load(self, node: yaml.Node, w: Walk, key: str) -> Any:
        value = self._scalar(node, w, key)
        if value is BAD:
            return BAD
        if isinstance(value, str) and _FLOAT_TEXT.match(value.strip()):
            value = float(value)
        if isinstance(value, bool) or not isinstance(value, int | float):
            hint = _BOOL_HINT if isinstance(value, bool) else " (write a plain number such as 2.5)"
            return w.fail(node, key, f"expected a number, got {describe(node)}{hint}")
        value = float(value)
        if not math.isfinite(value):
            return w.fail(node, key, f"expected a finite number, got {describe(node)}")
        return self.check_range(value, node, w, key)

    def check_range(self, value: float, node: yaml.Node, w: Walk, key: str) -> Any:
        if self.minimum is not None and value < self.minimum:
            return w.fail(node, key, f"must be at least {self.minimum:g}, got {value:g}")
        if self.maximum is not None and value > self.maximum:
            return w.fail(node, key, f"must be at most {self.maximum:g}, got {value:g}")
        if self.exclusive_minimum is not None and value <= self.exclusive_minimum:
            return w.fail(node, key, f"must be greater than {self.exclusive_minimum:g}, "
                          f"got {value:g}")
        return value

    def json_schema(self) -> dict[str, Any]:
        out: dict[str, Any] = {"anyOf": [{"type": "number"},
                                         {"type": "string", "pattern": _FLOAT_TEXT.pattern}]}
        num = _bounded(out["anyOf"][0], self.minimum, self.maximum)
        if self.exclusive_minimum is not None:
            num["exclusiveMinimum"] = self.exclusive_minimum
        return self._described(out)


@dataclass
class Integer(Spec):
    minimum: int | None = None
    maximum: int | None = None
    description: str = ""
    expected = "a whole number"

    def load(self, node: yaml.Node, w: Walk, key: str) -> Any:
        value = self._scalar(node, w, key)
        if value is BAD:
            return BAD
        if isinstance(value, float) and value.is_integer() and abs(value) < 2**53:
            value = int(value)
        if isinstance(value, bool) or not isinstance(value, int):
            return w.fail(node, key, f"expected a whole number, got {describe(node)}")
        if self.minimum is not None and value < self.minimum:
            return w.fail(node, key, f"must be at least {self.minimum}, got {value}")
        if self.maximum is not None and value > self.maximum:
            return w.fail(node, key, f"must be at most {self.maximum}, got {value}")
        return value

    def json_schema(self) -> dict[str, Any]:
        out = _bounded({"type": "integer"}, self.minimum, self.maximum)
        return self._described(out)


@dataclass
class Boolean(Spec):
    description: str = ""
    expected = "true or false"

    def load(self, node: yaml.Node, w: Walk, key: str) -> Any:
        value = self._scalar(node, w, key)
        if value is BAD:
            return BAD
        if not isinstance(value, bool):
            return w.fail(node, key, f"expected true or false, got {describe(node)}")
        return value

    def json_schema(self) -> dict[str, Any]:
        out: dict[str, Any] = {"type": "boolean"}
        return self._described(out)


@dataclass
class Text(Spec):
    pattern: str | None = None
    max_length: int = 10000
    hint: str = ""
    description: str = ""
    expected = "text"

    def load(self, node: yaml.Node, w: Walk, key: str) -> Any:
        value = self._scalar(node, w, key)
        if value is BAD:
            return BAD
        if not isinstance(value, str):
            return w.fail(node, key, f"expected text, got {describe(node)} (put it in quotes)")
        if len(value) > self.max_length:
            return w.fail(node, key, f"text is {len(value)} characters; at most "
                          f"{self.max_length} are allowed")
        if self.pattern and not re.fullmatch(self.pattern, value):
            return w.fail(node, key, f"{describe(node)} is not allowed here; {self.hint}")
        return value

    def json_schema(self) -> dict[str, Any]:
        out: dict[str, Any] = {"type": "string", "maxLength": self.max_length}
        if self.pattern:
            out["pattern"] = f"^(?:{self.pattern})$"
        return self._described(out)


@dataclass
class Choice(Spec):
    choices: tuple[str, ...] = ()
    description: str = ""
    expected = "one of the listed words"

    def load(self, node: yaml.Node, w: Walk, key: str) -> Any:
        value = self._scalar(node, w, key)
        if value is BAD:
            return BAD
        if not isinstance(value, str) or value not in self.choices:
            hint = suggest(str(value), self.choices) if isinstance(value, str) else ""
            return w.fail(node, key, f"expected one of {', '.join(self.choices)}; got "
                          f"{describe(node)}{hint}")
        return value

    def json_schema(self) -> dict[str, Any]:
        out: dict[str, Any] = {"enum": list(self.choices)}
        return self._described(out)


@dataclass
class Expression(Spec):
    """A number or an expression string; loads as a parsed :class:`expr.Expr`.

    ``allow_variable`` permits the transform variable (transfer expressions); otherwise the
    text is a parameter expression. Column numbers of parse errors point into the text when
    the scalar sits on one line.
    """

    allow_variable: bool = False
    description: str = ""
    expected = "a number or an expression"

    def load(self, node: yaml.Node, w: Walk, key: str) -> Any:
        value = self._scalar(node, w, key)
        if value is BAD:
            return BAD
        if isinstance(value, bool) or not isinstance(value, int | float | str):
            hint = _BOOL_HINT if isinstance(value, bool) else ""
            return w.fail(node, key, f"expected {self.expected}, got {describe(node)}{hint}")
        text = value if isinstance(value, str) else repr(float(value))
        if isinstance(value, float) and not math.isfinite(value):
            return w.fail(node, key, f"expected a finite number, got {describe(node)}")
        try:
            return exprmod.parse(text, allow_variable=self.allow_variable)
        except exprmod.ExpressionError as exc:
            return fail_expression(w, node, key, text, exc)

    def json_schema(self) -> dict[str, Any]:
        out: dict[str, Any] = {"anyOf": [{"type": "number"},
                                         {"type": "string", "minLength": 1,
                                          "maxLength": exprmod.MAX_TEXT}]}
        return self._described(out)


def fail_expression(w: Walk, node: yaml.Node, key: str, text: str,
                    exc: exprmod.ExpressionError) -> Any:
    """Report a parse/evaluation error at its column inside the YAML scalar when possible."""
    mark = node.start_mark
    col = mark.column + 1
    style = getattr(node, "style", None)
    one_line = node.start_mark.line == node.end_mark.line
    if one_line and style in (None, '"', "'"):
        col += exc.start + (1 if style in ('"', "'") else 0)
    part = text[exc.start:exc.end] if 0 <= exc.start < exc.end <= len(text) else ""
    if not part:
        where = ""
    elif f"'{part}'" in exc.message:
        where = f" (character {exc.start + 1} of the expression)"
    else:
        where = f" (at '{part}', character {exc.start + 1} of the expression)"
    w.problems.append(RecordProblem(path=w.path, line=mark.line + 1, column=col, key=key,
                                    message=f"{exc.message}{where}"))
    return BAD


@dataclass
class ListOf(Spec):
    item: Spec = field(default_factory=lambda: Text())
    min_items: int = 0
    max_items: int = 64
    description: str = ""
    expected = "a list"

    def load(self, node: yaml.Node, w: Walk, key: str) -> Any:
        if not isinstance(node, yaml.SequenceNode):
            return w.fail(node, key, f"expected a list, got {describe(node)} "
                          "(write [a, b] or one '- item' per line)")
        if not (self.min_items <= len(node.value) <= self.max_items):
            return w.fail(node, key, f"expected {self.min_items} to {self.max_items} items, "
                          f"got {len(node.value)}")
        out = []
        for i, child in enumerate(node.value):
            ck = join_key(key, i)
            if not w.visit(child, ck):
                return BAD
            out.append(self.item.load(child, w, ck))
        return BAD if any(v is BAD for v in out) else out

    def json_schema(self) -> dict[str, Any]:
        out: dict[str, Any] = {"type": "array", "items": self.item.json_schema(),
                               "minItems": self.min_items, "maxItems": self.max_items}
        return self._described(out)


@dataclass
class Fields(Spec):
    """A mapping with a fixed set of keys; unknown keys are errors with a suggestion."""

    fields: Mapping[str, Spec] = field(default_factory=dict)
    required: tuple[str, ...] = ()
    description: str = ""
    check: Callable[[dict[str, Any], yaml.MappingNode, Walk, str], None] | None = None
    expected = "a mapping"

    def load(self, node: yaml.Node, w: Walk, key: str) -> Any:
        items = mapping_items(node, w, key)
        if items is BAD:
            return BAD
        out: dict[str, Any] = {}
        ok = True
        for kname, knode, vnode in items:
            ck = join_key(key, kname)
            if kname not in self.fields:
                where = f" in {key}" if key else " at the top level"
                w.fail(knode, ck, f"unknown key '{kname}'{where}{suggest(kname, list(self.fields))}"
                       f"; allowed: {', '.join(self.fields)}")
                ok = False
                continue
            if not w.visit(vnode, ck):
                return BAD
            out[kname] = self.fields[kname].load(vnode, w, ck)
            ok = ok and out[kname] is not BAD
        for r in self.required:
            if r not in out:
                where = f"'{key}'" if key else "the record"
                w.fail(node, join_key(key, r), f"{where} needs the key '{r}'")
                ok = False
        if not ok:
            return BAD
        if self.check is not None:
            before = len(w.problems)
            self.check(out, node, w, key)  # type: ignore[arg-type]
            if len(w.problems) > before:
                return BAD
        return out

    def json_schema(self) -> dict[str, Any]:
        out: dict[str, Any] = {"type": "object",
                               "properties": {k: v.json_schema() for k, v in self.fields.items()},
                               "additionalProperties": False}
        if self.required:
            out["required"] = list(self.required)
        return self._described(out)


@dataclass
class NamedMap(Spec):
    """A mapping from user-chosen names (matching ``pattern``) to values of one spec."""

    value: Spec = field(default_factory=lambda: Text())
    pattern: str = r"[A-Za-z_][A-Za-z0-9_]*"
    hint: str = ""
    max_items: int = 200
    description: str = ""
    expected = "a mapping"

    def load(self, node: yaml.Node, w: Walk, key: str) -> Any:
        items = mapping_items(node, w, key)
        if items is BAD:
            return BAD
        if len(items) > self.max_items:
            return w.fail(node, key, f"at most {self.max_items} entries are allowed")
        out: dict[str, Any] = {}
        ok = True
        for kname, knode, vnode in items:
            ck = join_key(key, kname)
            if not re.fullmatch(self.pattern, kname):
                w.fail(knode, ck, f"'{kname}' is not a valid name; {self.hint}")
                ok = False
                continue
            if not w.visit(vnode, ck):
                return BAD
            out[kname] = self.value.load(vnode, w, ck)
            ok = ok and out[kname] is not BAD
        return out if ok else BAD

    def json_schema(self) -> dict[str, Any]:
        out: dict[str, Any] = {"type": "object",
                               "patternProperties": {f"^(?:{self.pattern})$":
                                                     self.value.json_schema()},
                               "additionalProperties": False, "maxProperties": self.max_items}
        return self._described(out)


@dataclass
class ByKind(Spec):
    """Dispatch on the YAML node kind: a scalar, a list or a mapping each get their own spec."""

    scalar: Spec | None = None
    sequence: Spec | None = None
    mapping: Spec | None = None
    expected_text: str = "a value"
    description: str = ""

    def load(self, node: yaml.Node, w: Walk, key: str) -> Any:
        spec = (self.mapping if isinstance(node, yaml.MappingNode) else
                self.sequence if isinstance(node, yaml.SequenceNode) else self.scalar)
        if spec is None:
            return w.fail(node, key, f"expected {self.expected_text}, got {describe(node)}")
        return spec.load(node, w, key)

    def json_schema(self) -> dict[str, Any]:
        options = [s.json_schema() for s in (self.scalar, self.sequence, self.mapping) if s]
        out: dict[str, Any] = {"anyOf": options}
        return self._described(out)


def mapping_items(node: yaml.Node, w: Walk, key: str) -> Any:
    """(key text, key node, value node) triples of a mapping; duplicate and non-text keys fail."""
    if not isinstance(node, yaml.MappingNode):
        return w.fail(node, key, f"expected a mapping of 'key: value' lines, got {describe(node)}")
    seen: dict[str, yaml.Node] = {}
    out = []
    ok = True
    for knode, vnode in node.value:
        if not isinstance(knode, yaml.ScalarNode) or knode.tag == "tag:yaml.org,2002:merge":
            w.fail(knode, key, "YAML merge keys ('<<') and complex keys are not supported; "
                   "write the keys out")
            ok = False
            continue
        kname = str(knode.value)
        if kname in seen:
            prev = seen[kname].start_mark.line + 1
            w.fail(knode, join_key(key, kname), f"key '{kname}' appears twice (first on line "
                   f"{prev}); keep one")
            ok = False
            continue
        seen[kname] = knode
        out.append((kname, knode, vnode))
    return out if ok else BAD

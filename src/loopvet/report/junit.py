"""JUnit XML for CI test views: a test suite per design, a test case per requirement entry,
and one for the drift against the approved baseline. From results.json data only; no
timestamps or durations, so the same results give the same bytes."""

from __future__ import annotations

import re
import xml.etree.ElementTree as ET
from typing import Any

from . import view

#: characters XML 1.0 cannot carry (record text may hold them); replaced by U+FFFD
_NOT_XML = re.compile("[^\u0009\u000a\u000d\u0020-\ud7ff\ue000-\ufffd\U00010000-\U0010ffff]")


def _clean(text: Any) -> str:
    return _NOT_XML.sub("\ufffd", str(text))


def _message(e: dict[str, Any]) -> str:
    where = view.where_text(e)
    text = (f"{e['key']} ({view.SCOPES[e['scope']]}) = {view.value_text(e)}, "
            f"required {view.bound_text(e)}")
    return text + (f", at {where}" if where else "") + (f"; {e['note']}" if e.get("note") else "")


def _case(suite: ET.Element, d: dict[str, Any], name: str) -> ET.Element:
    return ET.SubElement(suite, "testcase", {"classname": _clean(f"loopvet.{d['name']}"),
                                             "name": _clean(name), "file": _clean(d["path"])})


def _drift(suite: ET.Element, d: dict[str, Any]) -> tuple[int, int]:
    b = d.get("baseline") or {}
    if not b or b.get("status") in ("new", "removed"):
        return 0, 0
    case = _case(suite, d, f"approved baseline (r{b.get('approved_revision')})")
    stale = b.get("content_changed") and not b.get("revision_bumped")
    worse = [c for c in b.get("changes", []) if c["verdict"] == "degraded"]
    if not worse and not stale:
        return 1, 0
    lines = [f"{c['key']} ({view.SCOPES.get(c['scope'], c['scope'])}): {view.num(c['old'])} -> "
             f"{view.num(c['new'])} ({view.signed(c['delta'])})" for c in worse]
    if stale:
        lines.append(f"the record changed since approved r{b.get('approved_revision')} but its "
                     "revision did not")
    lines += [f"record: {c['message']}" for c in b.get("record_changes", [])]
    head = (f"{len(worse)} result(s) degraded since approval" if worse
            else "record changed without a revision bump")
    fail = ET.SubElement(case, "failure", {"type": "drift", "message": _clean(head)})
    fail.text = _clean("\n".join(lines))
    return 1, 1


def render(data: dict[str, Any]) -> str:
    root = ET.Element("testsuites", {"name": "loopvet"})
    totals = {"tests": 0, "failures": 0, "errors": 0, "skipped": 0}
    for d in data["designs"]:
        if (d.get("baseline") or {}).get("status") == "removed":
            continue
        suite = ET.SubElement(root, "testsuite", {"name": _clean(d["name"])})
        props = ET.SubElement(suite, "properties")
        for key in ("revision", "path", "title"):
            if d.get(key) is not None:
                ET.SubElement(props, "property", {"name": key, "value": _clean(d[key])})
        n = {"tests": 0, "failures": 0, "errors": 0, "skipped": 0}
        if d["status"] == "invalid":
            case = _case(suite, d, "record")
            err = ET.SubElement(case, "error", {"type": "invalid", "message": _clean(
                f"the record is invalid ({len(d.get('errors', []))} problem(s))")})
            err.text = _clean("\n".join(f"{e['path']}:{e['line']}:{e['column']}: {e['message']}"
                                        for e in d.get("errors", [])))
            n["tests"], n["errors"] = 1, 1
        for e in d.get("requirements", []):
            case = _case(suite, d, f"{e['key']} ({e['scope']})")
            n["tests"] += 1
            if e["status"] == "fail":
                fail = ET.SubElement(case, "failure", {"type": "requirement",
                                                       "message": _clean(_message(e))})
                fail.text = _clean(_message(e))
                n["failures"] += 1
            elif e["status"] == "not_evaluated":
                ET.SubElement(case, "skipped", {"message": "not evaluated"})
                n["skipped"] += 1
        tests, failures = _drift(suite, d)
        n["tests"] += tests
        n["failures"] += failures
        for key, value in n.items():
            suite.set(key, str(value))
            totals[key] += value
    for key, value in totals.items():
        root.set(key, str(value))
    ET.indent(root)
    return '<?xml version="1.0" encoding="UTF-8"?>\n' + ET.tostring(root, "unicode") + "\n"

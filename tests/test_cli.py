"""The command line end to end, through a subprocess: exit codes 0, 1, 2, 3 and strict JSON
(RFC 8259: no NaN or Infinity literals; infinities as the strings "inf"/"-inf")."""

from __future__ import annotations

import json

from .conftest import ROOT, run_cli

GOOD = """\
loopvet: 1
name: good-loop
revision: 1
plant: {transfer: "1/(s*(s+1)*(s+2))"}
controller: {transfer: "2"}
requirements:
  stability: {}
"""
UNSTABLE = GOOD.replace("good-loop", "hot-loop").replace('"2"', '"9"')
BROKEN = GOOD.replace("good-loop", "broken-loop").replace("revision: 1", "revision: one")


def _strict_load(text: str):
    def bad_constant(name):
        raise AssertionError(f"non-strict JSON constant {name}")
    return json.loads(text, parse_constant=bad_constant)


def test_exit_0_all_pass(tmp_path):
    (tmp_path / "a.yaml").write_text(GOOD)
    out = tmp_path / "out"
    r = run_cli("check", str(tmp_path / "a.yaml"), "--out", str(out))
    assert r.returncode == 0, r.stdout + r.stderr
    data = _strict_load((out / "results.json").read_text())
    assert data["summary"]["exit_code"] == 0
    assert data["designs"][0]["status"] == "pass"
    assert "1 designs: 1 pass" in r.stdout


def test_exit_1_requirement_fails(tmp_path):
    (tmp_path / "a.yaml").write_text(GOOD)
    (tmp_path / "b.yaml").write_text(UNSTABLE)
    r = run_cli("check", str(tmp_path), "--out", str(tmp_path / "out"), "--format", "json")
    assert r.returncode == 1, r.stderr
    data = _strict_load(r.stdout)
    status = {d["name"]: d["status"] for d in data["designs"]}
    assert status == {"good-loop": "pass", "hot-loop": "fail"}


def test_exit_2_usage_error(tmp_path):
    r = run_cli("check", "--format", "xml")
    assert r.returncode == 2
    assert "invalid choice" in r.stderr
    assert run_cli("frobnicate").returncode == 2
    assert run_cli().returncode == 2


def test_exit_3_invalid_record_does_not_stop_the_fleet(tmp_path):
    (tmp_path / "a.yaml").write_text(GOOD)
    (tmp_path / "b.yaml").write_text(BROKEN)
    (tmp_path / "c.yaml").write_text(UNSTABLE)
    r = run_cli("check", str(tmp_path), "--out", str(tmp_path / "out"), "--format", "json")
    assert r.returncode == 3, r.stderr
    assert "Traceback" not in r.stderr
    data = _strict_load(r.stdout)
    by = {d["name"]: d for d in data["designs"]}
    assert by["good-loop"]["status"] == "pass"
    assert by["hot-loop"]["status"] == "fail"
    err = by["b"]["errors"][0]
    assert err["line"] == 3 and err["column"] == 11
    assert "revision" in err["message"] and "whole number" in err["message"]


def test_infinite_values_are_strings_not_literals(tmp_path):
    # a first-order loop has no finite gain limit: the natural frequency is finite but a
    # damping ratio of 1; the results must still be strict JSON
    (tmp_path / "a.yaml").write_text(GOOD.replace("1/(s*(s+1)*(s+2))", "1/(s+1)"))
    r = run_cli("check", str(tmp_path), "--out", str(tmp_path / "out"), "--format", "json")
    assert r.returncode == 0
    _strict_load(r.stdout)
    assert "Infinity" not in r.stdout and "NaN" not in r.stdout


def test_schema_is_json_schema_2020_12():
    r = run_cli("schema")
    assert r.returncode == 0
    schema = json.loads(r.stdout)
    assert schema["$schema"] == "https://json-schema.org/draft/2020-12/schema"
    assert set(schema["required"]) >= {"loopvet", "name", "revision", "plant", "controller"}
    assert schema["additionalProperties"] is False


def test_demo_fleet_runs(tmp_path):
    r = run_cli("check", str(ROOT / "designs"), "--out", str(tmp_path / "out"))
    assert r.returncode in (0, 1), r.stdout + r.stderr
    assert "designs:" in r.stdout.splitlines()[-1]


def test_show_reads_well(tmp_path):
    (tmp_path / "a.yaml").write_text(GOOD)
    r = run_cli("show", str(tmp_path / "a.yaml"))
    assert r.returncode == 0, r.stderr
    # the record has controller gain 2: K/(s(s+1)(s+2)) limits halve, (0, 6) -> (0, 3)
    for fragment in ("stable gain intervals (open):", "(0, 3)", "crossing gain K",
                     "1.414213562", "asymptotes (K > 0): centroid -1, angles 60 deg, 180 deg, "
                     "300 deg", "break point -0.42265 at K = 0.19245", "closed-loop poles"):
        assert fragment in r.stdout, (fragment, r.stdout)
    (tmp_path / "b.yaml").write_text(BROKEN)
    r = run_cli("show", str(tmp_path / "b.yaml"))
    assert r.returncode == 3 and "INVALID" in r.stdout

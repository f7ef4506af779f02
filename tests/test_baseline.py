"""Approved baselines and drift (results-format v1, "Baseline file" and "Exit codes").

Scenario tests run in temporary git repositories. The numbers are checked against values
derived outside loopvet (see ``tests/scenario.py``): for L = k/(s(s+1)(s+2)) the gain margin
is 20 log10(6/k) dB (Routh-Hurwitz ultimate gain 6) and the phase margin comes from the
positive root of x^3 + 5x^2 + 4x - k^2 (x = w^2), solved with numpy.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from loopvet import baseline as bl
from loopvet.drift import compare_value, metric_changes, tolerance

from .conftest import ROOT
from .scenario import (
    LOOP_B,
    gain_margin_db,
    loop_a,
    make_repo,
    phase_margin_deg,
    run,
    write,
)

BASELINE = Path("reports") / "baseline.json"
EPOCH = "1700000000"                     # 2023-11-14T22:13:20Z (date -u -d @1700000000)


@pytest.fixture
def repo(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """Two records (loop a at k = 2, loop b) committed and approved."""
    monkeypatch.setenv("SOURCE_DATE_EPOCH", EPOCH)
    r = make_repo(tmp_path / "repo", {"designs/a.yaml": loop_a(2), "designs/b.yaml": LOOP_B})
    done = run(r, "approve", "--by", "Reviewer One", "--note", "first approval")
    assert done.code == 0, done.err
    return r


def _results(repo: Path) -> dict:
    return json.loads((repo / "reports" / "latest" / "results.json").read_text())


def _design(data: dict, name: str) -> dict:
    return next(d for d in data["designs"] if d["name"] == name)


def _change(block: dict, key: str, scope: str = "nominal") -> dict:
    return next(c for c in block["changes"] if c["key"] == key and c["scope"] == scope)


# ------------------------------------------------------------------------------- approve

def test_approve_writes_a_sorted_pretty_baseline(repo: Path):
    text = (repo / BASELINE).read_text()
    data = json.loads(text)
    assert text == json.dumps(data, indent=2, sort_keys=True, ensure_ascii=False) + "\n"
    entry = data["designs"]["loop-a"]
    raw = (repo / "designs" / "a.yaml").read_bytes()
    assert entry["record_sha256"] == hashlib.sha256(raw).hexdigest()
    assert "\n".join(entry["record_lines"]).encode() == raw
    assert entry["revision"] == 1 and entry["path"] == "designs/a.yaml"
    assert entry["approved_by"] == "Reviewer One" and entry["note"] == "first approval"
    assert entry["approved_at"] == "2023-11-14T22:13:20Z"
    assert entry["status"] == "pass" and entry["failing_accepted"] is False
    assert math.isclose(entry["metrics"]["gain_margin_db"], gain_margin_db(2), rel_tol=1e-9)
    assert math.isclose(entry["metrics"]["phase_margin_deg"], phase_margin_deg(2),
                        rel_tol=1e-7)
    pm = next(r for r in entry["requirements"] if r["key"] == "phase_margin_deg")
    assert pm["scope"] == "nominal" and pm["status"] == "pass" and pm["bound"] == {"min": 20}
    assert math.isclose(pm["value"], phase_margin_deg(2), rel_tol=1e-7)
    assert data["settings"] == bl.fingerprint()
    assert data["settings"]["tool_version"] and data["kind"] == "baseline"


def test_approving_unchanged_records_changes_no_byte(repo: Path, monkeypatch):
    before = (repo / BASELINE).read_bytes()
    monkeypatch.setenv("SOURCE_DATE_EPOCH", "1800000000")
    done = run(repo, "approve", "--by", "Someone Else")
    assert done.code == 0 and "already up to date" in done.err
    assert (repo / BASELINE).read_bytes() == before


def test_approver_defaults_to_the_git_user(repo: Path):
    from .scenario import git

    git(repo, "config", "user.name", "Ada From Git")
    write(repo, {"designs/a.yaml": loop_a(1.5, rev=2)})
    assert run(repo, "approve", "designs/a.yaml").code == 0
    entries = json.loads((repo / BASELINE).read_text())["designs"]
    assert entries["loop-a"]["approved_by"] == "Ada From Git"
    assert "note" not in entries["loop-a"]
    # the other design's entry is kept exactly as it was
    assert entries["loop-b"]["approved_by"] == "Reviewer One"


def test_approve_refuses_invalid_and_failing_records(repo: Path):
    before = (repo / BASELINE).read_bytes()
    write(repo, {"designs/a.yaml": loop_a(2).replace("revision: 1", "revision: one")})
    done = run(repo, "approve")
    assert done.code == 3 and "designs/a.yaml" in done.err and "revision" in done.err
    assert (repo / BASELINE).read_bytes() == before
    # k = 7 is past the ultimate gain 6: unstable, so the record fails
    write(repo, {"designs/a.yaml": loop_a(7, rev=2)})
    done = run(repo, "approve")
    assert done.code == 1 and "--accept-failing" in done.err
    assert (repo / BASELINE).read_bytes() == before
    done = run(repo, "approve", "--accept-failing", "--by", "R")
    assert done.code == 0 and "failing, accepted" in done.err
    entry = json.loads((repo / BASELINE).read_text())["designs"]["loop-a"]
    assert entry["status"] == "fail" and entry["failing_accepted"] is True


# --------------------------------------------------------------------------------- drift

def test_unchanged_fleet_exits_0(repo: Path):
    done = run(repo, "check", "designs")
    assert done.code == 0, done.out + done.err
    data = _results(repo)
    block = _design(data, "loop-a")["baseline"]
    assert block["status"] == "unchanged" and block["changes"] == []
    assert block["approved_revision"] == 1 and block["content_changed"] is False
    assert data["baseline"]["comparable"] is True
    assert data["summary"]["degraded"] == 0 and data["summary"]["revision_not_bumped"] == 0


def test_retune_without_revision_bump_exits_4(repo: Path):
    write(repo, {"designs/a.yaml": loop_a(1.5)})             # better margins, same revision
    done = run(repo, "check", "designs")
    assert done.code == 4, done.out
    block = _design(_results(repo), "loop-a")["baseline"]
    assert block["content_changed"] is True and block["revision_bumped"] is False
    assert block["status"] == "improved"
    assert "its revision is still r1: bump the revision" in done.out
    assert _results(repo)["summary"]["revision_not_bumped"] == 1


def test_bump_and_degrade_exits_4_with_the_delta(repo: Path):
    write(repo, {"designs/a.yaml": loop_a(2.5, rev=2)})
    done = run(repo, "check", "designs")
    assert done.code == 4, done.out
    block = _design(_results(repo), "loop-a")["baseline"]
    assert block["status"] == "degraded" and block["revision_bumped"] is True
    gm = _change(block, "gain_margin_db")
    expected = gain_margin_db(2.5) - gain_margin_db(2)          # 20 log10(0.8) dB
    assert gm["verdict"] == "degraded" and gm["tolerance"] == 0.05
    assert math.isclose(gm["delta"], expected, rel_tol=1e-8), gm
    pm = _change(block, "phase_margin_deg")
    assert math.isclose(pm["delta"], phase_margin_deg(2.5) - phase_margin_deg(2),
                        rel_tol=1e-6), pm
    # shown to people with the record value that caused it
    assert f"gain_margin_db: {gain_margin_db(2):.4g} -> {gain_margin_db(2.5):.4g} " \
           f"({expected:+.4g}, WORSE; tolerance 0.05)" in done.out
    assert "record: controller transfer: '2' -> '2.5'" in done.out
    assert "record: revision: 1 -> 2" in done.out


def test_improvement_exits_0_and_is_listed(repo: Path):
    write(repo, {"designs/a.yaml": loop_a(1.5, rev=2)})
    done = run(repo, "check", "designs")
    assert done.code == 0, done.out
    block = _design(_results(repo), "loop-a")["baseline"]
    assert block["status"] == "improved"
    gm = _change(block, "gain_margin_db")
    assert gm["verdict"] == "improved"
    assert math.isclose(gm["delta"], 20 * math.log10(2 / 1.5), rel_tol=1e-8)
    assert "drift since approved r1: improved" in done.out
    # metrics without a requirement are 'changed', never degraded or improved
    assert _change(block, "overshoot_pct")["verdict"] == "changed"


def test_record_tolerance_overrides_the_default(repo: Path):
    extra = "baseline_tolerance: {gain_margin_db: 3, phase_margin_deg: 10}\n"
    write(repo, {"designs/a.yaml": loop_a(2.5, rev=2, extra=extra)})
    done = run(repo, "check", "designs")
    assert done.code == 0, done.out
    block = _design(_results(repo), "loop-a")["baseline"]
    assert _change(block, "gain_margin_db")["verdict"] == "unchanged"
    assert _change(block, "gain_margin_db")["tolerance"] == 3


def test_deleting_a_requirement_does_not_hide_a_degradation(repo: Path):
    text = loop_a(2.5, rev=2).replace("  gain_margin_db: {min: 3}\n", "")
    write(repo, {"designs/a.yaml": text})
    done = run(repo, "check", "designs")
    assert done.code == 4
    block = _design(_results(repo), "loop-a")["baseline"]
    assert _change(block, "gain_margin_db")["verdict"] == "degraded"   # approved bound
    assert any(v["key"] == "gain_margin_db" and v["new"] is None
               for v in block["verdict_changes"])


def test_removed_record_is_reported_and_dropped_on_approve(repo: Path):
    (repo / "designs" / "b.yaml").unlink()
    done = run(repo, "check", "designs")
    assert done.code == 0
    data = _results(repo)
    assert _design(data, "loop-b")["baseline"]["status"] == "removed"
    assert data["summary"]["removed"] == 1 and data["summary"]["designs"] == 1
    assert "gone  loop-b" in done.out
    # a check of another path does not call it removed
    run(repo, "check", "designs/a.yaml")
    assert [d["name"] for d in _results(repo)["designs"]] == ["loop-a"]
    # approving only a.yaml keeps b's entry; approving the folder drops it
    assert run(repo, "approve", "designs/a.yaml", "--by", "R").code == 0
    assert "loop-b" in json.loads((repo / BASELINE).read_text())["designs"]
    done = run(repo, "approve", "designs", "--by", "R")
    assert done.code == 0 and "dropped   loop-b" in done.err
    assert list(json.loads((repo / BASELINE).read_text())["designs"]) == ["loop-a"]


def test_new_record_is_new(repo: Path):
    write(repo, {"designs/c.yaml": LOOP_B.replace("loop-b", "loop-c")})
    done = run(repo, "check", "designs")
    assert done.code == 0
    assert _design(_results(repo), "loop-c")["baseline"]["status"] == "new"
    assert "new: not in the approved baseline yet" in done.out


def test_other_settings_are_not_comparable(repo: Path):
    path = repo / BASELINE
    data = json.loads(path.read_text())
    data["settings"]["tool_version"] = "0.0.1"
    data["settings"]["key"] = bl.settings_key(data["settings"])
    path.write_text(json.dumps(data))
    write(repo, {"designs/a.yaml": loop_a(2.5, rev=2)})
    done = run(repo, "check", "designs")
    assert done.code == 0          # no bogus drift: requirements decide alone
    results = _results(repo)
    assert results["baseline"]["comparable"] is False
    assert "tool_version '0.0.1' -> " in results["baseline"]["reason"]
    assert all("baseline" not in d for d in results["designs"])
    assert "not comparable" in done.err
    # approving part of it under the new settings is refused: one file, one kind of result
    done = run(repo, "approve", "designs/a.yaml", "--by", "R")
    assert done.code == 2 and "loop-b" in done.err


def test_check_output_is_byte_deterministic_with_a_baseline(repo: Path):
    write(repo, {"designs/a.yaml": loop_a(2.5, rev=2)})
    run(repo, "check", "designs")
    first = (repo / "reports" / "latest" / "results.json").read_bytes()
    run(repo, "check", "designs")
    assert (repo / "reports" / "latest" / "results.json").read_bytes() == first


# --------------------------------------------------------------------- corrupt baselines

def _corrupt_cases(text: str) -> dict[str, tuple[str, str]]:
    data = json.loads(text)
    missing = json.loads(text)
    del missing["designs"]["loop-a"]["metrics"]
    wrong_version = dict(data, loopvet=2)
    edited = json.loads(text)
    edited["designs"]["loop-a"]["record_lines"][4] = 'controller: {transfer: "9"}'
    return {
        "bad json": (text[:-40], "not valid JSON"),
        "wrong version": (json.dumps(wrong_version), "baseline format version 2 is not known"),
        "missing field": (json.dumps(missing), "designs.loop-a: missing 'metrics'"),
        "hash mismatch": (json.dumps(edited), "designs.loop-a: the stored record does not "
                                              "match its record_sha256"),
        "results file": (json.dumps({"loopvet": 1, "designs": [], "summary": {}}),
                         "this looks like a results.json, not a baseline"),
    }


def test_corrupt_baseline_is_a_clear_error_and_never_overwritten(repo: Path):
    path = repo / BASELINE
    for case, (text, message) in _corrupt_cases(path.read_text()).items():
        path.write_text(text)
        done = run(repo, "check", "designs")
        assert done.code == 2, case
        assert f"reports/baseline.json: {message}" in done.err, (case, done.err)
        done = run(repo, "approve", "--by", "R")
        assert done.code == 2 and "--discard-corrupt" in done.err, case
        assert path.read_text() == text, case
    done = run(repo, "approve", "--by", "R", "--discard-corrupt")
    assert done.code == 0 and "discarding" in done.err
    assert bl.read_store(str(path)) is not None


def test_named_baseline_must_exist(repo: Path):
    done = run(repo, "check", "designs", "--baseline", "elsewhere.json")
    assert done.code == 2 and "elsewhere.json: no such file" in done.err
    assert run(repo, "check", "designs", "--no-baseline").code == 0
    assert "baseline" not in _results(repo)


# ---------------------------------------------------------------- interrupted approvals

def test_failure_during_the_write_leaves_the_previous_baseline(repo: Path, monkeypatch):
    before = (repo / BASELINE).read_bytes()
    write(repo, {"designs/a.yaml": loop_a(1.5, rev=2)})

    def broken_fsync(fd: int) -> None:
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, "fsync", broken_fsync)
    done = run(repo, "approve", "--by", "R")
    assert done.code == 2 and "previous baseline is unchanged" in done.err
    assert (repo / BASELINE).read_bytes() == before
    assert [p.name for p in (repo / "reports").iterdir()] == ["baseline.json"]


KILLED_APPROVE = """
import os, sys, time
marker = sys.argv[1]
def stall(fd):
    open(marker, "w").close()      # the new baseline is half way: written, not renamed
    time.sleep(60)
os.fsync = stall
from loopvet.cli import main
sys.exit(main(["approve", "--by", "K", "--jobs", "1"]))
"""


def test_killed_approve_leaves_the_previous_baseline(repo: Path, tmp_path: Path):
    before = (repo / BASELINE).read_bytes()
    write(repo, {"designs/a.yaml": loop_a(1.5, rev=2)})
    marker = tmp_path / "writing"
    env = {**os.environ, "PYTHONPATH": str(ROOT / "src")}
    proc = subprocess.Popen([sys.executable, "-c", KILLED_APPROVE, str(marker)], cwd=repo,
                            env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    try:
        deadline = time.monotonic() + 120
        while not marker.exists():
            assert proc.poll() is None, proc.stderr.read() if proc.stderr else ""
            assert time.monotonic() < deadline
            time.sleep(0.05)
        proc.send_signal(signal.SIGKILL)
    finally:
        proc.wait(timeout=30)
        if proc.stderr:
            proc.stderr.close()
    assert (repo / BASELINE).read_bytes() == before
    assert bl.read_store(str(repo / BASELINE)) is not None


# ------------------------------------------------------------------- the drift rules

def test_default_tolerances():
    """Spec: 0.1 for _deg, 0.05 for _db, else 0.5 % relative with an absolute floor 1e-9;
    baseline_tolerance overrides per key."""
    assert tolerance("phase_margin_deg", 50.0, {}) == 0.1
    assert tolerance("gain_margin_db", 10.0, {}) == 0.05
    assert tolerance("sensitivity_peak", 2.0, {}) == pytest.approx(0.01)
    assert tolerance("steady_state_error", 0.0, {}) == 1e-9
    assert tolerance("phase_margin_deg", 50.0, {"phase_margin_deg": 0.5}) == 0.5


MIN = {"min": 6.0}
MAX = {"max": 1.6}
BAND = {"min": 2.0, "max": 12.0}


@pytest.mark.parametrize(("old", "new", "bound", "verdict"), [
    (10.0, 10.04, MIN, "unchanged"),         # within 0.05 dB
    (10.0, 9.0, MIN, "degraded"),
    (10.0, 11.0, MIN, "improved"),
    (math.inf, 12.0, MIN, "degraded"),        # an unbounded margin became finite
    (12.0, math.inf, MIN, "improved"),
    (12.0, None, MIN, "degraded"),            # the metric stopped existing: fails its bound
    (None, 12.0, MIN, "improved"),
    (12.0, 9.0, None, "changed"),             # no requirement: never degraded
    (1.5, 1.4, MAX, "improved"),
    (1.5, 1.55, MAX, "degraded"),
    (5.0, 10.0, BAND, "degraded"),            # two-sided: closer to the upper bound
    (10.0, 6.0, BAND, "improved"),
])
def test_verdict_follows_the_bound(old, new, bound, verdict):
    key = "gain_margin_db" if bound in (MIN, None) else "sensitivity_peak" \
        if bound is MAX else "bandwidth"
    c = compare_value(key, "nominal", old, new, bound, {})
    assert c is not None and c.verdict == verdict, c


def test_inf_and_null_deltas():
    c = compare_value("gain_margin_db", "nominal", math.inf, 12.0, MIN, {})
    assert c is not None and c.delta == -math.inf and c.tolerance is None
    c = compare_value("gain_margin_db", "nominal", 12.0, None, MIN, {})
    assert c is not None and c.delta is None
    assert compare_value("gain_margin_db", "nominal", math.inf, math.inf, MIN, {}) is None
    assert compare_value("gain_margin_db", "nominal", None, None, MIN, {}) is None
    s = compare_value("stability", "gain", True, False, None, {})
    assert s is not None and s.verdict == "degraded"


def test_stability_entries_are_compared_in_every_scope():
    old = bl.Outcome(status="pass", requirements=(
        bl.Verdict(key="stability", scope="gain", status="pass", value=True, bound={}),))
    new = bl.Outcome(status="fail", requirements=(
        bl.Verdict(key="stability", scope="gain", status="fail", value=False, bound={}),))
    (c,) = metric_changes(old, new, {})
    assert (c.key, c.scope, c.verdict) == ("stability", "gain", "degraded")

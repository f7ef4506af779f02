"""Record diffs: value-level record changes, and `loopvet diff` between two files, against a
git revision (read with git show) and against the approved baseline.

Metric deltas are checked against the closed forms in ``tests/scenario.py`` (gain margin
20 log10(6/k) dB of k/(s(s+1)(s+2)), phase margin from numpy's roots).
"""

from __future__ import annotations

import json
import math
import textwrap
from pathlib import Path

import pytest

from loopvet.diff import record_changes

from .scenario import (
    LOOP_B,
    commit,
    gain_margin_db,
    git,
    loop_a,
    make_repo,
    phase_margin_deg,
    run,
    write,
)

OLD = textwrap.dedent("""\
    loopvet: 1
    name: oven
    revision: 3
    parameters:
      tau: {nominal: 120, min: 90, max: 160}
      Kh: 2.4
    plant:
      transfer: "Kh / (tau*s + 1)"
      delay: 8
    controller:
      pid: {kp: 0.9, ki: 0.01}
    requirements:
      phase_margin_deg: {min: 45}
      overshoot_pct: {max: 10}
    """)


def _messages(old: str, new: str) -> list[str]:
    return [c.message for c in record_changes(old, new)]


# ------------------------------------------------------------------ record changes, pure

def test_values_old_to_new_as_an_engineer_reads_them():
    new = (OLD.replace("revision: 3", "revision: 4")
           .replace("nominal: 120", "nominal: 140")
           .replace("kp: 0.9", "kp: 1.2")
           .replace("{min: 45}", "{min: 50}"))
    assert _messages(OLD, new) == [
        "revision: 3 -> 4",
        "parameter tau nominal: 120 -> 140",
        "controller pid kp: 0.9 -> 1.2",
        "requirement phase_margin_deg min: 45 -> 50",
    ]
    (c,) = [c for c in record_changes(OLD, new) if c.key == "controller.pid.kp"]
    assert (c.kind, c.old, c.new) == ("changed", 0.9, 1.2)


def test_blocks_and_keys_added_and_removed():
    new = OLD.replace("  overshoot_pct: {max: 10}\n", "") + \
        'sensor:\n  transfer: "1 / (2*s + 1)"\n'
    new = new.replace("  delay: 8\n", "")
    assert _messages(OLD, new) == [
        "plant delay removed (was 8)",
        "requirement overshoot_pct removed (was {max: 10})",
        "sensor block added: {transfer: '1 / (2*s + 1)'}",
    ]


def test_form_change_and_whole_lists():
    old = OLD + "gain: {nominal: 1, range: [0.5, 2]}\n"
    new = old.replace("pid: {kp: 0.9, ki: 0.01}", 'factored: {zeros: [-0.5], poles: [0], '
                      'gain: 0.9}').replace("[0.5, 2]", "[0.5, 2.5]")
    assert _messages(old, new) == [
        "controller factored added: {zeros: [-0.5], poles: [0], gain: 0.9}",
        "controller pid removed (was {kp: 0.9, ki: 0.01})",
        "gain range: [0.5, 2] -> [0.5, 2.5]",
    ]


def test_formatting_only_and_unreadable():
    reformatted = "# a comment\n" + OLD.replace("{kp: 0.9, ki: 0.01}", "{kp: 0.90,  ki: 0.010}")
    (c,) = record_changes(OLD, reformatted)
    assert c.kind == "format" and "every value is the same" in c.message
    assert record_changes(OLD, OLD) == ()
    (c,) = record_changes(OLD, "plant: [unclosed\n")
    assert c.kind == "unreadable" and "not valid YAML" in c.message


def test_record_text_is_escaped_in_messages():
    new = OLD.replace("name: oven", "name: oven\ntitle: \"\\e[31mred\\e[0m <b>|x|</b>\"")
    (c,) = record_changes(OLD, new)
    assert "\x1b" not in c.message and "\\x1b[31m" in c.message


# ------------------------------------------------------------------------ the command

@pytest.fixture
def repo(tmp_path: Path) -> Path:
    """History: loop a at k = 2 (HEAD~1), then retuned to k = 2.5 as revision 2 (HEAD)."""
    r = make_repo(tmp_path / "repo", {"designs/a.yaml": loop_a(2), "designs/b.yaml": LOOP_B})
    write(r, {"designs/a.yaml": loop_a(2.5, rev=2)})
    commit(r, "retune loop a")
    return r


def test_diff_against_head_1(repo: Path):
    done = run(repo, "diff", "--rev", "HEAD~1")
    assert done.code == 0, done.err
    out = done.out
    assert out.startswith("records: HEAD~1 (") and "-> working tree" in out.splitlines()[0]
    assert "loop-a  r1 -> r2  (designs/a.yaml)" in out
    assert "    controller transfer: '2' -> '2.5'" in out
    gm_old, gm_new = gain_margin_db(2), gain_margin_db(2.5)
    assert (f"    gain_margin_db: {gm_old:.4g} -> {gm_new:.4g} ({gm_new - gm_old:+.4g}, WORSE; "
            "tolerance 0.05)") in out
    assert out.rstrip().endswith("1 changed, 0 added, 0 removed, 1 unchanged")
    assert "loop-b" not in out
    # nothing changed between HEAD and the working tree
    assert run(repo, "diff", "--rev", "HEAD").out.rstrip().endswith(
        "0 changed, 0 added, 0 removed, 2 unchanged")


def test_diff_json_has_record_metric_and_verdict_changes(repo: Path):
    write(repo, {"designs/a.yaml": loop_a(7, rev=3)})          # past the ultimate gain 6
    done = run(repo, "diff", "--rev", "HEAD~1", "--format", "json")
    assert done.code == 0, done.err
    data = json.loads(done.out)
    (rec,) = data["records"]
    assert rec["old"]["source"] == "HEAD~1:designs/a.yaml" and rec["new"]["status"] == "fail"
    assert {"key": "controller.transfer", "change": "changed", "old": "2", "new": "7",
            "message": "controller transfer: '2' -> '7'"} in rec["record_changes"]
    pm = next(c for c in rec["metric_changes"] if c["key"] == "phase_margin_deg")
    assert math.isclose(pm["old"], phase_margin_deg(2), rel_tol=1e-7)
    assert pm["verdict"] == "degraded" and pm["new"] < 0      # unstable: negative margin
    gm = next(c for c in rec["metric_changes"] if c["key"] == "gain_margin_db")
    assert gm["new"] is None and gm["verdict"] == "degraded"  # no margin when unstable
    verdicts = {(v["key"], v["scope"]): (v["old"], v["new"]) for v in rec["verdict_changes"]}
    assert verdicts[("stability", "nominal")] == ("pass", "fail")


def test_diff_added_and_removed_records(repo: Path):
    (repo / "designs" / "b.yaml").unlink()
    write(repo, {"designs/c.yaml": LOOP_B.replace("loop-b", "loop-c")})
    data = json.loads(run(repo, "diff", "--rev", "HEAD", "--format", "json").out)
    status = {r["name"]: r["status"] for r in data["records"]}
    assert status == {"loop-b": "removed", "loop-c": "added"}


def test_diff_two_files_and_markdown_escaping(tmp_path: Path):
    old = tmp_path / "old.yaml"
    new = tmp_path / "new.yaml"
    old.write_text(loop_a(2))
    new.write_text(loop_a(1.5, rev=2).replace("title: Scenario loop a",
                                              "title: \"<script>x</script> | `tick` *b*\""))
    done = run(tmp_path, "diff", str(old), str(new), "--format", "markdown")
    assert done.code == 0, done.err
    md = done.out
    assert "<script>" not in md and "&lt;script" in md
    assert "\\| \\`tick\\` \\*b\\*" in md
    gm = 20 * math.log10(2 / 1.5)
    assert f"| `gain_margin_db` | {gain_margin_db(2):.4g} | {gain_margin_db(1.5):.4g} | " \
           f"{gm:+.4g} | better |" in md


def test_diff_against_the_approved_records(repo: Path, monkeypatch):
    git(repo, "checkout", "-q", "HEAD~1")
    assert run(repo, "approve", "--by", "R").code == 0
    git(repo, "checkout", "-q", "-")
    done = run(repo, "diff", "--approved")
    assert done.code == 0, done.err
    assert done.out.startswith("records: approved in reports/baseline.json -> working tree")
    assert "loop-a  r1 -> r2" in done.out and "controller transfer: '2' -> '2.5'" in done.out


def test_diff_usage_and_git_errors(repo: Path, tmp_path: Path):
    done = run(repo, "diff", "--rev", "no-such-rev")
    assert done.code == 2 and "unknown revision 'no-such-rev'" in done.err
    done = run(repo, "diff", "--rev", "--output=x")
    assert done.code == 2
    assert run(repo, "diff", "--rev=-p").code == 2
    assert not (repo / "x").exists()
    outside = tmp_path / "outside"
    outside.mkdir()
    done = run(outside, "diff", "--rev", "HEAD")
    assert done.code == 2 and "not inside a git repository" in done.err
    done = run(repo, "diff", "designs/a.yaml")
    assert done.code == 2 and "give two record files" in done.err
    done = run(repo, "diff", "--approved")
    assert done.code == 2 and "no such file" in done.err

"""The corpus of broken records: each file names the message fragment it must produce
(``# expect:``) and optionally the line:column it must point at (``# at:``)."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from loopvet.run import check_file

from .conftest import run_cli

CORPUS = Path(__file__).parent / "corpus"
FILES = sorted(CORPUS.glob("*.yaml"))


def _expectations(path: Path) -> tuple[str, tuple[int, int] | None]:
    text = path.read_text()
    expect = re.search(r"^# expect: (.+)$", text, re.M)
    at = re.search(r"^# at: (\d+):(\d+)$", text, re.M)
    assert expect, f"{path.name} has no '# expect:' line"
    return expect.group(1).strip(), (int(at.group(1)), int(at.group(2))) if at else None


def test_corpus_is_large_enough():
    assert len(FILES) >= 25


@pytest.mark.parametrize("path", FILES, ids=[p.stem for p in FILES])
def test_broken_record_gets_its_message(path):
    fragment, at = _expectations(path)
    result = check_file(str(path))
    assert result.status == "invalid", f"{path.name} was accepted"
    texts = [str(e) for e in result.errors]
    assert any(fragment in t for t in texts), f"{path.name}: {texts}"
    for e in result.errors:
        assert e.path == str(path)
        assert e.message and e.message[0].islower() or e.message[0] in "'(", e.message
        assert not e.message.endswith("."), e.message
    if at is not None:
        hit = next(e for e in result.errors if fragment in str(e))
        assert (hit.line, hit.column) == at, f"{path.name}: {hit}"


def test_whole_corpus_through_the_cli(tmp_path):
    r = run_cli("check", str(CORPUS), "--out", str(tmp_path), "--format", "text")
    assert r.returncode == 3
    assert "Traceback" not in r.stdout + r.stderr
    assert f"{len(FILES)} designs: 0 pass, 0 fail, {len(FILES)} invalid" in r.stdout


def test_errors_carry_line_column_and_key():
    result = check_file(str(CORPUS / "16-parameter-typo-key.yaml"))
    err = result.errors[0]
    assert (err.line, err.column) == (6, 10)
    assert err.key == "parameters.zeta.value"

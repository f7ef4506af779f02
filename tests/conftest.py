"""Shared test helpers: write records into a temporary folder, load them, run the CLI."""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from loopvet.record.load import parse_record
from loopvet.record.model import Record

ROOT = Path(__file__).resolve().parents[1]


def record_text(body: str) -> str:
    """A record: the standard header plus ``body`` (dedented YAML)."""
    return "loopvet: 1\nname: t\nrevision: 1\n" + textwrap.dedent(body)


def load_text(body: str, header: bool = True) -> Record:
    text = record_text(body) if header else textwrap.dedent(body)
    return parse_record("t.yaml", text.encode())


@pytest.fixture
def write(tmp_path: Path):
    def _write(name: str, text: str) -> Path:
        p = tmp_path / name
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_text(textwrap.dedent(text))
        return p
    return _write


def run_cli(*args: str, cwd: Path | None = None) -> subprocess.CompletedProcess[str]:
    env = dict(os.environ)
    env["PYTHONPATH"] = str(ROOT / "src") + os.pathsep + env.get("PYTHONPATH", "")
    return subprocess.run([sys.executable, "-m", "loopvet", *args], capture_output=True,
                          text=True, cwd=cwd or ROOT, env=env, timeout=300)

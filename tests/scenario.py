"""Helpers for scenario tests: a temporary git repository with records, and the command line
run in-process (a subprocess would add about a second of start-up per call).

Git runs with author and committer set in the environment and without system or global
configuration, so the tests work on a fresh CI machine.
"""

from __future__ import annotations

import io
import math
import os
import subprocess
from contextlib import redirect_stderr, redirect_stdout
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from loopvet.cli import main

GIT_ENV = {"GIT_AUTHOR_NAME": "Scenario Author", "GIT_AUTHOR_EMAIL": "author@example.invalid",
           "GIT_COMMITTER_NAME": "Scenario Author",
           "GIT_COMMITTER_EMAIL": "author@example.invalid", "GIT_CONFIG_NOSYSTEM": "1",
           "GIT_CONFIG_GLOBAL": os.devnull}

# Loop a: K / (s (s+1) (s+2)) with a proportional controller of gain k. Characteristic
# polynomial s^3 + 3 s^2 + 2 s + k: by Routh-Hurwitz stable iff 0 < k < 3*2 = 6 (the
# textbook third-order example, e.g. Ogata, Modern Control Engineering, Routh's criterion).
LOOP_A = """\
loopvet: 1
name: loop-a
revision: {rev}
title: Scenario loop a
plant: {{transfer: "1/(s*(s+1)*(s+2))"}}
controller: {{transfer: "{k}"}}
requirements:
  phase_margin_deg: {{min: 20}}
  gain_margin_db: {{min: 3}}
{extra}"""

# Loop b: a first-order plant under PI control, no declared requirement (always stable).
LOOP_B = """\
loopvet: 1
name: loop-b
revision: 1
plant: {transfer: "1/(s+1)"}
controller: {pid: {kp: 1, ki: 1}}
"""


def loop_a(k: float, rev: int = 1, extra: str = "") -> str:
    return LOOP_A.format(k=k, rev=rev, extra=extra)


def gain_margin_db(k: float) -> float:
    """20 log10(6/k): the ultimate gain 6 from Routh-Hurwitz over the nominal gain k."""
    return 20.0 * math.log10(6.0 / k)


def phase_margin_deg(k: float) -> float:
    """Independent of loopvet: |k/(jw(jw+1)(jw+2))| = 1 <=> x^3 + 5x^2 + 4x - k^2 = 0 with
    x = w^2 (one positive root), then PM = 180 - 90 - atan(w) - atan(w/2) degrees."""
    x = [r.real for r in np.roots([1.0, 5.0, 4.0, -k * k]) if abs(r.imag) < 1e-12 and r.real > 0]
    w = math.sqrt(x[0])
    return 90.0 - math.degrees(math.atan(w) + math.atan(w / 2.0))


def git(repo: Path, *args: str) -> str:
    done = subprocess.run(["git", *args], cwd=repo, env={**os.environ, **GIT_ENV},
                          capture_output=True, text=True, check=True, timeout=60)
    return done.stdout


def make_repo(root: Path, records: dict[str, str]) -> Path:
    """A git repository with ``records`` (relative path -> text) committed once."""
    root.mkdir(parents=True, exist_ok=True)
    git(root, "init", "-q")
    write(root, records)
    commit(root, "first")
    return root


def write(repo: Path, records: dict[str, str]) -> None:
    for rel, text in records.items():
        p = repo / rel
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_text(text)


def commit(repo: Path, message: str) -> None:
    git(repo, "add", "-A")
    git(repo, "commit", "-q", "-m", message)


@dataclass(frozen=True)
class Run:
    code: int
    out: str
    err: str


def run(repo: Path, *args: str) -> Run:
    """``loopvet ARGS`` in-process, in ``repo``; ``check`` and ``approve`` use one job."""
    argv = list(args)
    if argv and argv[0] in ("check", "approve") and "--jobs" not in argv:
        argv += ["--jobs", "1"]
    out, err = io.StringIO(), io.StringIO()
    cwd = os.getcwd()
    os.chdir(repo)
    try:
        with redirect_stdout(out), redirect_stderr(err):
            try:
                code = main(argv)
            except SystemExit as exc:
                code = int(exc.code or 0)
    finally:
        os.chdir(cwd)
    return Run(code, out.getvalue(), err.getvalue())

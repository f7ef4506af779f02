"""Record files as they were at a git revision, read with ``git show`` (never a checkout).

Paths are relative to the current folder, as in the working tree, so that a record and its
older version pair up by path. Only ``git rev-parse``, ``git ls-tree`` and ``git show`` run;
the revision is passed as an argument, never through a shell, and may not start with '-'.
"""

from __future__ import annotations

import os
import subprocess
from collections.abc import Sequence

SUFFIXES = (".yaml", ".yml")


class GitError(Exception):
    pass


def _git(*args: str) -> bytes:
    try:
        done = subprocess.run(["git", *args], capture_output=True, timeout=120, check=False)
    except FileNotFoundError:
        raise GitError("git is not installed (needed for --rev)") from None
    except subprocess.TimeoutExpired:
        raise GitError(f"git {args[0]} did not finish within 120 s") from None
    if done.returncode != 0:
        message = done.stderr.decode("utf-8", "replace").strip().splitlines()
        raise GitError(message[-1] if message else f"git {args[0]} failed")
    return done.stdout


def commit_of(rev: str) -> str:
    """The commit id a revision names; GitError when it names none."""
    if not rev or rev.startswith("-"):
        raise GitError(f"{rev!r} is not a revision")
    try:
        return _git("rev-parse", "--verify", "--quiet", f"{rev}^{{commit}}").decode().strip()
    except GitError as exc:
        if "not a git repository" in str(exc):
            raise GitError("not inside a git repository (--rev reads older records with "
                           "git show)") from None
        raise GitError(f"unknown revision {rev!r}") from None


def records_at(commit: str, paths: Sequence[str]) -> dict[str, bytes]:
    """{path: bytes} of every record file (*.yaml, *.yml, no hidden parts) under ``paths``
    at ``commit``; paths are normalised and relative to the current folder."""
    listed = _git("ls-tree", "-r", "-z", "--name-only", commit, "--", *paths)
    out: dict[str, bytes] = {}
    for raw in listed.split(b"\0"):
        if not raw:
            continue
        name = os.path.normpath(raw.decode("utf-8", "surrogateescape"))
        parts = name.split(os.sep)
        if not name.endswith(SUFFIXES) or any(p.startswith(".") and p not in (".", "..")
                                              for p in parts):
            continue
        out[name] = _git("show", "--no-textconv", f"{commit}:./{name}")
    return out

"""Fleet orchestration: discover record files, check each, collect one FleetResult.

A record that cannot be read, validated or assembled becomes an ``invalid`` result and
never stops the others. An unexpected exception inside the analysis of one record is
reported the same way (as an internal error), never as a traceback.
"""

from __future__ import annotations

import os
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

from .analysis.design import check_record
from .record.errors import RecordInvalid, RecordProblem
from .record.load import read_record
from .results import DesignResult, FleetResult

SUFFIXES = (".yaml", ".yml")


@dataclass(frozen=True, kw_only=True, slots=True)
class Settings:
    """Everything a check run depends on, resolved from the command line."""

    paths: tuple[str, ...] = ("designs",)
    out: str = "reports/latest"
    format: str = "text"
    jobs: int = 1


def discover(paths: Sequence[str]) -> tuple[list[str], list[RecordProblem]]:
    """Record files under ``paths`` (recursive, sorted, no duplicates) and path problems."""
    found: list[str] = []
    problems: list[RecordProblem] = []
    for p in paths:
        if os.path.isdir(p):
            for root, dirs, files in os.walk(p):
                dirs[:] = sorted(d for d in dirs if not d.startswith("."))
                found.extend(os.path.join(root, f) for f in sorted(files)
                             if f.endswith(SUFFIXES) and not f.startswith("."))
        elif os.path.isfile(p):
            found.append(p)
        else:
            problems.append(RecordProblem(path=p, line=0, column=0, key="",
                                          message="no such file or folder"))
    seen: set[str] = set()
    unique = []
    for f in found:
        norm = os.path.normpath(f)
        if norm not in seen:
            seen.add(norm)
            unique.append(norm)
    return unique, problems


def _stem(path: str) -> str:
    return os.path.splitext(os.path.basename(path))[0]


def check_file(path: str) -> DesignResult:
    """Read, validate and analyse one file; every failure becomes an invalid result."""
    record = None
    try:
        record = read_record(path)
        return check_record(record)
    except RecordInvalid as exc:
        problems = tuple(exc.problems)
    except OSError as exc:
        problems = (RecordProblem(path=path, line=0, column=0, key="",
                                  message=f"cannot read the file: {exc.strerror}"),)
    except Exception as exc:  # noqa: BLE001 - one broken analysis must not stop the fleet
        problems = (RecordProblem(path=path, line=0, column=0, key="",
                                  message=f"internal error while analysing this record "
                                          f"({type(exc).__name__}: {exc}); please report it "
                                          "with the record attached"),)
    name = record.name if record else _stem(path)
    return DesignResult(name=name, revision=record.revision if record else None, path=path,
                        status="invalid", errors=problems,
                        title=record.title if record else "")


def check_fleet(settings: Settings, files: Iterable[str] | None = None) -> FleetResult:
    paths, problems = discover(settings.paths) if files is None else (list(files), [])
    results = [check_file(p) for p in paths]
    results.extend(DesignResult(name=_stem(p.path), revision=None, path=p.path,
                                status="invalid", errors=(p,)) for p in problems)
    return FleetResult(designs=tuple(_unique_names(results)))


def _unique_names(results: list[DesignResult]) -> list[DesignResult]:
    first: dict[str, str] = {}
    out = []
    for r in results:
        if r.status != "invalid" or r.revision is not None:
            if r.name in first:
                r = DesignResult(name=r.name, revision=r.revision, path=r.path,
                                 status="invalid", title=r.title, errors=(RecordProblem(
                                     path=r.path, line=0, column=0, key="name",
                                     message=f"name '{r.name}' is already used by "
                                             f"{first[r.name]}; names are unique in a fleet"),))
            else:
                first[r.name] = r.path
        out.append(r)
    return out

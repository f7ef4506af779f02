"""Fleet orchestration: discover record files, check each, collect one FleetResult.

A record that cannot be read, validated or assembled becomes an ``invalid`` result and
never stops the others. An unexpected exception inside the analysis of one record is
reported the same way (as an internal error), never as a traceback.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass

from .analysis.design import check_record
from .record.errors import RecordInvalid, RecordProblem
from .record.load import parse_record
from .results import DesignResult, FleetResult

SUFFIXES = (".yaml", ".yml")


@dataclass(frozen=True, kw_only=True, slots=True)
class Settings:
    """Everything a check run depends on, resolved from the command line."""

    paths: tuple[str, ...] = ("designs",)
    out: str = "reports/latest"
    format: str = "text"
    jobs: int = 1
    cluster: str | None = None
    baseline: str | None = None       # approved baseline file to compare with, if any
    baseline_required: bool = False   # True when named on the command line: must exist
    html: bool = True                 # write the HTML report beside results.json


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
    item = _read(path)
    return item if isinstance(item, DesignResult) else check_data(*item)


def check_data(path: str, data: bytes) -> DesignResult:
    """Validate and analyse the bytes of one record file (no file access: this is what
    runs in worker processes and on cluster workers)."""
    record = None
    try:
        record = parse_record(path, data)
        return check_record(record)
    except RecordInvalid as exc:
        problems = tuple(exc.problems)
    except Exception as exc:  # noqa: BLE001 - one broken analysis must not stop the fleet
        problems = (RecordProblem(path=path, line=0, column=0, key="",
                                  message=f"internal error while analysing this record "
                                          f"({type(exc).__name__}: {exc}); please report it "
                                          "with the record attached"),)
    name = record.name if record else _stem(path)
    return DesignResult(name=name, revision=record.revision if record else None, path=path,
                        status="invalid", errors=problems,
                        title=record.title if record else "")


def _check_pair(item: tuple[str, bytes]) -> DesignResult:
    return check_data(*item)


def _read(path: str) -> tuple[str, bytes] | DesignResult:
    try:
        with open(path, "rb") as fh:
            return path, fh.read(8 * 1024 * 1024)
    except OSError as exc:
        return DesignResult(name=_stem(path), revision=None, path=path, status="invalid",
                            errors=(RecordProblem(path=path, line=0, column=0, key="",
                                                  message=f"cannot read the file: "
                                                          f"{exc.strerror}"),))


Read = list[tuple[str, bytes] | DesignResult]


def read_fleet(paths: Sequence[str]) -> Read:
    """The first stage: (path, bytes) of every record file under ``paths``, in file order;
    a path that cannot be read is already an invalid result."""
    found, problems = discover(paths)
    read: Read = [_read(p) for p in found]
    read.extend(DesignResult(name=_stem(p.path), revision=None, path=p.path,
                             status="invalid", errors=(p,)) for p in problems)
    return read


def check_fleet(settings: Settings, files: Iterable[str] | None = None,
                progress: Callable[[int, int], None] | None = None,
                read: Read | None = None) -> FleetResult:
    """Check every record; results in file order whatever the parallelism.

    ``read`` (from :func:`read_fleet`) gives the bytes already read, so that later stages
    (the baseline comparison) see exactly the bytes that were analysed.

    ``settings.jobs`` > 1 runs records in that many worker processes; ``settings.cluster``
    sends them to a dask.distributed scheduler at that address. Workers receive the file
    bytes, never paths, so a remote worker needs no access to the checkout. Each record is
    analysed by the same deterministic code wherever it runs, so the results (and the
    results.json bytes) are identical for any number of jobs.
    """
    if read is None:
        read = read_fleet(settings.paths) if files is None else [_read(p) for p in files]
    work = [r for r in read if not isinstance(r, DesignResult)]
    done = _run(work, settings, progress)
    it = iter(done)
    results = [r if isinstance(r, DesignResult) else next(it) for r in read]
    return FleetResult(designs=tuple(_unique_names(results)))


def _run(work: list[tuple[str, bytes]], settings: Settings,
         progress: Callable[[int, int], None] | None) -> list[DesignResult]:
    total = len(work)
    if settings.cluster:
        from .cluster import run_on_cluster

        return run_on_cluster(settings.cluster, work, _check_pair, progress)
    if settings.jobs <= 1 or total <= 1:
        out = []
        for i, item in enumerate(work):
            out.append(_check_pair(item))
            if progress:
                progress(i + 1, total)
        return out
    from concurrent.futures import ProcessPoolExecutor

    out = []
    with ProcessPoolExecutor(max_workers=min(settings.jobs, total)) as pool:
        for i, res in enumerate(pool.map(_check_pair, work, chunksize=1)):
            out.append(res)
            if progress:
                progress(i + 1, total)
    return out


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

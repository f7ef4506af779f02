"""Command line: parse arguments into one Settings value, hand off, return the exit code.

Exit codes of ``loopvet check`` (results-format v1):
  0  every record valid, every requirement met, nothing degraded against the baseline
  1  at least one requirement not met (and no invalid record)
  2  usage error (bad command line)
  3  at least one record invalid (the others are still checked and reported)
  4  all requirements met, but a metric degraded beyond tolerance against the approved
     baseline, or a record's content changed without a revision bump
A baseline file that is named but missing, or is corrupt, stops the run with code 2.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
from collections.abc import Sequence
from typing import TYPE_CHECKING

from . import __version__

if TYPE_CHECKING:
    from .run import Settings

EXIT_CODES = __doc__.split("loopvet check`` (results-format v1):\n", 1)[1] if __doc__ else ""
BASELINE = os.path.join("reports", "baseline.json")


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:  # type: ignore[override]
        self.print_usage(sys.stderr)
        self.exit(2, f"loopvet: error: {message}\n")


def _positive(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected at least 1, got {value}")
    return value


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="loopvet", description="Check a fleet of feedback-loop records.",
                     formatter_class=argparse.RawDescriptionHelpFormatter,
                     epilog="exit codes of 'loopvet check':\n" + EXIT_CODES)
    parser.add_argument("--version", action="version", version=f"loopvet {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    check = sub.add_parser("check", help="check records and write results",
                           formatter_class=argparse.RawDescriptionHelpFormatter,
                           epilog="exit codes:\n" + EXIT_CODES)
    check.add_argument("paths", nargs="*", default=["designs"], metavar="PATH",
                       help="record files or folders (searched recursively; default designs/)")
    check.add_argument("--out", default=os.path.join("reports", "latest"), metavar="DIR",
                       help="output folder for results.json, junit.xml, summary.md and the "
                            "HTML report index.html (default reports/latest/)")
    check.add_argument("--no-html", action="store_true",
                       help="skip the HTML report (fastest gate run; an earlier one in DIR "
                            "is removed)")
    check.add_argument("--format", choices=("text", "json"), default="text",
                       help="what to print on stdout: a line per record, or the results JSON")
    check.add_argument("--jobs", type=_positive, default=os.cpu_count() or 1, metavar="N",
                       help="records checked in parallel processes (default: the machine's "
                            "cores); results are identical for any N")
    check.add_argument("--cluster", metavar="ADDRESS", default=None,
                       help="run on a dask.distributed scheduler, e.g. tcp://127.0.0.1:8786 "
                            "(needs the extra loopvet[cluster])")
    check.add_argument("--baseline", metavar="PATH", default=None,
                       help=f"approved baseline to report drift against (default {BASELINE}, "
                            "used when it exists)")
    check.add_argument("--no-baseline", action="store_true",
                       help="do not compare with any baseline")
    approve = sub.add_parser("approve", help="record current results as the approved baseline",
                             formatter_class=argparse.RawDescriptionHelpFormatter,
                             epilog="exit codes: 0 written (or already up to date), 1 failing "
                                    "records\nwithout --accept-failing, 2 usage or unusable "
                                    "baseline file,\n3 invalid records; nothing is written "
                                    "unless the code is 0")
    approve.add_argument("paths", nargs="*", default=["designs"], metavar="PATH",
                         help="records or folders to approve (default designs/); approved "
                              "records missing from these paths are dropped")
    approve.add_argument("--baseline", metavar="PATH", default=BASELINE,
                         help=f"baseline file (default {BASELINE})")
    approve.add_argument("--by", metavar="NAME", help="approver (default: git user.name, "
                         "else the login name)")
    approve.add_argument("--note", metavar="TEXT", default="", help="note stored with the "
                         "records approved now")
    approve.add_argument("--accept-failing", action="store_true",
                         help="approve records that fail requirements (recorded as such)")
    approve.add_argument("--discard-corrupt", action="store_true",
                         help="start afresh when the baseline file is unusable")
    approve.add_argument("--jobs", type=_positive, default=os.cpu_count() or 1, metavar="N",
                         help="records checked in parallel processes")
    diff = sub.add_parser("diff", help="record changes and the result changes they cause",
                          description="Compare two record files (OLD NEW), the working tree "
                                      "with a git revision (--rev), or with the records "
                                      "stored in the approved baseline (--approved).",
                          epilog="exit codes: 0 shown (whatever changed), 2 usage error, or "
                                 "an unusable baseline, revision or file")
    diff.add_argument("paths", nargs="*", metavar="PATH",
                      help="OLD NEW files, or records/folders for --rev and --approved "
                           "(default designs/)")
    which = diff.add_mutually_exclusive_group()
    which.add_argument("--rev", metavar="REV", help="git revision to compare with "
                       "(read with git show)")
    which.add_argument("--approved", action="store_true",
                       help="compare with the records stored in the baseline")
    diff.add_argument("--baseline", metavar="PATH", default=BASELINE,
                      help=f"baseline file for --approved (default {BASELINE})")
    diff.add_argument("--format", choices=("text", "json", "markdown"), default="text",
                      help="text for people, json, or markdown for a pull-request comment")
    show = sub.add_parser("show", help="print a readable analysis of one record")
    show.add_argument("record", metavar="RECORD", help="one record file")
    sub.add_parser("schema", help="print the JSON Schema of the record format")
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help(sys.stderr)
        return 2
    if args.command == "schema":
        from .record.format import json_schema

        sys.stdout.write(json.dumps(json_schema(), indent=2) + "\n")
        return 0
    if args.command == "show":
        from .report.show import render as render_show
        from .run import check_file

        result = check_file(args.record)
        sys.stdout.write(render_show(result))
        return 3 if result.status == "invalid" else 0
    if args.command == "approve":
        from .approve import ApproveSettings, run_approve

        return run_approve(ApproveSettings(
            paths=tuple(args.paths), baseline=args.baseline, by=args.by, note=args.note,
            accept_failing=args.accept_failing, discard_corrupt=args.discard_corrupt,
            jobs=args.jobs))
    if args.command == "diff":
        from .review import DiffSettings, run_diff

        return run_diff(DiffSettings(paths=tuple(args.paths), rev=args.rev,
                                     approved=args.approved, baseline=args.baseline,
                                     format=args.format))
    from .run import Settings

    baseline = None if args.no_baseline else args.baseline or BASELINE
    return _check(Settings(paths=tuple(args.paths), out=args.out, format=args.format,
                           jobs=args.jobs, cluster=args.cluster, baseline=baseline,
                           baseline_required=args.baseline is not None,
                           html=not args.no_html))


def _check(settings: Settings) -> int:
    from . import baseline, drift
    from .cluster import ClusterUnavailable
    from .report.files import write_atomic
    from .report.text import render
    from .results import dumps
    from .run import check_fleet, read_fleet

    progress = _progress if sys.stderr.isatty() else None
    try:
        store = baseline.read_store(settings.baseline, required=settings.baseline_required) \
            if settings.baseline else None
        read = read_fleet(settings.paths)
        fleet = check_fleet(settings, progress=progress, read=read)
    except (ClusterUnavailable, baseline.BaselineError) as exc:
        print(f"loopvet: {exc}", file=sys.stderr)
        return 2
    if progress:
        sys.stderr.write("\r\x1b[K")
    if store is not None and settings.baseline:
        sources = {p: baseline.source_of(p, data) for p, data in
                   (r for r in read if isinstance(r, tuple))}
        fleet = drift.apply(fleet, store, sources, scope=settings.paths,
                            path=settings.baseline, settings=baseline.fingerprint())
        if fleet.baseline and not fleet.baseline["comparable"]:
            print(f"loopvet: {settings.baseline} is not comparable: "
                  f"{fleet.baseline['reason']}", file=sys.stderr)
        elif fleet.baseline:
            from .overlay import attach

            fleet = attach(fleet, store, settings.jobs)
    payload = dumps(fleet.to_json())
    results_path = os.path.join(settings.out, "results.json")
    try:
        write_atomic(results_path, payload)
        from .report.bundle import write_reports

        written = write_reports(settings.out, json.loads(payload), html=settings.html,
                                jobs=settings.jobs)
    except OSError as exc:
        print(f"loopvet: cannot write into {settings.out}: {exc.strerror}", file=sys.stderr)
        return 2
    if "index.html" in written:
        print(f"loopvet: report in {os.path.join(settings.out, 'index.html')}",
              file=sys.stderr)
    if settings.format == "json":
        sys.stdout.write(payload)
    else:
        sys.stdout.write(render(fleet, results_path))
    return int(fleet.summary.exit_code)


def _progress(done: int, total: int) -> None:
    width = 30
    filled = width * done // max(total, 1)
    sys.stderr.write(f"\rchecking [{'#' * filled}{'.' * (width - filled)}] {done}/{total}")
    sys.stderr.flush()


def entry() -> None:
    sys.exit(main())


if __name__ == "__main__":  # pragma: no cover
    entry()

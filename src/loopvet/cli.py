"""Command line: parse arguments into one Settings value, hand off, return the exit code.

Exit codes of ``loopvet check`` (results-format v1):
  0  every record valid, every requirement met, nothing degraded against the baseline
  1  at least one requirement not met (and no invalid record)
  2  usage error (bad command line)
  3  at least one record invalid (the others are still checked and reported)
  4  all requirements met, but a metric degraded beyond tolerance against the approved
     baseline, or a record's content changed without a revision bump
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
                       help="output folder for results.json (default reports/latest/)")
    check.add_argument("--format", choices=("text", "json"), default="text",
                       help="what to print on stdout: a line per record, or the results JSON")
    check.add_argument("--jobs", type=_positive, default=os.cpu_count() or 1, metavar="N",
                       help="records checked in parallel processes (default: the machine's "
                            "cores); results are identical for any N")
    check.add_argument("--cluster", metavar="ADDRESS", default=None,
                       help="run on a dask.distributed scheduler, e.g. tcp://127.0.0.1:8786 "
                            "(needs the extra loopvet[cluster])")
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
    from .run import Settings

    return _check(Settings(paths=tuple(args.paths), out=args.out, format=args.format,
                           jobs=args.jobs, cluster=args.cluster))


def _check(settings: Settings) -> int:
    from .cluster import ClusterUnavailable
    from .report.files import write_atomic
    from .report.text import render
    from .results import dumps
    from .run import check_fleet

    progress = _progress if sys.stderr.isatty() else None
    try:
        fleet = check_fleet(settings, progress=progress)
    except ClusterUnavailable as exc:
        print(f"loopvet: {exc}", file=sys.stderr)
        return 2
    if progress:
        sys.stderr.write("\r\x1b[K")
    payload = dumps(fleet.to_json())
    results_path = os.path.join(settings.out, "results.json")
    try:
        write_atomic(results_path, payload)
    except OSError as exc:
        print(f"loopvet: cannot write {results_path}: {exc.strerror}", file=sys.stderr)
        return 2
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

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

    return _check(Settings(paths=tuple(args.paths), out=args.out, format=args.format))


def _check(settings: Settings) -> int:
    from .report.files import write_atomic
    from .report.text import render
    from .results import dumps
    from .run import check_fleet

    fleet = check_fleet(settings)
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


def entry() -> None:
    sys.exit(main())


if __name__ == "__main__":  # pragma: no cover
    entry()

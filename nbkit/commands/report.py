"""`nbkit report RUN [RUN ...] -o report.html`: the static HTML report of any recordings."""
from __future__ import annotations

import sys

from nbkit.errors import RecordingError
from nbkit.recording import load
from nbkit.views.report import write_report


def add_arguments(parser):
    parser.add_argument("runs", nargs="+", help="recording folders; the first is the reference run")
    parser.add_argument("-o", "--output", default="report.html", help="HTML file to write (default: report.html)")
    parser.add_argument("--title", default="nbkit report")


def run(args) -> int:

    try:
        runs = [load(path) for path in args.runs]
    except RecordingError as exc:
        print(f"nbkit report: {exc}", file=sys.stderr)
        return 2
    path = write_report(runs, args.output, title=args.title,
                        commands=["nbkit report " + " ".join(args.runs) + f" -o {args.output}"])
    print(f"report written to {path}")
    return 0

"""The `nbkit` command line: demo, report, findings, info, replay.

Every command lives in nbkit/commands/ and exposes `add_arguments(parser)` and `run(args) -> int`;
this module only dispatches. Each command module keeps its heavy imports inside `run`, so
`nbkit --help` stays fast.
"""
from __future__ import annotations

import argparse
import sys

from nbkit.commands import demo, findings, info, replay, report
from nbkit.version import __version__

COMMANDS = {
    "demo": (demo, "record, replay and diagnose the demo scenario; write an HTML report"),
    "report": (report, "write a self-contained HTML report of recordings"),
    "findings": (findings, "print a recording's findings; non-zero exit on errors"),
    "info": (info, "summarise a recording: steps, tensors, size, state"),
    "replay": (replay, "replay a recording from a keyframe with other optimizers"),
}


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(prog="nbkit", description="Training-run forensics for PyTorch.")
    # argparse's "version" action prints the string and exits 0 (Python docs, argparse "action")
    parser.add_argument("--version", action="version", version=f"nbkit {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name, (module, help_text) in COMMANDS.items():
        module.add_arguments(sub.add_parser(name, help=help_text, description=help_text))
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 2
    return int(COMMANDS[args.command][0].run(args) or 0)


if __name__ == "__main__":
    sys.exit(main())

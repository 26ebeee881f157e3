"""The `nbkit` command line: demo, report, findings, info, replay.

Each subcommand lives beside the code it drives and exposes `add_arguments(parser)` and
`run(args) -> int`; this module only dispatches, so a command's heavy imports load when it runs.
"""
from __future__ import annotations

import argparse
import importlib
import sys

COMMANDS = {
    "demo": ("nbkit.demo.command", "record, replay and diagnose the demo scenario; write an HTML report"),
    "report": ("nbkit.views.report_command", "write a self-contained HTML report of recordings"),
    "findings": ("nbkit.analyze.findings_command", "print a recording's findings; non-zero exit on errors"),
    "info": ("nbkit.store.info_command", "summarise a recording: steps, tensors, size, state"),
    "replay": ("nbkit.replay.command", "replay a recording from a keyframe with other optimizers"),
}


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(prog="nbkit", description="Training-run forensics for PyTorch.")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    modules = {}
    for name, (module_name, help_text) in COMMANDS.items():
        try:
            module = importlib.import_module(module_name)
        except ImportError as exc:
            if exc.name != module_name:
                raise
            continue                                  # a command not built yet
        modules[name] = module
        module.add_arguments(sub.add_parser(name, help=help_text, description=help_text))
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 2
    return int(modules[args.command].run(args) or 0)


if __name__ == "__main__":
    sys.exit(main())

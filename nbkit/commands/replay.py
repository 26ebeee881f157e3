"""`nbkit replay RUN --setup module:function --optimizer NAME=module:factory ...`

The setup function returns (model, step_fn, batches); each --optimizer names a factory(groups) ->
optimizer (a bare NAME "recorded" replays the recorded optimizer). Each replay is written to
<to>/<NAME>, so a cluster scheduler can fan replays out as independent jobs over a shared folder.
"""
from __future__ import annotations

import importlib
import sys

import nbkit
from nbkit.errors import NbkitError, ReplayError


def add_arguments(parser) -> None:
    parser.add_argument("run", help="the recording to replay")
    parser.add_argument("--setup", required=True, metavar="MODULE:FUNCTION",
                        help="a function returning (model, step_fn, batches)")
    parser.add_argument("--optimizer", action="append", default=[], metavar="NAME=MODULE:FACTORY",
                        help="a replay: NAME=module:factory, or 'recorded' (repeatable; default: recorded)")
    parser.add_argument("--start", type=int, default=None, help="first replayed step (default: the run's first)")
    parser.add_argument("--steps", type=int, default=None, help="number of steps (default: to the run's end)")
    parser.add_argument("--to", default=None, help="folder for the replays (default: RUN.replays)")
    parser.add_argument("--before-step", default=None, metavar="MODULE:FUNCTION",
                        help="before_step(model, optimizer, step), e.g. gradient clipping")
    parser.add_argument("--workers", type=int, default=1, help="spawned processes (default 1)")
    parser.add_argument("--no-strict", action="store_true", help="warn instead of stopping on a batch mismatch")
    parser.add_argument("--no-progress", action="store_true", help="no progress bar")


def load_object(spec: str, what: str):
    """module:attribute -> the attribute, with an error that says how to write the spec."""
    module_name, _, attribute = spec.partition(":")
    if not module_name or not attribute:
        raise ReplayError(f"{what} {spec!r} is not of the form module:attribute (e.g. mysetup:make)")
    if "" not in sys.path:
        sys.path.insert(0, "")        # like `python -m`: modules in the current folder are importable
    try:
        module = importlib.import_module(module_name)
    except ImportError as exc:
        raise ReplayError(f"{what} {spec!r}: cannot import {module_name!r} ({exc}); run from the folder that "
                          "holds it or put it on PYTHONPATH") from exc
    try:
        return getattr(module, attribute)
    except AttributeError:
        raise ReplayError(f"{what} {spec!r}: module {module_name!r} has no {attribute!r}") from None


def parse_optimizers(specs: list[str]) -> dict | None:
    if not specs:
        return None
    optimizers = {}
    for spec in specs:
        name, equals, target = spec.partition("=")
        if not equals:
            if name != "recorded":
                raise ReplayError(f"--optimizer {spec!r}: write NAME=module:factory, or 'recorded'")
            optimizers[name] = None
        else:
            optimizers[name] = load_object(target, f"--optimizer {name}")
    return optimizers


def run(args) -> int:
    try:
        setup = load_object(args.setup, "--setup")
        model, step_fn, batches = setup()
        before_step = load_object(args.before_step, "--before-step") if args.before_step else None
        runs = nbkit.replay(args.run, model, step_fn, batches, optimizers=parse_optimizers(args.optimizer),
                            start=args.start, steps=args.steps, to=args.to, before_step=before_step,
                            workers=args.workers, progress=not args.no_progress, strict=not args.no_strict)
    except NbkitError as exc:
        print(f"nbkit replay: {exc}", file=sys.stderr)
        return 1
    for name, recording in runs.items():
        info = recording.meta["replay"]
        fidelity = info.get("fidelity")
        note = ""
        if fidelity is not None:
            first = (f"first difference at step {fidelity['first_step']}: {fidelity['first_difference']}; "
                     if fidelity.get("first_step") is not None else "")
            note = ("identical to the parent" if fidelity["identical"] else
                    f"{first}largest differences: loss {fidelity['loss']:.3g}, probes {fidelity['probes']:.3g}, "
                    f"keyframes {fidelity['keyframes']:.3g}")
        print(f"{name}: steps {int(recording.steps[0])}-{int(recording.steps[-1])} -> {recording.path} "
              f"(process {info['pid']}; {note or recording.meta['optimizer']['class']})")
    return 0

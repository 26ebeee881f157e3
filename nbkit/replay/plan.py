"""A replay's plan: the arguments of replay() validated up front, as plain data a spawned worker can take."""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import torch

from nbkit.errors import ReplayError
from nbkit.replay import restore
from nbkit.replay.changes import Change
from nbkit.store.files import is_recording, read_meta

RECORDED = "recorded"    # the key of the recorded optimizer's replay

DATALOADER_ADVICE = ("`batches` must yield the run's batches from step 0 in the recorded order (or be a "
                     "callable batches(step)). A DataLoader repeats its order when it is re-created with its "
                     "own seeded generator, e.g. DataLoader(data, shuffle=True, "
                     "generator=torch.Generator().manual_seed(0)), and the same worker and sampler settings")


@dataclass
class Plan:
    """Everything one replay call needs; plain data, so it can travel to a spawned worker."""

    run_path: str
    start: int
    steps: int
    keyframe: int
    factories: dict            # name -> factory(groups) -> optimizer, or None for the recorded optimizer
    targets: dict              # name -> output folder
    before_step: object = None
    strict: bool = True
    record: bool = True
    every: object = 1          # the replays' recording stride
    kept: bool = False         # the batches come from the recording (no `batches` given)
    rebuild: str | None = None     # how the loss is rebuilt without a step_fn (nbkit.record.trained_loss)


def checked_window(run, start, steps) -> tuple[int, int]:
    """(start, steps) of a window of `run`'s recorded steps (None: from the first step, to the last), or a
    ReplayError saying what to pass."""
    if len(run) == 0:
        raise ReplayError(f"The recording {str(run.path)!r} holds no steps yet; record some steps first")
    first, last = int(run.steps[0]), int(run.steps[-1])
    start = first if start is None else start
    if not isinstance(start, (int, np.integer)) or isinstance(start, bool) or not first <= start <= last:
        raise ReplayError(f"Invalid start: {start!r}; expected a recorded step between {first} and {last}")
    start = int(start)
    steps = last + 1 - start if steps is None else steps
    if not isinstance(steps, (int, np.integer)) or isinstance(steps, bool) or steps < 1:
        raise ReplayError(f"Invalid steps: {steps!r}; expected a positive number of steps")
    if start + steps - 1 > last:
        raise ReplayError(f"start={start} with steps={steps} runs to step {start + steps - 1}, but the recording "
                          f"ends at step {last}, so later batches cannot be checked; use steps <= {last + 1 - start}")
    return start, int(steps)


def make_plan(run, model, step_fn, batches, optimizers, start, steps, to, before_step, workers, strict,
              record=True, every=None) -> Plan:
    """Validate the arguments of replay() up front and say what to fix."""
    start, steps = checked_window(run, start, steps)
    keyframes = [k for k in run.keyframes if k <= start]
    if not keyframes:
        raise ReplayError(f"No keyframe at or before step {start} (keyframes: {run.keyframes}); pick a later start")
    keyframe, kept = max(keyframes), batches is None
    if kept:
        keyframe = kept_keyframe(run, start, start + steps - 1)
    if not isinstance(model, torch.nn.Module):
        raise ReplayError(f"model must be a torch.nn.Module, got {type(model).__name__}")
    restore.check_model(run.meta, model)
    rebuild = None
    if step_fn is None:
        rebuild = recorded_rebuild(run, kept)
    elif not callable(step_fn):
        raise ReplayError(f"step_fn must be callable as step_fn(model, batch) -> loss, got {step_fn!r}")
    if not kept and not callable(batches) and not hasattr(batches, "__iter__"):
        raise ReplayError(f"batches must be an iterable of the run's batches from step 0 or a callable "
                          f"batches(step), got {type(batches).__name__}")
    if before_step is not None and not callable(before_step):
        raise ReplayError(f"before_step must be None or callable as before_step(model, optimizer, step), "
                          f"got {before_step!r}")
    if not isinstance(workers, int) or isinstance(workers, bool) or workers < 1:
        raise ReplayError(f"Invalid workers: {workers!r}; expected a positive integer")
    if every is not None and every != "auto" and (not isinstance(every, int) or isinstance(every, bool) or every < 1):
        raise ReplayError(f"Invalid every: {every!r}; expected None, \"auto\" or a positive integer "
                          "(1: every step in full)")
    detail = every == 1 and optimizers is None
    factories = {f"full-{start}-{start + steps - 1}" if detail else RECORDED: None} if optimizers is None else optimizers
    if not isinstance(factories, dict) or not factories:
        raise ReplayError(f"optimizers must be None or a non-empty dict name -> factory(groups) -> optimizer, "
                          f"got {optimizers!r}")
    for name, factory in factories.items():
        if not isinstance(name, str) or not name or "/" in name or "\\" in name or name.startswith("."):
            raise ReplayError(f"Invalid replay name {name!r}: names become folder names; use plain words")
        if factory is not None and not callable(factory) and not isinstance(factory, Change):
            raise ReplayError(f"optimizers[{name!r}] must be a factory(groups) -> optimizer, a "
                              f"nbkit.Change(...) of the recorded optimizer or None, got {factory!r}")
    root = Path(f"{run.path}.replays") if to is None else Path(to)
    targets = {name: str(root / name) for name in factories}
    if record:
        for name, target in targets.items():
            check_target(Path(target), run.path)
    return Plan(str(run.path), start, int(steps), keyframe, dict(factories), targets, before_step,
                bool(strict), bool(record), 1 if every is None else every, kept, rebuild)


def kept_keyframe(run, first: int, last: int) -> int:
    """The keyframe a replay of steps first..last on the kept batches starts from: the latest one whose
    replayable window (nbkit.store.batches.windows) covers them."""
    for start, end in sorted(run.replayable_windows, reverse=True):
        if start <= first and last <= end:
            return max(k for k in run.keyframes if start <= k <= first)
    windows = ", ".join(f"{a}-{b}" for a, b in run.replayable_windows) or "none"
    why = ("it was recorded with keep_batches=False" if run.meta.get("keep_batches") is False
           else f"its replayable windows (kept steps from a keyframe on) are: {windows}")
    raise ReplayError(f"Steps {first}-{last} of {str(run.path)!r} cannot be replayed without `batches`: {why}. "
                      "Replay within a window, or pass batches= (" + DATALOADER_ADVICE + ")")


def recorded_rebuild(run, kept: bool) -> str:
    """How a replay without step_fn rebuilds the loss: what the recording verified (meta["trained_loss"])."""
    checked = run.meta.get("trained_loss") or {}
    kind = checked.get("rebuild") if checked.get("rebuildable") else None
    if kind is None:
        last = (checked.get("checks") or [{}])[-1]
        why = last.get("how") if last.get("verdict") is None else (
            f"the loss rebuilt from {last.get('how')} did not give the recorded gradient")
        raise ReplayError(f"This recording's trained loss is not rebuildable ({why or 'it was not checked'}); "
                          "pass step_fn=step_fn(model, micro_batch) -> loss (with kept batches it receives one "
                          "micro-batch {'args', 'kwargs', 'targets'} at a time)")
    if kind == "step_fn":
        raise ReplayError("The recording verified the loss of the step_fn given to nbkit.record; functions are not "
                          "stored, so pass the same step_fn= to nbkit.replay")
    if kind == "criterion" and run.meta.get("criterion_spec") is None:
        raise ReplayError(f"The recording's criterion ({run.meta.get('criterion')}) is not a torch.nn loss a replay "
                          "can make again; pass step_fn=step_fn(model, micro_batch) -> loss")
    if not kept:
        raise ReplayError("Without step_fn a replay rebuilds the loss from kept micro-batches; with batches= also "
                          "pass step_fn=step_fn(model, batch) -> loss")
    return kind


def check_target(path: Path, parent: Path) -> None:
    """A replay may replace an earlier replay of the same run, nothing else."""
    if not path.exists() or not any(path.iterdir()):
        return
    if not is_recording(path):
        raise ReplayError(f"{str(path)!r} exists and is not an nbkit recording; pass another `to` folder")
    previous = (read_meta(path).get("replay") or {}).get("parent")
    if previous is None or Path(previous).resolve() != Path(parent).resolve():
        raise ReplayError(f"{str(path)!r} holds a recording that is not a replay of {str(parent)!r}; it is kept. "
                          "Pass another `to` folder or another replay name")

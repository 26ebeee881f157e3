"""Replay lanes: one model copy and optimizer per replayed optimizer, with the hooks that collect
each step's batch fingerprints and find the recorded criterion; and the Recorder that records a lane."""
from __future__ import annotations

import os
from dataclasses import dataclass, field

import torch

from nbkit.analyze.model_copy import copy_model
from nbkit.errors import ReplayError
from nbkit.measure.fingerprint import fingerprint
from nbkit.record.options import RecordOptions
from nbkit.record.recorder import Recorder
from nbkit.record.step_inputs import rng_digest
from nbkit.replay import changes, restore
from nbkit.replay.changes import Change
from nbkit.store.layout import OPTIMIZER_ONLY_LAYER


@dataclass
class Lane:
    name: str
    model: torch.nn.Module
    optimizer: torch.optim.Optimizer
    recorded: bool
    closure: bool
    recorder: object = None
    rng: dict | None = None
    prints: list = field(default_factory=list)
    target_prints: list = field(default_factory=list)
    saw_criterion: bool = False      # the recorded criterion class was seen during any step
    criterion_now: bool = False      # ... during the step being taken
    active: bool = False             # this lane's step is running (global hooks listen only then)
    watch: object = None             # the global hook that looks for the recorded criterion's object
    rewatch: object = None           # re-installs it
    rewatched: bool = False          # it had to be re-installed: it stays
    handles: list = field(default_factory=list)
    mismatches: list = field(default_factory=list)
    rng_digest: float | None = None  # CRC32 of the CPU random state at this step's first training forward
    change: object = None            # nbkit.replay.changes.Change: the recorded optimizer with one change
    recorded_groups: int = 0         # the recorded optimizer's groups (a change may add one)


def optimizer_only_tensors(lane, meta) -> dict:
    """The lane's optimizer-only tensors (group{g}.{i}) by name."""
    names = {t["name"] for t in meta["tensors"] if t["layer"] == OPTIMIZER_ONLY_LAYER}
    return {name: p for group, info in zip(lane.optimizer.param_groups, meta["param_groups"])
            for p, name in zip(group["params"], info["params"]) if name in names}


def make_lane(name, factory, model, meta, model_state, optimizer_state, extra_params, carried=()) -> Lane:
    """A lane for `factory` (None: the recorded optimizer with the keyframe's state; a Change: the same with
    that change, nbkit.replay.changes); carried: per group, the settings a factory's groups carry
    (restore.carried_settings)."""
    copy = copy_model(model)
    copy.load_state_dict(model_state)
    copy.train()
    groups = restore.parameter_groups(meta, copy, restore.fresh_extra_params(extra_params))
    change = factory if isinstance(factory, Change) else None
    if factory is None or change is not None:
        optimizer = restore.recorded_optimizer(meta, groups, optimizer_state)
        if change is not None:
            changes.build(change, optimizer, copy)
    else:
        try:
            optimizer = restore.factory_optimizer(factory, groups, list(carried) or [{} for _ in groups])
        except Exception as exc:
            raise ReplayError(f"The optimizer factory {name!r} failed on the recorded parameter groups "
                              f"({type(exc).__name__}: {exc}); it is called as factory(groups) with groups a list "
                              "of {'params': [...], ...} dicts (plus the settings that differ between groups)") from exc
        if not isinstance(optimizer, torch.optim.Optimizer):
            raise ReplayError(f"The optimizer factory {name!r} returned {type(optimizer).__name__}, not a "
                              "torch.optim.Optimizer")
    lane = Lane(name, copy, optimizer, recorded=factory is None or change is not None,
                closure=restore.needs_closure(optimizer), change=change, recorded_groups=len(groups))

    def collect(module, args, kwargs):
        if module.training and torch.is_grad_enabled():
            if lane.rng_digest is None:
                lane.rng_digest = rng_digest(torch.get_rng_state())
            lane.prints.append(fingerprint(args, kwargs))

    lane.handles.append(copy.register_forward_pre_hook(collect, with_kwargs=True))
    criterion = meta.get("criterion")
    if criterion is not None:
        own = {id(m) for m in copy.modules()}

        def criterion_hook(module, inputs, output):
            if not lane.active:
                return
            if torch.is_grad_enabled() and copy.training and isinstance(output, torch.Tensor):
                lane.saw_criterion = lane.criterion_now = True
                if len(inputs) > 1:
                    lane.target_prints.append(fingerprint(inputs[1:]))
                if lane.recorder is not None:
                    lane.recorder.observe_criterion(inputs, output)    # the recorder's own loss rule

        def find_criterion(module, inputs, output):
            # A global hook slows every module call, so it only finds the criterion object; the
            # hook then moves onto that object (and back here if step_fn makes a new one per step).
            if type(module).__name__ != criterion or id(module) in own or not lane.active:
                return
            if lane.rewatched:                     # step_fn makes a new criterion per step: keep looking
                return criterion_hook(module, inputs, output)
            lane.watch.remove()
            lane.watch = None
            lane.handles.append(module.register_forward_hook(criterion_hook))
            criterion_hook(module, inputs, output)

        def watch(again=True):
            lane.rewatched = again
            lane.watch = torch.nn.modules.module.register_module_forward_hook(find_criterion)
            lane.handles.append(lane.watch)

        lane.rewatch = watch
        watch(again=False)
    return lane


def detach(lane):
    for handle in lane.handles:
        handle.remove()
    lane.handles = []


def lane_recorder(lane, plan, meta, threads_note) -> Recorder:
    """The Recorder of a lane: the parent's recording settings, into the plan's target folder."""
    parent = {"parent": plan.run_path, "start": plan.start, "keyframe": plan.keyframe, "steps": plan.steps,
              "optimizer": lane.name, "recorded_optimizer": lane.recorded, "pid": os.getpid(),
              "threads": torch.get_num_threads(), "threads_note": threads_note}
    # strict: a replay whose recording fails stops with the recorder's error instead of leaving a
    # silently truncated recording behind
    # a replay keeps no batches of its own: it is replayed from its parent's
    options = RecordOptions.from_meta(meta, strict=True, overwrite=True, resume=False, expected_steps=None,
                                      curvature_every=0, noise_every=0, keep_batches=False, every=plan.every)
    extra = {"replay": parent, "criterion": meta.get("criterion"), "criterion_spec": meta.get("criterion_spec"),
             "loss_source": meta.get("loss_source"), **({"clip": meta["clip"]} if meta.get("clip") else {})}
    recorder = Recorder(lane.model, lane.optimizer, plan.targets[lane.name], options, extra_meta=extra,
                        first_step=plan.start, check_loss=False)
    recorder.set_loss_rule(meta.get("loss_rule", "mean"))
    return recorder

"""Replays: re-run a recording from a keyframe on the same batches, with the recorded or other optimizers.

Order of one replayed step s (the order of a plain training loop, which is what the recording saw):
fetch batch s; optimizer.zero_grad(); loss = step_fn(model, batch); loss.backward() unless step_fn
returned a float or a tensor without grad_fn (it ran backward itself); before_step(model,
optimizer, s); for the recorded optimizer, set each group's lr to the recorded value; optimizer.step()
(with a closure built from step_fn for optimizers whose step() requires one, such as LBFGS).
Several optimizers advance in lockstep on the same batch, each on its own model copy and with its own
copy of the global torch/numpy/python random states, so dropout draws what the original drew.
"""
from __future__ import annotations

import os
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import torch

from nbkit.errors import ReplayError
from nbkit.replay import restore
from nbkit.measure.fingerprint import combine, describe_difference, fingerprint, matches
from nbkit.store.files import is_recording, read_json, META_FILE

RECORDED = "recorded"    # the key of the recorded optimizer's replay
MISMATCHES_KEPT = 100    # fingerprint mismatches listed in a replay's meta with strict=False

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


@dataclass
class _Lane:
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


# --- the public call ----------------------------------------------------------------------------
def replay(run, model, step_fn, batches, optimizers=None, start=None, steps=None, to=None, before_step=None,
           workers=1, progress=True, strict=True, *, _record=True) -> dict:
    """Replay `run` from the keyframe at or before `start` on the same batches; see DESIGN.md §3.

    run: a Recording (or its path). model: the recorded architecture (only copies are trained).
    step_fn(model, batch) -> loss. batches: an iterable yielding the run's batches from step 0, or
    a callable batches(step) -> batch. optimizers=None: {"recorded": None}; otherwise name ->
    factory(groups) -> optimizer, where groups are the recorded parameter groups as [{"params": [...]}];
    a value None stands for the recorded optimizer. start=None: the run's first step. steps=None: to
    the run's last step. to=None: "<run path>.replays/<name>"; otherwise a folder holding <name>.
    before_step=None: before_step(model, optimizer, step) before every optimizer.step(). workers=1:
    replays run in this many spawned processes. progress=True: a tqdm.auto bar. strict=True: a batch
    whose fingerprint differs from the recording stops the replay (False: a warning, listed in meta).
    Returns {name: Recording}; each replay's meta["replay"] holds its parent, start, process id,
    thread count and, for the recorded optimizer, the largest differences from the parent
    ("fidelity"). The model copies run in training mode. The recorded optimizer gets the recorded
    learning rates after before_step, so a scheduler's effect is reproduced without its object (and a
    scheduler stepped in before_step does not change it). For closure optimizers (LBFGS) before_step
    runs once before step(closure), not inside the closure. An earlier replay of the same run in the
    target folder is replaced; any other recording there is left alone (an error says so).
    """
    from nbkit.store.reader import Recording, load

    run = run if isinstance(run, Recording) else load(run)
    plan = make_plan(run, model, step_fn, batches, optimizers, start, steps, to, before_step, workers, strict,
                     _record)
    names = list(plan.factories)
    if workers > 1 and len(names) > 1:
        from nbkit.replay.workers import in_workers

        paths = in_workers(plan, restore.copy_model(model), step_fn, batches, workers, progress)
    else:
        paths = run_plan(plan, model, step_fn, batches, names, progress)
    return {name: (load(paths[name]) if plan.record else None) for name in names}


def make_plan(run, model, step_fn, batches, optimizers, start, steps, to, before_step, workers, strict,
              record=True) -> Plan:
    """Validate the arguments of replay() up front and say what to fix."""
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
    keyframes = [k for k in run.keyframes if k <= start]
    if not keyframes:
        raise ReplayError(f"No keyframe at or before step {start} (keyframes: {run.keyframes}); pick a later start")
    if not isinstance(model, torch.nn.Module):
        raise ReplayError(f"model must be a torch.nn.Module, got {type(model).__name__}")
    restore.check_model(run.meta, model)
    if not callable(step_fn):
        raise ReplayError(f"step_fn must be callable as step_fn(model, batch) -> loss, got {step_fn!r}")
    if not callable(batches) and not hasattr(batches, "__iter__"):
        raise ReplayError(f"batches must be an iterable of the run's batches from step 0 or a callable "
                          f"batches(step), got {type(batches).__name__}")
    if before_step is not None and not callable(before_step):
        raise ReplayError(f"before_step must be None or callable as before_step(model, optimizer, step), "
                          f"got {before_step!r}")
    if not isinstance(workers, int) or isinstance(workers, bool) or workers < 1:
        raise ReplayError(f"Invalid workers: {workers!r}; expected a positive integer")
    factories = {RECORDED: None} if optimizers is None else optimizers
    if not isinstance(factories, dict) or not factories:
        raise ReplayError(f"optimizers must be None or a non-empty dict name -> factory(groups) -> optimizer, "
                          f"got {optimizers!r}")
    for name, factory in factories.items():
        if not isinstance(name, str) or not name or "/" in name or "\\" in name or name.startswith("."):
            raise ReplayError(f"Invalid replay name {name!r}: names become folder names; use plain words")
        if factory is not None and not callable(factory):
            raise ReplayError(f"optimizers[{name!r}] must be a factory(groups) -> optimizer, got {factory!r}")
    root = Path(f"{run.path}.replays") if to is None else Path(to)
    targets = {name: str(root / name) for name in factories}
    if record:
        for name, target in targets.items():
            _check_target(Path(target), run.path)
    return Plan(str(run.path), start, int(steps), max(keyframes), dict(factories), targets, before_step,
                bool(strict), bool(record))


def _check_target(path: Path, parent: Path) -> None:
    """A replay may replace an earlier replay of the same run, nothing else."""
    if not path.exists() or not any(path.iterdir()):
        return
    if not is_recording(path):
        raise ReplayError(f"{str(path)!r} exists and is not an nbkit recording; pass another `to` folder")
    previous = (read_json(path / META_FILE).get("replay") or {}).get("parent")
    if previous is None or Path(previous).resolve() != Path(parent).resolve():
        raise ReplayError(f"{str(path)!r} holds a recording that is not a replay of {str(parent)!r}; it is kept. "
                          "Pass another `to` folder or another replay name")


# --- running replays in this process ------------------------------------------------------------
def run_plan(plan: Plan, model, step_fn, batches, names, progress=True, position=None) -> dict:
    """Run the replays `names` of `plan` here, in lockstep. Returns {name: output folder}."""
    from nbkit.store.reader import load

    run = load(plan.run_path)
    user_rng, user_threads = restore.get_rng(), torch.get_num_threads()
    threads_note = _set_threads(run.meta.get("threads"))
    try:
        return _run(plan, run, model, step_fn, batches, names, progress, threads_note, position)
    finally:
        torch.set_num_threads(user_threads)
        restore.set_rng(user_rng)        # the caller's random streams are left as they were


def _set_threads(recorded) -> str:
    if not isinstance(recorded, int) or recorded < 1:
        note = "the recording does not say its torch thread count; results may differ in the last bits"
        warnings.warn(f"nbkit replay: {note}", stacklevel=4)
        return note
    torch.set_num_threads(recorded)
    if torch.get_num_threads() != recorded:
        note = (f"could not set the recorded torch thread count {recorded} (running with "
                f"{torch.get_num_threads()}); results may differ in the last bits")
        warnings.warn(f"nbkit replay: {note}", stacklevel=4)
        return note
    return f"torch thread count set to the recorded {recorded}"


def _run(plan, run, model, step_fn, batches, names, progress, threads_note, position=None) -> dict:
    from nbkit.replay.fidelity import compare_recordings
    from nbkit.store.meta_update import update_meta

    meta = run.meta
    state = run.keyframe(plan.keyframe)
    fetch = _fetcher(batches, plan.keyframe)           # reaching the keyframe: batches are only fetched
    restore.set_rng(restore.rng_from_keyframe(state["rng"]))
    recorded = _Recorded(run, plan.keyframe, plan.start + plan.steps)
    bar = _progress(progress, plan.start + plan.steps - plan.keyframe, names, position)
    lanes = []
    try:
        if plan.start > plan.keyframe:                  # bring the run from the keyframe to `start`
            bridge = _lane(f"recorded optimizer from keyframe {plan.keyframe} to start {plan.start}", None, model,
                           meta, state["model"], state["optimizer"], state["extra_params"])
            try:
                _loop([bridge], recorded, step_fn, fetch, plan.keyframe, plan.start, plan.before_step, plan.strict,
                      bar)
            finally:
                _detach(bridge)                         # its global hook must not outlive an error
            state = {"model": bridge.model.state_dict(), "optimizer": bridge.optimizer.state_dict(),
                     "extra_params": _extra_tensors(bridge, meta)}
        for name in names:
            lanes.append(_lane(name, plan.factories[name], model, meta, state["model"], state["optimizer"],
                               state["extra_params"]))
        if plan.record:
            for lane in lanes:
                lane.recorder = _recorder(lane, plan, meta, threads_note)
        if len(lanes) > 1:
            start_rng = restore.get_rng()
            for lane in lanes:
                lane.rng = start_rng
        _loop(lanes, recorded, step_fn, fetch, plan.start, plan.start + plan.steps, plan.before_step,
              plan.strict, bar)
    finally:
        if bar is not None:
            bar.close()
        for lane in lanes:
            _detach(lane)
            if lane.recorder is not None:
                lane.recorder.close()
    paths = {}
    for lane in lanes:
        paths[lane.name] = plan.targets[lane.name]
        if not plan.record:
            continue
        from nbkit.store.reader import load

        info = {"fingerprint_mismatches": lane.mismatches[:MISMATCHES_KEPT],
                "fingerprint_mismatch_count": len(lane.mismatches),
                "targets_checked": lane.saw_criterion or meta.get("criterion") is None}
        if lane.recorded:
            info["fidelity"] = compare_recordings(run, load(paths[lane.name]))
        replay_meta = dict(load(paths[lane.name]).meta["replay"], **info)
        update_meta(paths[lane.name], replay=replay_meta)
        fidelity = info.get("fidelity")
        if fidelity and not fidelity["identical"]:
            warnings.warn(f"nbkit replay {lane.name!r} differs from its parent: largest loss difference "
                          f"{fidelity['loss']:.3g}, probe {fidelity['probes']:.3g}, keyframe parameter "
                          f"{fidelity['keyframes']:.3g} ({threads_note})", stacklevel=4)
    return paths


class _Recorded:
    """The parent's per-step data the loop needs: fingerprints and learning rates by step."""

    def __init__(self, run, first, end):
        rows = run.rows_for_steps(first, end - 1)
        self.first_row = rows.start
        steps = run.steps[rows]
        if len(steps) != end - first or (len(steps) and (steps[0] != first or steps[-1] != end - 1)):
            raise ReplayError(f"The recording lacks rows between steps {first} and {end - 1}; it cannot be replayed "
                              "over that range")
        self.fingerprints = run.fingerprints[rows]      # (steps, 2, width)
        self.lr = run.lr[rows]                          # (steps, groups)
        self.first = first

    def row(self, step):
        return step - self.first


def _fetcher(batches, skip: int):
    """fetch(step) -> batch. An iterable is advanced past the first `skip` batches (fetched only)."""
    if callable(batches) and not hasattr(batches, "__iter__"):
        return batches
    iterator = iter(batches)
    for step in range(skip):
        try:
            next(iterator)
        except StopIteration:
            raise ReplayError(f"`batches` ran out at step {step}, before the keyframe at step {skip}; "
                              + DATALOADER_ADVICE) from None

    def fetch(step):
        try:
            return next(iterator)
        except StopIteration:
            raise ReplayError(f"`batches` ran out at step {step}; it must yield every batch of the replayed "
                              "steps (repeat the epochs as the training loop did)") from None

    return fetch


def _progress(progress, total, names, position=None):
    """A tqdm.auto bar (a widget in a notebook, text in a terminal); tqdm shows steps per second."""
    if not progress:
        return None
    from tqdm.auto import tqdm

    return tqdm(total=total, unit="step", desc=f"replay {', '.join(names)}", leave=True, position=position)


def _extra_tensors(lane, meta) -> dict:
    """The lane's optimizer-only tensors (group{g}.{i}) by name."""
    names = {t["name"] for t in meta["tensors"] if t["layer"] == "(optimizer only)"}
    return {name: p for group, info in zip(lane.optimizer.param_groups, meta["param_groups"])
            for p, name in zip(group["params"], info["params"]) if name in names}


def _lane(name, factory, model, meta, model_state, optimizer_state, extra_params) -> _Lane:
    copy = restore.copy_model(model)
    copy.load_state_dict(model_state)
    copy.train()
    groups = restore.parameter_groups(meta, copy, restore.fresh_extra_params(extra_params))
    if factory is None:
        optimizer = restore.recorded_optimizer(meta, groups, optimizer_state)
    else:
        try:
            optimizer = factory(groups)
        except Exception as exc:
            raise ReplayError(f"The optimizer factory {name!r} failed on the recorded parameter groups "
                              f"({type(exc).__name__}: {exc}); it is called as factory(groups) with groups a list "
                              "of {'params': [...]} dicts") from exc
        if not isinstance(optimizer, torch.optim.Optimizer):
            raise ReplayError(f"The optimizer factory {name!r} returned {type(optimizer).__name__}, not a "
                              "torch.optim.Optimizer")
    lane = _Lane(name, copy, optimizer, recorded=factory is None, closure=restore.needs_closure(optimizer))

    def collect(module, args, kwargs):
        if module.training and torch.is_grad_enabled():
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
                    lane.recorder._after_criterion(module, inputs, output)    # the recorder's own loss rule

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


def _detach(lane):
    for handle in lane.handles:
        handle.remove()
    lane.handles = []


def _recorder(lane, plan, meta, threads_note):
    from nbkit.record.recorder import Recorder

    parent = {"parent": plan.run_path, "start": plan.start, "keyframe": plan.keyframe, "steps": plan.steps,
              "optimizer": lane.name, "recorded_optimizer": lane.recorded, "pid": os.getpid(),
              "threads": torch.get_num_threads(), "threads_note": threads_note}
    return Recorder(lane.model, lane.optimizer, plan.targets[lane.name], every=meta["every"], probes=meta["probes"],
                    keyframe_every=meta["keyframe_every"], flush_seconds=meta.get("flush_seconds", 5.0),
                    strict=True, overwrite=True, _extra_meta={"replay": parent, "criterion": meta.get("criterion")}, _first_step=plan.start)
    # strict: a replay whose recording fails stops with the recorder's error instead of leaving a
    # silently truncated recording behind


def _loop(lanes, recorded, step_fn, fetch, first, end, before_step, strict, bar):
    """Steps first..end-1 of every lane, in lockstep on the same batches."""
    several = len(lanes) > 1
    for step in range(first, end):
        if several:
            restore.set_rng(lanes[0].rng)
            batch = fetch(step)
            _advance_rng(lanes)
        else:
            batch = fetch(step)
        row = recorded.row(step)
        for lane in lanes:
            if several:
                restore.set_rng(lane.rng)
            _step(lane, step_fn, batch, before_step, step, recorded.lr[row])
            _check_fingerprint(lane, recorded.fingerprints[row], step, strict)
            if several:
                lane.rng = restore.get_rng()
        if bar is not None:
            bar.update(1)


def _advance_rng(lanes):
    """The batch was fetched once, from lane 0's random state: lanes at the same state move with it."""
    before, after = lanes[0].rng, restore.get_rng()
    if restore.same_rng(before, after):
        return
    for lane in lanes:
        if lane is lanes[0] or restore.same_rng(lane.rng, before):
            lane.rng = after
        else:
            warnings.warn("nbkit replay: fetching a batch drew from the global random generators while the "
                          "replays' random states differ; give the data pipeline its own seeded generator",
                          stacklevel=4)


def _needs_backward(loss) -> bool:
    return isinstance(loss, torch.Tensor) and loss.requires_grad and loss.grad_fn is not None


def _step(lane, step_fn, batch, before_step, step, lrs):
    model, optimizer = lane.model, lane.optimizer
    lane.prints, lane.target_prints, lane.criterion_now = [], [], False
    lane.active = True
    try:
        if lane.closure:
            def closure():
                optimizer.zero_grad()
                loss = step_fn(model, batch)
                if _needs_backward(loss):
                    loss.backward()
                return loss

            if before_step is not None:
                before_step(model, optimizer, step)
            if lane.recorded:
                _apply_lr(optimizer, lrs)
            optimizer.step(closure)
            return
        optimizer.zero_grad()
        loss = step_fn(model, batch)
        if _needs_backward(loss):
            loss.backward()
        if not lane.criterion_now and lane.watch is None and lane.rewatch is not None:
            lane.rewatch()                  # the criterion object found earlier was not used this step
        if lane.recorder is not None and not lane.criterion_now:
            lane.recorder.loss(loss)        # no criterion call seen: the step_fn's loss is the step's loss
        if before_step is not None:
            before_step(model, optimizer, step)
        if lane.recorded:
            _apply_lr(optimizer, lrs)
        optimizer.step()
    finally:
        lane.active = False


def _apply_lr(optimizer, lrs):
    for group, lr in zip(optimizer.param_groups, lrs):
        if isinstance(group["lr"], torch.Tensor):
            group["lr"].fill_(float(lr))
        else:
            group["lr"] = float(lr)


def _check_fingerprint(lane, recorded, step, strict):
    ok = matches(recorded[0], lane.prints)
    if ok and lane.target_prints:
        ok = matches(recorded[1], lane.target_prints)
    if ok:
        return
    seen = np.stack([combine(lane.prints), combine(lane.target_prints)])
    which = 0 if not matches(recorded[0], lane.prints) else 1
    part = "model inputs" if which == 0 else "targets given to the criterion"
    message = (f"Replay {lane.name!r}: the batch at step {step} differs from the recording ({part}: "
               f"{describe_difference(recorded[which], seen[which])}). " + DATALOADER_ADVICE +
               ". Pass strict=False to continue with a warning.")
    if strict:
        raise ReplayError(message)
    if not lane.mismatches:
        warnings.warn(message, stacklevel=4)
    lane.mismatches.append(int(step))

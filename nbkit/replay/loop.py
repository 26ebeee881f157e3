"""Running a replay plan in this process: restore the keyframe, bring the run to the start step, and
step every lane in lockstep on the same batches, checking each batch's fingerprint.

Order of one replayed step s (the order of a plain training loop, which is what the recording saw):
fetch batch s (or the kept step s); optimizer.zero_grad(); loss = step_fn(model, batch) and
loss.backward() unless step_fn returned a float or a tensor without grad_fn (it ran backward itself)
(a kept step: the recorded CPU random state, then per micro-batch its loss under the recorded autocast
state, back-propagated times its recorded scale); before_step(model, optimizer, s), or without one the
recorded clipping (nbkit.record.trained_loss.clip_gradients); for the recorded optimizer, set each
group's lr and every other recorded setting
(momentum, betas, weight_decay, ...) to the recorded values of step s; optimizer.step()
(with a closure built from step_fn for optimizers whose step() requires one, such as LBFGS).
Several optimizers advance in lockstep on the same batch, each on its own model copy and with its own
copy of the global torch/numpy/python random states, so dropout draws what the original drew.
"""
from __future__ import annotations

import warnings

import numpy as np
import torch
from tqdm.auto import tqdm

from nbkit.errors import ReplayError
from nbkit.measure.fingerprint import combine, describe_difference, matches
from nbkit.record.trained_loss import autocast_context, clip_gradients, make_criterion, micro_batch_loss, scaled
from nbkit.recording import load
from nbkit.store.batches import KeptStep
from nbkit.replay import changes, restore
from nbkit.replay.fidelity import compare_recordings
from nbkit.replay.lanes import detach, lane_recorder, make_lane, optimizer_only_tensors
from nbkit.replay.plan import DATALOADER_ADVICE, Plan
from nbkit.store.annotate import update_meta
from nbkit.store.layout import setting_columns

MISMATCHES_KEPT = 100    # fingerprint mismatches listed in a replay's meta with strict=False


def run_plan(plan: Plan, model, step_fn, batches, names, progress=True, position=None) -> dict:
    """Run the replays `names` of `plan` here, in lockstep. Returns {name: output folder}."""
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
    meta = run.meta
    state = run.keyframe(plan.keyframe)
    if plan.kept:                                     # the recording's own kept steps
        fetch = run.kept_step
        step_fn = step_fn or micro_batch_loss(plan.rebuild, make_criterion(meta["criterion_spec"])
                                              if plan.rebuild == "criterion" else None)
    else:
        fetch = fetcher(batches, plan.keyframe)       # reaching the keyframe: batches are only fetched
    restore.set_rng(restore.rng_from_keyframe(state["rng"]))
    recorded = RecordedSteps(run, plan.keyframe, plan.start + plan.steps)
    bar = _progress(progress, plan.start + plan.steps - plan.keyframe, names, position)
    lanes = []
    try:
        if plan.start > plan.keyframe:                  # bring the run from the keyframe to `start`
            bridge = make_lane(f"recorded optimizer from keyframe {plan.keyframe} to start {plan.start}", None, model,
                           meta, state["model"], state["optimizer"], state["extra_params"])
            try:
                _loop([bridge], recorded, step_fn, fetch, plan.keyframe, plan.start, plan.before_step, plan.strict,
                      bar)
            finally:
                detach(bridge)                         # its global hook must not outlive an error
            state = {"model": bridge.model.state_dict(), "optimizer": bridge.optimizer.state_dict(),
                     "extra_params": optimizer_only_tensors(bridge, meta)}
        carried = restore.carried_settings(meta, set(run.settings))
        for name in names:
            lanes.append(make_lane(name, plan.factories[name], model, meta, state["model"], state["optimizer"],
                                   state["extra_params"], carried))
        if plan.record:
            for lane in lanes:
                lane.recorder = lane_recorder(lane, plan, meta, threads_note)
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
            detach(lane)
            if lane.recorder is not None:
                lane.recorder.close()
    paths = {}
    for lane in lanes:
        paths[lane.name] = plan.targets[lane.name]
        if not plan.record:
            continue
        info = {"fingerprint_mismatches": lane.mismatches[:MISMATCHES_KEPT],
                "fingerprint_mismatch_count": len(lane.mismatches),
                "targets_checked": lane.saw_criterion or meta.get("criterion") is None}
        if lane.recorded and lane.change is None:
            info["fidelity"] = compare_recordings(run, load(paths[lane.name]))
        replay_meta = dict(load(paths[lane.name]).meta["replay"], **info)
        update_meta(paths[lane.name], replay=replay_meta)
        fidelity = info.get("fidelity")
        if fidelity and not fidelity["identical"]:
            # replays run eagerly (replay() unwraps a compiled model): inductor's kernels round differently
            differs = ("differs: compiled vs eager numerics (recorded through torch.compile, replayed eagerly); "
                       if meta.get("compiled") else "differs from its parent: ")
            warnings.warn(f"nbkit replay {lane.name!r} {differs}first difference at step "
                          f"{fidelity['first_step']}: {fidelity['first_difference']}; largest loss difference "
                          f"{fidelity['loss']:.3g}, probe {fidelity['probes']:.3g}, setting "
                          f"{fidelity['settings']:.3g}, keyframe parameter {fidelity['keyframes']:.3g} "
                          f"({threads_note})", stacklevel=4)
    return paths


class RecordedSteps:
    """The parent's per-step data the loop needs: fingerprints, learning rates and settings by step."""
    def __init__(self, run, first, end):
        rows = run.rows_for_steps(first, end - 1)
        steps = run.steps[rows]
        if len(steps) != end - first or (len(steps) and (steps[0] != first or steps[-1] != end - 1)):
            raise ReplayError(f"The recording lacks rows between steps {first} and {end - 1}; it cannot be replayed "
                              "over that range")
        self.fingerprints = run.fingerprints[rows]      # (steps, 2, width)
        self.lr = run.lr[rows]                          # (steps, groups)
        columns = setting_columns(run.meta)
        keep = [s for s, c in enumerate(columns) if c.key != "lr"]     # lr comes from self.lr (old recordings too)
        self.setting_columns = [columns[s] for s in keep]
        self.settings = run.setting_values(rows=rows)[:, :, keep]      # (steps, groups, settings)
        self.rng_digests = run.rng_digests[rows]
        self.clip_factor = run.clip_factor[rows]
        self.clip = run.meta.get("clip")
        self.first = first

    def row(self, step):
        return step - self.first


def fetcher(batches, skip: int):
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
    return tqdm(total=total, unit="step", desc=f"replay {', '.join(names)}", leave=True, position=position)


def advance(lanes, recorded, step_fn, fetch, first, end, before_step=None, strict=True):
    """Step every lane from step `first` to `end` − 1 in lockstep, each step in the module docstring's order,
    checking batch fingerprints and random states against `recorded` (RecordedSteps)."""
    _loop(lanes, recorded, step_fn, fetch, first, end, before_step, strict, None)


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
            _step(lane, step_fn, batch, before_step, step, recorded, row)
            if lane.change is None or not lane.change.data:     # a data remedy changes the batches on purpose
                _check_fingerprint(lane, recorded.fingerprints[row], step, strict, isinstance(batch, KeptStep))
            _check_random_state(lane, recorded.rng_digests[row], step, strict)
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


def _step(lane, step_fn, batch, before_step, step, recorded, row):
    model, optimizer = lane.model, lane.optimizer
    lane.prints, lane.target_prints, lane.criterion_now, lane.rng_digest = [], [], False, None
    lane.active = True
    kept = isinstance(batch, KeptStep)
    try:
        def gradients():
            optimizer.zero_grad()
            return _kept_gradients(lane, step_fn, batch) if kept else _batch_gradients(lane, step_fn, batch)

        if lane.closure:                    # LBFGS: before_step once, then step(closure)
            _before_update(lane, before_step, step, recorded, row)
            optimizer.step(gradients)
            return
        gradients()
        _before_update(lane, before_step, step, recorded, row)
        optimizer.step()
    finally:
        lane.active = False


def _batch_gradients(lane, step_fn, batch):
    """A user's batch: loss = step_fn(model, batch), one backward (unless step_fn ran its own)."""
    loss = step_fn(lane.model, batch)
    if _needs_backward(loss):
        loss.backward()
    if not lane.criterion_now and lane.watch is None and lane.rewatch is not None:
        lane.rewatch()                      # the criterion object found earlier was not used this step
    if lane.recorder is not None and not lane.criterion_now and not lane.closure:
        lane.recorder.loss(loss)            # no criterion call seen: the step_fn's loss is the step's loss
    return loss


def _kept_gradients(lane, loss_fn, kept: KeptStep):
    """A kept step: the recorded random state, then per micro-batch its loss under the recorded autocast
    state, back-propagated with its recorded scale (accumulation as the training loop did it)."""
    if "cpu" in kept.rng:
        torch.set_rng_state(kept.rng["cpu"])
    rebuild = getattr(loss_fn, "rebuild", None)
    total = 0.0
    for micro_batch, scale in zip(kept.micro_batches, kept.scales):
        if lane.change is not None:
            micro_batch = changes.scaled_inputs(lane.change, micro_batch)
        if lane.recorder is not None and rebuild == "training_step":
            lane.recorder.keep_training_step(micro_batch["args"], micro_batch["kwargs"])
        with autocast_context(kept.autocast):
            loss = loss_fn(lane.model, micro_batch)
        if lane.recorder is not None and rebuild in ("training_step", None):
            lane.recorder.observe_loss(loss)            # the step_fn's loss counts as the trained loss
        if _needs_backward(loss):
            scaled(loss, scale).backward()
        total = total + (loss.detach() if isinstance(loss, torch.Tensor) else loss)
    return total


def _before_update(lane, before_step, step, recorded, row):
    """Between the gradients and optimizer.step(): the user's before_step, or else the recorded clipping;
    then, for the recorded optimizer, the recorded settings of the step."""
    if before_step is not None:
        before_step(lane.model, lane.optimizer, step)
    elif not (lane.change is not None and changes.clip(lane.change, lane.model)):
        clip_gradients(lane.model, lane.optimizer, recorded.clip, float(recorded.clip_factor[row]))
    if lane.recorded:
        _apply_settings(lane.optimizer, recorded, row)
    if lane.change is not None:
        changes.adjust(lane.change, lane.optimizer, lane.recorded_groups)


def _apply_settings(optimizer, recorded, row):
    """The recorded optimizer's groups take step `row`'s recorded learning rates and settings."""
    for group, lr in zip(optimizer.param_groups, recorded.lr[row]):
        if isinstance(group["lr"], torch.Tensor):
            group["lr"].fill_(float(lr))
        else:
            group["lr"] = float(lr)
    if recorded.setting_columns:
        restore.apply_settings(optimizer.param_groups, recorded.setting_columns, recorded.settings[row])


def _check_random_state(lane, recorded, step, strict):
    """The CPU random state at the step's first training forward must be the recorded one, or dropout
    draws other masks."""
    if lane.rng_digest is None or not np.isfinite(recorded) or lane.rng_digest == recorded:
        return
    message = (f"Replay {lane.name!r}: the random state at step {step}'s first training forward differs from the "
               "recording (its dropout masks and other random draws would differ). Something drew from torch's "
               "global generator that the recorded run did not (a data pipeline, step_fn or before_step); give "
               "it its own torch.Generator. Pass strict=False to continue with a warning.")
    _mismatch(lane, message, step, strict)


def _mismatch(lane, message, step, strict):
    """A replayed step that did not see what the recording saw: an error, or (strict=False) a warning
    once and the step listed in the replay's meta."""
    if strict:
        raise ReplayError(message)
    if not lane.mismatches:
        warnings.warn(message, stacklevel=5)
    lane.mismatches.append(int(step))


KEPT_ADVICE = ("The kept batch in the recording's batches/ folder no longer matches the fingerprint recorded with "
               "it: the file was changed or damaged")


def _check_fingerprint(lane, recorded, step, strict, kept=False):
    ok = matches(recorded[0], lane.prints)
    if ok and lane.target_prints:
        ok = matches(recorded[1], lane.target_prints)
    if ok:
        return
    seen = np.stack([combine(lane.prints), combine(lane.target_prints)])
    which = 0 if not matches(recorded[0], lane.prints) else 1
    part = "model inputs" if which == 0 else "targets given to the criterion"
    message = (f"Replay {lane.name!r}: the batch at step {step} differs from the recording ({part}: "
               f"{describe_difference(recorded[which], seen[which])}). " + (KEPT_ADVICE if kept else DATALOADER_ADVICE) +
               ". Pass strict=False to continue with a warning.")
    _mismatch(lane, message, step, strict)

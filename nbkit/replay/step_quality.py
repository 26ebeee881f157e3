"""nbkit.step_quality: an on-demand pass over a window that measures, per step on its own kept batch, the
first- and second-order predicted loss change and the actual one (the maths: nbkit.analyze.step_quality).

The pass is a self-replay (nbkit.replay.loop) from the keyframe at or before the window on the kept
batches, with the recorded thread count, random states, settings and clipping, so the trajectory is the
recorded one bit for bit; before each step the replayed state is copied into a second model (the probe),
where the extra passes run: at θ_before, with the step's CPU random state and autocast state, the trained
loss of every micro-batch times its recorded scale, its gradient (create_graph) and one Hessian-vector
product with the step Δθ that the replayed optimizer then took; at θ_after, the same loss again with the
same random state (dropout draws the same masks) and the probe's buffers (BatchNorm running statistics)
put back to their values before the step. The replayed model never sees these passes.
"""
from __future__ import annotations

import warnings

import numpy as np
import torch

from nbkit.analyze.curvature import second_order as second_order_kernels
from nbkit.analyze.model_copy import copy_model
from nbkit.analyze.step_quality import StepQuality, step_terms
from nbkit.errors import RecordingError, ReplayError
from nbkit.record.trained_loss import autocast_context, make_criterion, micro_batch_loss, scaled
from nbkit.record.wrappers import unwrap_model
from nbkit.recording import Recording, load
from nbkit.replay import restore
from nbkit.replay.lanes import detach, make_lane
from nbkit.replay.loop import RecordedSteps, advance
from nbkit.replay.plan import checked_window, make_plan, recorded_rebuild
from nbkit.store.quality import ranges, write_step_quality

NOT_KEPT = ("the step's batch was not kept (keep_batches=False, or outside the byte budget) or no keyframe "
            "before it starts a run of kept steps, and the pass replays kept batches only")


def step_quality(run, model, start=None, steps=None, step_fn=None, second_order=True, store=True,
                 strict=True) -> StepQuality:
    """Measure each step of start..start+steps−1 on its own batch (module docstring; README: Step quality).

    run: a Recording or its path. model: the recorded architecture (only copies are used). start=None: the
    run's first step; steps=None: to its last. step_fn=None: the loss rebuilt as the recording verified it
    (meta["trained_loss"]); else step_fn(model, micro_batch) -> loss, one kept micro-batch
    {"args", "kwargs", "targets"} at a time. second_order=True: one Hessian-vector product per step (False:
    first order only, about half the cost). store=True: merge the arrays into the recording's sidecar
    (nbkit.store.quality; the recording must be closed). strict=True: a kept batch or random state that
    differs from the recording stops the pass. Steps that cannot be measured hold NaN, and
    meta["step_quality"]["missing"] says why. Returns a StepQuality (its as_arrays() gives every array).
    """
    run = run if isinstance(run, Recording) else load(run)
    model = unwrap_model(model).plain
    start, steps = checked_window(run, start, steps)
    window = list(range(start, start + int(steps)))
    T = len(run.tensors)
    arrays = {"step": np.array(window, dtype=np.int64),
              **{k: np.full(len(window), np.nan) for k in ("loss_before", "loss_after", "predicted_first",
                                                           "predicted_second")},
              **{k: np.full((len(window), T), np.nan) for k in ("first_order_terms", "second_order_terms")}}
    missing, notes = [], []
    no_loss = None                      # why the trained loss cannot be rebuilt without a step_fn
    if step_fn is None:
        try:
            recorded_rebuild(run, kept=True)
        except ReplayError as exc:
            no_loss = str(exc)
    covered = set()
    for a, b in run.replayable_windows:
        segment = [s for s in window if a <= s <= b]
        if not segment:
            continue
        if no_loss is not None:
            missing.append({"first": segment[0], "last": segment[-1], "why": no_loss})
        else:
            _measure_segment(run, model, step_fn, segment[0], segment[-1], second_order, strict, arrays,
                             start, notes)
        covered.update(segment)
    for a, b in ranges(set(window) - covered):
        missing.append({"first": a, "last": b, "why": NOT_KEPT})
    if missing:
        spans = ", ".join(f"{m['first']}-{m['last']}" for m in missing)
        warnings.warn(f"nbkit step_quality: steps {spans} hold NaN: {missing[0]['why']}", stacklevel=2)
    if store:
        try:
            write_step_quality(run.path, arrays, missing, notes)
            run.refresh()
        except RecordingError as exc:
            warnings.warn(f"nbkit step_quality: not stored ({exc})", stacklevel=2)
    return StepQuality(tensors=list(run.tensors), **arrays)


def _measure_segment(run, model, step_fn, first, last, second_order, strict, arrays, offset, notes):
    """Replay from the keyframe before `first` and measure steps first..last into `arrays` (rows s − offset)."""
    plan = make_plan(run, model, step_fn, None, None, first, last + 1 - first, None, None, 1, strict, record=False)
    meta = run.meta
    loss_fn = step_fn or micro_batch_loss(plan.rebuild, make_criterion(meta["criterion_spec"])
                                          if plan.rebuild == "criterion" else None)
    user_rng, user_threads = restore.get_rng(), torch.get_num_threads()
    if isinstance(meta.get("threads"), int) and meta["threads"] >= 1:
        torch.set_num_threads(meta["threads"])         # the recorded count: a bit-exact trajectory
    state = run.keyframe(plan.keyframe)
    restore.set_rng(restore.rng_from_keyframe(state["rng"]))
    recorded = RecordedSteps(run, plan.keyframe, last + 1)
    lane = make_lane("step quality", None, model, meta, state["model"], state["optimizer"], state["extra_params"])
    probe = copy_model(model)
    probe.train()
    index = {name: k for k, name in enumerate(run.tensors)}
    lane_params = dict(lane.model.named_parameters())
    probe_params = dict(probe.named_parameters())
    names = [n for n in lane_params if n in index and lane_params[n].requires_grad]
    try:
        advance([lane], recorded, loss_fn, run.kept_step, plan.keyframe, first, strict=strict)
        for s in range(first, last + 1):
            kept = run.kept_step(s)
            probe.load_state_dict(lane.model.state_dict())           # θ_before and the buffers before
            buffers = [b.detach().clone() for b in probe.buffers()]
            before = [lane_params[n].detach().clone() for n in names]
            advance([lane], recorded, loss_fn, lambda step: kept, s, s + 1, strict=strict)
            delta = [lane_params[n].detach() - b for n, b in zip(names, before)]
            row = s - offset
            rng = restore.get_rng()
            try:
                _measure_step(probe, [probe_params[n] for n in names], [index[n] for n in names], kept, loss_fn,
                              delta, [lane_params[n].detach() for n in names], buffers, second_order, arrays, row,
                              notes, s)
            finally:
                restore.set_rng(rng)
    finally:
        detach(lane)
        torch.set_num_threads(user_threads)
        restore.set_rng(user_rng)


def _objective(model, kept, loss_fn) -> torch.Tensor:
    """Σ over the step's micro-batches of loss × recorded scale, at the step's CPU random state."""
    if "cpu" in kept.rng:
        torch.set_rng_state(kept.rng["cpu"])
    total = None
    for micro_batch, scale in zip(kept.micro_batches, kept.scales):
        with autocast_context(kept.autocast):
            loss = scaled(loss_fn(model, micro_batch), scale)
        if not isinstance(loss, torch.Tensor) or loss.numel() != 1:
            raise ReplayError(f"The rebuilt loss of step {kept.step} is not a scalar tensor (got {type(loss).__name__})"
                              "; pass step_fn=step_fn(model, micro_batch) -> loss returning the micro-batch's mean loss")
        total = loss.reshape(()) if total is None else total + loss.reshape(())
    return total


def _measure_step(probe, params, columns, kept, loss_fn, delta, after, buffers, second_order, arrays, row, notes,
                  step):
    with second_order_kernels():
        loss = _objective(probe, kept, loss_fn)
        arrays["loss_before"][row] = float(loss.detach().double())
        hvp = second_order and loss.requires_grad
        try:
            first, second = step_terms(loss, params, delta, second_order=hvp)
        except RuntimeError as exc:                  # an op without double backward: first order only
            notes.append(f"step {step}: no Hessian-vector product ({type(exc).__name__}: {str(exc)[:200]})")
            loss = _objective(probe, kept, loss_fn)
            first, second = step_terms(loss, params, delta, second_order=False)
    del loss
    arrays["first_order_terms"][row, columns] = first
    arrays["predicted_first"][row] = first.sum()
    if second is not None:
        arrays["second_order_terms"][row, columns] = second
        arrays["predicted_second"][row] = first.sum() + second.sum()
    with torch.no_grad():
        for p, value in zip(params, after):
            p.copy_(value)
        for b, value in zip(probe.buffers(), buffers):
            b.copy_(value)
        loss_after = _objective(probe, kept, loss_fn)
        for b, value in zip(probe.buffers(), buffers):
            b.copy_(value)
    arrays["loss_after"][row] = float(loss_after.double())     # inf / NaN kept: the step's evidence

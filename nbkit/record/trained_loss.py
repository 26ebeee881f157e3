"""The trained loss, rebuilt from a kept step and verified by its gradient (the loss the training step actually
back-propagated, glue code included).

A value check is blind: a loss divided by the accumulation count, scaled by num_items_in_batch, or with a
term added after the criterion matches by value but not by gradient. So the recorder keeps, at a check
step, the pre-clip gradient at the probe coordinates, rebuilds the loss of every micro-batch at the same
parameters, random state and autocast state, back-propagates each with the scale the training code used
(its tensor hook saw it) and compares the two gradients. Replays run the same rebuild.

How a micro-batch's loss is rebuilt (`kind`), in order of preference:
  "step_fn"        step_fn(model, micro_batch), the user's function
  "training_step"  model.training_step(*args, **kwargs) (a LightningModule; a dict's "loss")
  "criterion"      criterion(model(*args, **kwargs), *targets)
  "returned"       the loss in model(*args, **kwargs) (output.loss or output["loss"])
"""
from __future__ import annotations

import contextlib
import math
from collections.abc import Mapping

import torch

from nbkit.analyze.model_copy import copy_model
from nbkit.record.step_inputs import returned_loss

EXACT, CLOSE, DIFFERENT = "bit-exact", "within 1e-5 relative", "different"
TOLERANCE = 1e-5       # relative difference of the probe gradients still called the same loss


def rebuild_kind(micro_batches, criterion, step_fn) -> tuple[str | None, str]:
    """(kind, why) for a step's micro-batches (nbkit.record.step_inputs.MicroBatch); kind None: no rebuild."""
    if step_fn is not None:
        return "step_fn", "the step_fn given to nbkit.record"
    if not micro_batches:
        return None, "the step had no training forward pass"
    if all(m.call is not None for m in micro_batches):
        return "training_step", "the module's training_step on the kept arguments"
    if any(m.forward is None for m in micro_batches):
        return None, "a micro-batch had no training forward pass of the recorded model"
    if criterion is not None and all(m.losses["criterion"] for m in micro_batches):
        twice = max(m.criterion_calls for m in micro_batches)
        if twice > 1:
            return None, f"the criterion was called {twice} times in one micro-batch"
        return "criterion", f"criterion={type(criterion).__name__} on the model's output and the kept targets"
    if all(m.losses["returned"] for m in micro_batches):
        return "returned", "the loss the model returns"
    return None, ("the loss comes from code the recorder cannot see (a loss function rather than an nn.Module "
                  "criterion, and the model returns none)")


def micro_batch_loss(kind: str, criterion=None, step_fn=None):
    """loss(model, micro_batch) -> tensor for a rebuild `kind` (module docstring)."""
    if kind == "step_fn":
        return step_fn

    def loss(model, micro_batch):
        args, kwargs = micro_batch["args"], micro_batch["kwargs"]
        if kind == "training_step":
            # the class's method: a callback may have wrapped the instance's (and a copy keeps that wrapper)
            out = type(model).training_step(model, *args, **kwargs)
            return out["loss"] if isinstance(out, Mapping) else out
        output = model(*args, **kwargs)
        if kind == "criterion":
            return criterion(output, *micro_batch["targets"])
        value = returned_loss(output)
        if value is None:
            raise ValueError("the model returned no loss for a kept micro-batch")
        return value

    loss.rebuild = kind
    return loss


def autocast_context(state: dict) -> contextlib.ExitStack:
    """The recorded autocast state ({"cpu": [enabled, dtype name], ...}) entered as context managers."""
    stack = contextlib.ExitStack()
    for device, (enabled, dtype) in (state or {}).items():
        if device == "cuda" and not torch.cuda.is_available():
            continue
        stack.enter_context(torch.autocast(device, dtype=getattr(torch, dtype), enabled=bool(enabled)))
    return stack


def scaled(loss, scale):
    """The objective one micro-batch contributed: its loss times the scale it was back-propagated with."""
    if scale is None or not isinstance(loss, torch.Tensor):
        return loss
    return loss * scale


def rebuilt_gradient(model, params: list, micro_batches: list[dict], scales: list, loss_fn,
                     autocast: dict) -> list:
    """The gradient of Σ scale × loss over `micro_batches` w.r.t. `params`, accumulated per micro-batch as
    backward() accumulates into .grad (first assigned, then added), so equal work gives equal bits.
    p.grad is not touched; the caller sets the random state first."""
    total = [None] * len(params)
    for micro_batch, scale in zip(micro_batches, scales):
        with autocast_context(autocast):
            loss = loss_fn(model, micro_batch)
        objective = scaled(loss, scale)
        if not (isinstance(objective, torch.Tensor) and objective.numel() == 1 and objective.requires_grad):
            raise ValueError(f"the rebuilt loss must be a scalar tensor that requires grad (the mean loss of the "
                             f"micro-batch, from model(...) with gradients on), got {_described(loss)}")
        grads = torch.autograd.grad(objective, params, allow_unused=True)
        total = [g if t is None else (t if g is None else t + g) for t, g in zip(total, grads)]
    return total


def _described(value) -> str:
    if not isinstance(value, torch.Tensor):
        return f"a {type(value).__name__} ({value!r:.40})"
    return (f"a tensor of shape {tuple(value.shape)}, dtype {str(value.dtype).removeprefix('torch.')}, "
            + ("requiring grad" if value.requires_grad else "without grad (no autograd graph)"))


def compare_probes(recorded: list, rebuilt: list, probes: list) -> dict:
    """The verdict of one check: recorded and rebuilt gradients at the probe coordinates (`probes`: flat
    index tensors), compared over every recorded tensor together."""
    a, b = [], []
    for rec, new, index in zip(recorded, rebuilt, probes):
        if rec is None:
            continue
        a.append(rec.reshape(-1).double())
        b.append(new.reshape(-1)[index].double() if new is not None else torch.zeros(len(index), dtype=torch.float64))
    if not a:
        return {"verdict": None, "why": "no recorded tensor had a gradient"}
    a, b = torch.cat(a), torch.cat(b)
    norm, difference = float(a.norm()), float((a - b).norm())
    relative = difference / norm if norm > 0 else (0.0 if difference == 0 else math.inf)
    verdict = EXACT if torch.equal(a, b) else (CLOSE if relative <= TOLERANCE else DIFFERENT)
    return {"verdict": verdict, "relative_difference": relative, "recorded_norm": norm, "rebuilt_norm": float(b.norm())}


def check_step(model, tensors, before: list, recorded_probes: list, taken, kind: str, criterion, step_fn,
               pause) -> dict:
    """Rebuild the step `taken` (nbkit.record.step_inputs.StepTaken) at the parameters `before` it and
    compare its gradient with `recorded_probes` (BackwardWatch.probes). The rebuild runs on a copy of the
    model (nbkit.analyze.model_copy: whatever the forward changes, a BatchNorm's statistics or a list the
    model appends to, stays in the copy) and the global CPU random state is put back. pause(): the
    recorder's hooks ignore the extra passes."""
    copy = copy_model(model)
    own = dict(copy.named_parameters(remove_duplicate=False))
    params = [own.get(t.name) for t in tensors]               # None: an optimizer-only tensor
    with torch.no_grad():
        for p, value in zip(params, before):
            if p is not None:
                p.copy_(value)
    trainable = [k for k, p in enumerate(params) if p is not None and p.requires_grad]
    loss_fn = micro_batch_loss(kind, criterion, step_fn)
    micro = [m.as_kept() for m in taken.micro_batches]
    scales = [m.loss().scale if m.loss() is not None else None for m in taken.micro_batches]
    rng = torch.get_rng_state()
    try:
        torch.set_rng_state(taken.rng_state)
        with pause():
            grads = rebuilt_gradient(copy, [params[k] for k in trainable], micro, scales, loss_fn, taken.autocast)
    finally:
        torch.set_rng_state(rng)
    full = [None] * len(params)
    for k, g in zip(trainable, grads):
        full[k] = g
    result = compare_probes(recorded_probes, full, [t.index[:t.probes] for t in tensors])
    result["scales"] = sorted({s for s in scales if s is not None})[:4]
    return result


def make_criterion(spec: dict) -> torch.nn.Module:
    """The criterion a recording describes (nbkit.record.setup.criterion_spec), made again."""
    arguments = {name: torch.tensor(value["tensor"], dtype=getattr(torch, value["dtype"]))
                 if isinstance(value, dict) else value for name, value in spec["arguments"].items()}
    return getattr(torch.nn, spec["class"])(**arguments)


def clip_gradients(model, optimizer, clip: dict | None, factor: float) -> None:
    """Clip as the recorded loop did: its rule (clip_grad_norm_ or clip_grad_value_ with the recorded max
    norm, over the same parameters in the same order) or, without one, the measured clip factor."""
    if clip and clip.get("max_norm"):
        params = (list(model.parameters()) if clip.get("over", "model") == "model"
                  else [p for group in optimizer.param_groups for p in group["params"]])
        if clip.get("algorithm", "norm") == "value":
            torch.nn.utils.clip_grad_value_(params, clip["max_norm"])
        else:
            torch.nn.utils.clip_grad_norm_(params, clip["max_norm"])
    elif math.isfinite(factor) and abs(factor - 1.0) > 1e-6:
        grads = [p.grad for group in optimizer.param_groups for p in group["params"] if p.grad is not None]
        if grads:
            torch._foreach_mul_(grads, factor)


def verify(model, tensors, before, probes, taken, criterion, step_fn, pause, step: int) -> dict:
    """The trained-loss check of step `step` (check_step), as the entry the metadata lists under
    trained_loss.checks: rebuild, how, verdict (EXACT, CLOSE, DIFFERENT, or None: no check) and the norms."""
    kind, how = rebuild_kind(taken.micro_batches, criterion, step_fn)
    result = {"step": step, "rebuild": kind, "how": how, "verdict": None}
    if taken.closure_calls > 1:
        result.update(rebuild=None, why="the optimizer evaluated its closure several times in one step (at other "
                                        "parameters); replays of it need step_fn")
    elif kind is not None and before is not None and probes is not None and taken.rng_state is not None:
        try:
            result.update(check_step(model, tensors, before, probes, taken, kind, criterion, step_fn, pause))
        except Exception as exc:           # the rebuild itself failed: it is not the trained loss
            result.update(verdict=DIFFERENT, error=f"{type(exc).__name__}: {exc}", exception=exc)
    elif kind is not None:
        result["why"] = "no backward pass of the recorded tensors was seen at this step"
    return result


def problem(result: dict, estimates: bool) -> str | None:
    """What to warn about a check (verify): a rebuild that gives another gradient always; no rebuild at
    all only when estimates need one (replays say so themselves)."""
    step, how = result["step"], result["how"]
    if result["verdict"] == DIFFERENT:
        detail = result.get("error") or (f"recorded probe-gradient norm {result['recorded_norm']:.6g}, rebuilt "
                                         f"{result['rebuilt_norm']:.6g}")
        fix = ("fix step_fn so it returns the loss your loop back-propagates for one micro-batch"
               if result["rebuild"] == "step_fn" else "pass step_fn=step_fn(model, micro_batch) -> loss to nbkit.record")
        return (f"the loss rebuilt at step {step} from {how} does not give the trained gradient ({detail}); "
                f"sharpness and noise estimates store NaN and replays need a step_fn: {fix}")
    if result["verdict"] is None and estimates:
        return (f"the trained loss cannot be rebuilt at step {step}: {result.get('why') or how}; sharpness and "
                "noise estimates store NaN. Pass step_fn=step_fn(model, micro_batch) -> loss to nbkit.record")
    return None

"""Sharpness and gradient noise scale estimated while recording (record(curvature_every=N, noise_every=M)).

A step hook of the recorder (Recorder.add_step_hook) calls `after_step(recorder, row)` after the
recorder's own statistics, using only the recorder's public surface. The
estimate of step s uses step s's own batch, rebuilt from what the recorder observed: the positional and
keyword arguments of the last training-mode forward and the criterion's target arguments, giving
    loss = criterion(model(*args, **kwargs), *targets)
or, with record(step_fn=...), step_fn(model, (*args, *targets)) (the forward's positional arguments
followed by the criterion's targets, when a criterion was given). The post-hook runs after the update,
so the estimate is at the parameters after step s's update, on step s's batch, with the optimizer's
state after that step (for Adam's preconditioner); run.curvature() measures at keyframes, before the
update.

Training is not changed: every pass forks the RNG state and restores buffers (curvature.untouched),
gradients come from torch.autograd.grad (p.grad is not touched), and the recorder's hooks are paused so
the extra forward passes leave no trace in the recording (Recorder.pause). A failed estimate warns once (RecorderWarning)
and leaves NaN; the recording goes on.
"""
from __future__ import annotations

import math

from nbkit.analyze.curvature import sharpness
from nbkit.analyze.noise import RunningNoise, batch_size_of, noise_parts
from nbkit.errors import RecorderError
from nbkit.record.options import RecordOptions

RECORDING_TOL = 1e-3        # Lanczos tolerance while recording: ample for a stability comparison
NOISE_AVERAGE_WEIGHT = 0.2  # weight of the newest estimate in the running averages of |G|² and tr Σ


def estimates_for(options: RecordOptions) -> "RecordingEstimates | None":
    """The estimates the options ask for, or None when both strides are 0. Raises when they cannot work."""
    if not (options.curvature_every or options.noise_every):
        return None
    if options.criterion is None and options.step_fn is None:
        raise RecorderError(f"curvature_every={options.curvature_every} / noise_every={options.noise_every} need "
                            "the loss of the step's batch: pass criterion=<the nn.Module loss you call> or "
                            "step_fn=step_fn(model, batch) -> loss to nbkit.record")
    return RecordingEstimates(options.curvature_every, options.noise_every)


class RecordingEstimates:
    """Estimates sharpness every `curvature_every` steps and the noise scale every `noise_every` steps."""

    def __init__(self, curvature_every: int, noise_every: int):
        self.curvature_every, self.noise_every = curvature_every, noise_every
        self.noise = RunningNoise(NOISE_AVERAGE_WEIGHT)
        self._noted_batch = False

    def after_step(self, recorder, row) -> None:
        step = row.step
        want_curvature = self.curvature_every and step % self.curvature_every == 0
        want_noise = self.noise_every and step % self.noise_every == 0
        if not (want_curvature or want_noise):
            return
        observed = recorder.last_batch()
        if observed is None:
            recorder.report_problem("curvature/noise estimates found no training forward pass to rebuild the batch from")
            return
        step_fn, batch = self._rebuild(recorder, *observed)
        with recorder.pause():
            if want_curvature:
                self._estimate(recorder, row, "sharpness", lambda: sharpness(
                    recorder.model, step_fn, batch, optimizer=recorder.optimizer, tol=RECORDING_TOL))
            if want_noise:
                self._estimate(recorder, row, "noise_scale", lambda: self._noise(recorder, step_fn, batch))

    @staticmethod
    def _estimate(recorder, row, quantity, compute):
        try:
            value = compute()
        except Exception as exc:
            recorder.report_problem(f"the {quantity} estimate failed", exc)
            return
        row.set_quantity(quantity, value if value is not None else math.nan)

    @staticmethod
    def _rebuild(recorder, args, kwargs, targets):
        if recorder.step_fn is not None:
            return recorder.step_fn, (*args, *targets)
        criterion = recorder.criterion
        summed = getattr(criterion, "reduction", "mean") == "sum"

        def step_fn(model, batch):
            inputs, keywords, wanted = batch
            loss = criterion(model(*inputs, **keywords), *wanted)
            if summed:                      # the estimators need the mean loss of the batch
                loss = loss / batch_size_of(batch)
            return loss

        return step_fn, (args, kwargs, targets)

    def _noise(self, recorder, step_fn, batch):
        held = {id(p) for g in recorder.optimizer.param_groups for p in g["params"]}
        params = [p for p in recorder.model.parameters() if p.requires_grad and id(p) in held]
        parts = noise_parts(recorder.model, step_fn, batch, params=params)
        if not self._noted_batch:
            recorder.note(noise_batch_size=parts.batch_size, noise_method=parts.method,
                          noise_average_weight=NOISE_AVERAGE_WEIGHT)
            self._noted_batch = True
        return self.noise.add(parts)

"""Sharpness and gradient noise scale estimated while recording (record(curvature_every=N, noise_every=M)).

A step hook of the recorder (Recorder.add_step_hook) calls `after_step(recorder, row)` after the
recorder's own statistics, using only the recorder's public surface. The estimate of step s uses the
last micro-batch of step s, kept as {"args", "kwargs", "targets"}, and the trained loss as the recorder
verified it (nbkit.record.trained_loss: the step_fn given to record, or the criterion, the model's
returned loss or its training_step); where that check failed or could not be made the estimates store
NaN. The post-hook runs after the update, so the estimate is at the parameters after step s's update,
on step s's batch, with the optimizer's state after that step (for Adam's preconditioner);
run.curvature() measures at keyframes, before the update.

Training is not changed: every pass forks the RNG state and restores buffers (curvature.untouched),
gradients come from torch.autograd.grad (p.grad is not touched), and the recorder's hooks are paused so
the extra forward passes leave no trace in the recording (Recorder.pause). A failed estimate warns once (RecorderWarning)
and leaves NaN; the recording goes on.
"""
from __future__ import annotations

import math

from nbkit.analyze.curvature import sharpness
from nbkit.analyze.noise import RunningNoise, batch_size_of, noise_parts
from nbkit.record.options import RecordOptions

RECORDING_TOL = 1e-3        # Lanczos tolerance while recording: ample for a stability comparison
NOISE_AVERAGE_WEIGHT = 0.2  # weight of the newest estimate in the running averages of |G|² and tr Σ


def estimates_for(options: RecordOptions) -> "RecordingEstimates | None":
    """The estimates the options ask for, or None when both strides are 0 (they need the trained loss,
    checked at the first step: without one they store NaN and the recorder warns)."""
    if not (options.curvature_every or options.noise_every):
        return None
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
        rebuilt = recorder.trained_loss()
        if rebuilt is None:
            return                          # NaN: the recorder warned why (trained-loss check)
        loss_fn, micro_batch = rebuilt
        step_fn = self._mean_loss(recorder, loss_fn)
        with recorder.pause():
            if want_curvature:
                self._estimate(recorder, row, "sharpness", lambda: sharpness(
                    recorder.model, step_fn, micro_batch, optimizer=recorder.optimizer, tol=RECORDING_TOL))
            if want_noise:
                self._estimate(recorder, row, "noise_scale", lambda: self._noise(recorder, step_fn, micro_batch))

    @staticmethod
    def _estimate(recorder, row, quantity, compute):
        try:
            value = compute()
        except Exception as exc:
            recorder.report_problem(f"the {quantity} estimate failed", exc)
            return
        row.set_quantity(quantity, value if value is not None else math.nan)

    @staticmethod
    def _mean_loss(recorder, loss_fn):
        """The estimators need the mean loss of the batch: a sum-reduced criterion is divided."""
        if getattr(recorder.criterion, "reduction", "mean") != "sum" or getattr(loss_fn, "rebuild", None) != "criterion":
            return loss_fn
        return lambda model, micro_batch: loss_fn(model, micro_batch) / batch_size_of(micro_batch)

    def _noise(self, recorder, step_fn, batch):
        held = {id(p) for g in recorder.optimizer.param_groups for p in g["params"]}
        params = [p for p in recorder.model.parameters() if p.requires_grad and id(p) in held]
        parts = noise_parts(recorder.model, step_fn, batch, params=params)
        if not self._noted_batch:
            recorder.note(noise_batch_size=parts.batch_size, noise_method=parts.method,
                          noise_average_weight=NOISE_AVERAGE_WEIGHT)
            self._noted_batch = True
        return self.noise.add(parts)

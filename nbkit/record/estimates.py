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

import collections
import math
import statistics
import time

from nbkit.analyze.curvature import sharpness
from nbkit.analyze.noise import RunningNoise, batch_size_of, noise_parts
from nbkit.record.budget import ESTIMATE_SHARE
from nbkit.record.options import RecordOptions

RECORDING_TOL = 1e-3        # Lanczos tolerance while recording: ample for a stability comparison
NOISE_AVERAGE_WEIGHT = 0.2  # weight of the newest estimate in the running averages of |G|² and tr Σ


def estimates_for(options: RecordOptions) -> "RecordingEstimates | None":
    """The estimates the options ask for, or None when both strides are 0 (they need the trained loss,
    checked at the first step: without one they store NaN and the recorder warns)."""
    if not (options.curvature_every or options.noise_every):
        return None
    return RecordingEstimates(options.curvature_every, options.noise_every)


AUTO_INTERVAL_STEPS = 50  # steps whose intervals give the step time an "auto" stride is measured against


class EstimateStride:
    """When the next estimate of one kind is due: every N steps, or (N = "auto") after as many steps as
    its own measured cost needs to average ESTIMATE_SHARE of the step (an estimate costing 100 steps
    comes every 10,000 steps). The first "auto" estimate is at the first step."""

    def __init__(self, every):
        self.every, self.next_step = every, 0

    def due(self, step: int) -> bool:
        if self.every == "auto":
            return step >= self.next_step
        return bool(self.every) and step % self.every == 0

    def took(self, step: int, seconds: float, step_seconds: float | None) -> None:
        if self.every == "auto":
            steps = seconds / (ESTIMATE_SHARE * step_seconds) if step_seconds else 1000
            self.next_step = step + max(1, math.ceil(steps))


class RecordingEstimates:
    """Estimates sharpness and the gradient noise scale at their strides (EstimateStride)."""

    def __init__(self, curvature_every, noise_every):
        self.curvature, self.noise_stride = EstimateStride(curvature_every), EstimateStride(noise_every)
        self.noise = RunningNoise(NOISE_AVERAGE_WEIGHT)
        self._noted_batch = False
        self._last_call: float | None = None
        self._intervals: collections.deque = collections.deque(maxlen=AUTO_INTERVAL_STEPS)

    def _step_seconds(self) -> float | None:
        return statistics.median(self._intervals) if self._intervals else None

    def after_step(self, recorder, row) -> None:
        step, now = row.step, time.perf_counter()
        if self._last_call is not None:
            self._intervals.append(now - self._last_call)
        self._last_call = now
        want_curvature, want_noise = self.curvature.due(step), self.noise_stride.due(step)
        if not (want_curvature or want_noise):
            return
        rebuilt = recorder.trained_loss()
        if rebuilt is None:
            return                          # NaN: the recorder warned why (trained-loss check)
        loss_fn, micro_batch = rebuilt
        step_fn = self._mean_loss(recorder, loss_fn)
        with recorder.pause():
            if want_curvature:
                started = time.perf_counter()
                self._estimate(recorder, row, "sharpness", lambda: sharpness(
                    recorder.model, step_fn, micro_batch, optimizer=recorder.optimizer, tol=RECORDING_TOL))
                self.curvature.took(step, time.perf_counter() - started, self._step_seconds())
            if want_noise:
                started = time.perf_counter()
                self._estimate(recorder, row, "noise_scale", lambda: self._noise(recorder, step_fn, micro_batch))
                self.noise_stride.took(step, time.perf_counter() - started, self._step_seconds())
        self._last_call = time.perf_counter()   # the estimate's own time is not a training step's

    @staticmethod
    def _estimate(recorder, row, quantity, compute):
        try:
            value = compute()
        except Exception as exc:
            recorder.report_problem(f"the {quantity} estimate failed (said once; training goes on)", exc, traceback=True)
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

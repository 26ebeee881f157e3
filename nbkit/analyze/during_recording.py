"""Sharpness and gradient noise scale estimated while recording (record(curvature_every=N, noise_every=M)).

The recorder calls `after_step(recorder, row)` in its step post-hook, after its own statistics. The
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
the extra forward passes leave no trace in the recording. A failed estimate warns once (RecorderWarning)
and leaves NaN; the recording goes on.
"""
from __future__ import annotations

import math

from nbkit.errors import RecorderError
from nbkit.measure.quantities import QUANTITIES

RECORDING_TOL = 1e-3        # Lanczos tolerance while recording: ample for a stability comparison
NOISE_AVERAGE_WEIGHT = 0.2  # weight of the newest estimate in the running averages of |G|² and tr Σ


def analysis_for(recorder, curvature_every: int, noise_every: int):
    """The recorder's analysis object, or None when both strides are 0. Raises when it cannot work."""
    if not (curvature_every or noise_every):
        return None
    if recorder.criterion is None and recorder.step_fn is None:
        raise RecorderError(f"curvature_every={curvature_every} / noise_every={noise_every} need the loss of the "
                            "step's batch: pass criterion=<the nn.Module loss you call> or step_fn=step_fn(model, "
                            "batch) -> loss to nbkit.record")
    return DuringRecording(curvature_every, noise_every)


class DuringRecording:
    """Estimates sharpness every `curvature_every` steps and the noise scale every `noise_every` steps."""

    def __init__(self, curvature_every: int, noise_every: int):
        from nbkit.analyze.noise import RunningNoise

        self.curvature_every, self.noise_every = curvature_every, noise_every
        self.noise = RunningNoise(NOISE_AVERAGE_WEIGHT)
        self._noted_batch = False

    def after_step(self, recorder, row) -> None:
        step = row["step"]
        want_curvature = self.curvature_every and step % self.curvature_every == 0
        want_noise = self.noise_every and step % self.noise_every == 0
        if not (want_curvature or want_noise):
            return
        if recorder._last_inputs is None:
            recorder._fail("curvature/noise estimates found no training forward pass to rebuild the batch from",
                           stop=False)
            return
        step_fn, batch = self._rebuild(recorder)
        recorder._paused = True
        try:
            if want_curvature:
                self._estimate(recorder, row, "sharpness", lambda: self._sharpness(recorder, step_fn, batch))
            if want_noise:
                self._estimate(recorder, row, "noise_scale", lambda: self._noise(recorder, step_fn, batch))
        finally:
            recorder._paused = False

    @staticmethod
    def _estimate(recorder, row, quantity, compute):
        try:
            value = compute()
        except Exception as exc:
            recorder._fail(f"the {quantity} estimate failed", exc, stop=False)
            return
        row["q"][QUANTITIES.index(quantity), :] = value if value is not None else math.nan

    @staticmethod
    def _rebuild(recorder):
        args, kwargs = recorder._last_inputs
        targets = tuple(recorder._last_targets or ())
        if recorder.step_fn is not None:
            return recorder.step_fn, (*args, *targets)
        criterion = recorder.criterion
        summed = getattr(criterion, "reduction", "mean") == "sum"

        def step_fn(model, batch):
            inputs, keywords, wanted = batch
            loss = criterion(model(*inputs, **keywords), *wanted)
            if summed:                      # the estimators need the mean loss of the batch
                from nbkit.analyze.noise import _batch_size

                loss = loss / _batch_size(batch)
            return loss

        return step_fn, (tuple(args), dict(kwargs), targets)

    @staticmethod
    def _sharpness(recorder, step_fn, batch):
        from nbkit.analyze.curvature import sharpness

        return sharpness(recorder.model, step_fn, batch, optimizer=recorder.optimizer, tol=RECORDING_TOL)

    def _noise(self, recorder, step_fn, batch):
        from nbkit.analyze.noise import noise_parts

        held = {id(p) for g in recorder.optimizer.param_groups for p in g["params"]}
        params = [p for p in recorder.model.parameters() if p.requires_grad and id(p) in held]
        parts = noise_parts(recorder.model, step_fn, batch, params=params)
        if not self._noted_batch:
            recorder._writer.update_meta(noise_batch_size=parts.batch_size, noise_method=parts.method,
                                         noise_average_weight=NOISE_AVERAGE_WEIGHT)
            self._noted_batch = True
        return self.noise.add(parts)

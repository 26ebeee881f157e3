"""What one training step fed the model: its loss by the precedence rule of DESIGN.md §3, and the
fingerprints of its model inputs and criterion targets (the batch a replay checks against)."""
from __future__ import annotations

import math
from collections.abc import Mapping

import numpy as np
import torch

from nbkit.measure.fingerprint import combine, fingerprint

NO_LOSS = ("step {step} has no loss: no criterion= was given, the model's output has no loss (an output.loss "
           "or a \"loss\" key), no closure returned one and rec.loss() was not called, so the loss is NaN for "
           "such steps. Pass criterion= (an nn.Module loss), call rec.loss(loss) each step, or record through "
           "the trainer callbacks nbkit.transformers_callback / nbkit.lightning_callback (when available)")


def returned_loss(output) -> torch.Tensor | None:
    """The loss a model returns with its output: a tensor in output.loss (transformers' ModelOutput) or
    output["loss"] (a dict); None when there is none."""
    if isinstance(output, (torch.Tensor, tuple, list)):     # the common outputs first: this runs every forward
        return None
    if isinstance(output, Mapping):
        loss = output.get("loss")
    else:
        loss = getattr(output, "loss", None)
    return loss if isinstance(loss, torch.Tensor) else None


class StepInputs:
    """Collects, between two optimizer steps, every training forward pass and criterion call.

    A step's loss, in order of precedence: what rec.loss() reported; the mean of the criterion outputs
    since the previous step (accumulation: the mean of the micro-batch losses); the mean of the losses
    the model returned (returned_loss: output.loss or output["loss"]); the first closure evaluation;
    NaN. keep_batch: also keep the last forward's arguments and the criterion's targets.
    `without_loss`: the step last taken had no loss from any source (until a rec.loss() after it).
    """

    def __init__(self, keep_batch: bool):
        self.keep_batch = keep_batch
        self.reported_loss = None
        self.closure_loss = None
        self.without_loss = False
        self._criterion_losses: list = []
        self._returned_losses: list = []
        self._input_prints: list = []
        self._target_prints: list = []
        self._last_inputs = self._last_targets = None      # (args, kwargs), targets

    def forward(self, args, kwargs) -> None:
        self._input_prints.append(fingerprint(args, kwargs))
        if self.keep_batch:
            self._last_inputs = (args, kwargs)

    def criterion(self, inputs: tuple, output: torch.Tensor) -> None:
        self._criterion_losses.append(output.detach())
        if len(inputs) > 1:
            self._target_prints.append(fingerprint(inputs[1:]))
            if self.keep_batch:
                self._last_targets = inputs[1:]

    def model_output(self, output) -> None:
        """A training forward pass's output: the loss it carries, if any, counts towards the step's."""
        loss = returned_loss(output)
        if loss is not None:
            self._returned_losses.append(loss.detach())

    def wrap_closure(self, closure, args: tuple, kwargs: dict) -> tuple[tuple, dict]:
        """optimizer.step()'s (args, kwargs) as a step pre-hook sees them (the optimizer first), with
        `closure` wrapped so that its first loss is kept."""
        self.closure_loss = None

        def recorded_closure():
            loss = closure()
            if self.closure_loss is None and loss is not None:
                self.closure_loss = loss.detach() if isinstance(loss, torch.Tensor) else loss
            return loss

        if "closure" in kwargs:
            return args, {**kwargs, "closure": recorded_closure}
        return (args[0], recorded_closure, *args[2:]), kwargs

    def take(self) -> tuple[float, np.ndarray]:
        """(the step's loss, (2, width) fingerprints of inputs and targets); starts the next step."""
        losses = self._criterion_losses or self._returned_losses
        self.without_loss = False
        if losses:
            loss = float(torch.stack([l.float().mean() for l in losses]).mean())
        elif self.closure_loss is not None:
            loss = float(self.closure_loss)
        else:
            loss, self.without_loss = math.nan, self.reported_loss is None
        if self.reported_loss is not None:
            loss, self.reported_loss = self.reported_loss, None
        prints = np.stack([combine(self._input_prints), combine(self._target_prints)])
        self._criterion_losses, self._returned_losses, self._input_prints, self._target_prints = [], [], [], []
        self.closure_loss = None
        return loss, prints

    def last_batch(self):
        """(args, kwargs, targets) of the last forward pass and criterion call, or None."""
        if self._last_inputs is None:
            return None
        args, kwargs = self._last_inputs
        return tuple(args), dict(kwargs), tuple(self._last_targets or ())

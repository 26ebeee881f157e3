"""What one training step fed the model: its loss by the precedence rule of DESIGN.md §3, and the
fingerprints of its model inputs and criterion targets (the batch a replay checks against)."""
from __future__ import annotations

import math

import numpy as np
import torch

from nbkit.measure.fingerprint import combine, fingerprint


class StepInputs:
    """Collects, between two optimizer steps, every training forward pass and criterion call.

    A step's loss, in order of precedence: what rec.loss() reported; the mean of the criterion outputs
    since the previous step (accumulation: the mean of the micro-batch losses); the first closure
    evaluation; NaN. keep_batch: also keep the last forward's arguments and the criterion's targets.
    """

    def __init__(self, keep_batch: bool):
        self.keep_batch = keep_batch
        self.reported_loss = None
        self.closure_loss = None
        self._criterion_losses: list = []
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

    def take(self) -> tuple[float, np.ndarray]:
        """(the step's loss, (2, width) fingerprints of inputs and targets); starts the next step."""
        if self._criterion_losses:
            loss = float(torch.stack([l.float().mean() for l in self._criterion_losses]).mean())
        elif self.closure_loss is not None:
            loss = float(self.closure_loss)
        else:
            loss = math.nan
        if self.reported_loss is not None:
            loss, self.reported_loss = self.reported_loss, None
        prints = np.stack([combine(self._input_prints), combine(self._target_prints)])
        self._criterion_losses, self._input_prints, self._target_prints = [], [], []
        self.closure_loss = None
        return loss, prints

    def last_batch(self):
        """(args, kwargs, targets) of the last forward pass and criterion call, or None."""
        if self._last_inputs is None:
            return None
        args, kwargs = self._last_inputs
        return tuple(args), dict(kwargs), tuple(self._last_targets or ())

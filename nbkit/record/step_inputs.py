"""What one training step fed the model: its micro-batches (what a replay runs again), its loss by the
precedence rule of `StepInputs` below, the scale each observed loss was back-propagated with, the random and
autocast state at its first training forward, and the fingerprints a replay checks against."""
from __future__ import annotations

import math
import zlib
from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np
import torch

from nbkit.measure.fingerprint import combine, fingerprint
from nbkit.store.batches import KeptStep

NO_LOSS = ("step {step} has no loss: no criterion= was given, the model's output has no loss (an output.loss "
           "or a \"loss\" key), no closure returned one and rec.loss() was not called, so the loss is NaN for "
           "such steps. Pass criterion= (an nn.Module loss), call rec.loss(loss) each step, or record through "
           "the trainer callbacks nbkit.transformers_callback / nbkit.lightning_callback (when available)")

LOSS_KINDS = ("observed", "criterion", "returned")   # precedence of the losses seen in one micro-batch
LOSS_RULES = ("mean", "backpropagated")            # a step's loss: their mean, or Σ scale × loss


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


def autocast_state() -> dict:
    """The autocast state in force now, per device type: {"cpu": [enabled, dtype name], ...}."""
    state = {"cpu": [torch.is_autocast_enabled("cpu"), str(torch.get_autocast_dtype("cpu")).removeprefix("torch.")]}
    if torch.cuda.is_available() and torch.cuda.is_initialized():
        state["cuda"] = [torch.is_autocast_enabled("cuda"),
                         str(torch.get_autocast_dtype("cuda")).removeprefix("torch.")]
    return state


def rng_digest(state: torch.Tensor) -> float:
    """CRC32 of a generator state (a uint8 tensor), as a float for the step arrays."""
    return float(zlib.crc32(state.numpy().tobytes()))


@dataclass
class ObservedLoss:
    value: torch.Tensor                 # detached
    scale: float | None = None          # d(back-propagated objective) / d(this loss), from its tensor hook


@dataclass
class MicroBatch:
    """One forward-and-loss of a step, with what the recorder learned of it."""

    forward: tuple | None = None        # (args, kwargs) of its training forward
    call: tuple | None = None           # (args, kwargs) of a training-step function (Lightning's)
    batch: object = None                # what rec.keep() was given
    kept: bool = False                  # rec.keep() was called for it
    targets: tuple | None = None        # the criterion's arguments after the prediction
    criterion_calls: int = 0
    losses: dict = field(default_factory=lambda: {kind: [] for kind in LOSS_KINDS})

    def loss(self) -> ObservedLoss | None:
        """The loss that counts for this micro-batch (LOSS_KINDS order; the first of its kind)."""
        for kind in LOSS_KINDS:
            if self.losses[kind]:
                return self.losses[kind][0]
        return None

    def as_kept(self) -> dict:
        """{"args", "kwargs", "targets"} as the training step received them (the README: Kept batches and the trained loss)."""
        if self.call is not None:
            return {"args": tuple(self.call[0]), "kwargs": dict(self.call[1]), "targets": ()}
        args, kwargs = self.forward if self.forward is not None else ((), {})
        if self.targets is not None:
            targets = tuple(self.targets)
        elif self.kept:
            targets = _not_given(self.batch, args, kwargs)
        else:
            targets = ()
        return {"args": tuple(args), "kwargs": dict(kwargs), "targets": targets}


def _not_given(batch, args, kwargs):
    """The parts of a loader's batch the model did not receive (by identity): its targets."""
    given = {id(v) for v in (*args, *kwargs.values())}
    if isinstance(batch, Mapping):
        return {k: v for k, v in batch.items() if id(v) not in given}
    if isinstance(batch, (tuple, list)):
        return tuple(v for v in batch if id(v) not in given)
    return () if id(batch) in given else (batch,)


@dataclass
class StepTaken:
    """What one finished step fed the model (StepInputs.take)."""

    loss: float
    fingerprints: np.ndarray            # (2, width): model inputs, criterion targets
    micro_batches: list
    rng_state: torch.Tensor | None      # the CPU generator's state at the first training forward
    autocast: dict
    rng_digest: float
    closure_calls: int = 0

    def kept_step(self, step: int) -> KeptStep:
        """The step as a recording keeps it (nbkit.store.batches)."""
        micro = self.micro_batches
        return KeptStep(step, [m.as_kept() for m in micro],
                        {"cpu": self.rng_state} if self.rng_state is not None else {}, self.autocast,
                        [m.loss().scale if m.loss() is not None else None for m in micro],
                        "training_step" if any(m.call is not None for m in micro) else "forward", {})


class StepInputs:
    """Collects, between two optimizer steps, every training forward pass, criterion call and loss.

    A step's loss, in order of precedence: what rec.loss() reported; the losses of its micro-batches
    (per micro-batch: a loss handed over by observe_loss, else the criterion's output, else the loss the
    model returned), combined by the loss rule: "mean" (accumulation: the mean of the micro-batch losses)
    or "backpropagated" (Σ scale × loss: the objective actually back-propagated); the first closure
    evaluation; NaN. `without_loss`: the step last taken had no loss from any source (until a rec.loss()
    after it). `on_backward()` is called from the first loss hook of each backward pass.
    """

    def __init__(self, on_backward=None):
        self.on_backward = on_backward
        self.rule = "mean"
        self.reported_loss = None
        self.closure_loss = None
        self.without_loss = False
        self.last: StepTaken | None = None
        self._start()

    def _start(self):
        self._micro: list[MicroBatch] = []
        self._input_prints: list = []
        self._target_prints: list = []
        self._rng_state = None
        self._autocast: dict = {}
        self._closure_calls = 0             # evaluations of an optimizer closure (LBFGS) in this step

    def _first_input(self):
        if self._rng_state is None:
            self._rng_state = torch.get_rng_state()
            self._autocast = autocast_state()

    def _current(self) -> MicroBatch:
        if not self._micro:
            self._micro.append(MicroBatch())
        return self._micro[-1]

    # --- what the hooks and the loop report -----------------------------------------------------
    def _reevaluation(self) -> bool:
        """A closure's second or later evaluation in one step (LBFGS): the same batch at other parameters,
        not another micro-batch."""
        return self._closure_calls > 1

    def forward(self, args, kwargs) -> None:
        self._first_input()
        self._input_prints.append(fingerprint(args, kwargs))
        if self._reevaluation():
            return
        current = self._micro[-1] if self._micro else None
        if current is None or current.forward is not None:
            current = MicroBatch()              # a forward opens a micro-batch, unless rec.keep() just did
            self._micro.append(current)
        current.forward = (args, kwargs)

    def keep(self, batch) -> None:
        """rec.keep(batch): what the loader yielded for the current micro-batch (before or after its forward)."""
        self._first_input()
        current = self._micro[-1] if self._micro else None
        if current is None or current.kept or current.call is not None:
            current = MicroBatch()
            self._micro.append(current)
        current.batch, current.kept = batch, True

    def keep_call(self, args, kwargs) -> None:
        """The arguments of a training-step function that computes one micro-batch's loss."""
        self._first_input()
        self._micro.append(MicroBatch(call=(tuple(args), dict(kwargs))))

    def criterion(self, inputs: tuple, output: torch.Tensor) -> None:
        if self._reevaluation():
            if len(inputs) > 1:
                self._target_prints.append(fingerprint(inputs[1:]))
            return
        current = self._current()
        current.criterion_calls += 1
        self._observe(current, "criterion", output)
        if len(inputs) > 1:
            self._target_prints.append(fingerprint(inputs[1:]))
            if current.targets is None:
                current.targets = tuple(inputs[1:])

    def model_output(self, output) -> None:
        """A training forward pass's output: the loss it carries, if any, counts towards the step's."""
        loss = returned_loss(output)
        if loss is not None and not self._reevaluation():
            self._observe(self._current(), "returned", loss)

    def observe_loss(self, loss: torch.Tensor) -> None:
        """The loss of the current micro-batch as the training code computed it (wins over the others)."""
        if not self._reevaluation():
            self._observe(self._current(), "observed", loss)

    def _observe(self, micro: MicroBatch, kind: str, loss: torch.Tensor) -> None:
        record = ObservedLoss(loss.detach())
        micro.losses[kind].append(record)
        if loss.requires_grad:
            loss.register_hook(self._scale_hook(record))

    def _scale_hook(self, record: ObservedLoss):
        def hook(grad):
            if grad.numel() == 1:
                record.scale = float(grad)
            else:                                   # a vector loss reduced later: one scale if uniform
                flat = grad.detach().reshape(-1)
                record.scale = float(flat[0]) if bool((flat == flat[0]).all()) else math.nan
            if self.on_backward is not None:
                self.on_backward()
        return hook

    def wrap_closure(self, closure, args: tuple, kwargs: dict) -> tuple[tuple, dict]:
        """optimizer.step()'s (args, kwargs) as a step pre-hook sees them (the optimizer first), with
        `closure` wrapped so that its first loss is kept."""
        self.closure_loss = None

        def recorded_closure():
            self._closure_calls += 1
            loss = closure()
            if self.closure_loss is None and loss is not None:
                self.closure_loss = loss.detach() if isinstance(loss, torch.Tensor) else loss
            return loss

        if "closure" in kwargs:
            return args, {**kwargs, "closure": recorded_closure}
        return (args[0], recorded_closure, *args[2:]), kwargs

    # --- the step ends --------------------------------------------------------------------------
    def take(self) -> StepTaken:
        """The finished step (also kept as `last`); starts the next one."""
        loss = step_loss(self._micro, self.rule)
        self.without_loss = False
        if loss is None:
            if self.closure_loss is not None:
                loss = float(self.closure_loss)
            else:
                loss, self.without_loss = math.nan, self.reported_loss is None
        if self.reported_loss is not None:
            loss, self.reported_loss = self.reported_loss, None
        prints = np.stack([combine(self._input_prints), combine(self._target_prints)])
        state = self._rng_state
        self.last = StepTaken(loss, prints, self._micro, state, self._autocast,
                              rng_digest(state) if state is not None else math.nan, self._closure_calls)
        self.closure_loss = None
        self._start()
        return self.last


def step_loss(micro_batches: list[MicroBatch], rule: str) -> float | None:
    """A step's loss from its micro-batches' losses by `rule` (LOSS_RULES); None when none was seen.
    The kind that counts is the first in LOSS_KINDS any micro-batch has; "mean" averages every loss of
    that kind (a criterion called twice counts twice), "backpropagated" sums scale × loss."""
    for kind in LOSS_KINDS:
        losses = [loss for m in micro_batches for loss in m.losses[kind]]
        if losses:
            break
    else:
        return None
    if rule == "backpropagated" and all(loss.scale is not None for loss in losses):
        return sum(float(loss.value.float().mean()) * loss.scale for loss in losses)
    return float(torch.stack([loss.value.float().mean() for loss in losses]).mean())

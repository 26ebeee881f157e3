"""nbkit.lightning_callback: record a Lightning Trainer run (extra: nbkit[lightning]).

Under automatic optimisation Lightning runs training_step inside optimizer.step(closure) and hands
on_train_batch_end the loss divided by accumulate_grad_batches (lightning/pytorch/loops/optimization/
automatic.py, ClosureResult). The step's loss recorded here is the undivided mean over the step's
micro-batches: each value is multiplied back by accumulate_grad_batches. The metadata says so.
"""
from __future__ import annotations

import warnings

try:
    import lightning.pytorch as pl
except ImportError as exc:      # the optional dependency this module exists for
    raise ImportError("nbkit.lightning_callback needs lightning: pip install 'nbkit[lightning]'") from exc

from nbkit.errors import RecorderWarning
from nbkit.integrations.shared import RecordingSession


def batch_loss(outputs) -> float | None:
    """The loss in what on_train_batch_end receives: a tensor, or a dict's "loss"; None without one."""
    loss = outputs.get("loss") if isinstance(outputs, dict) else outputs
    return float(loss.detach()) if hasattr(loss, "detach") else None


class RecordingCallback(pl.Callback):
    """Attaches nbkit.record(pl_module, trainer.optimizers[0], path, **options) when training starts."""

    def __init__(self, path, **options):
        self.session = RecordingSession(path, options)
        self._pending: list[float] = []
        self._steps_seen = 0

    @property
    def recorder(self):
        return self.session.recorder

    def on_train_start(self, trainer, pl_module):
        if len(trainer.optimizers) != 1:
            warnings.warn(f"nbkit.lightning_callback records one optimizer; the module has "
                          f"{len(trainer.optimizers)}: the first is recorded", RecorderWarning, stacklevel=2)
        recorder = self.session.start(pl_module, trainer.optimizers[0])
        self._steps_seen = recorder.step
        if trainer.gradient_clip_val:
            recorder.note(clip={"max_norm": float(trainer.gradient_clip_val),
                                "algorithm": str(trainer.gradient_clip_algorithm or "norm"),
                                "by": "lightning Trainer gradient_clip_val"})
        recorder.note(loss_source=f"LightningModule.training_step, undivided: the mean over the step's micro-"
                                  f"batches (Lightning divides by accumulate_grad_batches="
                                  f"{trainer.accumulate_grad_batches} before backward)")

    def on_train_batch_end(self, trainer, pl_module, outputs, batch, batch_idx):
        loss = batch_loss(outputs)
        if loss is not None:
            self._pending.append(loss * trainer.accumulate_grad_batches)
        recorder = self.recorder
        if recorder is not None and recorder.step != self._steps_seen:     # an optimizer step just ran
            self._steps_seen = recorder.step
            if self._pending:
                recorder.loss(sum(self._pending) / len(self._pending))
            self._pending = []

    def on_train_end(self, trainer, pl_module):
        self.session.stop()


def lightning_callback(path, **options) -> RecordingCallback:
    """A Lightning Callback that records the Trainer's run into `path`; options: any keyword of
    nbkit.record other than model, optimizer and path (checked here, before training starts)."""
    return RecordingCallback(path, **options)

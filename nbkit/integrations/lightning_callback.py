"""nbkit.lightning_callback: record a Lightning Trainer run (extra: nbkit[lightning]).

Under automatic optimisation Lightning runs training_step inside optimizer.step(closure) and divides its
loss by accumulate_grad_batches before backward (lightning/pytorch/loops/optimization/automatic.py,
ClosureResult). The callback keeps each training_step's arguments (the loader's batch and batch_idx)
and hands its undivided loss to the recorder: the step's loss is the mean over its micro-batches, and a
replay runs the module's training_step again on the kept arguments.
"""
from __future__ import annotations

import warnings

try:
    import lightning.pytorch as pl
except ImportError as exc:      # the optional dependency this module exists for
    raise ImportError("nbkit.lightning_callback needs lightning: pip install 'nbkit[lightning]'") from exc

from nbkit.errors import RecorderWarning
from nbkit.integrations.shared import RecordingSession


class RecordingCallback(pl.Callback):
    """Attaches nbkit.record(pl_module, trainer.optimizers[0], path, **options) when training starts."""

    def __init__(self, path, **options):
        self.session = RecordingSession(path, options)

    @property
    def recorder(self):
        return self.session.recorder

    def on_train_start(self, trainer, pl_module):
        if len(trainer.optimizers) != 1:
            warnings.warn(f"nbkit.lightning_callback records one optimizer; the module has "
                          f"{len(trainer.optimizers)}: the first is recorded", RecorderWarning, stacklevel=2)
        recorder = self.session.start(pl_module, trainer.optimizers[0])
        if trainer.gradient_clip_val:
            # Lightning clips the optimizer's parameters (precision plugin: clip_gradients, main_params)
            recorder.note(clip={"max_norm": float(trainer.gradient_clip_val), "over": "optimizer",
                                "algorithm": str(trainer.gradient_clip_algorithm or "norm"),
                                "by": "lightning Trainer gradient_clip_val"})
        self._wrap_training_step(pl_module)
        recorder.note(loss_source=f"LightningModule.training_step, undivided: the mean over the step's micro-"
                                  f"batches (Lightning divides by accumulate_grad_batches="
                                  f"{trainer.accumulate_grad_batches} before backward)")

    def _wrap_training_step(self, pl_module):
        """An instance attribute around the class's training_step: each call's arguments are kept and its
        loss observed (removed at train end; a replay calls the class's method)."""
        session, step = self.session, type(pl_module).training_step

        def training_step(*args, **kwargs):
            recorder = session.recorder
            if recorder is not None and pl_module.training:
                recorder.keep_training_step(args, kwargs)
            output = step(pl_module, *args, **kwargs)
            loss = output.get("loss") if isinstance(output, dict) else output
            if recorder is not None and pl_module.training and hasattr(loss, "requires_grad"):
                recorder.observe_loss(loss)
            return output

        pl_module.__dict__["training_step"] = training_step

    def on_train_end(self, trainer, pl_module):
        pl_module.__dict__.pop("training_step", None)
        self.session.stop()


def lightning_callback(path, **options) -> RecordingCallback:
    """A Lightning Callback that records the Trainer's run into `path`; options: any keyword of
    nbkit.record other than model, optimizer and path (checked here, before training starts)."""
    return RecordingCallback(path, **options)

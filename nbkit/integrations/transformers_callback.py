"""nbkit.transformers_callback: record a transformers.Trainer run (extra: nbkit[transformers]).

The step's loss is the one the Trainer back-propagated: the sum over the step's micro-batches of what
Trainer.training_step returns (compute_loss with label smoothing, divided by the accumulation count or
normalised by num_items_in_batch, as the Trainer does), which is the loss the Trainer logs with
logging_steps=1 (transformers 5, trainer.py: training_step, _maybe_log_save_evaluate).
"""
from __future__ import annotations

import inspect

try:
    import transformers
except ImportError as exc:      # the optional dependency this module exists for
    raise ImportError("nbkit.transformers_callback needs transformers: pip install 'nbkit[transformers]'") from exc

from nbkit.errors import RecorderError
from nbkit.integrations.shared import RecordingSession


def find_trainer(frame) -> "transformers.Trainer":
    """The Trainer whose callback event is running: the nearest caller frame whose `self` is one. A
    callback's events receive the model and optimizer but not the Trainer; its training_step is needed
    to see the loss it back-propagates."""
    while frame is not None:
        owner = frame.f_locals.get("self")
        if isinstance(owner, transformers.Trainer):
            return owner
        frame = frame.f_back
    raise RecorderError("nbkit.transformers_callback found no transformers.Trainer calling it; pass it in "
                        "Trainer(callbacks=[...]) or record your own loop with nbkit.record")


class RecordingCallback(transformers.TrainerCallback):
    """Attaches nbkit.record(model, optimizer, path, **options) when training starts."""

    def __init__(self, path, **options):
        self.session = RecordingSession(path, options)
        self._micro_batch_losses: list = []

    @property
    def recorder(self):
        return self.session.recorder

    def on_train_begin(self, args, state, control, model=None, optimizer=None, **kwargs):
        trainer = find_trainer(inspect.currentframe())
        recorder = self.session.start(model, optimizer)
        if args.max_grad_norm and args.max_grad_norm > 0:
            recorder.note(clip={"max_norm": float(args.max_grad_norm), "by": "transformers.Trainer max_grad_norm"})
        recorder.note(loss_source="transformers.Trainer.training_step (summed over the step's micro-batches)")
        step = trainer.training_step
        losses = self._micro_batch_losses

        def training_step(*arguments, **keywords):
            loss = step(*arguments, **keywords)
            losses.append(loss.detach())
            return loss

        trainer.training_step = training_step         # an instance attribute: the class is not changed
        self._restore = lambda: trainer.__dict__.pop("training_step", None)

    def on_pre_optimizer_step(self, args, state, control, **kwargs):
        if self._micro_batch_losses and self.recorder is not None:
            self.recorder.loss(sum(float(loss) for loss in self._micro_batch_losses))
        self._micro_batch_losses.clear()

    def on_train_end(self, args, state, control, **kwargs):
        self._restore()
        self.session.stop()


def transformers_callback(path, **options) -> RecordingCallback:
    """A transformers.TrainerCallback that records the Trainer's run into `path`; options: any keyword of
    nbkit.record other than model, optimizer and path (checked here, before training starts)."""
    return RecordingCallback(path, **options)

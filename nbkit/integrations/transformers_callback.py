"""nbkit.transformers_callback: record a transformers.Trainer run (extra: nbkit[transformers]).

The step's loss is the one the Trainer back-propagated: each micro-batch's loss as Trainer.compute_loss
returns it (label smoothing and num_items_in_batch included), times the scale its backward used (divided
by the accumulation count where the Trainer divides), summed over the step's micro-batches: the value the
Trainer logs with logging_steps=1 (transformers 5, trainer.py: training_step, compute_loss). Each
micro-batch is kept as the model's forward received it, so a replay runs model(**kwargs) again.
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

    @property
    def recorder(self):
        return self.session.recorder

    def on_train_begin(self, args, state, control, model=None, optimizer=None, **kwargs):
        trainer = find_trainer(inspect.currentframe())
        recorder = self.session.start(model, optimizer)
        if args.max_grad_norm and args.max_grad_norm > 0:
            # Trainer clips with accelerator.clip_grad_norm_(model.parameters(), max_grad_norm)
            recorder.note(clip={"max_norm": float(args.max_grad_norm), "over": "model",
                                "by": "transformers.Trainer max_grad_norm"})
        recorder.note(loss_source="transformers.Trainer.compute_loss × its back-propagated scale, summed over "
                                  "the step's micro-batches")
        recorder.set_loss_rule("backpropagated")
        compute = trainer.compute_loss
        session = self.session

        def compute_loss(model, inputs, *arguments, **keywords):
            result = compute(model, inputs, *arguments, **keywords)
            loss = result[0] if isinstance(result, tuple) else result
            if session.recorder is not None and model.training:
                session.recorder.observe_loss(loss)
            return result

        trainer.compute_loss = compute_loss           # an instance attribute: the class is not changed
        self._restore = lambda: trainer.__dict__.pop("compute_loss", None)

    def on_train_end(self, args, state, control, **kwargs):
        self._restore()
        self.session.stop()


def transformers_callback(path, **options) -> RecordingCallback:
    """A transformers.TrainerCallback that records the Trainer's run into `path`; options: any keyword of
    nbkit.record other than model, optimizer and path (checked here, before training starts)."""
    return RecordingCallback(path, **options)

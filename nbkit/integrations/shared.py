"""What both trainer callbacks share: options checked when the callback is made, one recorder per
training run, and a second run appending to the same recording."""
from __future__ import annotations

from nbkit.record.attach import record
from nbkit.record.options import RecordOptions


class RecordingSession:
    """The recorder a callback attaches at train start; a second train() resumes the same recording."""

    def __init__(self, path, options: dict):
        RecordOptions.from_keywords(**options)       # a bad option fails here, before training starts
        self.path, self.options = path, dict(options)
        self.recorder = None
        self.runs = 0

    def start(self, model, optimizer):
        options = dict(self.options)
        if self.runs:                                # train() again: steps continue in the same recording
            options.update(resume=True, overwrite=False)
        self.recorder = record(model, optimizer, self.path, **options)
        self.runs += 1
        return self.recorder

    def stop(self) -> None:
        if self.recorder is not None:
            self.recorder.close()

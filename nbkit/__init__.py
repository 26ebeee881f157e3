"""nbkit: record a PyTorch training run, scrub through it, replay it with another optimizer.

This module only re-exports the public API (the README's Quick start lists it); DEVELOPERS.md in the
source repository maps where each part lives.
The views (ipywidgets, matplotlib, ipympl) and the trainer callbacks (transformers, lightning: optional
extras) are re-exported on first use, so that a training script, a replay worker or a DDP rank that
never draws does not pay for importing them.
"""
import importlib
from nbkit.analyze.curvature import sharpness
from nbkit.analyze.noise import noise_scale
from nbkit.errors import NbkitError, RecorderError, RecorderWarning, RecordingError, RecordingWarning, ReplayError
from nbkit.record.attach import record
from nbkit.record.distributed import record_local_gradients
from nbkit.record.options import RecordOptions
from nbkit.record.recorder import Recorder
from nbkit.recording import Recording, load
from nbkit.analyze.remedies import Remedy
from nbkit.replay.changes import Change
from nbkit.replay.remedies import try_remedies
from nbkit.replay.replay import replay
from nbkit.replay.step_quality import step_quality
from nbkit.version import __version__

# loaded on first use: the views, and the trainer callbacks with their optional frameworks
LAZY = {"explore": "nbkit.views.explorer", "compare": "nbkit.views.compare", "landscape": "nbkit.views.landscape",
        "transformers_callback": "nbkit.integrations.transformers_callback",
        "lightning_callback": "nbkit.integrations.lightning_callback"}


def __getattr__(name):
    if name in LAZY:
        value = getattr(importlib.import_module(LAZY[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'nbkit' has no attribute {name!r}")

__all__ = [
    # recording
    "record", "Recorder", "RecordOptions", "load", "Recording", "record_local_gradients",
    # views
    "explore",
    # inside the trainers practitioners use (extras nbkit[transformers], nbkit[lightning])
    "transformers_callback", "lightning_callback",
    # replays and their comparison
    "replay", "compare", "landscape", "try_remedies", "Remedy", "Change",
    # analysis
    "sharpness", "noise_scale", "step_quality",
    # errors
    "NbkitError", "RecorderError", "RecorderWarning", "RecordingError", "RecordingWarning", "ReplayError",
    "__version__",
]

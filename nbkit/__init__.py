"""nbkit: record a PyTorch training run, scrub through it, replay it with another optimizer."""

from nbkit.version import __version__
from nbkit.record.attach import record
from nbkit.record.recorder import Recorder
from nbkit.recording import Recording, load
from nbkit.replay.replay import replay
from nbkit.errors import NbkitError, RecorderError, RecorderWarning, RecordingError, RecordingWarning, ReplayError
from nbkit.record.distributed import record_local_gradients
from nbkit.analyze.curvature import sharpness
from nbkit.analyze.noise import noise_scale


def explore(run, *, quantity="update_ratio"):
    """The explorer of one recording (an ipywidgets widget): timeline, layer map, coordinate view and
    findings on one step cursor. `run`: a Recording, a recording's path, or a live Recorder (same kernel).
    quantity="update_ratio": the layer map's quantity at start (any name in run.quantities)."""
    from nbkit.views.explorer import explore as _explore

    return _explore(run, quantity=quantity)


def compare(run, *others, model=None, step_fn=None, batch=None):
    """The comparison: several recordings side by side on one step cursor (an ipywidgets widget).
    With model, step_fn and batch it adds the loss-landscape slice through the runs."""
    from nbkit.views.compare import Comparison

    return Comparison(run, *others, model=model, step_fn=step_fn, batch=batch)


def landscape(model, step_fn, batch, runs, resolution=21, progress=True):
    """The loss-landscape slice view: the loss on the plane through the runs' shared start point and
    two end points (or two filter-normalised random directions for one run), with their paths."""
    from nbkit.views.landscape import LandscapeView

    return LandscapeView(model, step_fn, batch, runs, resolution=resolution, progress=progress)


__all__ = [
    # recording
    "record", "Recorder", "load", "Recording", "record_local_gradients",
    # views
    "explore",
    # replays and their comparison
    "replay", "compare", "landscape",
    # analysis
    "sharpness", "noise_scale",
    # errors
    "NbkitError", "RecorderError", "RecorderWarning", "RecordingError", "RecordingWarning", "ReplayError",
]

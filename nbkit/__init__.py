"""nbkit: record a PyTorch training run, scrub through it, replay it with another optimizer."""
__version__ = "0.1.0"

from nbkit.record.recorder import Recorder
from nbkit.store.reader import Recording, load
from nbkit.replay.replay import replay
from nbkit.errors import NbkitError, RecorderError, RecorderWarning, RecordingError, RecordingWarning, ReplayError
from nbkit.record.distributed import record_local_gradients
from nbkit.analyze.curvature import sharpness
from nbkit.analyze.noise import noise_scale


def record(model, optimizer, path, *, every=1, probes=64, keyframe_every=100, criterion=None, step_fn=None,
           curvature_every=0, noise_every=0, flush_seconds=5.0, expected_steps=None, strict=False,
           resume=False, overwrite=False) -> Recorder:
    """Attach a recorder to `model` and `optimizer`; every optimizer.step() becomes a recorded row.

    every=1: heavy per-tensor quantities every N steps (loss, learning rates, fingerprints every step).
    probes=64: probe coordinates per tensor kept in full every recorded step.
    keyframe_every=100: keyframe stride (plus step 0 and the final state at close()).
    criterion=None: an nn.Module loss; its training-mode outputs give each step's loss.
    step_fn=None: step_fn(model, batch) -> loss, used for curvature and noise estimates.
    curvature_every=0, noise_every=0: sharpness / gradient noise scale every N steps (0 = off).
    flush_seconds=5.0: at most this much recorded time is lost in a crash.
    expected_steps=None: lets record() refuse when the disk cannot hold the run.
    strict=False: True makes recorder errors raise instead of warning once.
    resume=False: True appends to an existing recording; steps continue (an int names the restart
        step; an overlap or gap is stated in the metadata under "resumes").
    Under torch.distributed only rank 0 records; other ranks get an InactiveRecorder.
    overwrite=False: True replaces an existing recording at `path`.
    """
    from nbkit.record import distributed

    # Under torch.distributed one rank records (gradients are already averaged); the others pay
    # only this rank check. A DDP wrapper is unwrapped so tensor names have no "module." prefix.
    rank, _ = distributed.rank_and_world()
    if rank != 0:
        return distributed.InactiveRecorder(path, probes, rank)
    return Recorder(distributed.unwrap(model), optimizer, path, every=every, probes=probes,
                    keyframe_every=keyframe_every, criterion=criterion, step_fn=step_fn,
                    curvature_every=curvature_every, noise_every=noise_every, flush_seconds=flush_seconds,
                    expected_steps=expected_steps, strict=strict, resume=resume, overwrite=overwrite,
                    _extra_meta=distributed.distributed_meta())


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

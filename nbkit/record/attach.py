"""nbkit.record: the one call that attaches a recorder to a model and optimizer."""
from __future__ import annotations

from nbkit.record import distributed
from nbkit.record.options import RecordOptions
from nbkit.record.recorder import Recorder


def record(model, optimizer, path, **options) -> Recorder:
    """Attach a recorder to `model` and `optimizer`; every optimizer.step() becomes a recorded row.

    Options (nbkit.record.options.RecordOptions lists each with the reason for its default):
    every=1: heavy per-tensor quantities every N steps (loss, learning rates, fingerprints every step).
    probes=64: probe coordinates per tensor kept in full every recorded step.
    keyframe_every=100: keyframe stride (plus step 0 and the final state at close()).
    criterion=None: an nn.Module loss; its training-mode outputs give each step's loss.
    step_fn=None: step_fn(model, batch) -> loss, used for curvature and noise estimates.
    curvature_every=0, noise_every=0: sharpness / gradient noise scale every N steps (0 = off).
    commit_seconds=5.0: rows are committed at least this often; at most this much is lost in a crash
        (flush_seconds, its old name, works for one more release with a DeprecationWarning).
    expected_steps=None: lets record() refuse when the disk cannot hold the run.
    strict=False: True makes recorder errors raise instead of warning once.
    resume=False: True appends to an existing recording; steps continue (an int names the restart
        step; an overlap or gap is stated in the metadata under "resumes").
    overwrite=False: True replaces an existing recording at `path`.
    Under torch.distributed only rank 0 records; other ranks get an InactiveRecorder.
    """
    settings = RecordOptions.from_keywords(**options)
    # Under torch.distributed one rank records (gradients are already averaged); the others pay
    # only this rank check. A DDP wrapper is unwrapped so tensor names have no "module." prefix.
    rank, _ = distributed.rank_and_world()
    if rank != 0:
        return distributed.InactiveRecorder(path, settings.probes, rank)
    return Recorder(distributed.unwrap(model), optimizer, path, settings, extra_meta=distributed.distributed_meta())

"""nbkit.record: the one call that attaches a recorder to a model and optimizer."""
from __future__ import annotations

from nbkit.record import distributed
from nbkit.record.options import RecordOptions
from nbkit.record.recorder import Recorder


def record(model, optimizer, path, **options) -> Recorder:
    """Attach a recorder to `model` and `optimizer`; every optimizer.step() becomes a recorded row.

    Under torch.distributed only rank 0 records; other ranks get an InactiveRecorder. Wrappers are
    unwrapped (nbkit.record.wrappers): a DDP model and a torch.compile'd one give the plain model's tensor
    names (no "module." or "_orig_mod." prefix), and an optimizer wrapper holding the real optimizer in
    `.optimizer` (accelerate, Lightning) is followed to it. The options (nbkit.RecordOptions):
    """
    settings = RecordOptions.from_keywords(**options)
    # Under torch.distributed one rank records (gradients are already averaged); the others pay
    # only this rank check. The Recorder unwraps DDP, torch.compile and optimizer wrappers.
    rank, _ = distributed.rank_and_world()
    if rank != 0:
        return distributed.InactiveRecorder(path, settings.probes, rank)
    return Recorder(model, optimizer, path, settings, extra_meta=distributed.distributed_meta())


record.__doc__ = record.__doc__.rstrip(" ") + RecordOptions.describe() + "\n"

"""torch.distributed support: record once on one rank, and optionally each rank's local gradients.

Under DistributedDataParallel every rank holds the same averaged gradient after backward, so one
rank (rank 0 by default) records and the others get an `InactiveRecorder`: no hooks, no files,
no cost per step beyond the rank check made once in nbkit.record().

`record_local_gradients(ddp_model, recorder)` opts in to each rank's own gradient before the
all-reduce. It registers a DDP communication hook (PyTorch documents that a DDP model accepts one
hook, registered before the first backward; see `DistributedDataParallel.register_comm_hook`).
The hook computes, per tensor, the local gradient norm and the local gradient at the recorder's
probe coordinates, shares them with one extra small all-reduce per bucket (each rank fills only
its own row of a zero tensor, so the sum gathers every rank's row), and then runs PyTorch's
default all-reduce hook, so DDP's averaged gradient is unchanged.
"""
from __future__ import annotations

import collections
import contextlib
import threading
import warnings
from pathlib import Path

import torch
import torch.distributed as dist
from torch.nn.parallel import DistributedDataParallel
from torch.utils.hooks import RemovableHandle

from nbkit.errors import RecorderError, RecorderWarning


def rank_and_world() -> tuple[int, int]:
    """(rank, world size); (0, 1) when torch.distributed is not in use."""
    if dist.is_available() and dist.is_initialized():
        return dist.get_rank(), dist.get_world_size()
    return 0, 1


def distributed_meta(recording_rank: int = 0) -> dict:
    """Rank metadata for the recording; empty outside torch.distributed."""
    rank, world = rank_and_world()
    if world == 1 and not (dist.is_available() and dist.is_initialized()):
        return {}
    return {"distributed": {"rank": rank, "world_size": world, "recording_rank": recording_rank,
                            "backend": str(dist.get_backend()), "local_gradients": False,
                            "note": "gradients recorded after DDP's all-reduce (the average over ranks)"}}


class InactiveRecorder:
    """What nbkit.record returns on ranks that do not record: every method is a no-op."""

    active = False
    tensors: list = []

    def __init__(self, path, probes: int, rank: int):
        self.recording_path, self.probes, self.rank = Path(path), int(probes), rank

    def loss(self, value) -> None:
        pass

    def keep(self, batch) -> None:
        pass

    def keep_training_step(self, args, kwargs) -> None:
        pass

    def observe_loss(self, loss) -> None:
        pass

    def set_loss_rule(self, rule: str) -> None:
        pass

    def flush(self, wait: bool = True) -> None:
        pass

    def add_step_hook(self, hook) -> RemovableHandle:
        return RemovableHandle(collections.OrderedDict())          # this rank records no steps: the hook never runs

    @contextlib.contextmanager
    def pause(self):
        yield self

    def close(self) -> None:
        pass

    remove = close

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return False

    def __repr__(self):
        return f"InactiveRecorder(rank {self.rank}: rank 0 records into {str(self.recording_path)!r})"


class _LocalGradients:
    """State of the communication hook on one rank."""

    def __init__(self, recorder, table: torch.Tensor, tensors: int, params, process_group):
        self.recorder = None if isinstance(recorder, InactiveRecorder) or not recorder.active else recorder
        self.table = table                          # (params, 1 + probes): recorder position, probe coordinates
        self.position = {id(p): i for i, p in enumerate(params)}
        self.tensors = tensors
        self.group = process_group
        self.rank, self.world = rank_and_world()
        self.pending: dict[int, torch.Tensor] = {}   # step -> summed values of the buckets done so far
        self.done: dict[int, int] = {}               # step -> buckets whose values arrived
        self.buckets: dict[int, int] = {}            # step -> bucket count (known at the last bucket)
        self.lock = threading.Lock()
        self.warned = False

    def local_values(self, bucket) -> torch.Tensor:
        probes = self.table.shape[1] - 1
        values = torch.zeros((self.world, self.tensors, 1 + probes), dtype=torch.float64)
        try:
            for p, g in zip(bucket.parameters(), bucket.gradients()):
                row = self.table[self.position[id(p)]]
                k, index = int(row[0]), row[1:]
                if k < 0:
                    continue
                index = index[index >= 0]
                values[self.rank, k, 0] = torch.linalg.vector_norm(g.detach(), dtype=torch.float64)
                values[self.rank, k, 1:1 + len(index)] = g.detach().reshape(-1)[index].double()
        except Exception as exc:   # the extra all-reduce must still happen on every rank, or DDP hangs
            if not self.warned:
                self.warned = True
                warnings.warn(f"nbkit: local gradient statistics failed ({type(exc).__name__}: {exc}); "
                              "they are recorded as zeros from here; training continues", RecorderWarning)
        return values

    def arrived(self, step: int, values: torch.Tensor) -> None:
        with self.lock:
            self.pending[step] = self.pending.get(step, 0) + values
            self.done[step] = self.done.get(step, 0) + 1
            complete = self.done[step] == self.buckets.get(step, -1)
            if complete:
                total = self.pending.pop(step)
                del self.done[step], self.buckets[step]
        if complete and self.recorder is not None and self.recorder.active:
            self.recorder.put_local_gradients(step, total.numpy())


def _hook(state: _LocalGradients, bucket):
    # optional: a torch built without distributed support has no comm hooks (nothing calls this there)
    from torch.distributed.algorithms.ddp_comm_hooks.default_hooks import allreduce_hook

    values = state.local_values(bucket)
    step = state.recorder.step if state.recorder is not None else -1
    if bucket.is_last():
        with state.lock:
            state.buckets[step] = bucket.index() + 1
    stats = dist.all_reduce(values, group=state.group, async_op=True).get_future()
    averaged = allreduce_hook(state.group if state.group is not None else dist.group.WORLD, bucket)
    if state.recorder is not None:
        stats = stats.then(lambda fut: state.arrived(step, fut.value()[0]))
    return torch.futures.collect_all([averaged, stats]).then(lambda fut: fut.value()[0].value())


def record_local_gradients(ddp_model, recorder, process_group=None) -> None:
    """Record each rank's local gradient (before DDP averages it) into rank 0's recording.

    Call on every rank, after nbkit.record(ddp_model, ...) and before the first backward pass.
    `recorder` is what nbkit.record returned on this rank. Per step it adds, per tensor, one norm
    and a gather of the probe coordinates, plus one small all-reduce of
    ranks x tensors x (1 + probes) float64 values per gradient bucket. Read back with
    Recording.local_gradients(tensor).
    """
    if not isinstance(ddp_model, DistributedDataParallel):
        raise RecorderError(f"record_local_gradients needs the DistributedDataParallel model, got "
                            f"{type(ddp_model).__name__}; pass the wrapper, not its .module")
    rank, _ = rank_and_world()
    params = [p for p in ddp_model.module.parameters() if p.requires_grad]
    probes = int(recorder.probes)
    table = torch.full((len(params), 1 + probes), -1, dtype=torch.int64)
    header = torch.zeros(1, dtype=torch.int64)
    source = 0
    if not isinstance(recorder, InactiveRecorder):  # the recording rank knows the tensor table
        order = {name: k for k, name in enumerate(recorder.tensors)}
        for i, p in enumerate(params):                # matched by identity, as the recorder holds them
            name = recorder.tensor_name(p)
            if name is not None:
                coordinates = recorder.probe_coordinates(name)
                table[i, 0] = order[name]
                table[i, 1:1 + len(coordinates)] = coordinates
        header[0] = len(recorder.tensors)
        source = rank
    # every rank needs the same table so that rows line up; rank 0 records by default
    dist.broadcast(header, src=source, group=process_group)
    dist.broadcast(table, src=source, group=process_group)
    state = _LocalGradients(recorder, table, int(header[0]), params, process_group)
    ddp_model.register_comm_hook(state, _hook)
    if state.recorder is not None:
        meta = dict(recorder.recorded_meta("distributed", {}))
        meta.update(local_gradients=True, local_gradient_values="per rank: grad_norm, then grad at probe coordinates")
        recorder.note(distributed=meta)


__all__ = ["InactiveRecorder", "distributed_meta", "rank_and_world", "record_local_gradients"]

"""Run by tests/test_ddp.py under `torchrun --nproc_per_node=2`: DDP on gloo, each rank its own data."""
import json
import os
import sys
import time

import torch
import torch.distributed as dist
from torch.nn.parallel import DistributedDataParallel

import nbkit


def main(out, local):
    import faulthandler; faulthandler.dump_traceback_later(150, exit=True)  # a hang prints stacks, then fails
    dist.init_process_group("gloo")
    rank = dist.get_rank()
    torch.manual_seed(0)                                  # the same initial model on every rank
    model = DistributedDataParallel(torch.nn.Sequential(torch.nn.Linear(6, 8), torch.nn.Tanh(), torch.nn.Linear(8, 2)))
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1, momentum=0.9)
    rec = nbkit.record(model, optimizer, os.path.join(out, "run"), probes=8, keyframe_every=5)
    if local:
        nbkit.record_local_gradients(model, rec)
    data = torch.Generator().manual_seed(100 + rank)      # different data on each rank
    started = time.perf_counter()
    for _ in range(int(os.environ.get("NBKIT_DDP_STEPS", "12"))):
        x, y = torch.randn(16, 6, generator=data), torch.randn(16, 2, generator=data)
        optimizer.zero_grad()
        loss = torch.nn.functional.mse_loss(model(x), y)
        loss.backward()
        optimizer.step()
        rec.loss(loss)
    elapsed = time.perf_counter() - started
    active = bool(rec.active)
    rec.close()
    with open(os.path.join(out, f"rank{rank}.json"), "w") as handle:
        json.dump({"rank": rank, "recorder": type(rec).__name__, "active": active,
                   "seconds": elapsed, "weight": model.module[0].weight.detach().flatten()[:4].tolist()}, handle)
    # Rank 0's close() writes files while the other ranks are already done: without a barrier the
    # fast rank tore gloo down first and once aborted at exit ("terminate called without an active
    # exception", 1 run in about 35). Waiting for every rank before the teardown is common practice.
    dist.barrier()
    dist.destroy_process_group()


if __name__ == "__main__":
    main(sys.argv[1], sys.argv[2] == "local")

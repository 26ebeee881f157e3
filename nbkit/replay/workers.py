"""Replays in several spawned processes: `replay(..., workers=N)`.

Spawned, not forked: a forked child can hang on torch's thread pool. Each process runs its share of
the replays in lockstep with `run_plan`, exactly as one process would, and records its process id.
"""
from __future__ import annotations

import multiprocessing
import pickle
from concurrent.futures import ProcessPoolExecutor

from nbkit.errors import ReplayError
from nbkit.replay.loop import run_plan


def in_workers(plan, model, step_fn, batches, workers, progress) -> dict:
    """Split the replays over `workers` spawned processes (not forked: a forked child can hang on
    torch's thread pool). Everything sent must pickle by reference to an importable module."""

    for what, value in (("step_fn", step_fn), ("batches", batches), ("before_step", plan.before_step),
                        ("model", model), *((f"optimizers[{n!r}]", f) for n, f in plan.factories.items())):
        try:
            pickle.dumps(value)
        except Exception as exc:
            raise ReplayError(f"workers={workers} sends {what} to spawned processes, but it cannot be pickled "
                              f"({type(exc).__name__}: {exc}). Define it at module level in an importable file "
                              "(not a lambda, a nested function or a generator), or use workers=1") from exc
    names = list(plan.factories)
    shares = [names[i::workers] for i in range(min(workers, len(names)))]
    context = multiprocessing.get_context("spawn")
    with ProcessPoolExecutor(max_workers=len(shares), mp_context=context) as pool:
        futures = [pool.submit(run_plan, plan, model, step_fn, batches, share, progress, position)
                   for position, share in enumerate(shares)]
        paths = {}
        for future in futures:
            paths.update(future.result())
    return paths

"""When the recorder's per-step statistics run: on the shared statistics thread, at once or held until
the next forward pass ends (Pacer), or in the hook itself.
"""
from __future__ import annotations

import threading
import time
from concurrent.futures import Future, ThreadPoolExecutor

import torch

from nbkit.record.capture import BlockJob, block_statistics

_worker = None
BACKGROUND_CPU = [0.0]      # CPU seconds spent in run_statistics so far (all recorders; for benchmarks)


def _executor():
    """One background thread shared by all recorders: the statistics of step s run there while
    the training thread goes on with step s + 1's forward and backward pass."""
    global _worker
    if _worker is None:
        _worker = ThreadPoolExecutor(max_workers=1, thread_name_prefix="nbkit-statistics")
    return _worker


class StatisticsTask:
    """The statistics of one step's blocks (`prepare_block` jobs), run as one task on the
    statistics thread. It is put on that thread only when started, so a task held back by its
    Pacer never occupies the thread that other recorders share; waiting for it starts it."""

    def __init__(self, jobs: list[BlockJob], pacer: "Pacer"):
        self.jobs, self.pacer, self.future = jobs, pacer, None
        self._lock = threading.Lock()
        for job in jobs:
            job.block.pending = self

    def start(self) -> None:
        with self._lock:
            if self.future is None:
                self.future = _executor().submit(run_statistics, self.jobs, self.pacer)

    def run_here(self) -> None:
        self.future = Future()
        try:
            self.future.set_result(run_statistics(self.jobs, self.pacer))
        except Exception as exc:
            self.future.set_exception(exc)

    def done(self) -> bool:
        return self.future is not None and self.future.done()

    def result(self):
        self.start()
        return self.future.result()

    def exception(self):
        self.start()
        return self.future.exception()


class Pacer:
    """When a recorder's statistics run: at once, or held until the next forward pass ends.

    A forward pass through many small modules is mostly Python; statistics computed at the same
    time compete with it for the GIL and slow it. The backward pass runs in torch's C++ engine
    without the GIL. So when the statistics have taken well under the time from the end of a
    forward pass to the next optimizer step (HOLD_BELOW, both measured as moving averages), they
    wait for the forward pass to end. Otherwise (a model whose backward pass is short next to its
    statistics) they start at once, so the next step's pre-hook does not wait for them.
    """

    HOLD_BELOW = 0.6
    SMOOTHING = 0.2             # weight of the newest measurement in the moving averages

    def __init__(self):
        self.held: StatisticsTask | None = None
        self.statistics_seconds: float | None = None
        self.backward_seconds: float | None = None       # forward's end to the next optimizer step
        self._forward_end: float | None = None
        self.cpu_seconds = 0.0          # CPU time of this recorder's statistics so far (every="auto")

    def submit(self, jobs: list[BlockJob], background: bool = True) -> StatisticsTask:
        task = StatisticsTask(jobs, self)
        if not background:
            task.run_here()
        elif (self.statistics_seconds is not None and self.backward_seconds is not None
              and self.statistics_seconds < self.HOLD_BELOW * self.backward_seconds):
            self.held = task
        else:
            task.start()
        return task

    def forward_ended(self) -> None:
        self._forward_end = time.perf_counter()
        if self.held is not None:
            task, self.held = self.held, None
            task.start()

    def step_started(self) -> None:
        if self._forward_end is not None:
            self.backward_seconds = self._average(self.backward_seconds, time.perf_counter() - self._forward_end)
            self._forward_end = None

    def statistics_took(self, seconds: float) -> None:
        self.statistics_seconds = self._average(self.statistics_seconds, seconds)

    def _average(self, old: float | None, new: float) -> float:
        return new if old is None else (1 - self.SMOOTHING) * old + self.SMOOTHING * new


@torch.no_grad()
def run_statistics(jobs: list[BlockJob], pacer: Pacer | None = None) -> None:
    """The statistics of one step, block by block; the first error is raised after every block ran."""
    started, started_wall = time.thread_time(), time.perf_counter()
    error = None
    try:
        for job in jobs:
            try:
                job.deliver(block_statistics(job))
            except Exception as exc:             # noqa: BLE001 - raised below, after the other blocks
                error = error or exc
    finally:
        cpu = time.thread_time() - started
        BACKGROUND_CPU[0] += cpu
        if pacer is not None:
            pacer.cpu_seconds += cpu
            pacer.statistics_took(time.perf_counter() - started_wall)
    if error is not None:
        raise error

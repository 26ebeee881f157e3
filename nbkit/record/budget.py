"""every="auto": the stride of heavy steps that keeps the recorder's own cost within a share of the step.

The recorder never sees an unrecorded step, so it budgets what it can measure of itself: the time its
hooks hold the training thread plus the CPU time of its background threads (statistics, writer),
against the median interval between optimizer steps (which includes that cost). A heavy step costs a
light step's work plus the heavy extras (the copies before and after the step, the statistics); a
stride s with heavy pairs (steps where step % s is 0 or 1, so grad_cosine and sign_flip still compare
neighbours) costs on average light + extras · 2 / s per step. The budget picks the smallest s with
that ≤ SHARE × interval. When the light work alone is over the share, that is the floor: the stride is
MAX_STRIDE and the floor is reported. The first WARM_UP steps are heavy; the stride changes only at
keyframes (the recorder asks `stride_at(step)` there), so a replay from a keyframe sees one stride.
"""
from __future__ import annotations

import math
import statistics
from collections import deque

SHARE = 0.05          # the recorder's cost ÷ the interval between optimizer steps (issue: within 5 %)
WARM_UP = 50          # steps recorded in full before the first decision
MAX_STRIDE = 1000     # the sparsest thinning: one heavy pair per MAX_STRIDE steps
WINDOW = 200          # steps of measurements a decision looks at


ESTIMATE_SHARE = 0.01 # what each estimate with stride "auto" takes of SHARE (nbkit.record.estimates)


def budget_share(auto_estimates: int) -> float:
    """The heavy-step budget's share when `auto_estimates` estimates (sharpness, noise) run at "auto"."""
    return SHARE - ESTIMATE_SHARE * auto_estimates


class StrideBudget:
    """Measurements of the recorder's own cost and the stride they allow (module docstring)."""

    def __init__(self, share: float | None = None, warm_up: int | None = None):
        self.share = SHARE if share is None else share
        self.warm_up = WARM_UP if warm_up is None else warm_up
        self.stride = 1
        self.floor: float | None = None        # light work ÷ interval, when it alone is over the share
        self.intervals: deque = deque(maxlen=WINDOW)
        self._last_start: float | None = None
        self._light = self._extras = 0.0       # seconds since the last decision
        self._steps = self._heavy_steps = 0
        self._extra_per_heavy: float | None = None    # the last measured extras of one heavy step
        self.last: dict = {}

    def step_started(self, now: float) -> None:
        if self._last_start is not None:
            self.intervals.append(now - self._last_start)
        self._last_start = now

    def measured(self, light_seconds: float, extra_seconds: float, heavy: bool) -> None:
        """One step's cost on the training thread: its light work and its heavy extras."""
        self._light += light_seconds
        self._extras += extra_seconds
        self._steps += 1
        self._heavy_steps += heavy

    def background(self, statistics_seconds: float, writer_seconds: float) -> None:
        """CPU time of the background threads since the last call: the statistics are heavy extras,
        the writer's work (every step's row and kept batch) is light work."""
        self._extras += statistics_seconds
        self._light += writer_seconds

    @staticmethod
    def heavy(step: int, stride: int) -> bool:
        return stride == 1 or step % stride < 2

    def stride_at(self, step: int) -> int:
        """The stride from keyframe `step` on (called at keyframes only). A window without a heavy step
        (a long stride) keeps the last measured cost of one; the share is of the step without the
        recorder: the measured interval less the recorder's own cost per step over the window."""
        if step < self.warm_up or not self.intervals or not self._steps:
            return self.stride
        if self._heavy_steps:
            self._extra_per_heavy = self._extras / self._heavy_steps
        if self._extra_per_heavy is None:
            return self.stride
        light = self._light / self._steps
        own = (self._light + self._extras) / self._steps             # the recorder's cost per step, as run
        interval = max(statistics.median(self.intervals) - own, 1e-9)
        extras = self._extra_per_heavy
        self.last = {"step_ms": round(interval * 1e3, 4), "light_ms": round(light * 1e3, 4),
                     "heavy_extra_ms": round(extras * 1e3, 4), "at_step": step}
        self._light = self._extras = 0.0
        self._steps = self._heavy_steps = 0
        self.intervals.clear()                                       # each decision sees its own window
        allowed = self.share * interval - light
        if allowed <= 0:
            self.floor, self.stride = light / interval, MAX_STRIDE
        else:
            self.floor = None
            stride = int(min(MAX_STRIDE, max(1, math.ceil(2 * extras / allowed - 1e-9))))   # not 26 for 25.000…04
            self.stride = 1 if stride <= 2 else stride       # pairs every 2 steps is every step
        return self.stride

    def report(self) -> dict:
        """What the metadata states about the budget."""
        return {"share": self.share, "warm_up": self.warm_up, "stride": self.stride,
                "floor": None if self.floor is None else round(self.floor, 4), **self.last}

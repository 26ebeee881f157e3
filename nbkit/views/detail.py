"""Detail on demand: re-record the window around the explorer's cursor in full, by a self-replay.

A thinned recording (every="auto") holds per-tensor quantities, histograms and probes on few steps. A
self-replay from a keyframe on the kept batches is bit-exact, so the window around the cursor can be
recorded again with every quantity at every step (nbkit.replay(..., every=1): "full-<start>-<end>");
the explorer then reads those rows in place of the thinned ones (ExplorerData.add_detail).
"""
from __future__ import annotations

import html

import ipywidgets as widgets

from nbkit.errors import NbkitError
from nbkit.replay.replay import replay

DETAIL_STEPS = 50      # steps re-recorded per click


def detail_window(run, step: int, steps: int = DETAIL_STEPS) -> tuple[int, int] | None:
    """(start, count) of the window to re-record around `step`: within a replayable window of the
    kept batches, centred on the step where it can be; None when the step is in no window."""
    for first, last in run.replayable_windows:
        if first <= step <= last:
            start = max(first, min(step - steps // 2, last + 1 - steps))
            return start, min(steps, last + 1 - start)
    return None


class DetailControl:
    """The explorer's "re-record in full" button, its note and the replay's progress bar."""

    def __init__(self, run, model, step_fn, on_detail):
        self.run, self.model, self.step_fn, self.on_detail = run, model, step_fn, on_detail
        self.button = widgets.Button(description="re-record in full", icon="search-plus",
                                     layout=widgets.Layout(width="150px"), disabled=model is None)
        self.button.add_class("nbkit-detail")
        self.note = widgets.HTML()
        self.note.add_class("nbkit-detail-note")
        self.progress = widgets.Output()
        self.box = widgets.HBox([self.button, self.note, self.progress])
        self.step = 0
        self.button.on_click(lambda _: self.request(self.step))
        self.say("pass model= to nbkit.explore to re-record a window of this recording in full (a replay "
                 "from a keyframe on its kept batches)" if model is None else
                 f"re-record the {DETAIL_STEPS} steps around the cursor with every quantity (bit-exact replay)")

    def say(self, text: str) -> None:
        self.note.value = f"<small>{html.escape(text)}</small>"

    def request(self, step: int):
        """Replay the window around `step` with every=1 and hand the detailed Recording to on_detail."""
        window = detail_window(self.run, step, DETAIL_STEPS)
        if window is None:
            windows = ", ".join(f"{a}-{b}" for a, b in self.run.replayable_windows) or "none"
            self.say(f"step {step} is in no window of kept batches (replayable: {windows})")
            return None
        start, count = window
        self.button.disabled = True
        try:
            with self.progress:
                runs = replay(self.run, self.model, step_fn=self.step_fn, start=start, steps=count, every=1,
                              progress=True)
        except NbkitError as exc:
            self.say(f"could not re-record steps {start}-{start + count - 1}: {exc}")
            return None
        finally:
            self.button.disabled = self.model is None
        self.progress.clear_output()
        detail = next(iter(runs.values()))
        self.say(f"steps {start}-{start + count - 1} re-recorded in full by a replay ({detail.path.name})")
        self.on_detail(detail)
        return detail

"""Following a growing recording: a Recorder training in this kernel, or one another process writes."""
from __future__ import annotations

import threading
import time

from nbkit.store.files import read_committed
from nbkit.views.base import safe_call

LIVE_MIN_INTERVAL = 0.5      # seconds between live refreshes: at most twice a second ...
LIVE_COST_FACTOR = 4.0       # ... and never more than 1/4 of the training loop's time
POLL_SECONDS = 1.0           # a recording another process writes is checked this often


def prepare_busy_frontends(parts) -> None:
    """Make full frames reach a browser whose canvases the kernel has not heard from yet.

    A canvas shown while the kernel runs a training loop never gets its "initialized" message
    handled, so ipympl never sends the "resize" that sizes the page's canvas, and it has no base
    image for diff frames. Sending the resize here and forcing full frames lets a live view draw.
    `parts` are view parts with `.canvas` (a views.common.ViewCanvas) and `.figure`.
    """
    for part in parts:
        canvas = part.canvas
        if canvas.syncing_data_url:              # ipympl: True until the browser said "initialized"
            width, height = part.figure.bbox.size
            canvas.manager.resize(int(width), int(height))
            canvas.force_full_frame()


class LiveFollower:
    """Calls `refresh()` when the recording at `path` has grown; `stop()` ends it.

    recorder: a live Recorder in this kernel (anything with `add_step_hook` and `flush(wait=False)`)
    or None. After each of its steps (at most every LIVE_MIN_INTERVAL seconds, and at most a
    1/LIVE_COST_FACTOR share of the loop's time) the follower asks it to commit and refreshes.
    poll=True: also check the commit file every POLL_SECONDS on a thread, for a recording another
    process writes or the tail of a live one; polling ends once the recording is closed and seen
    whole. shown_rows() gives the rows the view shows now; show_error(text) reports an error.
    """

    def __init__(self, path, *, refresh, shown_rows, show_error, recorder=None, poll=False):
        self.path = path
        self.refresh, self.shown_rows, self.show_error = refresh, shown_rows, show_error
        self.stopped = False
        self._last_refresh, self._refresh_cost = 0.0, 0.0
        self._hook = None
        self._poller = None
        if recorder is not None:
            # The hook runs on the training thread after the recorder has recorded the step.
            self._hook = recorder.add_step_hook(lambda row: self._on_recorder_step(recorder))
        if poll:
            self._poller = threading.Thread(target=self._poll, name="nbkit-explorer-poll", daemon=True)
            self._poller.start()

    def stop(self) -> None:
        """No more refreshes: removes the step hook (safe to call twice); the poller ends at its next wake."""
        self.stopped = True
        if self._hook is not None:
            self._hook.remove()

    def _on_recorder_step(self, recorder):
        """Called after each optimizer step of a live Recorder (same kernel, inside the training loop):
        no widget message or timer is handled then, and ipympl's draw_idle would wait for the browser,
        so the view draws and pushes its images itself (canvas.draw sends them at once). Never raises:
        a view error must not break training."""
        try:
            self._live_step(recorder)
        except Exception as exc:                     # noqa: BLE001 - shown in the view, training goes on
            safe_call(self.show_error, f"live refresh failed: {exc!r}")

    def _live_step(self, recorder):
        now = time.monotonic()
        if now - self._last_refresh < max(LIVE_MIN_INTERVAL, LIVE_COST_FACTOR * self._refresh_cost):
            return
        self._last_refresh = now
        # Ask for a commit without waiting: the rows handed over so far reach the disk within a few
        # ms; this refresh shows what is committed, the next one the rest.
        recorder.flush(wait=False)
        safe_call(self.refresh, on_error=self.show_error)
        self._refresh_cost = time.monotonic() - now

    def _poll(self):
        while not self.stopped:
            time.sleep(POLL_SECONDS)
            if self.stopped:
                return                               # stopped while this slept
            try:
                committed = read_committed(self.path)
                if int(committed.get("rows", 0)) != self.shown_rows():
                    safe_call(self.refresh, on_error=self.show_error)
                if committed.get("closed") and int(committed.get("rows", 0)) == self.shown_rows():
                    return
            except (OSError, ValueError):
                continue                             # the file is being replaced; try again

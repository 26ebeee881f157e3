"""The recording writer: buffers rows and writes whole chunks from a background thread.

The training thread only puts Rows and keyframes on a queue. The writer thread appends them to the
Zarr arrays (nbkit.store.arrays), then publishes the number of committed rows. A reader trusts only
committed rows, so it never sees a torn step. Errors are kept and reported by the recorder; they
never reach the training loop unless the user asked for strict mode.
"""
from __future__ import annotations

import queue
import threading
import time
from pathlib import Path

import numpy as np

from nbkit.store import batches as kept
from nbkit.store import keyframes as kf
from nbkit.store.arrays import RowArrays
from nbkit.store.files import write_json_atomic
from nbkit.store.layout import COMMITTED_FILE, META_FILE, STEP_CHUNK, Row
from nbkit.store.resume import ResumePlan

QUEUE_ROWS = 20_000               # rows waiting for the writer before new rows are dropped ...
QUEUE_BYTES = 256 << 20           # ... or bytes: memory stays bounded when the disk is slower than training
KEPT_GROUP = 16                   # kept steps per file (fewer at a keyframe, a gap or a commit)
QUEUE_KEPT = 2048                 # kept steps waiting for the writer before new ones are dropped ...
QUEUE_KEPT_BYTES = 128 << 20      # ... or their bytes


class RecordingWriter:
    """Owns one recording directory while it is being written.

    meta: the new recording's metadata (nbkit.store.layout.new_meta); probe_index: (tensors, probes)
    int64 flat coordinates of each tensor's probes (-1 padded), stored with the first rows;
    commit_seconds: rows are committed at least this often; resume: continue an existing recording.
    """

    def __init__(self, path: Path, meta: dict, *, probe_index: np.ndarray | None = None,
                 commit_seconds: float = 5.0, resume: ResumePlan | None = None):
        self.path = Path(path)
        self.meta = meta
        self.commit_seconds = commit_seconds
        self.error: BaseException | None = None
        self.dropped_rows = 0
        self.kept_error: BaseException | None = None     # keeping batches failed (disk full): keeping stops
        self.batch_budget = int(meta.get("batch_budget_bytes", 0))
        self._kept_bytes = kept.kept_bytes(self.path) if resume is not None else 0
        self._kept_dropped = 0
        self._kept_full_until = None          # set while the window being written fills the budget
        self._kept_pending: list = []         # (step, packed) of the group being built
        self._keyframe_steps = set(kf.list_keyframes(self.path))   # kept up to date by _write_keyframe
        self.max_write_seconds = 0.0
        self.cpu_seconds = 0.0                  # the writer thread's CPU time so far (every="auto")
        self._probe_index = probe_index
        self._queue: queue.Queue = queue.Queue()
        # Each counter is written by one thread only (queued: training, dequeued: writer), so their
        # difference is the backlog without a lock.
        self._queued_rows = self._dequeued_rows = self._queued_bytes = self._dequeued_bytes = 0
        self._queued_kept = self._dequeued_kept = self._queued_kept_bytes = self._dequeued_kept_bytes = 0
        self.dropped_kept = 0                   # kept steps not kept because the writer fell behind
        self._buffer: list[Row] = []
        self._local: list[tuple[int, np.ndarray]] = []    # (step, (ranks, tensors, 1 + probes)) rows
        self._last_step = resume.last_step if resume is not None else None
        self._last_commit = time.monotonic()
        self._arrays = RowArrays(self.path, self.meta, written=resume.kept_rows if resume is not None else 0,
                                 local_rows=resume.kept_local_rows if resume is not None else 0)
        write_json_atomic(self.path / META_FILE, self.meta)
        self._publish(closed=False)
        self._thread = threading.Thread(target=self._run, name=f"nbkit-writer:{self.path.name}", daemon=True)
        self._thread.start()

    # --- the training thread's side -------------------------------------------------------------
    def put_row(self, row: Row) -> None:
        if (self._queued_rows - self._dequeued_rows >= QUEUE_ROWS
                or self._queued_bytes - self._dequeued_bytes >= QUEUE_BYTES):
            self.dropped_rows += 1
            return
        size = row.nbytes()
        self._queued_rows += 1
        self._queued_bytes += size
        self._queue.put(("row", (row, size)))

    def put_local(self, step: int, values: np.ndarray) -> None:
        """Per-rank local gradient statistics of one step (nbkit.record.distributed)."""
        self._queue.put(("local", (step, values)))

    def put_kept(self, step: int, packed) -> None:
        """One kept step (nbkit.store.batches.pack_kept_step), written off the training thread; dropped
        (counted in dropped_kept) while QUEUE_KEPT of them wait, so memory stays bounded."""
        if self.kept_error is not None:
            return
        size = sum(b.nbytes for b in packed.buffers.values())
        if (self._queued_kept - self._dequeued_kept >= QUEUE_KEPT
                or self._queued_kept_bytes - self._dequeued_kept_bytes + size > QUEUE_KEPT_BYTES):
            self.dropped_kept += 1
            return
        self._queued_kept += 1
        self._queued_kept_bytes += size
        self._queue.put(("kept", (step, packed, size)))

    def put_keyframe(self, keyframe: kf.Keyframe) -> None:
        self._queue.put(("keyframe", keyframe))

    def update_meta(self, **changes) -> None:
        self._queue.put(("meta", changes))

    def flush(self, timeout: float | None = 60.0) -> None:
        """Commit everything queued so far; wait up to `timeout` seconds for it (0: do not wait)."""
        done = threading.Event()
        self._queue.put(("flush", done))
        done.wait(timeout)

    def close(self, timeout: float | None = 120.0) -> None:
        done = threading.Event()
        self._queue.put(("close", done))
        if self._thread.is_alive():
            done.wait(timeout)
        else:
            self._run()                      # the thread is gone (interpreter shutdown): close here

    # --- the writer thread ----------------------------------------------------------------------
    def _run(self) -> None:
        closed = False
        while not closed:
            timeout = max(0.05, self.commit_seconds - (time.monotonic() - self._last_commit))
            try:
                kind, item = self._queue.get(timeout=timeout)
            except queue.Empty:
                kind, item = "tick", None
            started = time.thread_time()
            try:
                closed = self._handle(kind, item)
            except BaseException as exc:       # kept for the recorder to report; keep draining
                if self.error is None:
                    self.error = exc
                if kind == "close":
                    self._note_error()
                if kind in ("flush", "close"):
                    item.set()
                closed = kind == "close"
            self.cpu_seconds += time.thread_time() - started

    def _handle(self, kind, item) -> bool:
        if kind == "row":
            item, size = item
            self._dequeued_rows += 1
            self._dequeued_bytes += size
            if self.error is None:
                self._buffer.append(item)
        elif kind == "kept":
            step, packed, size = item
            self._dequeued_kept += 1
            self._dequeued_kept_bytes += size
            if self.error is None and self.kept_error is None:
                self._write_kept(step, packed)
        elif kind == "keyframe":
            if self.error is None:
                self._write_keyframe(item)
        elif kind == "local":
            if self.error is None:
                self._local.append(item)
        elif kind == "meta":
            self.meta.update(item)
            write_json_atomic(self.path / META_FILE, self.meta)
        due = (len(self._buffer) >= STEP_CHUNK
               or (self._buffer and time.monotonic() - self._last_commit >= self.commit_seconds))
        if kind in ("flush", "close") or due:
            if self.error is None:
                self._commit()
            self._last_commit = time.monotonic()
        if kind == "close":
            if self.error is None:
                self._note_kept()
                self.meta["closed"] = True
                write_json_atomic(self.path / META_FILE, self.meta)
                self._publish(closed=True)
            else:
                self._note_error()
            item.set()
            return True
        if kind == "flush":
            item.set()
        return False

    def _note_error(self) -> None:
        """Best effort: say in the metadata why the recording stopped (the disk may still refuse)."""
        try:
            self.meta["writer_error"] = f"{type(self.error).__name__}: {self.error}"
            self.meta["writer_error_after_rows"] = self._arrays.written
            write_json_atomic(self.path / META_FILE, self.meta)
        except Exception:
            pass

    def _commit(self) -> None:
        """Write the buffered rows, kept steps and local gradients, then publish the new committed count."""
        self._write_kept_group()
        wrote_local = bool(self._local)
        if wrote_local:
            items, self._local = self._local, []
            self._arrays.append_local(items)
        if not self._buffer:
            if wrote_local:
                self._publish(closed=False)
            return
        rows, self._buffer = self._buffer, []
        started = time.monotonic()
        if self._arrays.append(rows, self._probe_index):
            write_json_atomic(self.path / META_FILE, self.meta)     # it now lists the probe fields
        # how long a commit takes adds to what a crash can lose; published for the loss bound
        self.max_write_seconds = max(self.max_write_seconds, time.monotonic() - started)
        self._publish(closed=False, last_step=rows[-1].step)

    def _publish(self, *, closed: bool, last_step: int | None = None) -> None:
        data = {"rows": self._arrays.written, "closed": closed, "time": time.time(),
                "local_rows": self._arrays.local_rows, "max_write_seconds": round(self.max_write_seconds, 4),
                "dropped_rows": self.dropped_rows}
        if last_step is None and self._arrays.written:
            last_step = self._last_step
        if last_step is not None:
            data["last_step"] = self._last_step = int(last_step)
        write_json_atomic(self.path / COMMITTED_FILE, data)

    def _write_keyframe(self, keyframe: kf.Keyframe) -> None:
        kf.write_keyframe(self.path, keyframe)
        self._keyframe_steps.add(keyframe.step)
        retention = self.meta["keyframe_retention"]
        thinned = kf.thin_keyframes(self.path, retention["budget_bytes"], retention["kept_recent"])
        self._keyframe_steps.difference_update(thinned)
        if thinned:
            retention["thinned"] = sorted(retention["thinned"] + thinned)
            write_json_atomic(self.path / META_FILE, self.meta)

    # --- kept batches ---------------------------------------------------------------------------
    def _write_kept(self, step: int, packed) -> None:
        """Add one kept step to the group being built; a group is written when it holds KEPT_GROUP steps,
        at a commit, and before a step that does not follow it or starts a window (a keyframe)."""
        keyframes = self._keyframe_steps
        if self._kept_full_until is not None:       # the current window already fills the budget
            if step not in keyframes:
                return
            self._kept_full_until = None             # a new window begins at this keyframe
        pending = self._kept_pending
        if pending and (step != pending[-1][0] + 1 or step in keyframes):
            self._write_kept_group()
        self._kept_pending.append((step, packed))
        if len(self._kept_pending) >= KEPT_GROUP:
            self._write_kept_group()

    def _write_kept_group(self) -> None:
        items, self._kept_pending = self._kept_pending, []
        if not items or self.kept_error is not None:
            return
        try:
            self._kept_bytes += kept.write_packed_steps(self.path, items)
        except OSError as exc:                 # disk full: stop keeping, never stop the recording
            self.kept_error = exc
            self._note_kept(stopped=f"{type(exc).__name__}: {exc}")
            return
        if self._kept_bytes > self.batch_budget:
            self._drop_older_windows(items[-1][0], sorted(self._keyframe_steps))

    def _drop_older_windows(self, step: int, keyframes: list[int]) -> None:
        """Over the budget: delete the oldest kept steps up to the next keyframe after them, so what
        stays still starts at a keyframe (a replay starts there), while older windows exist. The window being
        written (from the last keyframe at or before `step`) is never cut: when it alone fills the
        budget, no step is kept until the next keyframe starts a new one."""
        current = max((k for k in keyframes if k <= step), default=step)
        steps = kept.kept_steps(self.path)
        while self._kept_bytes > self.batch_budget and steps and steps[0] < current:
            cut = min(next((k for k in keyframes if k > steps[0]), current), current)
            doomed = [s for s in steps if s < cut]
            kept.delete_kept_steps(self.path, doomed)
            self._kept_bytes = kept.kept_bytes(self.path)
            self._kept_dropped += len(doomed)
            steps = steps[len(doomed):]
        if self._kept_bytes > self.batch_budget:
            self._kept_full_until = current
        self._note_kept()

    def _note_kept(self, stopped: str | None = None) -> None:
        summary = dict(self.meta.get("kept_batches") or {})
        steps = kept.kept_steps(self.path)
        summary.update(budget_bytes=self.batch_budget, bytes=self._kept_bytes, steps=len(steps),
                       dropped=self._kept_dropped,
                       windows=[list(w) for w in kept.windows(steps, kf.list_keyframes(self.path))])
        if stopped:
            summary["stopped"] = stopped
        self.meta["kept_batches"] = summary
        write_json_atomic(self.path / META_FILE, self.meta)

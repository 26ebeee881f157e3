"""The recording writer: buffers rows and writes whole chunks from a background thread.

The training thread only puts plain NumPy rows and keyframe snapshots on a queue. The writer thread
appends them to Zarr arrays (preallocated, grown by doubling, so a flush rewrites no metadata),
then publishes the number of committed rows. A reader trusts only committed rows, so it never sees
a torn step. Errors are kept and reported by the recorder; they never reach the training loop
unless the user asked for strict mode.
"""
from __future__ import annotations

import queue
import threading
import time
from pathlib import Path

import numpy as np

from nbkit.store import keyframes as kf
from nbkit.measure.fingerprint import FINGERPRINT_WIDTH
from nbkit.store.files import (COMMITTED_FILE, DETAIL_CHUNK, FORMAT_VERSION, META_FILE,
                               OVERVIEW_BLOCK, STEP_CHUNK, write_json_atomic)

KEYFRAME_BUDGET_BYTES = 1 << 30   # above this estimated total, older keyframes are thinned
KEYFRAMES_KEPT_RECENT = 4         # the newest keyframes are never thinned
QUEUE_ROWS = 20_000               # rows waiting for the writer before new rows are dropped ...
QUEUE_BYTES = 256 << 20           # ... or bytes: memory stays bounded when the disk is slower than training
ROW_ARRAYS = ("step", "loss", "lr", "heavy", "fingerprint")   # every recording has these


def _codecs():
    from zarr.codecs import Crc32cCodec, ZstdCodec

    return [ZstdCodec(level=1), Crc32cCodec()]


class RecordingWriter:
    """Owns one recording directory while it is being written."""

    def __init__(self, path: Path, meta: dict, *, flush_seconds: float = 5.0, resume: "ResumePlan | None" = None,
                 start_thread: bool = True):
        import zarr

        resume_rows = resume.rows if resume is not None else 0

        self.path = Path(path)
        self.meta = meta
        self.flush_seconds = flush_seconds
        self.error: BaseException | None = None
        self._queue: queue.Queue = queue.Queue()
        # Each counter is written by one thread only (queued: training, written: writer), so their
        # difference is the backlog without a lock.
        self._queued_rows = self._written_rows = self._queued_bytes = self._written_bytes = 0
        self._buffer: list[dict] = []
        self._rows = resume_rows              # rows committed on disk
        self._last_step = resume.last_step if resume is not None else None
        self._capacity = 0
        self._last_flush = time.monotonic()
        self._block_rows: list[np.ndarray] = []   # summaries of the current overview block
        self._block_loss: list[float] = []
        self.dropped_rows = 0
        self.max_write_seconds = 0.0
        self._local: list[tuple[int, np.ndarray]] = []    # (step, (ranks, tensors, 1 + probes)) rows
        self._local_rows = resume.local_rows if resume is not None else 0
        self.meta.setdefault("format_version", FORMAT_VERSION)
        self.meta.setdefault("keyframe_retention", {"budget_bytes": KEYFRAME_BUDGET_BYTES,
                                                    "kept_recent": KEYFRAMES_KEPT_RECENT, "thinned": []})
        self._group = zarr.open_group(str(self.path), mode="a", use_consolidated=False)
        self._arrays = {}
        if resume_rows:
            self._arrays = {name: self._group[name] for name in self._array_names()}
            # a crash during _grow can leave arrays of different lengths: the shortest one bounds all
            self._capacity = min(self._arrays[name].shape[0] for name in self._arrays if not name.startswith("overview/"))
            self._block_rows, self._block_loss = self._reload_block()
            if self._local_rows:
                self._arrays.update({name: self._group[name] for name in LOCAL_ARRAYS})
        write_json_atomic(self.path / META_FILE, self.meta)
        self._publish(closed=False)
        self._thread = threading.Thread(target=self._run, name=f"nbkit-writer:{self.path.name}", daemon=True)
        if start_thread:
            self._thread.start()

    # --- the training thread's side -------------------------------------------------------------
    def put_row(self, row: dict) -> None:
        if (self._queued_rows - self._written_rows >= QUEUE_ROWS
                or self._queued_bytes - self._written_bytes >= QUEUE_BYTES):
            self.dropped_rows += 1
            return
        size = _row_bytes(row)
        self._queued_rows += 1
        self._queued_bytes += size
        self._queue.put(("row", (row, size)))

    def put_local(self, step: int, values: np.ndarray) -> None:
        """Per-rank local gradient statistics of one step (nbkit.record.distributed)."""
        self._queue.put(("local", (step, values)))

    def put_keyframe(self, snapshot: kf.Snapshot) -> None:
        self._queue.put(("keyframe", snapshot))

    def update_meta(self, **changes) -> None:
        self._queue.put(("meta", changes))

    def flush(self, timeout: float | None = 60.0) -> None:
        done = threading.Event()
        self._queue.put(("flush", done))
        done.wait(timeout)

    def close(self, timeout: float | None = 120.0) -> None:
        done = threading.Event()
        self._queue.put(("close", done))
        if self._thread.is_alive():
            done.wait(timeout)
        else:
            self._run()                      # thread never started (tests) or already gone

    # --- the writer thread ----------------------------------------------------------------------
    def _run(self) -> None:
        closed = False
        while not closed:
            timeout = max(0.05, self.flush_seconds - (time.monotonic() - self._last_flush))
            try:
                kind, item = self._queue.get(timeout=timeout)
            except queue.Empty:
                kind, item = "tick", None
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

    def _handle(self, kind, item) -> bool:
        if kind == "row":
            item, size = item
            self._written_rows += 1
            self._written_bytes += size
            if self.error is None:
                self._buffer.append(item)
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
               or (self._buffer and time.monotonic() - self._last_flush >= self.flush_seconds))
        if kind in ("flush", "close") or due:
            if self.error is None:
                self._write_rows()
            self._last_flush = time.monotonic()
        if kind == "close":
            if self.error is None:
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
            self.meta["writer_error_after_rows"] = self._rows
            write_json_atomic(self.path / META_FILE, self.meta)
        except Exception:
            pass

    # --- arrays ---------------------------------------------------------------------------------
    def _array_names(self):
        names = ["step", "loss", "lr", "heavy", "fingerprint", "overview/loss"]
        names += [f"q/{q}" for q in self.meta["quantities"]]
        names += [f"overview/{q}" for q in self.meta["quantities"]]
        names += [f"hist/{h}" for h in ("grad", "update", "gain")]
        names += [f"probe/{f}" for f in self.meta.get("probe_fields", [])]
        return names

    def _create_arrays(self, row: dict) -> None:
        T = len(self.meta["tensors"])
        G = len(row["lr"])
        P = self.meta["probes"]
        specs = {
            "step": ((), "int64", STEP_CHUNK, -1),
            "loss": ((), "float64", STEP_CHUNK, np.nan),
            "lr": ((G,), "float64", STEP_CHUNK, np.nan),
            "heavy": ((), "bool", STEP_CHUNK, False),
            "fingerprint": ((2, FINGERPRINT_WIDTH), "float64", STEP_CHUNK, np.nan),
        }
        for q in self.meta["quantities"]:
            specs[f"q/{q}"] = ((T,), "float32", STEP_CHUNK, np.nan)
        for h in ("grad", "update", "gain"):
            specs[f"hist/{h}"] = ((T, row["hist"].shape[-1]), "uint32", DETAIL_CHUNK, 0)
        self.meta["probe_fields"] = sorted(row["probes"])
        for name in self.meta["probe_fields"]:
            specs[f"probe/{name}"] = ((T, P), "float32", DETAIL_CHUNK, np.nan)
        capacity = STEP_CHUNK
        for name, (tail, dtype, chunk, fill) in specs.items():
            self._arrays[name] = self._group.create_array(
                name, shape=(capacity, *tail), chunks=(chunk, *tail), dtype=dtype, fill_value=fill,
                compressors=_codecs(), overwrite=True)
        for name, tail in [("overview/loss", (2,))] + [(f"overview/{q}", (T, 2)) for q in self.meta["quantities"]]:
            self._arrays[name] = self._group.create_array(
                name, shape=(capacity // OVERVIEW_BLOCK + 1, *tail), chunks=(256, *tail), dtype="float32",
                fill_value=np.nan, compressors=_codecs(), overwrite=True)
        index = self._group.create_array("probe_index", shape=(T, P), chunks=(T, P), dtype="int64",
                                         fill_value=-1, compressors=_codecs(), overwrite=True)
        index[...] = self.meta.pop("_probe_index")
        self._capacity = capacity
        write_json_atomic(self.path / META_FILE, self.meta)

    def _grow(self, needed: int) -> None:
        capacity = self._capacity
        while capacity < needed:
            capacity *= 2
        for name, array in self._arrays.items():
            if name in LOCAL_ARRAYS:
                continue                      # grown by _write_local on their own count
            rows = capacity // OVERVIEW_BLOCK + 1 if name.startswith("overview/") else capacity
            array.resize((rows, *array.shape[1:]))
        self._capacity = capacity

    def _write_rows(self) -> None:
        wrote_local = self._write_local()
        if not self._buffer:
            if wrote_local:
                self._publish(closed=False)
            return
        rows, self._buffer = self._buffer, []
        started = time.monotonic()
        if "step" not in self._arrays:
            self._create_arrays(rows[0])
        start, stop = self._rows, self._rows + len(rows)
        if stop > self._capacity:
            self._grow(stop)
        a = self._arrays
        a["step"][start:stop] = np.array([r["step"] for r in rows], dtype=np.int64)
        a["loss"][start:stop] = np.array([r["loss"] for r in rows], dtype=np.float64)
        a["lr"][start:stop] = np.stack([r["lr"] for r in rows])
        a["heavy"][start:stop] = np.array([r["heavy"] for r in rows])
        a["fingerprint"][start:stop] = np.stack([r["fingerprint"] for r in rows])
        summaries = np.stack([r["q"] for r in rows])                     # (rows, Q, T)
        for i, q in enumerate(self.meta["quantities"]):
            a[f"q/{q}"][start:stop] = summaries[:, i]
        for h_index, h in enumerate(("grad", "update", "gain")):
            a[f"hist/{h}"][start:stop] = np.stack([r["hist"][h_index] for r in rows])
        for name in self.meta["probe_fields"]:
            missing = np.full(a[f"probe/{name}"].shape[1:], np.nan, dtype=np.float32)
            a[f"probe/{name}"][start:stop] = np.stack([r["probes"].get(name, missing) for r in rows])
        self._write_overview(start, summaries, [r["loss"] for r in rows])
        self._rows = stop
        # how long a flush takes adds to what a crash can lose; published for the loss bound
        self.max_write_seconds = max(self.max_write_seconds, time.monotonic() - started)
        self._publish(closed=False, last_step=rows[-1]["step"])

    def _write_overview(self, start: int, summaries: np.ndarray, losses: list[float]) -> None:
        """Min/max of every summary over blocks of OVERVIEW_BLOCK rows, rewritten as blocks fill."""
        row = start
        for i in range(len(summaries)):
            self._block_rows.append(summaries[i])
            self._block_loss.append(losses[i])
            row += 1
            if row % OVERVIEW_BLOCK == 0 or i == len(summaries) - 1:
                block = (row - 1) // OVERVIEW_BLOCK
                values = np.stack(self._block_rows)                       # (rows, Q, T)
                loss = np.array(self._block_loss, dtype=np.float64)
                with np.errstate(all="ignore"), _quiet_nan_warnings():
                    low, high = np.nanmin(values, axis=0), np.nanmax(values, axis=0)   # (Q, T)
                    loss_range = [np.nanmin(loss), np.nanmax(loss)] if np.isfinite(loss).any() else [np.nan, np.nan]
                for qi, q in enumerate(self.meta["quantities"]):
                    self._arrays[f"overview/{q}"][block] = np.stack([low[qi], high[qi]], axis=-1)
                self._arrays["overview/loss"][block] = np.array(loss_range, dtype=np.float32)
                if row % OVERVIEW_BLOCK == 0:
                    self._block_rows, self._block_loss = [], []

    def _reload_block(self):
        """On resume, the rows of the partly filled overview block are read back."""
        start = (self._rows // OVERVIEW_BLOCK) * OVERVIEW_BLOCK
        if start == self._rows:
            return [], []
        quantities = self.meta["quantities"]
        values = np.stack([self._arrays[f"q/{q}"][start:self._rows] for q in quantities], axis=1)
        return list(values), list(self._arrays["loss"][start:self._rows])

    def _publish(self, *, closed: bool, last_step: int | None = None) -> None:
        data = {"rows": self._rows, "closed": closed, "time": time.time(), "local_rows": self._local_rows,
                "max_write_seconds": round(self.max_write_seconds, 4), "dropped_rows": self.dropped_rows}
        if last_step is None and self._rows:
            last_step = self._last_step
        if last_step is not None:
            data["last_step"] = self._last_step = int(last_step)
        write_json_atomic(self.path / COMMITTED_FILE, data)

    # --- keyframes ------------------------------------------------------------------------------
    def _write_keyframe(self, snapshot: kf.Snapshot) -> None:
        kf.write_keyframe(self.path, snapshot)
        self._thin_keyframes()

    def _thin_keyframes(self) -> None:
        """Keep step 0 and the newest keyframes; drop every second older one while over budget."""
        retention = self.meta["keyframe_retention"]
        steps = kf.list_keyframes(self.path)
        sizes = {s: kf.keyframe_bytes(self.path, s) for s in steps}
        thinned = []
        while sum(sizes.values()) > retention["budget_bytes"]:
            older = [s for s in steps[1:-retention["kept_recent"]]]
            if not older:
                break
            for s in older[1::2] or older[:1]:
                kf.delete_keyframe(self.path, s)
                thinned.append(s)
                sizes.pop(s)
            steps = sorted(sizes)
        if thinned:
            retention["thinned"] = sorted(retention["thinned"] + thinned)
            write_json_atomic(self.path / META_FILE, self.meta)


    def _write_local(self) -> bool:
        """Append the buffered per-rank rows to local/*; published with the next committed.json."""
        if not self._local:
            return False
        items, self._local = self._local, []
        values = np.stack([v for _, v in items]).astype(np.float32)     # (rows, ranks, tensors, 1 + probes)
        if "local/step" not in self._arrays:
            tail = values.shape[1:]
            for name, shape, dtype, fill in (("local/step", (), "int64", -1),
                                             ("local/values", tail, "float32", np.nan)):
                self._arrays[name] = self._group.create_array(
                    name, shape=(STEP_CHUNK, *shape), chunks=(DETAIL_CHUNK, *shape), dtype=dtype, fill_value=fill,
                    compressors=_codecs(), overwrite=True)
        start, stop = self._local_rows, self._local_rows + len(items)
        size = self._arrays["local/step"].shape[0]
        if stop > size:
            while size < stop:
                size *= 2
            for name in LOCAL_ARRAYS:
                self._arrays[name].resize((size, *self._arrays[name].shape[1:]))
        self._arrays["local/step"][start:stop] = np.array([s for s, _ in items], dtype=np.int64)
        self._arrays["local/values"][start:stop] = values
        self._local_rows = stop
        return True


LOCAL_ARRAYS = ("local/step", "local/values")


def _row_bytes(row: dict) -> int:
    return 256 + row["q"].nbytes + row["hist"].nbytes + sum(v.nbytes for v in row["probes"].values())


class _quiet_nan_warnings:
    def __enter__(self):
        import warnings

        self._ctx = warnings.catch_warnings()
        self._ctx.__enter__()
        warnings.simplefilter("ignore", RuntimeWarning)

    def __exit__(self, *exc):
        self._ctx.__exit__(*exc)


# --- resuming ---------------------------------------------------------------------------------------
class ResumePlan:
    """What `resume=True` keeps of an existing recording, and the metadata to continue it with."""

    def __init__(self, path: Path, meta: dict, rows: int, local_rows: int, last_step: int | None,
                 next_step: int, note: dict):
        self.path, self.meta, self.rows, self.local_rows = path, meta, rows, local_rows
        self.last_step, self.next_step, self.note = last_step, next_step, note

    def merged_meta(self, new: dict) -> dict:
        """The old metadata, checked against the new run's, with this resume noted in "resumes"."""
        old = self.meta
        if not old.get("tensors") or self.rows == 0:
            fresh = dict(new)
            fresh["resumes"] = old.get("resumes", []) + [self.note]
            return fresh
        for key in ("probes", "quantities", "histogram_bins"):
            if old.get(key) != new.get(key):
                raise ValueError(f"{key} differs: the recording has {old.get(key)!r}, this run {new.get(key)!r}")
        shapes_old = [(t["name"], t["shape"]) for t in old["tensors"]]
        shapes_new = [(t["name"], t["shape"]) for t in new["tensors"]]
        if shapes_old != shapes_new:
            changed = [f"{a} vs {b}" for a, b in zip(shapes_old, shapes_new) if a != b][:3]
            raise ValueError(f"the tensors differ ({len(shapes_old)} recorded, {len(shapes_new)} now; "
                             f"first differences: {changed or 'count'})")
        merged = dict(old)
        for key in ("pid", "threads", "interop_threads", "torch_version", "nbkit_version", "flush_seconds",
                    "expected_steps", "strict", "distributed", "size_estimate"):
            if key in new:
                merged[key] = new[key]
        merged["closed"] = False
        merged.pop("writer_error", None)
        merged["resumes"] = old.get("resumes", []) + [self.note]
        return merged


def plan_resume(path: Path, restart_step: int | None) -> ResumePlan:
    """Read an existing recording and decide which committed rows a resumed run keeps.

    restart_step: the optimizer step the restarted run takes next (from its checkpoint); None means
    right after the last committed step. Rows at or after it belong to the abandoned branch of the
    run and are dropped (an overlap); a restart after a missing stretch leaves a gap. Both are noted.
    """
    import zarr

    from nbkit.store.files import read_json

    path = Path(path)
    meta = read_json(path / META_FILE)
    committed = read_json(path / COMMITTED_FILE)
    rows, local_rows = int(committed.get("rows", 0)), int(committed.get("local_rows", 0))
    steps = np.zeros(0, dtype=np.int64)
    local_steps = np.zeros(0, dtype=np.int64)
    if rows:
        group = zarr.open_group(str(path), mode="r", use_consolidated=False)
        steps = group["step"][:rows]
        if local_rows:
            local_steps = group["local/step"][:local_rows]
    last_step = int(steps[-1]) if rows else None
    expected = last_step + 1 if last_step is not None else 0
    next_step = expected if restart_step is None else int(restart_step)
    keep = int(np.searchsorted(steps, next_step))         # rows of steps before the restart
    keep_local = int(np.searchsorted(local_steps, next_step))
    note = {"at_step": next_step, "previous_last_step": last_step, "previous_rows": rows,
            "time": time.time(), "was_closed": bool(committed.get("closed", False))}
    if next_step < expected:
        note["overlap"] = [next_step, expected - 1]
        note["dropped_rows"] = rows - keep
    elif next_step > expected:
        note["gap"] = [expected, next_step - 1]
    dropped_keyframes = [s for s in kf.list_keyframes(path) if s > next_step]
    for s in dropped_keyframes:                            # state of the abandoned branch
        kf.delete_keyframe(path, s)
    if dropped_keyframes:
        note["dropped_keyframes"] = dropped_keyframes
    return ResumePlan(path, meta, keep, keep_local, int(steps[keep - 1]) if keep else None, next_step, note)


# --- size -------------------------------------------------------------------------------------------
def estimate_recording_bytes(meta: dict, expected_steps: int, *, state_copies: int) -> dict:
    """An upper estimate of a recording's size: rows uncompressed, keyframes at full size.

    state_copies: parameter-sized tensors in a keyframe (1 for the model plus one per optimizer state
    tensor, e.g. 3 for Adam). Keyframe retention (KEYFRAME_BUDGET_BYTES) caps the keyframe share.
    """
    T, P, Q = len(meta["tensors"]), meta["probes"], len(meta["quantities"])
    bins = meta["histogram_bins"] + 2
    G = len(meta.get("param_groups", [])) or 1
    light = 8 + 8 + 8 * G + 1 + 2 * FINGERPRINT_WIDTH * 8
    fields = 2 + state_copies                              # grad, update, and the moments kept as probes
    heavy = 4 * T * (Q + 3 * bins + fields * P)
    every = max(1, int(meta.get("every", 1)))
    row_bytes = expected_steps * light + -(-expected_steps // every) * heavy
    param_bytes = sum(t["numel"] * (8 if t["dtype"] in ("float64", "int64") else 4) for t in meta["tensors"])
    keyframe = state_copies * param_bytes
    count = expected_steps // max(1, int(meta.get("keyframe_every", 100))) + 2
    keyframes = min(count * keyframe, max(KEYFRAME_BUDGET_BYTES, (KEYFRAMES_KEPT_RECENT + 2) * keyframe))
    return {"rows": row_bytes, "keyframes": keyframes, "total": row_bytes + keyframes,
            "bytes_per_heavy_step": heavy, "bytes_per_keyframe": keyframe}

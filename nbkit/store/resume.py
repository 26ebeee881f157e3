"""Resuming a recording: which committed rows a restarted run keeps, and the metadata it continues with."""
from __future__ import annotations

import time
from pathlib import Path

import numpy as np
import zarr

from nbkit.store import keyframes as kf
from nbkit.store.files import read_json
from nbkit.store.layout import COMMITTED_FILE, LOCAL_STEP, META_FILE, STEP


class ResumePlan:
    """What `resume=True` keeps of an existing recording, and the metadata to continue it with."""

    def __init__(self, path: Path, meta: dict, rows: int, local_rows: int, last_step: int | None,
                 next_step: int, note: dict):
        self.path, self.meta, self.kept_rows, self.kept_local_rows = path, meta, rows, local_rows
        self.last_step, self.next_step, self.note = last_step, next_step, note

    def merged_meta(self, new: dict) -> dict:
        """The old metadata, checked against the new run's, with this resume noted in "resumes"."""
        old = self.meta
        if not old.get("tensors") or self.kept_rows == 0:
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
        for key in ("pid", "threads", "interop_threads", "torch_version", "nbkit_version", "commit_seconds",
                    "expected_steps", "strict", "distributed", "size_estimate", "every", "keep_batches",
                    "batch_budget_bytes", "criterion_spec", "clip"):
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
    path = Path(path)
    meta = read_json(path / META_FILE)
    committed = read_json(path / COMMITTED_FILE)
    rows, local_rows = int(committed.get("rows", 0)), int(committed.get("local_rows", 0))
    steps = np.zeros(0, dtype=np.int64)
    local_steps = np.zeros(0, dtype=np.int64)
    if rows:
        group = zarr.open_group(str(path), mode="r", use_consolidated=False)
        steps = group[STEP][:rows]
        if local_rows:
            local_steps = group[LOCAL_STEP][:local_rows]
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

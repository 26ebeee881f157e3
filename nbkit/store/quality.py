"""The step-quality sidecar of a recording: `step_quality.npz` beside nbkit.json, and its meta entry.

The file holds the measured arrays of nbkit.step_quality (nbkit.analyze.step_quality.StepQuality's
stored fields) for every step computed so far; a later window is merged in (its steps replace the
same steps). meta["step_quality"] says which steps have values and why the others are NaN:

    {"file": "step_quality.npz", "computed": [[first, last], ...], "missing": [{"first", "last", "why"}],
     "second_order": [[first, last], ...], "notes": [...]}

Written to a temporary name and renamed into place; only on a closed recording (no writer holds it).
"""
from __future__ import annotations

import os
import tempfile
from pathlib import Path

import numpy as np

from nbkit.errors import RecordingError
from nbkit.store.annotate import update_meta
from nbkit.store.files import read_committed, read_meta
from nbkit.store.layout import META_FILE

QUALITY_FILE = "step_quality.npz"
STEP_ARRAYS = ("loss_before", "loss_after", "predicted_first", "predicted_second")     # (steps,) float64
TENSOR_ARRAYS = ("first_order_terms", "second_order_terms")                             # (steps, tensors)


def ranges(steps) -> list[list[int]]:
    """Consecutive steps as [first, last] pairs: [3, 4, 5, 9] -> [[3, 5], [9, 9]]."""
    out = []
    for s in sorted(int(x) for x in steps):
        if out and s == out[-1][1] + 1:
            out[-1][1] = s
        else:
            out.append([s, s])
    return out


def read_step_quality(path) -> dict | None:
    """{"step": (n,) int64, each STEP_ARRAYS and TENSOR_ARRAYS name: its array} or None without a sidecar."""
    file = Path(path) / QUALITY_FILE
    if not file.is_file():
        return None
    with np.load(file, allow_pickle=False) as data:
        return {name: data[name] for name in ("step", *STEP_ARRAYS, *TENSOR_ARRAYS)}


def write_step_quality(path, arrays: dict, missing: list[dict], notes: list[str]) -> dict:
    """Merge `arrays` (read_step_quality's form) into the sidecar of the closed recording at `path` and
    update meta["step_quality"]; missing: [{"first", "last", "why"}] for steps stored as NaN. Returns the
    meta entry."""
    path = Path(path)
    if not (path / META_FILE).is_file():
        raise RecordingError(f"No recording found at {str(path)!r}: it has no {META_FILE}")
    if not read_committed(path).get("closed", False):
        raise RecordingError(f"Recording {str(path)!r} is still open (or was not closed cleanly); close its "
                             "recorder (rec.close()) before storing step quality in it")
    new_steps = np.asarray(arrays["step"], dtype=np.int64)
    old = read_step_quality(path)
    if old is not None and old[TENSOR_ARRAYS[0]].shape[1:] != np.asarray(arrays[TENSOR_ARRAYS[0]]).shape[1:]:
        old = None                                    # another tensor list: the old file is replaced
    if old is not None:
        keep = ~np.isin(old["step"], new_steps)
        merged = {k: np.concatenate([old[k][keep], np.asarray(arrays[k])]) for k in old}
    else:
        merged = {k: np.asarray(arrays[k]) for k in ("step", *STEP_ARRAYS, *TENSOR_ARRAYS)}
    order = np.argsort(merged["step"], kind="stable")
    merged = {k: v[order] for k, v in merged.items()}
    merged["step"] = merged["step"].astype(np.int64)
    fd, tmp = tempfile.mkstemp(prefix=f".{QUALITY_FILE}.", suffix=".tmp", dir=path)
    try:
        with os.fdopen(fd, "wb") as handle:
            np.savez(handle, **merged)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, path / QUALITY_FILE)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    previous = (read_meta(path).get("step_quality") or {}) if old is not None else {}
    new = set(new_steps.tolist())
    kept_missing = [{"first": a, "last": b, "why": m["why"]} for m in previous.get("missing", [])
                    for a, b in ranges(set(range(m["first"], m["last"] + 1)) - new)]
    computed = np.isfinite(merged["loss_before"])
    second = np.isfinite(merged["predicted_second"])
    entry = {"file": QUALITY_FILE, "computed": ranges(merged["step"][computed]),
             "missing": sorted(kept_missing + list(missing), key=lambda m: m["first"]),
             "second_order": ranges(merged["step"][second]),
             "notes": list(dict.fromkeys(previous.get("notes", []) + list(notes)))[-20:]}
    update_meta(path, step_quality=entry)
    return entry

"""Small file helpers shared by the writer and reader: atomic JSON and the recording's layout."""
from __future__ import annotations

import json
import os
import tempfile
from pathlib import Path

FORMAT_VERSION = 1
META_FILE = "nbkit.json"            # what the recording is: tensors, optimizer, settings
COMMITTED_FILE = "committed.json"   # how many rows are safely on disk; published after the data
KEYFRAME_DIR = "keyframes"
STEP_CHUNK = 1024                   # rows per chunk for summaries, loss, learning rates
DETAIL_CHUNK = 256                  # rows per chunk for histograms and probes (bigger rows)
OVERVIEW_BLOCK = 256                # steps per row of the min/max overview


def write_json_atomic(path: Path, data: dict) -> None:
    """Write JSON to a temporary name in the same folder, then rename it into place."""
    path = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "w") as handle:
            json.dump(data, handle, indent=1, default=_json_default)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def _json_default(value):
    if hasattr(value, "tolist"):
        return value.tolist()
    if isinstance(value, (set, tuple)):
        return list(value)
    return repr(value)


def read_json(path: Path) -> dict:
    with open(path) as handle:
        return json.load(handle)


def is_recording(path: Path) -> bool:
    return (Path(path) / META_FILE).is_file()

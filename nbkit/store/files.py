"""File helpers shared by the store's modules: atomic JSON writes, JSON reads, what is a recording."""
from __future__ import annotations

import json
import os
import tempfile
from pathlib import Path

from nbkit.store.layout import COMMITTED_FILE, META_FILE



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


def read_meta(path: Path) -> dict:
    """The metadata of the recording at `path` (nbkit.json), as stored."""
    return read_json(Path(path) / META_FILE)


def read_committed(path: Path) -> dict:
    """The commit record of the recording at `path` (committed.json): "rows", "closed", ..."""
    return read_json(Path(path) / COMMITTED_FILE)


def is_recording(path: Path) -> bool:
    return (Path(path) / META_FILE).is_file()

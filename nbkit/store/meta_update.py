"""Adding entries to a closed recording's metadata (a replay's fidelity report, after the fact)."""
from __future__ import annotations

from pathlib import Path

from nbkit.errors import RecordingError
from nbkit.store.files import META_FILE, read_json, write_json_atomic


def update_meta(path, **changes) -> None:
    """Merge `changes` into the metadata of the recording at `path` (atomic rewrite). Call only on a
    recording no writer holds open; existing keys other than those in `changes` are kept."""
    meta_path = Path(path) / META_FILE
    if not meta_path.is_file():
        raise RecordingError(f"No recording found at {str(path)!r}: it has no {META_FILE}")
    meta = read_json(meta_path)
    meta.update(changes)
    write_json_atomic(meta_path, meta)

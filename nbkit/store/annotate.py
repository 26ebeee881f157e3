"""Annotating a closed recording: metadata entries and values of one series, written after the fact.

Used by run.curvature() to fill in sharpness at keyframes. Only committed rows can be written, only
while no recorder writes the recording, and the min/max overview blocks that hold the rows are
recomputed so long timelines show the new values.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import zarr

from nbkit.errors import RecordingError
from nbkit.store import layout
from nbkit.store.arrays import minmax
from nbkit.store.files import read_json, write_json_atomic
from nbkit.store.layout import COMMITTED_FILE, META_FILE, OVERVIEW_BLOCK


def write_series(path, name: str, rows, values) -> None:
    """Write `values` into series `name` at `rows` of the closed recording at `path`.

    rows: row indices (not step numbers; use run.rows_for_steps or searchsorted on run.steps);
    values: one number per row (written to every tensor's column) or a (rows, tensors) array.
    """
    path = Path(path)
    if not (path / META_FILE).is_file():
        raise RecordingError(f"No recording found at {str(path)!r}: it has no {META_FILE}")
    meta, committed = read_json(path / META_FILE), read_json(path / COMMITTED_FILE)
    if not committed.get("closed", False):
        raise RecordingError(f"Recording {str(path)!r} is still open (or was not closed cleanly); close its "
                             "recorder (rec.close()) before writing values into it")
    if name not in meta["quantities"]:
        raise RecordingError(f"Unknown series {name!r}; the recording holds {', '.join(meta['quantities'])}")
    rows = np.asarray(rows, dtype=np.int64).reshape(-1)
    n_rows, n_tensors = int(committed["rows"]), len(meta["tensors"])
    if len(rows) and (rows.min() < 0 or rows.max() >= n_rows):
        raise RecordingError(f"Rows {rows.tolist()} are outside the recording's {n_rows} committed rows")
    values = np.asarray(values, dtype=np.float32)
    if values.ndim == 1:
        values = np.repeat(values[:, None], n_tensors, axis=1)
    if values.shape != (len(rows), n_tensors):
        raise RecordingError(f"Expected {len(rows)} values (or a ({len(rows)}, {n_tensors}) array), "
                             f"got shape {values.shape}")
    if not len(rows):
        return
    group = zarr.open_group(str(path), mode="r+", use_consolidated=False)
    series = group[layout.series_array(name)]
    data = series[0:n_rows]
    data[rows] = values
    series[0:n_rows] = data
    overview_name = layout.overview_array(name)
    if overview_name not in group:
        return
    overview = group[overview_name]
    for block in np.unique(rows // OVERVIEW_BLOCK):
        part = data[block * OVERVIEW_BLOCK:min((block + 1) * OVERVIEW_BLOCK, n_rows)]
        low, high = minmax(part)                         # all-NaN columns stay NaN, as the writer's
        overview[int(block)] = np.stack([low, high], axis=-1).astype(np.float32)


def update_meta(path, **changes) -> None:
    """Merge `changes` into the metadata of the recording at `path` (atomic rewrite). Call only on a
    recording no writer holds open; existing keys other than those in `changes` are kept."""
    meta_path = Path(path) / META_FILE
    if not meta_path.is_file():
        raise RecordingError(f"No recording found at {str(path)!r}: it has no {META_FILE}")
    meta = read_json(meta_path)
    meta.update(changes)
    write_json_atomic(meta_path, meta)

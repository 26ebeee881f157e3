"""The recording's Zarr arrays while it is written: created at the first rows, grown by doubling,
appended to in whole batches of rows, with the min/max overview kept up to date.

Written by the writer thread (nbkit.store.writer); names, shapes and chunks come from
nbkit.store.layout.
"""
from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import zarr
from zarr.codecs import Crc32cCodec, ZstdCodec

from nbkit.store import layout
from nbkit.store.layout import OVERVIEW_BLOCK, Row


def codecs():
    """Zstd for size, CRC32C so a damaged chunk is detected when read (zarr's crc32c codec, RFC 3720 §B.4)."""
    return [ZstdCodec(level=1), Crc32cCodec()]


def create(group, name: str, spec: layout.ArraySpec, rows: int):
    return group.create_array(name, shape=(rows, *spec.tail), chunks=(spec.chunk, *spec.tail), dtype=spec.dtype,
                              fill_value=spec.fill, compressors=codecs(), overwrite=True)


class RowArrays:
    """The step arrays of one recording: `append(rows)` writes a batch of Rows at the end."""

    def __init__(self, path: Path, meta: dict, *, written: int = 0, local_rows: int = 0):
        self.meta = meta
        self.group = zarr.open_group(str(path), mode="a", use_consolidated=False)
        self.arrays: dict = {}
        self.written = written                  # step rows written
        self.local_rows = local_rows
        self.capacity = 0
        self._block_rows: list[np.ndarray] = []     # summaries of the current overview block
        self._block_loss: list[float] = []
        if written:                             # resuming: the arrays exist
            names = [*layout.row_arrays(meta, 1), *layout.overview_arrays(meta)]
            self.arrays = {name: self.group[name] for name in names}
            # a crash while growing can leave arrays of different lengths: the shortest one bounds all
            self.capacity = min(a.shape[0] for n, a in self.arrays.items() if not layout.is_overview(n))
            self._reload_block()
        if local_rows:
            self.arrays.update({name: self.group[name] for name in layout.LOCAL_ARRAYS})

    # --- creation and growth --------------------------------------------------------------------
    def _create(self, first: Row, probe_index: np.ndarray | None) -> None:
        """Create every array from the first row (it gives the group count and the probe fields)."""
        self.meta["probe_fields"] = sorted(first.probes)
        capacity = layout.STEP_CHUNK
        for name, spec in layout.row_arrays(self.meta, len(first.lr)).items():
            self.arrays[name] = create(self.group, name, spec, capacity)
        for name, spec in layout.overview_arrays(self.meta).items():
            self.arrays[name] = create(self.group, name, spec, layout.overview_rows(capacity))
        index = create(self.group, layout.PROBE_INDEX, layout.probe_index_array(self.meta), len(self.meta["tensors"]))
        if probe_index is not None:
            index[...] = probe_index
        self.capacity = capacity

    def _grow(self, needed: int) -> None:
        capacity = self.capacity
        while capacity < needed:
            capacity *= 2
        for name, array in self.arrays.items():
            if name in layout.LOCAL_ARRAYS:
                continue                      # grown by append_local on their own count
            rows = layout.overview_rows(capacity) if layout.is_overview(name) else capacity
            array.resize((rows, *array.shape[1:]))
        self.capacity = capacity

    # --- rows -----------------------------------------------------------------------------------
    def append(self, rows: list[Row], probe_index: np.ndarray | None = None) -> bool:
        """Write `rows` after the last written row. Returns True when the arrays were just created
        (the metadata gained "probe_fields" and must be rewritten)."""
        created = layout.STEP not in self.arrays
        if created:
            self._create(rows[0], probe_index)
        start, stop = self.written, self.written + len(rows)
        if stop > self.capacity:
            self._grow(stop)
        a = self.arrays
        a[layout.STEP][start:stop] = np.array([r.step for r in rows], dtype=np.int64)
        a[layout.LOSS][start:stop] = np.array([r.loss for r in rows], dtype=np.float64)
        a[layout.LR][start:stop] = np.stack([r.lr for r in rows])
        a[layout.HEAVY][start:stop] = np.array([r.heavy for r in rows])
        a[layout.FINGERPRINT][start:stop] = np.stack([r.fingerprint for r in rows])
        if layout.GRAD_NORM in a:
            for name in layout.BACKWARD_ARRAYS:
                a[name][start:stop] = np.array([getattr(r, name) for r in rows], dtype=np.float64)
            missing = np.full(len(self.meta["tensors"]), np.nan, dtype=np.float32)
            a[layout.TENSOR_GRAD_NORMS][start:stop] = np.stack(
                [missing if r.tensor_grad_norm is None else r.tensor_grad_norm for r in rows])
        if layout.SETTINGS in a:                   # recordings that store settings (meta["settings"])
            array = a[layout.SETTINGS]
            missing = np.full(array.shape[1:], np.nan)
            a[layout.SETTINGS][start:stop] = np.stack([missing if r.settings is None or r.settings.shape != missing.shape
                                                      else r.settings for r in rows])
        summaries = np.stack([r.quantities for r in rows])                     # (rows, Q, T)
        for i, q in enumerate(self.meta["quantities"]):
            a[layout.series_array(q)][start:stop] = summaries[:, i]
        for h_index, h in enumerate(layout.HISTOGRAMS):
            a[layout.histogram_array(h)][start:stop] = np.stack([r.histograms[h_index] for r in rows])
        for name in self.meta["probe_fields"]:
            array = a[layout.probe_array(name)]
            missing = np.full(array.shape[1:], np.nan, dtype=np.float32)
            array[start:stop] = np.stack([r.probes.get(name, missing) for r in rows])
        for axis in ("rows", "columns"):
            name = layout.profile_array(axis)
            if name in a:
                missing = np.full(a[name].shape[1:], layout.PROFILE_MISSING, dtype=np.int16)
                a[name][start:stop] = np.stack([(r.profiles or {}).get(axis, missing) for r in rows])
        self._write_overview(start, summaries, [r.loss for r in rows])
        self.written = stop
        return created

    def _write_overview(self, start: int, summaries: np.ndarray, losses: list[float]) -> None:
        """Min/max of every summary over blocks of OVERVIEW_BLOCK rows, rewritten as blocks fill."""
        row = start
        for i in range(len(summaries)):
            self._block_rows.append(summaries[i])
            self._block_loss.append(losses[i])
            row += 1
            if row % OVERVIEW_BLOCK == 0 or i == len(summaries) - 1:
                block = (row - 1) // OVERVIEW_BLOCK
                low, high = minmax(np.stack(self._block_rows))                     # (Q, T) each
                loss = np.array(self._block_loss, dtype=np.float64)
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore", RuntimeWarning)
                    loss_range = [np.nanmin(loss), np.nanmax(loss)] if np.isfinite(loss).any() else [np.nan, np.nan]
                for qi, q in enumerate(self.meta["quantities"]):
                    self.arrays[layout.overview_array(q)][block] = np.stack([low[qi], high[qi]], axis=-1)
                self.arrays[layout.OVERVIEW_LOSS][block] = np.array(loss_range, dtype=np.float32)
                if row % OVERVIEW_BLOCK == 0:
                    self._block_rows, self._block_loss = [], []

    def _reload_block(self) -> None:
        """On resume, the rows of the partly filled overview block are read back."""
        start = (self.written // OVERVIEW_BLOCK) * OVERVIEW_BLOCK
        if start == self.written:
            return
        quantities = self.meta["quantities"]
        values = np.stack([self.arrays[layout.series_array(q)][start:self.written] for q in quantities], axis=1)
        self._block_rows, self._block_loss = list(values), list(self.arrays[layout.LOSS][start:self.written])

    # --- per-rank local gradients ---------------------------------------------------------------
    def append_local(self, items: list[tuple[int, np.ndarray]]) -> None:
        """Append (step, (ranks, tensors, 1 + probes)) rows to the local gradient arrays."""
        values = np.stack([v for _, v in items]).astype(np.float32)     # (rows, ranks, tensors, 1 + probes)
        if layout.LOCAL_STEP not in self.arrays:
            for name, spec in layout.local_arrays(values.shape[1:]).items():
                self.arrays[name] = create(self.group, name, spec, layout.STEP_CHUNK)
        start, stop = self.local_rows, self.local_rows + len(items)
        size = self.arrays[layout.LOCAL_STEP].shape[0]
        if stop > size:
            while size < stop:
                size *= 2
            for name in layout.LOCAL_ARRAYS:
                self.arrays[name].resize((size, *self.arrays[name].shape[1:]))
        self.arrays[layout.LOCAL_STEP][start:stop] = np.array([s for s, _ in items], dtype=np.int64)
        self.arrays[layout.LOCAL_VALUES][start:stop] = values
        self.local_rows = stop


def minmax(values: np.ndarray, axis: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """(nanmin, nanmax) along `axis`; all-NaN columns stay NaN without a warning."""
    with warnings.catch_warnings(), np.errstate(all="ignore"):
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanmin(values, axis=axis), np.nanmax(values, axis=axis)

"""What the views read from a Recording: lazy, cached by storage block, downsampled to pixels.

Views only select; every number shown comes from the recording as stored. Every read goes through
the Recording's public API (so a damaged chunk shows as the reader's RecordingError), one storage
chunk of rows at a time: blocks are cached, so scrubbing inside one chunk costs no reads, and a
cursor move decodes only the probe fields it draws.
"""
from __future__ import annotations

import numpy as np

from nbkit.store.layout import DETAIL_CHUNK, OVERVIEW_BLOCK, STEP_CHUNK

LONG = 16_384            # rows above which timelines use the stored min/max overview
HISTOGRAM_BLOCKS = 64    # storage blocks sampled for a long recording's histogram image (each ~6 ms)
HISTOGRAM_COLUMNS = 400  # columns of a short recording's histogram image


def minmax_downsample(x: np.ndarray, y: np.ndarray, buckets: int) -> tuple[np.ndarray, np.ndarray]:
    """At most 2*buckets points that keep each bucket's minimum and maximum (spikes survive)."""
    n = len(y)
    if n <= 2 * buckets:
        return x, y
    edges = np.linspace(0, n, buckets + 1).astype(np.int64)
    xs, ys = [], []
    for a, b in zip(edges[:-1], edges[1:]):
        chunk = y[a:b]
        finite = np.isfinite(chunk)
        if not finite.any():
            xs += [x[a]]
            ys += [np.nan]
            continue
        lo, hi = np.nanargmin(chunk), np.nanargmax(chunk)
        for k in sorted({lo, hi}):
            xs.append(x[a + k])
            ys.append(chunk[k])
    return np.asarray(xs), np.asarray(ys)


GRID_COLUMNS = 2000      # evenly spaced heat-map columns a thinned recording is drawn on, at most


def with_gaps(steps: np.ndarray, columns: np.ndarray, first_step: int, last_step: int) -> tuple[np.ndarray, np.ndarray]:
    """The values of the recorded `steps` (rows of `columns`) on evenly spaced columns from first_step to
    last_step (a heat map's columns are drawn evenly): each grid column shows the recorded step it
    falls on, NaN where it falls on none, so a thinned recording shows where it has no values instead
    of stretching its heavy steps over the gaps."""
    count = min(GRID_COLUMNS, last_step - first_step + 1)
    grid = np.linspace(first_step, last_step + 1, count, endpoint=False)
    at = np.searchsorted(steps, grid, side="right") - 1
    out = np.full((count, *columns.shape[1:]), np.nan, dtype=np.float64)
    # the recorded step must cover the grid column: it is within one step before it
    hit = (at >= 0) & (grid - steps[np.maximum(at, 0)] < max(1.0, (last_step + 1 - first_step) / count))
    out[hit] = columns[at[hit]]
    return np.floor(grid).astype(np.int64), out


class ExplorerData:
    """Cached selections from one Recording for the explorer's parts."""

    def __init__(self, run):
        self.run = run
        self.reload()

    def reload(self) -> None:
        """Forget caches of rows that may have grown (call after run.refresh())."""
        self.steps = self.run.steps                                   # (rows,) int64
        self.row_count = len(self.steps)
        self._block_cache: dict = {}
        self._hist_cache: dict = {}
        self._heavy = None
        self.details = getattr(self, "details", [])                  # windows re-recorded in full

    # --- detail windows (views.detail) ----------------------------------------------------------
    def add_detail(self, detail) -> None:
        """Read the rows of `detail` (a self-replay recorded with every=1) in place of this run's rows
        over its steps; a later window wins where two overlap."""
        self.details = [d for d in self.details if d.path != detail.path] + [detail]
        self._block_cache, self._heavy = {}, None

    def detail_at(self, row: int):
        """(detail Recording, its row) when a detail window covers `row`, else None."""
        if not self.details or self.row_count == 0:
            return None
        step = int(self.steps[row])
        for detail in reversed(self.details):
            if len(detail) and detail.steps[0] <= step <= detail.steps[-1]:
                return detail, int(step - detail.steps[0])
        return None

    # --- steps and rows -------------------------------------------------------------------------
    def row_of(self, step: int) -> int:
        """Row of the recorded step nearest at or before `step` (first row if before the start)."""
        if self.row_count == 0:
            return 0
        return int(np.clip(np.searchsorted(self.steps, step, side="right") - 1, 0, self.row_count - 1))

    def heavy_row(self, row: int) -> int | None:
        """The latest row <= row whose per-tensor quantities were computed (or re-recorded), or None."""
        if self.detail_at(row) is not None:
            return row
        if self._heavy is None:
            self._heavy = np.flatnonzero(self.run.heavy)
        k = np.searchsorted(self._heavy, row, side="right") - 1
        return int(self._heavy[k]) if k >= 0 else None

    def tensor_group(self, tensor: str) -> int:
        return int(self.run.meta["tensors"][self.run.tensor_index(tensor)].get("group", 0))

    # --- timelines ------------------------------------------------------------------------------
    def timeline(self, which: str, buckets: int) -> tuple[np.ndarray, np.ndarray]:
        """(steps, values) of "loss" or "lr" (first group), at most ~2*buckets points, min/max kept."""
        if which == "loss" and self.row_count > LONG:
            start, blocks = self.run.overview("loss")                 # (blocks,), (blocks, 2)
            x = self.steps[np.minimum(start, self.row_count - 1)]
            return np.repeat(x, 2), blocks.reshape(-1).astype(np.float64)
        values = self.run.loss if which == "loss" else self.run.lr[:, 0]
        return minmax_downsample(self.steps, values, buckets)

    def layer_map(self, q: str) -> tuple[np.ndarray, np.ndarray, str]:
        """(column start steps, (tensors, columns) values, how) for the layer-map heatmap."""
        if self.row_count > LONG:
            start, blocks = self.run.overview(q)                      # (blocks, tensors, 2)
            return self.steps[np.minimum(start, self.row_count - 1)], blocks[:, :, 1].T, \
                f"maximum per {OVERVIEW_BLOCK} steps"
        values = self.run.series(q)                                   # (rows, tensors)
        heavy = self.run.heavy.copy()
        for detail in self.details:                                   # re-recorded windows: every row
            rows = np.flatnonzero((self.steps >= detail.steps[0]) & (self.steps <= detail.steps[-1]))
            values[rows] = detail.series(q)[self.steps[rows] - detail.steps[0]]
            heavy[rows] = True
        heavy = np.flatnonzero(heavy)
        if len(heavy) and len(heavy) < self.row_count:                     # every=N: keep the rows that have values
            how = f"every={self.run.meta.get('every', '?')}" + (", windows re-recorded in full" if self.details else "")
            starts, columns = with_gaps(self.steps[heavy], values[heavy], int(self.steps[0]), int(self.steps[-1]))
            return starts, columns.T, how
        return self.steps, values.T, "every step"

    def overview_range(self, q: str) -> tuple[float, float, float]:
        """(min, max, smallest positive) of q over the whole recording, from the overview."""
        _, blocks = self.run.overview(q)
        finite = blocks[np.isfinite(blocks)]
        if finite.size == 0:
            return np.nan, np.nan, np.nan
        positive = finite[finite > 0]
        return float(finite.min()), float(finite.max()), float(positive.min()) if positive.size else np.nan

    def lr_max(self, group: int) -> float:
        if "lr" not in self._block_cache:
            self._block_cache["lr"] = self.run.lr                  # (rows, groups), small
        lr = self._block_cache["lr"][:, group]
        return float(np.nanmax(lr)) if np.isfinite(lr).any() else np.nan

    def overall_max(self, q: str, tensor: str) -> float:
        """Largest value of q for tensor over the whole recording (from the overview)."""
        if q not in self.run.quantities:
            return np.nan
        _, blocks = self.run.overview(q)                              # (blocks, tensors, 2)
        column = blocks[:, self.run.tensor_index(tensor), 1]
        return float(np.nanmax(column)) if np.isfinite(column).any() else np.nan

    # --- per-row selections (cached by storage block) -------------------------------------------
    def _block(self, key: tuple, row: int, chunk: int, read) -> np.ndarray:
        """Row `row` of the storage block holding it; read(rows: slice) reads a block on a miss."""
        block = row // chunk
        data = self._block_cache.get((key, block))
        if data is None:
            if len(self._block_cache) > 64:                           # keep memory bounded while scrubbing
                self._block_cache = {k: v for k, v in self._block_cache.items() if k == "lr"}
            data = read(slice(block * chunk, min((block + 1) * chunk, self.row_count)))
            self._block_cache[(key, block)] = data
        return data[row - block * chunk]

    def values_at(self, q: str, row: int) -> np.ndarray:
        """(tensors,) values of q at row."""
        detailed = self.detail_at(row)
        if detailed is not None:
            detail, r = detailed
            return np.asarray(detail.series(q, rows=slice(r, r + 1))[0], dtype=np.float64)
        values = self._block(("series", q), row, STEP_CHUNK, lambda rows: self.run.series(q, rows=rows))
        return np.asarray(values, dtype=np.float64)

    def value_at(self, q: str, tensor: str, row: int) -> float:
        return float(self.values_at(q, row)[self.run.tensor_index(tensor)])

    def probe_fields(self) -> list[str]:
        return list(self.run.meta.get("probe_fields", []))

    def probes_at(self, tensor: str, row: int, fields) -> dict[str, np.ndarray]:
        """{field: (probes,) values} of tensor's probe coordinates at row (fields that exist)."""
        have = set(self.probe_fields())
        out = {}
        detailed = self.detail_at(row)
        if detailed is not None:
            detail, r = detailed
            got = detail.probes(tensor, rows=slice(r, r + 1), fields=[f for f in fields if f in have])
            return {f: np.asarray(v[0], dtype=np.float64) for f, v in got.items() if f != "index"}
        for field in fields:
            if field in have:
                values = self._block(("probe", field, tensor), row, DETAIL_CHUNK,
                                     lambda rows, f=field: self.run.probes(tensor, rows=rows, fields=[f])[f])
                out[field] = np.asarray(values, dtype=np.float64)
        return out

    def lr_at(self, row: int) -> np.ndarray:
        """(param_groups,) learning rates at row."""
        values = self._block(("learning_rates",), row, STEP_CHUNK, lambda rows: self.run.learning_rates(rows=rows))
        return np.asarray(values, dtype=np.float64)

    def histogram_image(self, q: str, tensor: str) -> tuple[np.ndarray, np.ndarray, np.ndarray, str]:
        """(column edges in steps, bin edges in log2 units, (bins, columns) share per column, how)."""
        if (q, tensor) not in self._hist_cache:
            self._fill_histograms(q)
        return self._hist_cache[(q, tensor)]

    def _fill_histograms(self, q: str) -> None:
        """One pass over storage blocks fills the images of every tensor: a block holds all tensors."""
        edges, _ = self.run.histogram_counts(q, rows=slice(0, 0))
        blocks = -(-self.row_count // DETAIL_CHUNK)
        if blocks <= HISTOGRAM_BLOCKS:
            _, counts = self.run.histogram_counts(q, rows=slice(0, self.row_count))
            counts = counts.astype(np.float64)                                    # (rows, T, bins)
            held = np.flatnonzero(counts.sum(axis=(1, 2)) > 0)                   # rows with a histogram
            held = held if held.size else np.arange(self.row_count)
            cols = np.linspace(0, len(held), min(HISTOGRAM_COLUMNS, len(held)) + 1).astype(np.int64)
            image = np.add.reduceat(counts[held], cols[:-1], axis=0)              # (columns, T, bins)
            ends = held[cols[1:] - 1] + 1                                         # after each column's last row
            cols = np.append(held[cols[:-1]], self.row_count)
            gaps = np.flatnonzero(ends < cols[1:])                                # rows without a histogram follow
            if len(gaps):                                                         # empty columns there
                image = np.insert(image, gaps + 1, np.nan, axis=0)
                cols = np.insert(cols, gaps + 1, ends[gaps])
            how = "all steps" if len(held) == self.row_count else f"the {len(held)} steps with histograms"
        else:
            chosen = np.unique(np.linspace(0, blocks - 1, HISTOGRAM_BLOCKS).round().astype(np.int64))
            rows_of = [slice(b * DETAIL_CHUNK, min((b + 1) * DETAIL_CHUNK, self.row_count)) for b in chosen]
            image = np.stack([self.run.histogram_counts(q, rows=rows)[1].astype(np.float64).sum(axis=0)
                              for rows in rows_of])                               # (columns, T, bins)
            cols = np.append(chosen * DETAIL_CHUNK, self.row_count)
            how = f"{len(chosen)} sampled blocks of {DETAIL_CHUNK} steps out of {blocks}"
        with np.errstate(invalid="ignore", divide="ignore"):
            share = image / image.sum(axis=2, keepdims=True)                      # (columns, T, bins)
        step_edges = np.append(self.steps[np.minimum(cols[:-1], self.row_count - 1)], self.steps[-1] + 1)
        for i, tensor in enumerate(self.run.tensors):
            self._hist_cache[(q, tensor)] = (step_edges, edges, share[:, i, :].T, how)


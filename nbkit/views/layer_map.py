"""The explorer's layer map: tensors x steps heatmap of one quantity, and its values at the cursor."""
from __future__ import annotations

import numpy as np
from matplotlib.colors import LogNorm, Normalize, TwoSlopeNorm
from matplotlib.ticker import LogLocator

from nbkit.measure.quantities import SHARE_QUANTITIES
from nbkit.views.common import (MAGNITUDE_MAP, OKABE_ITO, SHARE_MAP, SIGNED_MAP, SIGNED_QUANTITIES, Blitter, label_of,
                                make_canvas, plain_log_ticks)

WIDTH = 620
DECADES_FOR_LOG = 2.0     # a quantity spanning more than 100x is coloured on a log scale


def colour_scale(q: str, low: float, high: float, smallest_positive: float):
    """(norm, colour map name, is_log) for quantity q with range [low, high] over the recording."""
    if not np.isfinite(low):
        return Normalize(0, 1), MAGNITUDE_MAP, False
    if q in SIGNED_QUANTITIES or low < 0 < high:
        bound = max(abs(low), abs(high), 1e-12)
        return TwoSlopeNorm(0.0, -bound, bound), SIGNED_MAP, False
    if q in SHARE_QUANTITIES:
        return Normalize(0.0, max(high, 1e-6)), SHARE_MAP, False
    if np.isfinite(smallest_positive) and high / smallest_positive > 10 ** DECADES_FOR_LOG:
        return LogNorm(smallest_positive, high), MAGNITUDE_MAP, True
    return Normalize(low, high if high > low else low + 1), MAGNITUDE_MAP, False


class LayerMap:
    """Rows: tensors in model order, grouped by layer. Clicking a row calls on_pick_tensor(name)."""

    def __init__(self, data, on_pick_tensor):
        self.data = data
        self.on_pick_tensor = on_pick_tensor
        tensors = data.run.tensors
        height = int(np.clip(120 + 9 * len(tensors), 300, 720))
        self.figure, self.canvas = make_canvas(WIDTH, height, css_class="nbkit-layer-map")
        grid = self.figure.add_gridspec(1, 3, width_ratios=(4, 1.3, 0.12), wspace=0.06,
                                        left=0.2, right=0.86, top=0.9, bottom=60 / height)
        self.map_axes = self.figure.add_subplot(grid[0])
        self.value_axes = self.figure.add_subplot(grid[1], sharey=self.map_axes)
        self.colour_axes = self.figure.add_subplot(grid[2])
        rows = len(tensors)
        self.image = self.map_axes.imshow(np.full((rows, 1), np.nan), aspect="auto", interpolation="nearest",
                                          extent=(0, 1, rows - 0.5, -0.5), cmap=MAGNITUDE_MAP)
        self.colourbar = self.figure.colorbar(self.image, cax=self.colour_axes)
        self.map_axes.set_yticks(range(rows), tensors, fontsize=max(4.5, min(8, 400 / max(rows, 1))))
        self.map_axes.set_xlabel("optimizer step")
        self.value_axes.tick_params(labelleft=False, labelsize=7)
        self.value_axes.grid(axis="x", color="#dddddd", lw=0.5)
        layer_of = [t.get("layer", "") for t in data.run.meta["tensors"]]
        for k in range(1, rows):                    # thin separators between layers
            if layer_of[k] != layer_of[k - 1]:
                for ax in (self.map_axes, self.value_axes):
                    ax.axhline(k - 0.5, color="white" if ax is self.map_axes else "#cccccc", lw=0.6)
        self.blitter = Blitter(self.figure)
        # The selected row follows clicks: animated like the cursor, so a pick needs no full draw.
        self.selection = self.blitter.add(self.map_axes.axhspan(-0.5, 0.5, fill=False, ec=OKABE_ITO["reddish purple"],
                                                                lw=1.5))
        self.cursor = self.blitter.add(self.map_axes.axvline(0, color=OKABE_ITO["reddish purple"], lw=1.2))
        self.values, = self.value_axes.plot([], [], "o", ms=3.5, color=OKABE_ITO["black"])
        self.blitter.add(self.values)
        self.value_axes.set_title("at the cursor", fontsize=8)
        self.title = self.figure.text(0.01, 0.985, "", fontsize=9, va="top")
        self.quantity = None
        self.is_log = False                 # whether the quantity shown is coloured on a log scale
        self.canvas.mpl_connect("button_press_event", self._press)

    def set_quantity(self, q: str):
        """Read the heatmap of q (downsampled to blocks for long recordings). Needs a full draw."""
        self.quantity = q
        data = self.data
        if data.row_count == 0:
            return
        starts, values, how = data.layer_map(q)              # (columns,), (tensors, columns)
        low, high, smallest_positive = data.overview_range(q)
        norm, cmap, is_log = colour_scale(q, low, high, smallest_positive)
        shown = np.where(values > 0, values, np.nan) if is_log else values
        self.image.set_data(np.ma.masked_invalid(shown))
        self.image.set_cmap(cmap)
        self.image.set_norm(norm)
        last = int(data.steps[-1])
        self.image.set_extent((float(starts[0]), float(max(last, starts[0] + 1)), len(data.run.tensors) - 0.5, -0.5))
        self.map_axes.set_xlim(float(starts[0]), float(max(last, starts[0] + 1)))
        self.colourbar.update_normal(self.image)
        self.colourbar.set_label(label_of(q), fontsize=8)
        self.value_axes.set_xscale("log" if is_log else "linear")
        plain_log_ticks(self.value_axes.xaxis)
        if is_log:                                   # a narrow axis: three labels at most
            self.value_axes.xaxis.set_major_locator(LogLocator(numticks=3))
        plain_log_ticks(self.colourbar.ax.yaxis)
        if np.isfinite(low):
            if is_log:
                self.value_axes.set_xlim(smallest_positive / 1.5, high * 1.5)
            else:
                pad = 0.05 * (high - low or 1.0)
                self.value_axes.set_xlim(low - pad, high + pad)
        self.title.set_text(f"{label_of(q)} per tensor ({how})" if np.isfinite(low)
                            else f"{q}: no values recorded")
        self.is_log = is_log

    def set_tensor(self, tensor: str):
        k = self.data.run.tensor_index(tensor)
        self.selection.set_y(k - 0.5)
        self.selection.set_height(1.0)

    def set_cursor(self, step: int, row: int | None):
        """Cursor line and the values of every tensor at the per-tensor row `row` (None: no values)."""
        self.cursor.set_xdata([step, step])
        if row is None or self.quantity is None:
            self.values.set_data([], [])
            return
        values = self.data.values_at(self.quantity, row)
        if self.is_log:
            values = np.where(values > 0, values, np.nan)
        self.values.set_data(values, np.arange(len(values)))

    def _press(self, event):
        if event.inaxes in (self.map_axes, self.value_axes) and event.ydata is not None and event.button == 1:
            k = int(round(event.ydata))
            tensors = self.data.run.tensors
            if 0 <= k < len(tensors):
                self.on_pick_tensor(tensors[k])

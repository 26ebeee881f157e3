"""The explorer's layer map: a module tree x steps heat map of one quantity, and its values at the cursor.

Rows follow nbkit.analyze.module_tree: a block (`layer3.0`) is one row holding an aggregate of its
tensors (median, max, or its worst tensor) until a click expands it; a text filter narrows the rows
to the tensors whose names hold it. Colours span the 1st–99th percentile of what is shown
(nbkit.analyze.scales), or each row's own range when rows are scaled one by one; values outside
the colour range are drawn in the colour bar's end colours.
"""
from __future__ import annotations

import numpy as np
from matplotlib import colormaps
from matplotlib.colors import LogNorm, Normalize
from matplotlib.ticker import FormatStrFormatter, LogLocator, MaxNLocator

from nbkit.analyze.module_tree import AGGREGATES, build_tree, row_tensor, row_values, tree_rows
from nbkit.analyze.scales import normalise_rows, robust_limits
from nbkit.measure.quantities import SHARE_QUANTITIES
from nbkit.views.common import (MAGNITUDE_MAP, OKABE_ITO, SHARE_MAP, SIGNED_MAP, SIGNED_QUANTITIES, Blitter, label_of,
                                make_canvas, plain_log_ticks)

WIDTH = 680
DECADES_FOR_LOG = 2.0     # a quantity whose shown range spans more than 100x is coloured on a log scale
OVER, UNDER, MISSING = "#E8000B", "#000000", "#E4E4E4"   # beyond the colour range; not recorded
EXPANDED_UP_TO = 24      # tensors up to which every block starts expanded
PIXELS_PER_LABEL = 7.5    # below this many pixels per row only every k-th row is labelled


def _cmap(name):
    return colormaps[name].with_extremes(over=OVER, under=UNDER, bad=MISSING)


def choose_scale(q: str, values: np.ndarray):
    """(norm, colour map name, is_log, Limits or None) for the shown values of q (rows, columns)."""
    linear = robust_limits(values)
    if linear is None:
        return Normalize(0, 1), MAGNITUDE_MAP, False, None
    if q in SIGNED_QUANTITIES or linear.low < 0 < linear.high:
        limits = robust_limits(values, symmetric=True)
        return Normalize(limits.low, limits.high), SIGNED_MAP, False, limits
    if q in SHARE_QUANTITIES:
        return Normalize(0.0, max(linear.high, 1e-6)), SHARE_MAP, False, linear
    log = robust_limits(values, log=True)
    if log is not None and log.high / log.low > 10 ** DECADES_FOR_LOG:
        return LogNorm(log.low, log.high), MAGNITUDE_MAP, True, log
    return Normalize(linear.low, linear.high), MAGNITUDE_MAP, False, linear


class LayerMap:
    """Rows: the module tree. Clicking a tensor row calls on_pick_tensor(name); clicking a block row
    calls on_toggle(block name) (the explorer expands or collapses it)."""

    def __init__(self, data, on_pick_tensor, on_toggle=None):
        self.data = data
        self.on_pick_tensor = on_pick_tensor
        self.on_toggle = on_toggle
        run = data.run
        self.tree = build_tree(run.tensors, run.layers)
        # a small model shows every tensor from the start; a deep one opens with its blocks collapsed
        self.expanded: set[str] = ({b.name for b in self.tree.blocks} if len(run.tensors) <= EXPANDED_UP_TO
                                   else set())
        self.filter_text = ""
        self.aggregate = "max"
        self.per_row = False
        self.rows = tree_rows(self.tree, self.expanded)
        every_label = [label for block in self.tree.blocks for label in block.labels]
        longest = max((len(s) for s in every_label), default=8)
        height = int(np.clip(130 + 12 * len(self.rows), 320, 720))
        self.figure, self.canvas = make_canvas(WIDTH, height, css_class="nbkit-layer-map")
        left = float(np.clip((12 + 4.6 * longest) / WIDTH, 0.16, 0.42))
        grid = self.figure.add_gridspec(1, 3, width_ratios=(4, 1.3, 0.12), wspace=0.06,
                                        left=left, right=0.84, top=1 - 62 / height, bottom=52 / height)
        self.map_axes = self.figure.add_subplot(grid[0])
        self.value_axes = self.figure.add_subplot(grid[1], sharey=self.map_axes)
        self.colour_axes = self.figure.add_subplot(grid[2])
        self.map_axes.set_facecolor(MISSING)
        self.image = self.map_axes.imshow(np.full((1, 1), np.nan), aspect="auto", interpolation="nearest",
                                          extent=(0, 1, 0.5, -0.5), cmap=_cmap(MAGNITUDE_MAP))
        self.colourbar = self.figure.colorbar(self.image, cax=self.colour_axes)
        self.colourbar.ax.tick_params(labelsize=7)
        self.map_axes.set_xlabel("optimizer step", fontsize=8)
        self.map_axes.tick_params(labelsize=7)
        self.value_axes.tick_params(labelleft=False, left=False, labelsize=7)   # rows: labelled on the map only
        self.map_axes.tick_params(axis="y", length=0)
        self.value_axes.grid(axis="x", color="#dddddd", lw=0.5)
        self.separators = []
        self.blitter = Blitter(self.figure)
        # The selected row follows clicks: animated like the cursor, so a pick needs no full draw.
        self.selection = self.blitter.add(self.map_axes.axhspan(-0.5, 0.5, fill=False, ec=OKABE_ITO["reddish purple"],
                                                                lw=1.5))
        self.cursor = self.blitter.add(self.map_axes.axvline(0, color=OKABE_ITO["reddish purple"], lw=1.2))
        self.values, = self.value_axes.plot([], [], "o", ms=3.5, color=OKABE_ITO["black"])
        self.beyond, = self.value_axes.plot([], [], ">", ms=4, color=OVER)      # past the colour range
        self.blitter.add(self.values)
        self.blitter.add(self.beyond)
        self.value_axes.set_title("at the cursor", fontsize=8)
        self.title = self.figure.text(0.01, 0.985, "", fontsize=9, va="top", wrap=True)
        self.note = self.map_axes.text(0.5, 0.5, "", transform=self.map_axes.transAxes, ha="center", va="center",
                                       fontsize=9, color="#444444")
        self.quantity = None
        self.is_log = False                 # whether the quantity shown is coloured on a log scale
        self.limits = None                  # the colour range (nbkit.analyze.scales.Limits) or None
        self.tensor = None
        self._matrix = None                 # (tensors, columns) of the quantity, as read
        self._cursor = (0, None)
        self.canvas.mpl_connect("button_press_event", self._press)

    # --- what is shown --------------------------------------------------------------------------
    def set_quantity(self, q: str):
        """Read the heat map of q (downsampled to blocks for long recordings). Needs a full draw."""
        self.quantity = q
        if self.data.row_count == 0:
            return
        self._starts, self._matrix, self._how = self.data.layer_map(q)      # (columns,), (tensors, columns)
        self._show()

    def set_rows(self, *, expanded=None, filter_text=None, aggregate=None, per_row=None):
        """Change the tree's rows or their scale; needs a full draw after."""
        if aggregate is not None and aggregate not in AGGREGATES:
            raise ValueError(f"Unknown block aggregate {aggregate!r}; choose one of {', '.join(AGGREGATES)}")
        if expanded is not None:
            self.expanded = set(expanded)
        if filter_text is not None:
            self.filter_text = filter_text
        if aggregate is not None:
            self.aggregate = aggregate
        if per_row is not None:
            self.per_row = bool(per_row)
        if self._matrix is not None:
            self._show()
        else:
            self.rows = tree_rows(self.tree, self.expanded, self.filter_text)

    def _show(self):
        q = self.quantity
        self.rows = rows = tree_rows(self.tree, self.expanded, self.filter_text)
        values = row_values(rows, self.tree, self._matrix, self.aggregate, q)   # (rows, columns)
        norm, cmap, is_log, limits = choose_scale(q, values)
        self.is_log, self.limits = is_log, limits
        shown = np.where(values > 0, values, np.nan) if is_log else values
        if self.per_row and len(rows):
            shown = normalise_rows(values, log=is_log)
            norm, cmap = Normalize(0.0, 1.0), (SIGNED_MAP if cmap == SIGNED_MAP else MAGNITUDE_MAP)
            extend = {(True, True): "both", (True, False): "min", (False, True): "max"}.get(
                (bool((shown < 0).any()), bool((shown > 1).any())), "neither")
        else:
            extend = limits.extend if limits is not None else "neither"
        n = max(len(rows), 1)
        self.image.set_data(np.ma.masked_invalid(shown if len(rows) else np.full((1, 1), np.nan)))
        self.image.set_cmap(_cmap(cmap))
        self.image.set_norm(norm)
        first, last = float(self._starts[0]), float(max(int(self.data.steps[-1]), self._starts[0] + 1))
        self.image.set_extent((first, last, n - 0.5, -0.5))
        self.map_axes.set_xlim(first, last)
        self.map_axes.set_ylim(n - 0.5, -0.5)
        self._label_rows()
        if extend != self.colourbar.extend:          # the end triangles are built with the bar
            self.colourbar.remove()
            self.colour_axes = self.figure.add_axes(self.colour_axes.get_position())
            self.colourbar = self.figure.colorbar(self.image, cax=self.colour_axes, extend=extend)
            self.colourbar.ax.tick_params(labelsize=7)
        else:
            self.colourbar.update_normal(self.image)
        what = label_of(q)
        if self.per_row:
            self.colourbar.set_label("each row scaled to its own 1st–99th percentile" + (" (log)" if is_log else ""),
                                     fontsize=7)
        else:
            self.colourbar.set_label("1st–99th percentile of the rows shown", fontsize=7)
        self.value_axes.set_xscale("log" if is_log else "linear")
        plain_log_ticks(self.value_axes.xaxis)
        if is_log:                                   # a narrow axis: three labels at most
            self.value_axes.xaxis.set_major_locator(LogLocator(numticks=3))
        else:
            self.value_axes.xaxis.set_major_locator(MaxNLocator(3))
            self.value_axes.xaxis.set_major_formatter(FormatStrFormatter("%.2g"))
        plain_log_ticks(self.colourbar.ax.yaxis)
        if limits is not None:
            if is_log:
                self.value_axes.set_xlim(limits.low / 1.5, limits.high * 1.5)
            else:
                pad = 0.05 * (limits.high - limits.low or 1.0)
                self.value_axes.set_xlim(limits.low - pad, limits.high + pad)
        blocks = "" if self.filter_text else f"; a block row: {self.aggregate}"
        self.title.set_text(f"{what} ({self._how}{blocks})" if limits is not None or not rows
                            else f"{what}: no values recorded")
        self.note.set_text(f"no tensor matches “{self.filter_text}”" if not rows else "")
        if self.tensor is not None:
            self.set_tensor(self.tensor)
        self.set_cursor(*self._cursor)

    def _label_rows(self):
        for line in self.separators:
            line.remove()
        self.separators = []
        rows = self.rows
        pixels = self.map_axes.get_position().height * self.figure.get_figheight() * self.figure.dpi
        per_row = pixels / max(len(rows), 1)
        every = max(1, int(np.ceil(PIXELS_PER_LABEL / per_row)))
        ticks = list(range(0, len(rows), every))
        self.map_axes.set_yticks(ticks, [rows[k].label for k in ticks], fontsize=float(np.clip(per_row * every * 0.75, 5, 8)))
        edges = [k - 0.5 for k in range(1, len(rows)) if rows[k].block != rows[k - 1].block]
        if edges:                                        # thin separators between blocks: one collection each
            self.separators.append(self.map_axes.hlines(edges, 0, 1, transform=self.map_axes.get_yaxis_transform(),
                                                        colors="white", lw=0.6))
            self.separators.append(self.value_axes.hlines(edges, 0, 1, transform=self.value_axes.get_yaxis_transform(),
                                                          colors="#cccccc", lw=0.6))

    def row_of_tensor(self, tensor: str) -> int | None:
        """The row that shows `tensor` (its own, or its collapsed block's), None when filtered out."""
        k = self.data.run.tensor_index(tensor)
        for r, row in enumerate(self.rows):
            if row.tensor == k:
                return r
        block = self.tree.block_of(k)
        for r, row in enumerate(self.rows):
            if row.tensor is None and row.block == block and self.tree.blocks[block].name not in self.expanded:
                return r
        return None

    def block_of(self, tensor: str) -> str:
        return self.tree.blocks[self.tree.block_of(self.data.run.tensor_index(tensor))].name

    def set_tensor(self, tensor: str):
        self.tensor = tensor
        r = self.row_of_tensor(tensor)
        self.selection.set_visible(r is not None)
        if r is not None:
            self.selection.set_y(r - 0.5)
            self.selection.set_height(1.0)

    def set_cursor(self, step: int, row: int | None):
        """Cursor line and the values of every row at the per-tensor row `row` (None: no values)."""
        self._cursor = (step, row)
        self.cursor.set_xdata([step, step])
        if row is None or self.quantity is None or not self.rows:
            self.values.set_data([], [])
            self.beyond.set_data([], [])
            return
        per_tensor = self.data.values_at(self.quantity, row)
        values = row_values(self.rows, self.tree, per_tensor[:, None], self.aggregate, self.quantity)[:, 0]
        if self.is_log:
            values = np.where(values > 0, values, np.nan)
        y = np.arange(len(values))
        if self.limits is None:
            self.values.set_data(values, y)
            self.beyond.set_data([], [])
            return
        edge = self.value_axes.get_xlim()[1]
        over = values > edge
        self.values.set_data(np.where(over, np.nan, values), y)
        self.beyond.set_data(np.full(int(over.sum()), edge), y[over])

    def row_centre(self, row: int) -> tuple[float, float]:
        """Where row `row` of the map is drawn, in figure pixels from the top left (for browser tests)."""
        x0, x1 = self.map_axes.get_xlim()
        x, y = self.map_axes.transData.transform(((x0 + x1) / 2, row))
        return float(x), float(self.figure.bbox.height - y)

    def _press(self, event):
        if event.inaxes in (self.map_axes, self.value_axes) and event.ydata is not None and event.button == 1:
            k = int(round(event.ydata))
            if 0 <= k < len(self.rows):
                row = self.rows[k]
                if row.tensor is not None:
                    self.on_pick_tensor(self.data.run.tensors[row.tensor])
                elif self.on_toggle is not None:
                    self.on_toggle(self.tree.blocks[row.block].name)

    def worst_tensor_of(self, block: str) -> str:
        """The tensor a block row stands for under the current aggregate (its worst, for "worst")."""
        for b, candidate in enumerate(self.tree.blocks):
            if candidate.name == block:
                row = next(r for r in tree_rows(self.tree) if r.block == b)
                k = row_tensor(row, self.tree, self._matrix if self.aggregate == "worst" else None, self.quantity)
                return self.data.run.tensors[k]
        raise ValueError(f"No block named {block!r}; blocks: {', '.join(b.name for b in self.tree.blocks[:8])} …")

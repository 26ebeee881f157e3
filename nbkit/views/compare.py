"""The comparison: `nbkit.compare(run_a, run_b, ...)`, several recordings on one step cursor.

Parts: the losses overlaid; the chosen quantity of the chosen tensor, one panel per run with a shared
axis; a difference map (tensors x steps) between two chosen runs; the damped / accelerated /
reversed shares of the chosen tensor per run at the cursor; and, given model, step_fn and batch,
the loss-landscape slice. Steps are absolute, so a replay lines up with the run it started from.
A cursor move updates the existing artists and blits them; figures are redrawn in full only when
the tensor, quantity or pair changes.
"""
from __future__ import annotations

import html

import ipywidgets as widgets
import matplotlib.pyplot as plt
from matplotlib import colormaps
import numpy as np
import traitlets

from nbkit.analyze.landscape import landscape_slice
from nbkit.analyze.module_tree import block_rows, build_tree, row_values, tree_order
from nbkit.views.base import GuardedView
from nbkit.views.common import (DEFAULT_QUANTITY, GAIN_CLASS_COLOURS, SIGNED_MAP, Blitter, compose_png, figure_png,
                                label_of, make_canvas)
from nbkit.views.landscape import RUN_COLOURS, LandscapePanel, run_names
from nbkit.views.verdict_table import verdict_html, verdict_lines, verdict_of

GAIN_CLASS_SHARES = ("damped", "accelerated", "reversed")
# positive magnitudes are compared as log10(a / b); the rest as a - b
RATIO_QUANTITIES = {"grad_norm", "grad_rms", "grad_max", "weight_norm", "update_norm", "update_ratio", "sharpness",
                    "noise_scale"}


MAX_WIDTH = 1000         # px: figures fit a report page (and a notebook cell) without scaling
MIN_ROW_PIXELS = 10      # a difference map with thinner rows shows one row per block


def difference_map(a, b, quantity: str):
    """(common steps, (tensors, steps) difference, tensor names, what it is) of `quantity` between
    recordings a and b; tensors in a's module-tree order (nbkit.analyze.module_tree)."""
    common, rows_a, rows_b = np.intersect1d(a.steps, b.steps, return_indices=True)
    tree = build_tree(a.tensors, a.layers)
    tensors = [a.tensors[k] for k in tree_order(tree) if a.tensors[k] in b.tensors]
    ka = [a.tensors.index(t) for t in tensors]
    kb = [b.tensors.index(t) for t in tensors]
    va = a.series(quantity)[rows_a][:, ka].astype(np.float64).T
    vb = b.series(quantity)[rows_b][:, kb].astype(np.float64).T
    with np.errstate(divide="ignore", invalid="ignore"):
        if quantity in RATIO_QUANTITIES:
            return common, np.log10(va / vb), tensors, "log10 ratio"
        return common, va - vb, tensors, "difference"


class Comparison(GuardedView, widgets.VBox):
    """The comparison widget. Set `step`, `tensor` or `quantity` from code; the view follows."""

    step = traitlets.Int(0, help="the cursor: an absolute optimizer step number").tag(sync=True)
    tensor = traitlets.Unicode("", help="the tensor whose quantity and shares are shown").tag(sync=True)
    quantity = traitlets.Unicode(DEFAULT_QUANTITY, help="the per-tensor quantity compared").tag(sync=True)
    view_name = "comparison"

    def __init__(self, run, *others, model=None, step_fn=None, batch=None, quantity=DEFAULT_QUANTITY):
        self.runs = run_names([run, *others])
        self.names = list(self.runs)
        self.colours = {name: RUN_COLOURS[k % len(RUN_COLOURS)] for k, name in enumerate(self.names)}
        first = self.runs[self.names[0]]
        if quantity not in first.quantities:
            raise ValueError(f"Unknown quantity {quantity!r}; choose one of run.quantities: {', '.join(first.quantities)}")
        self.run_steps = {name: r.steps for name, r in self.runs.items()}   # read once: each read hits the store
        self.steps = np.unique(np.concatenate(list(self.run_steps.values())))
        if not len(self.steps):
            raise ValueError("None of the recordings holds a step yet; record or replay some steps first")
        self.tensors = [t for t in first.tensors if all(t in r.tensors for r in self.runs.values())]
        self.pair = (self.names[0], self.names[-1])
        self._cache: dict = {}
        self._moving = False
        self.start_guarding()
        with plt.ioff():
            self._build_figures()
            self.landscape = None
            if model is not None and step_fn is not None and batch is not None:
                self._build_landscape(model, step_fn, batch)
        self._build_controls(quantity)
        self.verdict = verdict_of(self.runs)
        self.verdict_box = widgets.HTML(verdict_html(self.verdict, self.colours))
        self.verdict_box.add_class("nbkit-verdict")
        self.range_buttons = []
        if self.verdict.window is None:          # no shared step: offer each run's own range
            for name, (a, b) in self.verdict.ranges.items():
                button = widgets.Button(description=f"{name}: steps {a}–{b}", layout={"width": "auto"})
                button.on_click(lambda _, a=a, b=b: self.guard(self.show_range, a, b))
                self.range_buttons.append(button)
        parts = [self.verdict_box, widgets.HBox(self.range_buttons), self.controls, self.timeline_canvas, self.detail_canvas]
        if self.landscape is not None:
            parts.append(self.landscape_canvas)
        super().__init__(children=[parts[0], self.header, *parts[1:], self.errors])
        self.add_class("nbkit-comparison")
        with self.hold_trait_notifications():
            self.quantity = quantity
            self.tensor = self.tensors[0] if self.tensors else ""
            # the first step every run holds, so each run has a bar at the start
            self.step = self.snap(max(int(steps[0]) for steps in self.run_steps.values() if len(steps)))
        self.observe(lambda c: self.guard(self._move, c["new"]), "step")
        self.observe(lambda c: self.guard(self._redraw), "tensor")
        self.observe(lambda c: self.guard(self._redraw), "quantity")
        self._redraw()

    # --- building -------------------------------------------------------------------------------
    def _build_figures(self):
        n = len(self.names)
        self.timeline_figure, self.timeline_canvas = make_canvas(min(MAX_WIDTH, max(760, 250 * n)), 440,
                                                                 css_class="nbkit-comparison-timeline")
        grid = self.timeline_figure.add_gridspec(2, n, height_ratios=[1.1, 1.0], hspace=0.45, wspace=0.08,
                                                 left=0.08, right=0.86)
        self.loss_axes = self.timeline_figure.add_subplot(grid[0, :])
        self.quantity_axes = [self.timeline_figure.add_subplot(grid[1, 0])]
        for k in range(1, n):
            self.quantity_axes.append(self.timeline_figure.add_subplot(grid[1, k], sharey=self.quantity_axes[0]))
        self.timeline_blitter = Blitter(self.timeline_figure)
        self.loss_lines = {}
        for name in self.names:
            run = self.runs[name]
            self.loss_lines[name] = self.loss_axes.plot(self.run_steps[name], run.loss, color=self.colours[name], linewidth=1.2,
                                                        label=name)[0]
        self.loss_axes.set_ylabel("loss")
        losses = np.concatenate([run.loss for run in self.runs.values()])
        losses = losses[np.isfinite(losses)]
        if losses.size and losses.min() > 0 and losses.max() / losses.min() > 100:
            self.loss_axes.set_yscale("log")            # a spike would flatten everything else
        self.end_labels = self._label_ends()
        self.quantity_lines = {name: ax.plot([], [], color=self.colours[name], linewidth=1.1)[0]
                               for name, ax in zip(self.names, self.quantity_axes)}
        for name, ax in zip(self.names, self.quantity_axes):
            ax.set_title(name, fontsize=9, color=self.colours[name], loc="left")
            ax.set_xlabel("step")
        for ax in self.quantity_axes[1:]:
            ax.tick_params(labelleft=False)
        self.cursors = [self.timeline_blitter.add(ax.axvline(0, color="black", linewidth=0.9, alpha=0.8))
                        for ax in (self.loss_axes, *self.quantity_axes)]
        self.cursor_dots = {name: self.timeline_blitter.add(ax.plot([], [], "o", markerfacecolor="white",
                                                                     markeredgecolor="black", markersize=6)[0])
                            for name, ax in zip(self.names, self.quantity_axes)}

        width = min(MAX_WIDTH, max(760, 250 * n))
        self.detail_figure, self.detail_canvas = make_canvas(width, 360,
                                                             css_class="nbkit-comparison-detail")
        tree = build_tree(self.tensors, self.runs[self.names[0]].layers)
        longest = max((len(tree.label(k)) for k in range(len(self.tensors))), default=8)
        left = float(np.clip((14 + 4.4 * longest) / width, 0.1, 0.35))     # tree labels fit at 7 pt
        grid = self.detail_figure.add_gridspec(1, 2, width_ratios=[2.2, 1.0], wspace=0.55, bottom=0.2, left=left,
                                               right=0.96, top=0.86)
        self.map_axes = self.detail_figure.add_subplot(grid[0, 0])
        self.share_axes = self.detail_figure.add_subplot(grid[0, 1])
        self.detail_blitter = Blitter(self.detail_figure)

        signed = colormaps[SIGNED_MAP].with_extremes(over="#E8000B", under="#000000", bad="#E4E4E4")
        self.map_image = self.map_axes.imshow(np.zeros((1, 1)), aspect="auto", cmap=signed, interpolation="nearest")
        # the range is ±(99th percentile of |difference|): the ends mark what lies beyond it
        self.map_colorbar = self.detail_figure.colorbar(self.map_image, ax=self.map_axes, shrink=0.9, extend="both")
        self.map_cursor = self.detail_blitter.add(self.map_axes.axvline(0, color="black", linewidth=0.9))
        width = 0.8 / len(GAIN_CLASS_SHARES)
        positions = np.arange(n)
        self.bars = {}
        for k, share in enumerate(GAIN_CLASS_SHARES):
            container = self.share_axes.bar(positions + (k - 1) * width, np.zeros(n), width,
                                            color=GAIN_CLASS_COLOURS[share], label=share)
            self.bars[share] = [self.detail_blitter.add(bar) for bar in container]
        self.share_axes.set_xticks(positions, self.names, rotation=30, ha="right", fontsize=8)
        self.share_axes.set_ylabel("share of coordinates with defined gain")
        self.share_axes.legend(fontsize=7, loc="upper right")
        self.share_title = self.detail_blitter.add(self.share_axes.set_title("", fontsize=8, loc="left", wrap=True))

    def _label_ends(self):
        """Each run's name at the right end of its loss curve, in its colour; ends closer than a line of
        text are spread apart so that names never sit on each other."""
        ax = self.loss_axes
        ax.set_xlim(self.steps[0], max(self.steps[-1], self.steps[0] + 1))
        ends = {}
        for name in self.names:
            loss = np.asarray(self.runs[name].loss, dtype=np.float64)
            finite = np.flatnonzero(np.isfinite(loss))
            if len(finite):
                ends[name] = float(loss[finite[-1]])
        ax.relim()
        ax.autoscale_view(scalex=False)
        low, high = ax.get_ylim()
        log = ax.get_yscale() == "log"
        def fraction(y):
            if log:
                return (np.log10(y) - np.log10(low)) / (np.log10(high) - np.log10(low))
            return (y - low) / (high - low) if high > low else 0.5
        placed = sorted(((float(np.clip(fraction(y), 0, 1)), name) for name, y in ends.items()))
        gap, positions = 0.09, []
        for f, name in placed:
            f = max(f, positions[-1][0] + gap) if positions else f
            positions.append((f, name))
        overflow = positions[-1][0] - 1.0 if positions else 0
        labels = []
        for f, name in positions:
            labels.append(ax.text(1.01, f - max(overflow, 0), name, transform=ax.transAxes, color=self.colours[name],
                                  fontsize=8, va="center", ha="left", fontweight="bold", clip_on=False))
        return labels

    def show_range(self, first: int, last: int) -> None:
        """Show steps first–last on every step axis and put the cursor at `first` (a run's own range)."""
        for ax in (self.loss_axes, *self.quantity_axes):
            ax.set_xlim(first, max(last, first + 1))
        self.step = self.snap(first)
        self.timeline_blitter.full()

    def _build_landscape(self, model, step_fn, batch):
        self.landscape = landscape_slice(model, step_fn, batch, self.runs)
        self.landscape_figure, self.landscape_canvas = make_canvas(620, 480, css_class="nbkit-comparison-landscape")
        self.landscape_panel = LandscapePanel(self.landscape_figure.add_subplot(1, 1, 1), self.landscape, self.colours)
        self.landscape_figure.tight_layout()

    def _build_controls(self, quantity):
        first = self.runs[self.names[0]]
        lines = []
        for name, run in self.runs.items():
            parent = (run.meta.get("replay") or {})
            origin = f", replay of {html.escape(str(parent.get('parent')))} from step {parent.get('start')}" \
                if parent else ""
            lines.append(f"<span style='color:{self.colours[name]}'>■</span> <b>{html.escape(name)}</b>: "
                         f"{html.escape(run.meta['optimizer']['class'])}, steps {int(self.run_steps[name][0])}–"
                         f"{int(self.run_steps[name][-1])}{origin}")
        self.header = widgets.HTML("<br>".join(lines))
        self.slider = widgets.IntSlider(int(self.steps[0]), min=int(self.steps[0]), max=int(self.steps[-1]),
                                        description="step", continuous_update=True)
        self.tensor_menu = widgets.Dropdown(options=self.tensors, description="tensor")
        self.quantity_menu = widgets.Dropdown(options=first.quantities, value=quantity, description="quantity")
        self.pair_menus = [widgets.Dropdown(options=self.names, value=v, description=d, layout={"width": "220px"})
                           for v, d in zip(self.pair, ("map: run", "minus"))]
        self.slider.observe(lambda c: self.guard(setattr, self, "step", int(c["new"])), "value")
        self.tensor_menu.observe(lambda c: self.guard(setattr, self, "tensor", c["new"]), "value")
        self.quantity_menu.observe(lambda c: self.guard(setattr, self, "quantity", c["new"]), "value")
        for menu in self.pair_menus:
            menu.observe(lambda c: self.guard(self._set_pair), "value")
        self.controls = widgets.VBox([widgets.HBox([self.slider, self.tensor_menu]),
                                      widgets.HBox([self.quantity_menu, *self.pair_menus])])

    # --- reacting -------------------------------------------------------------------------------
    def _set_pair(self):
        self.pair = tuple(menu.value for menu in self.pair_menus)
        self._redraw()

    def _series(self, name, quantity, tensor):
        key = (name, quantity, tensor)
        if key not in self._cache:
            self._cache[key] = self.runs[name].series(quantity, tensor).astype(np.float64)
        return self._cache[key]

    def snap(self, step: int) -> int:
        k = int(np.clip(np.searchsorted(self.steps, step), 0, len(self.steps) - 1))
        if k > 0 and abs(self.steps[k - 1] - step) <= abs(self.steps[k] - step):
            k -= 1
        return int(self.steps[k])

    def shares_at(self, step: int) -> dict:
        """{run: {share: value}} of the chosen tensor at `step` (NaN where a run has no such step)."""
        out = {}
        for name in self.runs:
            steps = self.run_steps[name]
            row = int(np.searchsorted(steps, step))
            inside = row < len(steps) and steps[row] == step
            out[name] = {s: float(self._series(name, s, self.tensor)[row]) if inside else np.nan for s in GAIN_CLASS_SHARES}
        return out

    # --- drawing --------------------------------------------------------------------------------
    def _redraw(self):
        """Full redraw: the tensor, quantity or pair changed."""
        if self.tensor not in self.tensors:
            raise ValueError(f"No tensor named {self.tensor!r} in all compared runs; pick one of {self.tensors[:8]}")
        if self.quantity not in self.runs[self.names[0]].quantities:
            raise ValueError(f"Unknown quantity {self.quantity!r}; choose one of run.quantities")
        values = []
        for name, line in self.quantity_lines.items():
            series = self._series(name, self.quantity, self.tensor)
            line.set_data(self.run_steps[name], series)
            values.append(series[np.isfinite(series)])
        values = np.concatenate(values)
        axes = self.quantity_axes[0]
        if values.size:
            low, high = values.min(), values.max()
            if low > 0 and high / low > 50:
                axes.set_yscale("log")
            else:
                axes.set_yscale("linear")
            pad = 0.05 * (high - low) if high > low else max(abs(high), 1e-12) * 0.1
            axes.set_ylim(low - pad if axes.get_yscale() == "linear" else low / 1.2,
                          high + pad if axes.get_yscale() == "linear" else high * 1.2)
        for ax in self.quantity_axes:
            ax.set_xlim(self.steps[0], max(self.steps[-1], self.steps[0] + 1))
        axes.set_ylabel(self.quantity, fontsize=8)
        self.loss_axes.set_title(f"loss of each run (above); {label_of(self.quantity)} of {self.tensor} (below)",
                                 fontsize=9, loc="left")
        self.loss_axes.set_xlim(self.steps[0], max(self.steps[-1], self.steps[0] + 1))
        a, b = self.pair
        common, diff, tensors, what = difference_map(self.runs[a], self.runs[b], self.quantity)
        finite = np.abs(diff[np.isfinite(diff)])
        limit = float(np.percentile(finite, 99)) if finite.size else 1.0
        limit = limit if limit > 0 else 1.0
        pixels = self.map_axes.get_position().height * self.detail_figure.get_figheight() * self.detail_figure.dpi
        tree = build_tree(tensors, self.runs[a].layers)
        labels = [tree.label(k) for k in range(len(tensors))]
        self.map_blocks = bool(len(tensors)) and pixels / len(tensors) < MIN_ROW_PIXELS
        if self.map_blocks:          # too thin to read: one row per block, its largest difference
            rows = block_rows(tree, list(range(len(tensors))))
            diff = row_values(rows, tree, diff, "largest")
            labels = [row.label for row in rows]
            what_rows = "largest per block"
        else:
            what_rows = "per tensor"
        tensors = labels
        self.map_image.set_data(np.ma.masked_invalid(diff))
        self.map_image.set_clim(-limit, limit)
        span = (common[0] - 0.5, common[-1] + 0.5) if len(common) else (0, 1)
        self.map_image.set_extent((*span, len(tensors) - 0.5, -0.5))
        self.map_axes.set_yticks(range(len(tensors)), tensors, fontsize=7)
        self.map_axes.set_xlabel("step")
        self.map_axes.set_title(f"{what} of {self.quantity}, {what_rows}: {a} vs {b}", fontsize=9, loc="left")
        self.map_colorbar.set_label(f"{what}, ±99th percentile of |{what}|", fontsize=7)
        top = max([np.nanmax(self._series(n, s, self.tensor), initial=0.0) for n in self.names for s in GAIN_CLASS_SHARES])
        self.share_axes.set_ylim(0, max(1e-3, min(1.0, 1.15 * top)))
        self._moving = False
        self._place(self.step)
        self.errors.value = ""
        self.timeline_blitter.full()
        self.detail_blitter.full()
        if self.landscape is not None:
            self.landscape_canvas.draw_idle()

    def _place(self, step):
        """Point every artist (and control) that follows the cursor at `step`."""
        step = self.snap(step)
        self.slider.value = step
        if self.tensor_menu.value != self.tensor:
            self.tensor_menu.value = self.tensor
        if self.quantity_menu.value != self.quantity:
            self.quantity_menu.value = self.quantity
        for cursor in self.cursors:
            cursor.set_xdata([step, step])
        self.map_cursor.set_xdata([step, step])
        for name, dot in self.cursor_dots.items():
            steps = self.run_steps[name]
            row = int(np.searchsorted(steps, step))
            inside = row < len(steps) and steps[row] == step
            value = self._series(name, self.quantity, self.tensor)[row] if inside else np.nan
            dot.set_data([step], [value])
        shares = self.shares_at(step)
        for share in GAIN_CLASS_SHARES:
            for bar, name in zip(self.bars[share], self.names):
                value = shares[name][share]
                bar.set_height(0.0 if not np.isfinite(value) else value)
        self.share_title.set_text(f"gain classes at step {step}\nof {self.tensor}")
        if self.landscape is not None:
            self.landscape_panel.set_cursor(step)
        return step

    def _move(self, step):
        if self._moving:
            return
        self._moving = True
        try:
            snapped = self._place(step)
            if snapped != self.step:
                self.step = snapped
            self.timeline_blitter.update()
            self.detail_blitter.update()
            if self.landscape is not None:
                self.landscape_canvas.draw_idle()
        finally:
            self._moving = False

    # --- static output --------------------------------------------------------------------------
    def png_bytes(self) -> bytes:
        rows = [[figure_png(self.timeline_figure)], [figure_png(self.detail_figure)]]
        if self.landscape is not None:
            rows.append([figure_png(self.landscape_figure)])
        footer = "\n".join([*verdict_lines(self.verdict),
                             f"comparison of {', '.join(self.names)}: step {self.step}, tensor {self.tensor}, {self.quantity}"])
        return compose_png(rows, footer)

    def close(self):
        # getattr: close() also runs from __del__ of a view whose __init__ raised (bad input)
        for canvas in (getattr(self, name, None) for name in ("timeline_canvas", "detail_canvas", "landscape_canvas")):
            if canvas is not None:
                canvas.close()
        super().close()



def compare(run, *others, model=None, step_fn=None, batch=None) -> Comparison:
    """The comparison: several recordings side by side on one step cursor (an ipywidgets widget).
    With model, step_fn and batch it adds the loss-landscape slice through the runs. The runs may also
    come as one list: compare([a, b])."""
    if isinstance(run, (list, tuple)) and not others:
        if not run:
            raise ValueError("compare() needs at least one recording")
        run, *others = run
    return Comparison(run, *others, model=model, step_fn=step_fn, batch=batch)

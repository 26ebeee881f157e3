"""The explorer's timeline: loss and learning rate over steps, keyframe and finding marks, the cursor."""
from __future__ import annotations

import numpy as np
from matplotlib.ticker import FuncFormatter, MaxNLocator

from nbkit.views.common import OKABE_ITO, Blitter, make_canvas, plain_log_ticks

WIDTH, HEIGHT = 980, 230
BUCKETS = 1200            # min/max pairs per line: a 980-pixel plot needs no more


class Timeline:
    """Loss (top) and learning rate (bottom) sharing the step axis; `on_pick(step)` on click or drag."""

    def __init__(self, data, on_pick):
        self.data = data
        self.on_pick = on_pick
        self.figure, self.canvas = make_canvas(WIDTH, HEIGHT, css_class="nbkit-timeline")
        self.loss_axes, self.lr_axes = self.figure.subplots(2, 1, sharex=True, height_ratios=(3, 1.3))
        self.figure.subplots_adjust(left=0.09, right=0.97, top=0.93, bottom=0.2, hspace=0.08)
        self.loss_line, = self.loss_axes.plot([], [], color=OKABE_ITO["black"], lw=0.8)
        self.lr_line, = self.lr_axes.plot([], [], color=OKABE_ITO["bluish green"], lw=1.0)
        self.loss_axes.set_ylabel("loss")
        self.lr_axes.set_ylabel("learning rate")
        self.lr_axes.yaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:.3g}"))   # no offset text
        self.lr_axes.yaxis.set_major_locator(MaxNLocator(3))
        self.lr_axes.set_xlabel("optimizer step")
        self.keyframe_marks = self.loss_axes.vlines([], 0, 1, transform=self.loss_axes.get_xaxis_transform(),
                                                    colors=OKABE_ITO["sky blue"], lw=0.8, label="keyframe")
        self.finding_marks, = self.loss_axes.plot([], [], "v", color=OKABE_ITO["vermillion"], ms=7,
                                                  transform=self.loss_axes.get_xaxis_transform(),
                                                  label="finding", clip_on=False)
        self.loss_axes.legend(loc="upper right", fontsize=7, frameon=False, ncols=2)
        self.blitter = Blitter(self.figure)
        self.cursors = [self.blitter.add(ax.axvline(0, color=OKABE_ITO["reddish purple"], lw=1.5))
                        for ax in (self.loss_axes, self.lr_axes)]
        self.log_scale = False
        self._dragging = False
        self.canvas.mpl_connect("button_press_event", self._press)
        self.canvas.mpl_connect("motion_notify_event", self._motion)
        self.canvas.mpl_connect("button_release_event", self._release)

    # --- data -----------------------------------------------------------------------------------
    def load(self, findings=()):
        """(Re)read the lines and marks; call after the recording grew. No drawing here."""
        data = self.data
        if data.row_count == 0:
            return
        self.loss_line.set_data(*data.timeline("loss", BUCKETS))
        self.lr_line.set_data(*data.timeline("lr", BUCKETS))
        self.keyframe_marks.set_segments([[(k, 0), (k, 1)] for k in data.run.keyframes])
        firsts = [f.first_step for f in findings]
        self.finding_marks.set_data(firsts, np.full(len(firsts), 1.02))
        last = max(int(data.steps[-1]), int(data.steps[0]) + 1)
        self.loss_axes.set_xlim(int(data.steps[0]), last)
        self._autoscale()

    def _autoscale(self):
        y = self.loss_line.get_ydata()
        y = np.asarray(y, dtype=np.float64)
        finite = y[np.isfinite(y)]
        positive = finite[finite > 0]
        use_log = self.log_scale and positive.size > 0
        self.loss_axes.set_yscale("log" if use_log else "linear")
        plain_log_ticks(self.loss_axes.yaxis)
        values = positive if use_log else finite
        if values.size:
            low, high = values.min(), values.max()
            pad = (high / low) ** 0.05 if use_log and low > 0 else 0.05 * (high - low or 1.0)
            self.loss_axes.set_ylim(low / pad, high * pad) if use_log else self.loss_axes.set_ylim(low - pad, high + pad)
        lr = np.asarray(self.lr_line.get_ydata(), dtype=np.float64)
        lr = lr[np.isfinite(lr)]
        if lr.size:
            span = lr.max() - lr.min()
            pad = 0.1 * span if span > 0 else 0.5 * abs(lr.max()) or 1.0     # a constant lr sits mid-axes
            self.lr_axes.set_ylim(lr.min() - pad, lr.max() + pad)

    def set_log_scale(self, on: bool):
        self.log_scale = bool(on)
        self._autoscale()
        self.blitter.full()

    # --- cursor ---------------------------------------------------------------------------------
    def set_cursor(self, step: int):
        for line in self.cursors:
            line.set_xdata([step, step])

    # --- mouse: click or drag anywhere on the plot moves the cursor ------------------------------
    def _press(self, event):
        if event.inaxes in (self.loss_axes, self.lr_axes) and event.button == 1 and event.xdata is not None:
            self._dragging = True
            self.on_pick(int(round(event.xdata)))

    def _motion(self, event):
        if self._dragging and event.inaxes in (self.loss_axes, self.lr_axes) and event.xdata is not None:
            self.on_pick(int(round(event.xdata)))

    def _release(self, event):
        # The browser throttles motion events, so the last ones of a fast drag may never arrive:
        # the release position is where the user let go.
        if self._dragging and event.inaxes in (self.loss_axes, self.lr_axes) and event.xdata is not None:
            self.on_pick(int(round(event.xdata)))
        self._dragging = False

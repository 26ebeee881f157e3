"""The explorer's timeline: loss and learning rate over steps, keyframe and finding marks, the cursor, and
where the recording holds step-quality arrays (nbkit.step_quality), each measured step's predicted and
actual change of its own batch's loss and the trust-region ratio ρ (nbkit.analyze.step_quality)."""
from __future__ import annotations

import numpy as np
from matplotlib.ticker import FuncFormatter, MaxNLocator

from nbkit.analyze.step_quality import RHO_HIGH, RHO_LOW, select_window
from nbkit.views.common import OKABE_ITO, Blitter, make_canvas, plain_log_ticks

WIDTH, HEIGHT = 980, 230
QUALITY_HEIGHT = 170      # px added for the step-quality axes (change bars and ρ), only where they exist
RHO_SHOWN = (-1.0, 2.0)   # the ρ axis spans at most this; values beyond are marked at its edge
BUCKETS = 1200            # min/max pairs per line: a 980-pixel plot needs no more


class Timeline:
    """Loss (top) and learning rate (below) sharing the step axis; `on_pick(step)` on click or drag. Where
    the recording holds step-quality arrays, two small axes under them: the predicted (first order) and
    actual change of each measured step's batch loss as thin bars, and ρ = actual / predicted as a line
    with the trust-region thresholds 1/4 and 3/4. Without them `change_axes` and `rho_axes` are None."""

    def __init__(self, data, on_pick):
        self.data = data
        self.on_pick = on_pick
        self.quality = _read_quality(data.run)
        height = HEIGHT + (QUALITY_HEIGHT if self.quality is not None else 0)
        self.figure, self.canvas = make_canvas(WIDTH, height, css_class="nbkit-timeline")
        if self.quality is None:
            self.loss_axes, self.lr_axes = self.figure.subplots(2, 1, sharex=True, height_ratios=(3, 1.3))
            self.change_axes = self.rho_axes = None
        else:
            self.loss_axes, self.lr_axes, self.change_axes, self.rho_axes = self.figure.subplots(
                4, 1, sharex=True, height_ratios=(3, 1.3, 1.2, 1.2))
        self.axes = [ax for ax in (self.loss_axes, self.lr_axes, self.change_axes, self.rho_axes) if ax is not None]
        # margins in pixels, so a taller figure keeps the same frame
        self.figure.subplots_adjust(left=0.09, right=0.97, top=1 - 16 / height, bottom=46 / height, hspace=0.08)
        self.loss_line, = self.loss_axes.plot([], [], color=OKABE_ITO["black"], lw=0.8)
        self.lr_line, = self.lr_axes.plot([], [], color=OKABE_ITO["bluish green"], lw=1.0)
        self.loss_axes.set_ylabel("loss")
        self.lr_axes.set_ylabel("learning rate")
        self.lr_axes.yaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:.3g}"))   # no offset text
        self.lr_axes.yaxis.set_major_locator(MaxNLocator(3))
        self.axes[-1].set_xlabel("optimizer step")
        if self.quality is not None:
            self._build_quality_axes()
        self.keyframe_marks = self.loss_axes.vlines([], 0, 1, transform=self.loss_axes.get_xaxis_transform(),
                                                    colors=OKABE_ITO["sky blue"], lw=0.8, label="keyframe")
        self.finding_marks, = self.loss_axes.plot([], [], "v", color=OKABE_ITO["vermillion"], ms=7,
                                                  transform=self.loss_axes.get_xaxis_transform(),
                                                  label="finding", clip_on=False)
        self.loss_axes.legend(loc="upper right", fontsize=7, frameon=False, ncols=2)
        self.blitter = Blitter(self.figure)
        self.cursors = [self.blitter.add(ax.axvline(0, color=OKABE_ITO["reddish purple"], lw=1.5))
                        for ax in self.axes]
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
        if self.quality is not None:
            self._load_quality(int(data.steps[0]), int(data.steps[-1]))
        self._autoscale()

    # --- step quality ---------------------------------------------------------------------------
    def _build_quality_axes(self):
        change, rho = self.change_axes, self.rho_axes
        self.predicted_bars = change.vlines([], 0, 0, colors=OKABE_ITO["blue"], lw=2.0,
                                            label="predicted (first order, gᵀΔθ)")
        self.actual_bars = change.vlines([], 0, 0, colors=OKABE_ITO["orange"], lw=2.0, label="actual")
        self.blown_marks, = change.plot([], [], "^", color=OKABE_ITO["vermillion"], ms=5, clip_on=False,
                                        transform=change.get_xaxis_transform(), label="loss became non-finite")
        change.axhline(0, color="#9A9A9A", lw=0.6)
        change.set_ylabel("Δ loss", fontsize=8)
        self.lr_axes.yaxis.label.set_fontsize(8)        # the lr axes is shorter here: its label must fit
        self.rho_line, = rho.plot([], [], ".-", color=OKABE_ITO["black"], lw=0.8, ms=3, label="ρ = actual / predicted")
        self.rho_beyond, = rho.plot([], [], "x", color=OKABE_ITO["vermillion"], ms=4, clip_on=False,
                                    label="ρ beyond the axis")
        for value in (RHO_LOW, RHO_HIGH):
            rho.axhline(value, color=OKABE_ITO["reddish purple"], lw=0.8, ls="--",
                        label=f"ρ = {RHO_LOW:g} and {RHO_HIGH:g}: trust-region thresholds (Nocedal & Wright ch. 4)"
                        if value == RHO_LOW else None)
        rho.set_ylabel("ρ, 1st order", fontsize=8)

    def _load_quality(self, first: int, last: int):
        self.quality = _read_quality(self.data.run) or self.quality        # nbkit.step_quality may have added steps
        view = self.quality_view = select_window(self.quality, first, last)
        steps = view["step"].astype(np.float64)
        offset = 0.18 if len(steps) < 200 else 0.0       # side by side while a step is wider than a pixel or two
        predicted, actual = view["predicted_first"], view["actual"]
        self.predicted_bars.set_segments([[(s - offset, 0), (s - offset, v)] for s, v in zip(steps, predicted)
                                          if np.isfinite(v)])
        self.actual_bars.set_segments([[(s + offset, 0), (s + offset, v)] for s, v in zip(steps, actual)
                                       if np.isfinite(v)])
        blown = steps[np.isposinf(actual)]
        self.blown_marks.set_data(blown + offset, np.full(len(blown), 1.0))
        finite = np.concatenate([predicted[np.isfinite(predicted)], actual[np.isfinite(actual)], [0.0]])
        pad = 0.08 * (finite.max() - finite.min() or 1.0)
        self.change_axes.set_ylim(finite.min() - pad, finite.max() + pad)
        rho = view["rho_first"]
        self.rho_line.set_data(steps, rho)
        shown = rho[np.isfinite(rho)]
        low = max(RHO_SHOWN[0], min(0.0, shown.min() if shown.size else 0.0))
        high = min(RHO_SHOWN[1], max(1.0, shown.max() if shown.size else 1.0))
        beyond = ~np.isnan(rho) & ((rho < low) | (rho > high))
        self.rho_beyond.set_data(steps[beyond], np.clip(rho[beyond], low, high))
        self.rho_axes.set_ylim(low - 0.08 * (high - low), high + 0.08 * (high - low))
        for ax in (self.change_axes, self.rho_axes):         # legend entries only for what is drawn
            shown = [a for a in ax.lines + ax.collections if not a.get_label().startswith("_") and _drawn(a)]
            ax.legend(handles=shown, loc="best", fontsize=6, frameon=True, framealpha=0.8, ncols=len(shown))

    def quality_at(self, step: int) -> str:
        """One line on the step quality at `step` ("" where it was not measured): predicted and actual change,
        ρ and the tensors with the largest shares of the first-order prediction."""
        if self.quality is None:
            return ""
        view = select_window(self.quality, step, step, at=step)
        if not len(view["step"]) or view["shares"] is None or not np.isfinite(view["predicted_first"][0]):
            return ""
        shares = view["shares"]["first_order"]
        order = [k for k in np.argsort(-np.abs(np.nan_to_num(shares))) if np.isfinite(shares[k])][:3]
        top = ", ".join(f"{view['shares']['tensors'][k]} {shares[k]:.0%}" for k in order)
        return (f"step quality: predicted {view['predicted_first'][0]:.3g}, actual {view['actual'][0]:.3g}, "
                f"ρ {view['rho_first'][0]:.3g} ({view['class_first'][0]}, a heuristic); first-order prediction "
                f"from {top}")

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
        if event.inaxes in self.axes and event.button == 1 and event.xdata is not None:
            self._dragging = True
            self.on_pick(int(round(event.xdata)))

    def _motion(self, event):
        if self._dragging and event.inaxes in self.axes and event.xdata is not None:
            self.on_pick(int(round(event.xdata)))

    def _release(self, event):
        # The browser throttles motion events, so the last ones of a fast drag may never arrive:
        # the release position is where the user let go.
        if self._dragging and event.inaxes in self.axes and event.xdata is not None:
            self.on_pick(int(round(event.xdata)))
        self._dragging = False


def _read_quality(run):
    """The recording's step-quality arrays (run.step_quality()), or None where there are none."""
    try:
        return run.step_quality()
    except (OSError, ValueError, KeyError):       # an unreadable sidecar: the timeline draws without it
        return None


def _drawn(artist) -> bool:
    """An artist with something to draw (a line with points, a collection with segments)."""
    if hasattr(artist, "get_segments"):
        return len(artist.get_segments()) > 0
    return len(artist.get_xdata()) > 0

"""The explorer's coordinate view: one tensor's probe coordinates at the cursor, and its gain classes over steps.

Top left: plain step |lr·g| against actual update |Δθ| on log-log axes, with the gain = 1 line (what
plain SGD would do), the tensor's median gain and its x2 / x1/2 band (the class boundaries); each
probe coloured by its class. Top right: each probe's gain split into momentum factor and scale
factor (where the optimizer keeps moments). Bottom: the tensor's gain classes over all steps, their
shares stacked (reversed at the bottom, then damped, ordinary, accelerated; they sum to 1 at each
step), with its median gain as a line on a second axis (nbkit.analyze.class_shares).
"""
from __future__ import annotations

import numpy as np
from matplotlib.patches import Patch

from nbkit.analyze.class_shares import STACK_ORDER, bucket_median, class_shares
from nbkit.measure.quantities import GAIN_CLASS_NAMES, classify_gain
from nbkit.views.common import GAIN_CLASS_COLOURS, OKABE_ITO, Blitter, make_canvas, plain_log_ticks

WIDTH, HEIGHT = 600, 640
FIELDS = ("grad", "update", "momentum_factor", "scale_factor")


def probe_gains(grad, update, lr):
    """Per probe: (plain step -lr*g, gain = update / plain step); gain NaN where g == 0."""
    plain = -lr * grad
    with np.errstate(divide="ignore", invalid="ignore"):
        gain = np.where(plain != 0, update / plain, np.nan)
    return plain, gain


def _limits(values, current, pad_decades=1.0):
    """Log-axis limits holding every finite positive value. They only ever grow (by a decade beyond
    the data), so that scrubbing settles on fixed axes and a cursor move rarely needs a full draw."""
    v = values[np.isfinite(values) & (values > 0)]
    if v.size == 0:
        return current if current is not None else (1e-8, 1.0)
    low, high = v.min(), v.max()
    pad = 10 ** pad_decades
    if current is None:
        return (low / pad, high * pad)
    return (min(current[0], low / pad) if low < current[0] else current[0],
            max(current[1], high * pad) if high > current[1] else current[1])


def _start_limits(high):
    """Limits spanning four decades below a recording-wide maximum (NaN: none known yet)."""
    return (high / 1e4, high * 3) if np.isfinite(high) and high > 0 else None


class CoordinateView:
    def __init__(self, data):
        self.data = data
        self.figure, self.canvas = make_canvas(WIDTH, HEIGHT, css_class="nbkit-coordinates")
        grid = self.figure.add_gridspec(2, 2, height_ratios=(1.15, 1), hspace=0.42, wspace=0.32,
                                        left=0.12, right=0.88, top=0.92, bottom=0.08)
        self.step_axes = self.figure.add_subplot(grid[0, 0])
        self.factor_axes = self.figure.add_subplot(grid[0, 1])
        self.classes_axes = self.figure.add_subplot(grid[1, :])
        ax = self.step_axes
        ax.set_xscale("log")
        ax.set_yscale("log")
        plain_log_ticks(ax.xaxis)
        plain_log_ticks(ax.yaxis)
        ax.set_xlabel("plain step |lr·g| (parameter units)", fontsize=8)
        ax.set_ylabel("actual update |Δθ| (parameter units)", fontsize=8)
        self.unit_line, = ax.plot([], [], color=OKABE_ITO["black"], lw=0.8, ls="--")
        ax.tick_params(labelsize=7)
        fx = self.factor_axes
        fx.set_yscale("log")
        plain_log_ticks(fx.yaxis)
        fx.set_xlabel("momentum factor (first moment / g)", fontsize=8)
        fx.set_ylabel("scale factor (from second moment)", fontsize=8)
        fx.tick_params(labelsize=7)
        fx.axvline(0, color="#bbbbbb", lw=0.6)
        fx.axvline(1, color="#bbbbbb", lw=0.6, ls="--")
        hx = self.classes_axes
        hx.set_xlabel("optimizer step", fontsize=8)
        hx.set_ylabel("share of coordinates\nwith a defined gain", fontsize=8)
        hx.set_ylim(0, 1)
        hx.tick_params(labelsize=7)
        self.median_axes = mx = hx.twinx()
        mx.set_yscale("log")
        mx.set_ylabel("median gain (black line)", fontsize=8)
        mx.tick_params(labelsize=7)
        self.shares = None                   # the stacked areas of the tensor shown
        self.share_steps, self.share_values = np.zeros(0), np.zeros((4, 0))   # (columns,), (4, columns)
        self.gain_line, = mx.plot([], [], color=OKABE_ITO["black"], lw=1.0)
        self.classes_note = hx.set_title("", fontsize=8, loc="left")
        self.blitter = b = Blitter(self.figure)
        self.band = b.add(ax.fill_between([1e-30, 1e30], [1e-30, 1e30], [1e-30, 1e30], color=OKABE_ITO["sky blue"],
                                          alpha=0.25, lw=0))
        self.median_line = b.add(ax.plot([], [], color=OKABE_ITO["blue"], lw=1.2)[0])
        self.points = b.add(ax.scatter([], [], s=18, edgecolors="none"))
        self.factor_points = b.add(fx.scatter([], [], s=18, edgecolors="none"))
        self.factor_note = b.add(fx.text(0.5, 0.5, "", transform=fx.transAxes, ha="center", va="center",
                                         fontsize=8, wrap=True))
        self.step_note = b.add(ax.text(0.5, 0.5, "", transform=ax.transAxes, ha="center", va="center", fontsize=8))
        self.classes_cursor = b.add(hx.axvline(0, color=OKABE_ITO["sky blue"], lw=1.2))
        # What the points say in words is page text (Explorer.coordinate_summary), not figure text:
        # rendering ~100 glyphs per cursor move would cost more than all the points together.
        self.summary = ""
        handles = [Patch(color=GAIN_CLASS_COLOURS[n], label=n) for n in GAIN_CLASS_NAMES]
        handles += [Patch(color=OKABE_ITO["sky blue"], alpha=0.4, label="median gain ×½ … ×2")]
        self.figure.legend(handles=handles, loc="upper center", ncols=5, fontsize=7, frameon=False,
                           bbox_to_anchor=(0.5, 0.99))
        self.tensor = None
        self._xlim = self._ylim = self._flim = None
        self.classes = np.zeros(0, dtype=np.int8)     # class code per probe at the cursor (for tests)
        self.has_moments = bool(data.run.meta.get("optimizer", {}).get("first_moment")
                                or data.run.meta.get("optimizer", {}).get("second_moment"))

    # --- tensor: the gain-class chart changes (a full draw follows) -------------------------------
    def set_tensor(self, tensor: str):
        self.tensor = tensor
        self._xlim = self._ylim = self._flim = None
        if self.data.row_count == 0:
            return
        # Axes start from recording-wide maxima (the stored overview), so they hold every step.
        data, group = self.data, self.data.tensor_group(tensor)
        lr_max = data.lr_max(group)
        self._xlim = _start_limits(lr_max * data.overall_max("grad_max", tensor))
        self._ylim = _start_limits(data.overall_max("update_norm", tensor))
        scale = _start_limits(data.overall_max("scale_factor_median", tensor))
        momentum = data.overall_max("momentum_factor_median", tensor)
        if scale is not None and np.isfinite(momentum):
            self._flim = ((-0.5, max(2.0, 2 * momentum)), scale)
        run = data.run
        steps = data.steps
        series = {q: run.series(q, tensor) for q in ("reversed", "damped", "accelerated", "gain_median")}
        x, shares = class_shares(steps, series["reversed"], series["damped"], series["accelerated"])
        self.share_steps, self.share_values = x, shares
        if self.shares is not None:
            for area in self.shares:
                area.remove()
        hx, mx = self.classes_axes, self.median_axes
        first, last = float(steps[0]), float(max(steps[-1], steps[0] + 1))
        if len(x):
            edges = np.append(x, last).astype(np.float64)          # each column holds until the next
            self.shares = hx.stackplot(np.repeat(edges, 2)[1:-1], np.repeat(shares, 2, axis=1),
                                       colors=[GAIN_CLASS_COLOURS[n] for n in STACK_ORDER], lw=0)
            median = bucket_median(steps, series["gain_median"], x)
            self.gain_line.set_data(np.repeat(edges, 2)[1:-1], np.repeat(median, 2))
            positive = median[np.isfinite(median) & (median > 0)]
            if positive.size:
                mx.set_ylim(positive.min() / 2, positive.max() * 2)
            plain_log_ticks(mx.yaxis)
            how = "every step" if len(x) == len(steps) else f"{len(x)} columns"
            self.classes_note.set_text(f"gain classes of {tensor} over all steps ({how})")
        else:
            self.shares = None
            self.gain_line.set_data([], [])
            self.classes_note.set_text(f"gain classes of {tensor}: undefined at every step (no non-zero gradient)")
        hx.set_xlim(first, last)

    # --- cursor: only animated artists change, unless the points left the axes -------------------
    def set_cursor(self, step: int, row: int | None) -> bool:
        """Update the points for `row` (a per-tensor row, None if none yet). True: limits changed,
        a full draw is needed."""
        self.classes_cursor.set_xdata([step, step])
        if self.tensor is None or row is None:
            return self._empty(f"no probe values at step {step}")
        data, tensor = self.data, self.tensor
        probes = data.probes_at(tensor, row, FIELDS)
        if "grad" not in probes or "update" not in probes:
            return self._empty("this recording has no probe coordinates")
        lr = data.lr_at(row)[data.tensor_group(tensor)]
        plain, gain = probe_gains(probes["grad"], probes["update"], lr)
        median = data.value_at("gain_median", tensor, row)
        if not np.isfinite(median):
            positive = gain[np.isfinite(gain) & (gain > 0)]
            median = float(np.median(positive)) if positive.size else np.nan
        self.classes = classes = classify_gain(gain, median) if np.isfinite(median) else \
            np.where(np.isfinite(gain), 0, -1).astype(np.int8)
        x, y = np.abs(plain), np.abs(probes["update"])
        keep = (x > 0) & (y > 0) & np.isfinite(x) & np.isfinite(y)
        colours = [GAIN_CLASS_COLOURS[GAIN_CLASS_NAMES[c]] if c >= 0 else GAIN_CLASS_COLOURS["undefined"]
                   for c in classes[keep]]
        self.points.set_offsets(np.column_stack([x[keep], y[keep]]) if keep.any() else np.zeros((0, 2)))
        self.points.set_facecolors(colours)
        xlim, ylim = _limits(x[keep], self._xlim), _limits(y[keep], self._ylim)
        full = (xlim, ylim) != (self._xlim, self._ylim)
        self._xlim, self._ylim = xlim, ylim
        self.step_axes.set_xlim(*xlim)
        self.step_axes.set_ylim(*ylim)
        line = np.array(xlim)
        self.unit_line.set_data(line, line)
        if np.isfinite(median) and median > 0:
            self.median_line.set_data(line, median * line)
            self._set_band(line, median)
        else:
            self.median_line.set_data([], [])
            self._set_band(line, None)
        self.step_note.set_text("" if keep.any() else "no coordinate with a non-zero gradient and update")
        full |= self._set_factors(probes, classes, keep)
        counts = {n: int((classes == k).sum()) for k, n in enumerate(GAIN_CLASS_NAMES)}
        if np.isfinite(median):
            said = f"median gain {median:.3g}"
        elif not np.isfinite(gain).any():
            said = "median gain undefined: every probe coordinate has a zero gradient at this step"
        else:
            said = "median gain undefined: no probe coordinate has a positive gain at this step"
        self.summary = (f"{tensor} at step {int(data.steps[row])}: {said}; {len(gain)} probe "
                        "coordinates: " + ", ".join(f"{v} {n}" for n, v in counts.items()))
        return full

    def _set_band(self, line, median):
        if median is None:
            self.band.set_verts([np.zeros((0, 2))])
            return
        low, high = median / 2 * line, median * 2 * line
        self.band.set_verts([np.array([[line[0], low[0]], [line[1], low[1]], [line[1], high[1]], [line[0], high[0]]])])

    def _set_factors(self, probes, classes, keep) -> bool:
        if not self.has_moments or "momentum_factor" not in probes:
            self.factor_points.set_offsets(np.zeros((0, 2)))
            self.factor_note.set_text("this optimizer keeps no moment estimates:\nthe gain is all residual")
            return False
        m, s = probes["momentum_factor"], probes["scale_factor"]
        ok = np.isfinite(m) & np.isfinite(s) & (s > 0)
        colours = [GAIN_CLASS_COLOURS[GAIN_CLASS_NAMES[c]] if c >= 0 else GAIN_CLASS_COLOURS["undefined"]
                   for c in classes[ok]]
        self.factor_points.set_offsets(np.column_stack([m[ok], s[ok]]) if ok.any() else np.zeros((0, 2)))
        self.factor_points.set_facecolors(colours)
        self.factor_note.set_text("" if ok.any() else "no factors at this step")
        flim = _limits(s[ok], self._flim[1] if self._flim else None)
        mm = m[ok]
        xr = self._flim[0] if self._flim else (-0.5, 2.0)
        if mm.size and (mm.min() < xr[0] or mm.max() > xr[1]):      # grow by half the span, rarely
            span = max(mm.max(), xr[1]) - min(mm.min(), xr[0])
            xr = (min(xr[0], mm.min() - 0.5 * span), max(xr[1], mm.max() + 0.5 * span))
        full = self._flim != (xr, flim)
        self._flim = (xr, flim)
        self.factor_axes.set_xlim(*xr)
        self.factor_axes.set_ylim(*flim)
        return full

    def _empty(self, why: str) -> bool:
        self.points.set_offsets(np.zeros((0, 2)))
        self.factor_points.set_offsets(np.zeros((0, 2)))
        self.median_line.set_data([], [])
        self.band.set_verts([np.zeros((0, 2))])
        self.classes = np.zeros(0, dtype=np.int8)
        self.step_note.set_text(why)
        self.summary = f"{self.tensor or ''}: {why}"
        return False

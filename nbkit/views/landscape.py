"""The loss-landscape slice view: `nbkit.landscape(model, step_fn, batch, runs)`.

Filled contours of the loss on the plane through the runs' shared start point (computed by
nbkit.analyze.landscape), each run's keyframe path projected onto it, and a marker per run at the
keyframe nearest the cursor `step`. The comparison embeds the same panel.
"""
from __future__ import annotations

import ipywidgets as widgets
import matplotlib.pyplot as plt
import numpy as np
import traitlets
from matplotlib.colors import LogNorm

from nbkit.analyze.landscape import landscape_slice
from nbkit.recording import Recording, load
from nbkit.views.base import StaticPicture
from nbkit.views.common import MAGNITUDE_MAP, OKABE_ITO, compose_png, figure_png, make_canvas

# Okabe & Ito (2008) colours, in the order runs take them (colour-blind safe).
RUN_COLOURS = [OKABE_ITO[c] for c in ("blue", "orange", "bluish green", "vermillion", "reddish purple",
                                      "sky blue", "yellow", "black")]


def run_names(runs) -> dict:
    """{name: Recording} from a Recording, a path, a list of them, or a dict. A replay is named by its
    optimizer name, anything else by its folder name; repeated names get a suffix."""
    if isinstance(runs, dict):
        return {str(k): (v if isinstance(v, Recording) else load(v)) for k, v in runs.items()}
    if isinstance(runs, Recording) or not isinstance(runs, (list, tuple)):
        runs = [runs]
    out = {}
    for run in runs:
        run = run if isinstance(run, Recording) else load(run)
        name = (run.meta.get("replay") or {}).get("optimizer") or run.path.name
        base, k = name, 2
        while name in out:
            name, k = f"{base} ({k})", k + 1
        out[name] = run
    return out


class LandscapePanel:
    """Draws a LandscapeSlice into one axes; set_cursor(step) moves the per-run markers."""

    def __init__(self, axes, landscape, colours: dict):
        self.axes, self.slice = axes, landscape
        loss = landscape.loss
        finite = loss[np.isfinite(loss)]
        levels = 24
        if finite.size and finite.min() > 0 and finite.max() / finite.min() > 30:
            levels = np.geomspace(finite.min(), finite.max(), 24)      # losses spanning decades
        norm = LogNorm(finite.min(), finite.max()) if not isinstance(levels, int) else None
        contours = axes.contourf(landscape.alpha, landscape.beta, loss, levels=levels, cmap=MAGNITUDE_MAP, norm=norm)
        axes.contour(landscape.alpha, landscape.beta, loss, levels=contours.levels[::4], colors="white",
                     linewidths=0.4, alpha=0.6, norm=norm)
        bar = axes.figure.colorbar(contours, ax=axes, label="loss on the batch (eval mode)", shrink=0.9, format="%.3g")
        if norm is not None:
            bar.set_ticks(contours.levels[::4])
        self.markers = {}
        for name, points in landscape.paths.items():
            colour = colours[name]
            axes.plot(points[:, 0], points[:, 1], "-", color="white", linewidth=3.2, alpha=0.7)
            axes.plot(points[:, 0], points[:, 1], "-o", color=colour, linewidth=1.6, markersize=3, label=name)
            axes.plot(points[-1, 0], points[-1, 1], "s", color=colour, markeredgecolor="white", markersize=7)
            self.markers[name] = axes.plot([points[0, 0]], [points[0, 1]], "o", markersize=11, markerfacecolor="none",
                                           markeredgecolor=colour, markeredgewidth=2.2)[0]
        axes.plot([0], [0], "o", color="white", markeredgecolor="black", markersize=8,
                  label=f"shared start (step {landscape.origin_step})")
        axes.set_xlabel(landscape.axis_labels[0])
        axes.set_ylabel(landscape.axis_labels[1])
        axes.set_title(f"loss on the plane through the start, axes: {landscape.axes}", fontsize=9, loc="left")
        axes.legend(fontsize=7, loc="best", framealpha=0.8)

    def set_cursor(self, step: int):
        for name, marker in self.markers.items():
            steps = self.slice.path_steps[name]
            k = max(0, int(np.searchsorted(steps, step, side="right")) - 1)
            point = self.slice.paths[name][k]
            marker.set_data([point[0]], [point[1]])


class LandscapeView(StaticPicture, widgets.VBox):
    """The landscape slice as its own view; `step` places each run's marker at its keyframe at or
    before that step."""

    step = traitlets.Int(0, help="the cursor: an absolute optimizer step number").tag(sync=True)

    def __init__(self, model, step_fn, batch, runs, *, resolution=21, progress=True):
        self.runs = run_names(runs)
        self.slice = landscape_slice(model, step_fn, batch, self.runs, resolution=resolution, progress=progress)
        colours = {name: RUN_COLOURS[k % len(RUN_COLOURS)] for k, name in enumerate(self.runs)}
        with plt.ioff():
            self.figure, self.canvas = make_canvas(620, 480, css_class="nbkit-landscape-canvas")
            self.panel = LandscapePanel(self.figure.add_subplot(1, 1, 1), self.slice, colours)
            self.figure.tight_layout()
        super().__init__(children=[self.canvas])
        self.add_class("nbkit-landscape")
        self.step = int(self.slice.origin_step)
        self.observe(lambda change: self._move(change["new"]), "step")
        self._move(self.step)

    def _move(self, step):
        self.panel.set_cursor(int(step))
        self.canvas.draw_idle()

    def png_bytes(self) -> bytes:
        return compose_png([[figure_png(self.figure)]], f"loss landscape slice, cursor at step {self.step}")




def landscape(model, step_fn, batch, runs, resolution=21, progress=True) -> LandscapeView:
    """The loss-landscape slice view: the loss on the plane through the runs' shared start point and
    two end points (or two filter-normalised random directions for one run), with their paths."""
    return LandscapeView(model, step_fn, batch, runs, resolution=resolution, progress=progress)

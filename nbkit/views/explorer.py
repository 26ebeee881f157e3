"""The explorer: `nbkit.explore(run)`, the main notebook view of one recording.

Five parts in one Box: the timeline (loss, learning rate, keyframe and finding marks, the step
cursor), the layer map (tensors x steps of one quantity, and its values at the cursor), the
coordinate view (one tensor's probe coordinates and gain histogram), the profile panel (the
tensor's unit gains, views.profile) and the findings list (views.findings_panel). A live recording is followed by views.live. Only `step`, `tensor` and
`quantity` are synced to the browser; the arrays stay in the kernel. A cursor move touches only
the artists that follow the cursor and blits them; figures are fully redrawn only when the
tensor, quantity or recording changes.
"""
from __future__ import annotations

import html
import os

import ipywidgets as widgets
import numpy as np
import traitlets

from nbkit.recording import Recording, load
from nbkit.views.base import GuardedView
from nbkit.views.common import DEFAULT_QUANTITY, compose_png, figure_png
from nbkit.views.coordinates import CoordinateView
from nbkit.views.data import ExplorerData
from nbkit.views.detail import DetailControl
from nbkit.views.findings_panel import FindingsPanel
from nbkit.views.layer_map import LayerMap
from nbkit.views.live import LiveFollower, prepare_busy_frontends
from nbkit.views.profile import ProfileView
from nbkit.views.remedies_panel import RemediesControl
from nbkit.views.timeline import Timeline



MAX_PICTURE_WIDTH = 1000     # px: the static picture fits a report page without scaling
PNG_FINDINGS_TIMEOUT = 60.0  # s: to_png() and the report wait this long for the background findings


def _open(source):
    """(Recording, live Recorder or None) for a Recording, a path, or a Recorder."""
    if isinstance(source, Recording):
        return source, None
    if hasattr(source, "add_step_hook"):         # a live Recorder: its public surface is all a view uses
        return load(source.recording_path), source
    if isinstance(source, (str, os.PathLike)):
        return load(source), None
    raise TypeError(f"nbkit.explore() takes a Recording, a recording path or a Recorder; got "
                    f"{type(source).__name__}. Open a recording with nbkit.load(path) or pass its folder.")


class Explorer(GuardedView, widgets.VBox):
    """The explorer widget. Set `step` or `tensor` from code; the view follows."""

    step = traitlets.Int(0, help="the cursor: an absolute optimizer step number").tag(sync=True)
    tensor = traitlets.Unicode("", help="the tensor shown in the coordinate view").tag(sync=True)
    quantity = traitlets.Unicode(DEFAULT_QUANTITY, help="the layer map's quantity").tag(sync=True)
    view_name = "explorer"

    def __init__(self, source, *, quantity: str = DEFAULT_QUANTITY, model=None, step_fn=None):
        run, recorder = _open(source)
        if quantity not in run.quantities:
            raise ValueError(f"Unknown quantity {quantity!r} for the layer map; choose one of run.quantities: "
                             f"{', '.join(run.quantities)}")
        self.run, self.recorder = run, recorder
        self.data = ExplorerData(run)
        self.start_guarding()
        self._moving = False
        self._closed = False
        self.follower = None
        self.timeline = Timeline(self.data, self._pick_step)
        self.layer_map = LayerMap(self.data, self._pick_tensor, self.toggle_block)
        self.coordinates = CoordinateView(self.data)
        self.profile = ProfileView(run)
        for part in self._parts():
            part.blitter.lock = self.lock
        # filled by a background thread: findings can take seconds
        self.findings_panel = FindingsPanel(run, lock=self.lock, on_pick=self._pick_finding,
                                            on_found=self._show_finding_marks, show_error=self.show_error)
        self.findings_list, self.findings_note = self.findings_panel.list, self.findings_panel.note
        self._build_controls(run, quantity)
        self.detail = DetailControl(run, model, step_fn, self._show_detail)
        self.remedies = RemediesControl(run, model, step_fn, self.show_error)
        super().__init__(children=self._layout())
        self.add_class("nbkit-explorer")
        live = recorder is not None or not run.closed_cleanly
        first = (int(self.data.steps[-1]) if live else self._first_learning_step()) if self.data.row_count else 0
        self._opened_at = first          # until the cursor leaves it, the first finding may move it
        self._live = live
        with self.hold_trait_notifications():
            self.quantity = quantity
            self.tensor = run.tensors[0] if run.tensors else ""
            self.step = first
        self.observe(self._on_step, "step")
        self.timeline.load(self.findings)
        self.observe(self._on_tensor, "tensor")
        self.observe(self._on_quantity, "quantity")
        # No drawing here: a browser asks each canvas for its first image when it shows it (and a
        # figure drawn now would be drawn again then). draw() does it for scripts and benchmarks.
        self._prepare(first)
        if live:
            self.follower = LiveFollower(run.path, refresh=self.refresh, shown_rows=lambda: self.data.row_count,
                                         show_error=self.show_error, recorder=recorder, poll=True)
        self.findings_panel.start_after_first_draws([part.canvas for part in self._parts()])

    def _parts(self):
        return (self.timeline, self.layer_map, self.coordinates, self.profile)

    @property
    def findings(self) -> list:
        """The findings listed (empty until the background search is done; see wait_for_findings)."""
        return self.findings_panel.findings

    @findings.setter
    def findings(self, value: list) -> None:
        self.findings_panel.findings = value

    def finding_options(self) -> list[tuple[str, int]]:
        """(label, position in `findings`) of each finding, as the findings list shows them."""
        return self.findings_panel.options()

    def wait_for_findings(self, timeout: float | None = None) -> bool:
        """Block until the background search for findings is done (True) or `timeout` passed."""
        return self.findings_panel.wait(timeout)

    # --- building -------------------------------------------------------------------------------
    def _build_controls(self, run, quantity):
        steps = self.data.steps
        low, high = (int(steps[0]), int(steps[-1])) if len(steps) else (0, 0)
        self.slider = widgets.IntSlider(value=low, min=low, max=high, description="step",
                                        continuous_update=True, layout=widgets.Layout(width="520px"))
        self.slider.add_class("nbkit-step-slider")
        self.play = widgets.Play(value=low, min=low, max=high, step=1, interval=250, description="play")
        self.play.add_class("nbkit-play")
        widgets.jslink((self.play, "value"), (self.slider, "value"))
        self.speed = widgets.Dropdown(options=[("1 step per tick", 1), ("10 steps per tick", 10),
                                               ("100 steps per tick", 100), ("1000 steps per tick", 1000)],
                                      value=1, layout=widgets.Layout(width="160px"))
        self.speed.add_class("nbkit-speed")
        widgets.link((self.speed, "value"), (self.play, "step"))
        self.previous_button = widgets.Button(description="◀ step", layout=widgets.Layout(width="84px"))
        self.next_button = widgets.Button(description="step ▶", layout=widgets.Layout(width="84px"))
        self.previous_button.add_class("nbkit-previous")
        self.next_button.add_class("nbkit-next")
        self.previous_button.on_click(lambda _: self._nudge(-1))
        self.next_button.on_click(lambda _: self._nudge(+1))
        self.step_label = widgets.HTML()
        self.step_label.add_class("nbkit-step-label")
        self.log_toggle = widgets.ToggleButton(value=False, description="log scale",
                                               layout=widgets.Layout(width="90px"))
        self.log_toggle.add_class("nbkit-log-scale")
        self.log_toggle.observe(lambda c: self.guard(self.timeline.set_log_scale, c["new"]), "value")
        self.quantity_menu = widgets.Dropdown(options=run.quantities, value=quantity, description="quantity")
        self.quantity_menu.add_class("nbkit-quantity")
        widgets.link((self.quantity_menu, "value"), (self, "quantity"))
        # labels that tell tensors apart (the module tree's), never a name cut from the left
        tree = self.layer_map.tree
        self.tensor_menu = widgets.Dropdown(options=[(tree.label(k), name) for k, name in enumerate(run.tensors)],
                                            description="tensor")
        self.tensor_menu.add_class("nbkit-tensor")
        widgets.link((self.tensor_menu, "value"), (self, "tensor"))
        self.slider.observe(lambda c: self.guard(setattr, self, "step", int(c["new"])), "value")
        # applied on Enter or when the box loses focus: a redraw per keystroke costs up to 0.7 s at 300 tensors
        self.filter_box = widgets.Text(value="", placeholder="filter tensors by name, then Enter", description="filter",
                                       continuous_update=False, layout=widgets.Layout(width="260px"))
        self.filter_box.add_class("nbkit-filter")
        self.filter_box.observe(lambda c: self.guard(self._set_rows, dict(filter_text=c["new"])), "value")
        self.aggregate_menu = widgets.Dropdown(options=[("block: max", "max"), ("block: median", "median"),
                                                        ("block: worst tensor", "worst")], value="max",
                                               layout=widgets.Layout(width="170px"))
        self.aggregate_menu.add_class("nbkit-aggregate")
        self.aggregate_menu.observe(lambda c: self.guard(self._set_rows, dict(aggregate=c["new"])), "value")
        self.per_row_toggle = widgets.ToggleButton(value=False, description="scale each row",
                                                   layout=widgets.Layout(width="120px"))
        self.per_row_toggle.add_class("nbkit-per-row")
        self.per_row_toggle.observe(lambda c: self.guard(self._set_rows, dict(per_row=c["new"])), "value")
        self.coordinate_summary = widgets.HTML()
        self.coordinate_summary.add_class("nbkit-coordinate-summary")
        self.profile_summary = widgets.HTML()
        self.profile_summary.add_class("nbkit-profile-summary")

    def _layout(self):
        controls = widgets.HBox([self.play, self.previous_button, self.slider, self.next_button, self.speed,
                                 self.log_toggle, self.step_label])
        menus = widgets.HBox([self.quantity_menu, self.tensor_menu, self.coordinate_summary])
        rows = widgets.HBox([self.filter_box, self.aggregate_menu, self.per_row_toggle])
        menus = widgets.VBox([menus, rows, self.detail.box])
        middle = widgets.HBox([self.layer_map.canvas, self.coordinates.canvas],
                              layout=widgets.Layout(flex_flow="row wrap"))   # narrow pages stack them
        profile = widgets.HBox([self.profile.canvas, self.profile_summary],
                               layout=widgets.Layout(flex_flow="row wrap"))
        return [controls, self.timeline.canvas, menus, middle, profile, self.findings_panel.box, self.remedies.box,
                self.errors]

    # --- reacting -------------------------------------------------------------------------------
    def _first_learning_step(self) -> int:
        """The first recorded step at which some parameter group's learning rate is non-zero (a
        warm-up from 0 opens where the run starts moving), else the first step."""
        lr = np.asarray(self.run.lr, dtype=np.float64)                # (steps, groups)
        moving = np.flatnonzero(np.nan_to_num(np.abs(lr)).max(axis=1, initial=0.0) > 0) if lr.size else []
        return int(self.data.steps[moving[0] if len(moving) else 0])

    def _show_finding_marks(self):
        if self.data.row_count:
            self.timeline.load(self.findings)
            self.timeline.blitter.full()
            # Opening state: the cursor goes to the first finding, unless the user moved it meanwhile.
            if not self._live and self.findings and self._opened_at is not None:
                self._opened_at = None
                self._pick_finding(self.findings[0])

    def _pick_step(self, step):
        self.guard(setattr, self, "step", int(step))

    def _pick_tensor(self, tensor):
        self.guard(setattr, self, "tensor", tensor)

    def toggle_block(self, block: str) -> None:
        """Expand the layer map's block `block` (e.g. "layer3.0") to one row per tensor, or collapse it."""
        expanded = set(self.layer_map.expanded)
        expanded.symmetric_difference_update({block})
        self.guard(self._set_rows, dict(expanded=expanded))

    def expand(self, block: str) -> None:
        self.guard(self._set_rows, dict(expanded=self.layer_map.expanded | {block}))

    def collapse(self, block: str) -> None:
        self.guard(self._set_rows, dict(expanded=self.layer_map.expanded - {block}))

    def _set_rows(self, change: dict) -> None:
        """New rows (expand, filter) or colour scale in the layer map: it alone is redrawn; the cursor stays."""
        if "expanded" in change:
            names = {b.name for b in self.layer_map.tree.blocks}
            unknown = set(change["expanded"]) - names
            if unknown:
                raise ValueError(f"No block named {sorted(unknown)[0]!r} in the layer map; blocks are "
                                 f"{', '.join(sorted(names)[:8])} …")
        self.layer_map.set_rows(**change)        # keeps the cursor and its values
        self.layer_map.blitter.full()

    def _pick_finding(self, finding):
        self.remedies.select(finding)            # the "try the remedies" button acts on the picked finding

        def jump():
            with self.hold_trait_notifications():
                if finding.tensors and finding.tensors[0] in self.run.tensors:
                    self.tensor = finding.tensors[0]
                self.step = int(finding.first_step)
        self.guard(jump)

    def _nudge(self, direction):
        if self.data.row_count:
            row = self.data.row_of(self.step)
            row = int(np.clip(row + direction, 0, self.data.row_count - 1))
            self._pick_step(int(self.data.steps[row]))

    def _on_step(self, change):
        self._opened_at = None                  # the cursor moved: a finding found later leaves it be
        self.guard(self._move_cursor, change["new"])

    def _on_tensor(self, change):
        def pick():
            if change["new"] not in self.run.tensors:
                raise ValueError(f"No tensor named {change['new']!r}; pick one of explorer.run.tensors")
            self.coordinates.set_tensor(change["new"])
            self.layer_map.set_tensor(change["new"])
            self.profile.set_tensor(change["new"])
            self._redraw(self.step, full=(self.coordinates, self.profile))
        self.guard(pick)

    def _on_quantity(self, change):
        def pick():
            if change["new"] not in self.run.quantities:
                raise ValueError(f"Unknown quantity {change['new']!r}; choose one of run.quantities")
            self.layer_map.set_quantity(change["new"])
            self._redraw(self.step, full=(self.layer_map,))
        self.guard(pick)

    # --- drawing --------------------------------------------------------------------------------
    def _place(self, step):
        """Snap `step` to a recorded step; point every part's cursor at it. Returns (step, full draw?)."""
        if self.data.row_count == 0:
            self.step_label.value = "<b>no steps recorded yet</b>"
            return step, False
        row = self.data.row_of(step)
        snapped = int(self.data.steps[row])
        heavy = self.data.heavy_row(row)
        self.timeline.set_cursor(snapped)
        self.layer_map.set_cursor(snapped, heavy)
        full = self.coordinates.set_cursor(snapped, heavy)
        self.profile.set_cursor(snapped, heavy)
        note = "" if heavy == row or heavy is None else \
            f" (per-tensor values from step {int(self.data.steps[heavy])})"
        if self.data.detail_at(row) is not None:
            note += " (re-recorded in full by a replay)"
        self.detail.step = snapped
        self.step_label.value = f"<b>step {snapped}</b> of {int(self.data.steps[-1])}{note}"
        quality = self.timeline.quality_at(snapped)        # "" where the step's quality was not measured
        self.coordinate_summary.value = (f"<small>{html.escape(self.coordinates.summary)}"
                                         + (f"<br>{html.escape(quality)}" if quality else "") + "</small>")
        self.profile_summary.value = "<small>" + "<br>".join(map(html.escape, self.profile.text.splitlines())) + "</small>"
        with self.slider.hold_trait_notifications():
            self.slider.max = max(self.slider.max, int(self.data.steps[-1]))
            self.slider.value = snapped
        return snapped, full

    def _move_cursor(self, step):
        if self._moving:
            return
        self._moving = True
        try:
            snapped, full = self._place(step)
            if snapped != self.step:
                self.step = snapped
            self.timeline.blitter.update()
            self.layer_map.blitter.update()
            self.profile.blitter.update()
            (self.coordinates.blitter.full if full else self.coordinates.blitter.update)()
        finally:
            self._moving = False

    def _redraw(self, step, full):
        """Place the cursor; fully redraw the parts in `full` (their data changed), blit the others."""
        self._moving = True
        try:
            _, coordinates_moved = self._place(step)
            full = (*full, self.coordinates) if coordinates_moved else full
            for part in self._parts():
                (part.blitter.full if part in full else part.blitter.update)()
        finally:
            self._moving = False

    def _show_detail(self, detail):
        """A window re-recorded in full (views.detail): its rows replace the thinned ones."""
        self.data.add_detail(detail)
        self.layer_map.set_quantity(self.quantity)
        self._redraw(self.step, full=(self.layer_map, self.coordinates))

    def _prepare(self, step):
        """Read what every part shows at `step`, without drawing."""
        self._moving = True
        try:
            if self.data.row_count and self.layer_map.quantity != self.quantity:
                self.layer_map.set_quantity(self.quantity)
            if self.data.row_count and self.coordinates.tensor != self.tensor and self.tensor:
                self.coordinates.set_tensor(self.tensor)
                self.layer_map.set_tensor(self.tensor)
            if self.data.row_count and self.profile.tensor != self.tensor and self.tensor:
                self.profile.set_tensor(self.tensor)
            self._place(step)
        finally:
            self._moving = False

    def draw(self):
        """Fully draw every part now (what showing the view costs) and send it to any browser."""
        with self.lock:
            for part in self._parts():
                part.blitter.full()

    def _redraw_all(self, step):
        self._prepare(step)
        self._moving = True
        try:
            for part in self._parts():
                part.blitter.full()
        finally:
            self._moving = False

    # --- growth ---------------------------------------------------------------------------------
    def refresh(self):
        """Show steps written since the view opened; the cursor stays unless it was at the end."""
        with self.lock:
            if self._closed:
                return False                         # a closed view stays as it was
            old_rows, step_before = self.data.row_count, self.step
            at_end = old_rows == 0 or self.step >= int(self.data.steps[-1])
            self.run.refresh()
            self.data.reload()
            if self.data.row_count == old_rows:
                return False
            self.timeline.load(self.findings)
            self.layer_map.quantity = None          # re-read the heatmap
            self.coordinates.tensor = None          # and the histogram image
            self.profile.tensor = None              # and the profile images
            last = int(self.data.steps[-1])
            self.slider.max = self.play.max = last
            if old_rows == 0:
                self.slider.min = self.play.min = int(self.data.steps[0])
            # A cursor moved from another thread while this ran (the trait is set before its
            # observers wait for the lock) is the user's choice: it wins over following the end.
            target = last if at_end and self.step == step_before else self.step
            prepare_busy_frontends(self._parts())
            self._redraw_all(target)
            if self.step != target:
                self._moving = True
                try:
                    self.step = target
                finally:
                    self._moving = False
            return True

    def close(self):
        # getattr: close() also runs from __del__ of a view whose __init__ raised (bad input)
        lock = getattr(self, "lock", None)
        if lock is not None:
            with lock:                               # waits for a refresh in flight
                self._closed = True
        if getattr(self, "findings_panel", None) is not None:
            self.findings_panel.stop()
        if getattr(self, "follower", None) is not None:
            self.follower.stop()
        if getattr(self, "remedies", None) is not None:
            self.remedies.close()
        for name in ("timeline", "layer_map", "coordinates", "profile"):
            if hasattr(self, name):
                getattr(self, name).blitter.stop()
                getattr(self, name).canvas.close()
        super().close()

    # --- static output --------------------------------------------------------------------------
    def display_png_bytes(self) -> bytes:
        return self.png_bytes(findings_timeout=0)

    def png_bytes(self, findings_timeout: float = PNG_FINDINGS_TIMEOUT) -> bytes:
        """The view as one PNG, once the background findings are in (their marks and list are part of it),
        or after `findings_timeout` seconds, which the picture then says."""
        ready = self.wait_for_findings(timeout=findings_timeout)
        with self.lock:
            middle = [figure_png(self.layer_map.figure), figure_png(self.coordinates.figure)]
            # side by side only when both fit MAX_PICTURE_WIDTH (a report page); else one under the other
            middle = [middle] if sum(m.shape[1] for m in middle) <= MAX_PICTURE_WIDTH else [[m] for m in middle]
            images = [[figure_png(self.timeline.figure)], *middle, [figure_png(self.profile.figure)]]
            lines = [f"{self.run.path.name}: step {self.step}, layer map of {self.quantity}; {self.coordinates.summary}"]
            lines += self.profile.text.splitlines()
            lines += [label for label, _ in self.finding_options()[:8]] or [self.findings_panel.note_text()]
            if not ready:
                lines.append(f"findings were still being computed when this picture was taken (it waited "
                             f"{findings_timeout:g} s): it shows none of them")
            return compose_png(images, "\n".join(lines))


def explore(run, *, quantity: str = DEFAULT_QUANTITY, model=None, step_fn=None) -> Explorer:
    """The explorer of `run`: a Recording, a recording's path, or a live Recorder (same kernel).

    quantity="update_ratio": the layer map's quantity at start (any name in run.quantities).
    model (and step_fn where the recording's trained loss is not rebuildable): the "re-record in full"
    button replays the window around the cursor with every=1 (nbkit.replay; a thinned recording's
    window then shows every quantity at every step). Without a model the button is disabled.
    With a model the findings list also offers "try the remedies" for the picked finding
    (nbkit.try_remedies on a background thread; views.remedies_panel).
    """
    return Explorer(run, quantity=quantity, model=model, step_fn=step_fn)

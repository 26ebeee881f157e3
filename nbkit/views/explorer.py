"""The explorer: `nbkit.explore(run)`, the main notebook view of one recording.

Four parts in one Box: the timeline (loss, learning rate, keyframe and finding marks, the step
cursor), the layer map (tensors x steps of one quantity, and its values at the cursor), the
coordinate view (one tensor's probe coordinates and gain histogram) and the findings list.
Only `step`, `tensor` and `quantity` are synced to the browser; the arrays stay in the kernel.
A cursor move touches only the artists that follow the cursor and blits them; figures are
fully redrawn only when the tensor, quantity or recording changes.
"""
from __future__ import annotations

import html
import os
import threading
import time

import ipywidgets as widgets
import numpy as np
import traitlets

from nbkit.views.common import StaticPicture, compose_png, figure_png, safe_call
from nbkit.views.coordinates import CoordinateView
from nbkit.views.data import ExplorerData
from nbkit.views.layer_map import LayerMap
from nbkit.views.timeline import Timeline

DEFAULT_QUANTITY = "update_ratio"
LIVE_MIN_INTERVAL = 0.5      # seconds between live refreshes: at most twice a second ...
LIVE_COST_FACTOR = 4.0       # ... and never more than 1/4 of the training loop's time
FINDINGS_START_SECONDS = 5.0   # findings start at the latest this long after the view opened
POLL_SECONDS = 1.0           # a recording another process writes is checked this often
FINDINGS_NOTE = ("Findings are heuristics: each points at the step and tensor where a known failure pattern "
                 "starts. Verify one with a replay (nbkit.replay) from the keyframe before its first step "
                 "before acting on it.")


def _open(source):
    """(Recording, live Recorder or None) for a Recording, a path, or a Recorder."""
    from nbkit.record.recorder import Recorder
    from nbkit.store.reader import Recording, load

    if isinstance(source, Recording):
        return source, None
    if isinstance(source, Recorder):
        return load(source.recording_path), source
    if isinstance(source, (str, os.PathLike)):
        return load(source), None
    raise TypeError(f"nbkit.explore() takes a Recording, a recording path or a Recorder; got "
                    f"{type(source).__name__}. Open a recording with nbkit.load(path) or pass its folder.")


class Explorer(StaticPicture, widgets.VBox):
    """The explorer widget. Set `step` or `tensor` from code; the view follows."""

    step = traitlets.Int(0, help="the cursor: an absolute optimizer step number").tag(sync=True)
    tensor = traitlets.Unicode("", help="the tensor shown in the coordinate view").tag(sync=True)
    quantity = traitlets.Unicode(DEFAULT_QUANTITY, help="the layer map's quantity").tag(sync=True)

    def __init__(self, source, *, quantity: str = DEFAULT_QUANTITY):
        run, recorder = _open(source)
        if quantity not in run.quantities:
            raise ValueError(f"Unknown quantity {quantity!r} for the layer map; choose one of run.quantities: "
                             f"{', '.join(run.quantities)}")
        self.run, self.recorder = run, recorder
        self.data = ExplorerData(run)
        self._lock = threading.RLock()
        self._moving = False
        self.findings: list = []           # filled by a background thread: findings can take seconds
        findings_note = "Looking for findings in the background …"
        self.timeline = Timeline(self.data, self._pick_step)
        self.layer_map = LayerMap(self.data, self._pick_tensor)
        self.coordinates = CoordinateView(self.data)
        for part in (self.timeline, self.layer_map, self.coordinates):
            part.blitter.lock = self._lock
        self._build_controls(run, quantity, findings_note)
        super().__init__(children=self._layout())
        self.add_class("nbkit-explorer")
        live = recorder is not None or not run.closed_cleanly
        first = int(self.data.steps[-1] if live else self.data.steps[0]) if self.data.rows else 0
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
        self._live_handle = self._poller = None
        self._last_live, self._live_cost = 0.0, 0.0
        if recorder is not None:
            # torch runs step post-hooks in registration order, so this one runs after the recorder's
            # own hook has put the step's row in the writer's queue. torch's RemovableHandle holds
            # only a weak reference to the optimizer.
            self._live_handle = recorder.optimizer.register_step_post_hook(
                lambda optimizer, args, kwargs: self._on_recorder_step(recorder))
        # Findings can take seconds on a long recording: they run in a thread that starts once every
        # part has been drawn for the first time (so it does not slow that down), or after
        # FINDINGS_START_SECONDS if nothing draws the view (a script), or when someone waits for them.
        self._findings_done = threading.Event()
        self._findings_started = False
        self._drawn_parts: set = set()
        for part in (self.timeline, self.layer_map, self.coordinates):
            part.canvas.mpl_connect("draw_event", lambda event, part=part: self._part_drawn(part))
        self._findings_timer = threading.Timer(FINDINGS_START_SECONDS, self._start_findings)
        self._findings_timer.daemon = True
        self._findings_timer.start()
        if live:
            self._poller = threading.Thread(target=self._poll, name="nbkit-explorer-poll", daemon=True)
            self._poller.start()

    # --- building -------------------------------------------------------------------------------
    def _build_controls(self, run, quantity, findings_note):
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
        self.log_toggle = widgets.ToggleButton(value=False, description="log loss", layout=widgets.Layout(width="90px"))
        self.log_toggle.add_class("nbkit-log-loss")
        self.log_toggle.observe(lambda c: self._guard(self.timeline.set_log_scale, c["new"]), "value")
        self.quantity_picker = widgets.Dropdown(options=run.quantities, value=quantity, description="quantity")
        self.quantity_picker.add_class("nbkit-quantity")
        widgets.link((self.quantity_picker, "value"), (self, "quantity"))
        self.tensor_picker = widgets.Dropdown(options=run.tensors, description="tensor")
        self.tensor_picker.add_class("nbkit-tensor")
        widgets.link((self.tensor_picker, "value"), (self, "tensor"))
        self.slider.observe(lambda c: self._guard(setattr, self, "step", int(c["new"])), "value")
        self.findings_list = widgets.Select(options=self._finding_options(), rows=min(8, max(3, len(self.findings))),
                                            layout=widgets.Layout(width="980px"))
        self.findings_list.add_class("nbkit-findings")
        self.findings_list.observe(self._on_finding, "value")
        self.findings_note = widgets.HTML(f"<small>{html.escape(findings_note)}</small>")
        self.coordinate_summary = widgets.HTML()
        self.coordinate_summary.add_class("nbkit-coordinate-summary")
        self.errors = widgets.HTML()
        self.errors.add_class("nbkit-errors")

    def _layout(self):
        controls = widgets.HBox([self.play, self.previous_button, self.slider, self.next_button, self.speed,
                                 self.log_toggle, self.step_label])
        pickers = widgets.HBox([self.quantity_picker, self.tensor_picker, self.coordinate_summary])
        middle = widgets.HBox([self.layer_map.canvas, self.coordinates.canvas],
                              layout=widgets.Layout(flex_flow="row wrap"))   # narrow pages stack them
        findings = widgets.VBox([widgets.HTML("<b>findings</b>"), self.findings_note, self.findings_list])
        findings.add_class("nbkit-findings-box")
        return [controls, self.timeline.canvas, pickers, middle, findings, self.errors]

    def _part_drawn(self, part):
        self._drawn_parts.add(id(part))
        if len(self._drawn_parts) == 3:
            self._start_findings()

    def _start_findings(self):
        with self._lock:
            if self._findings_started:
                return
            self._findings_started = True
        threading.Thread(target=self._find, name="nbkit-explorer-findings", daemon=True).start()

    def _find(self):
        """Run the findings off the opening path, then show them (list and timeline marks)."""
        try:
            found, note = self._read_findings()
        except Exception as exc:                     # noqa: BLE001 - a findings error must not break the view
            found, note = [], f"Finding the findings failed ({exc!r}). " + FINDINGS_NOTE
        with self._lock:
            self.findings = found
            self.findings_note.value = f"<small>{html.escape(note)}</small>"
            self.findings_list.options = self._finding_options()
            self.findings_list.rows = min(8, max(3, len(found)))
            if found and self.data.rows:
                safe_call(self._redraw_timeline, on_error=self._show_error)
        self._findings_done.set()

    def _redraw_timeline(self):
        self.timeline.load(self.findings)
        self.timeline.blitter.full()

    def wait_for_findings(self, timeout: float | None = None) -> bool:
        """Block until the background search for findings is done (True) or `timeout` passed."""
        self._start_findings()
        return self._findings_done.wait(timeout)

    def _read_findings(self):
        try:
            found = list(self.run.findings())
        except ImportError:
            return [], ("No findings yet: the findings module (nbkit.analyze.findings) is not part of this "
                        "installation. " + FINDINGS_NOTE)
        if not found:
            return [], "No findings for this recording. " + FINDINGS_NOTE
        return found, FINDINGS_NOTE

    def _finding_options(self):
        options = []
        for k, f in enumerate(self.findings):
            where = ", ".join(f.tensors[:3]) + (" …" if len(f.tensors) > 3 else "") if f.tensors else "whole run"
            options.append((f"[{f.severity}] {f.kind} · steps {f.first_step}–{f.last_step} · {where} · "
                            f"{f.suggestion} (source: {f.source})", k))
        return options

    # --- reacting -------------------------------------------------------------------------------
    def _guard(self, fn, *args):
        """Run a view update under the lock; an error is shown in the view, never raised into ipywidgets."""
        with self._lock:
            return safe_call(fn, *args, on_error=self._show_error)

    def _show_error(self, text):
        self.errors.value = ("<details open><summary>the explorer hit an error and carried on</summary>"
                             f"<pre>{html.escape(text[-4000:])}</pre></details>")

    def _pick_step(self, step):
        self._guard(setattr, self, "step", int(step))

    def _pick_tensor(self, tensor):
        self._guard(setattr, self, "tensor", tensor)

    def _nudge(self, direction):
        if self.data.rows:
            row = self.data.row_of(self.step)
            row = int(np.clip(row + direction, 0, self.data.rows - 1))
            self._pick_step(int(self.data.steps[row]))

    def _on_step(self, change):
        self._guard(self._move_cursor, change["new"])

    def _on_tensor(self, change):
        def pick():
            if change["new"] not in self.run.tensors:
                raise ValueError(f"No tensor named {change['new']!r}; pick one of explorer.run.tensors")
            self.coordinates.set_tensor(change["new"])
            self.layer_map.set_tensor(change["new"])
            self._redraw(self.step, full=(self.coordinates,))
        self._guard(pick)

    def _on_quantity(self, change):
        def pick():
            if change["new"] not in self.run.quantities:
                raise ValueError(f"Unknown quantity {change['new']!r}; choose one of run.quantities")
            self.layer_map.set_quantity(change["new"])
            self._redraw(self.step, full=(self.layer_map,))
        self._guard(pick)

    def _on_finding(self, change):
        if change["new"] is None:
            return
        finding = self.findings[change["new"]]

        def jump():
            with self.hold_trait_notifications():
                if finding.tensors and finding.tensors[0] in self.run.tensors:
                    self.tensor = finding.tensors[0]
                self.step = int(finding.first_step)
        self._guard(jump)

    # --- drawing --------------------------------------------------------------------------------
    def _place(self, step):
        """Snap `step` to a recorded step; point every part's cursor at it. Returns (step, full draw?)."""
        if self.data.rows == 0:
            self.step_label.value = "<b>no steps recorded yet</b>"
            return step, False
        row = self.data.row_of(step)
        snapped = int(self.data.steps[row])
        heavy = self.data.heavy_row(row)
        self.timeline.set_cursor(snapped)
        self.layer_map.set_cursor(snapped, heavy)
        full = self.coordinates.set_cursor(snapped, heavy)
        note = "" if heavy == row or heavy is None else \
            f" (per-tensor values from step {int(self.data.steps[heavy])})"
        self.step_label.value = f"<b>step {snapped}</b> of {int(self.data.steps[-1])}{note}"
        self.coordinate_summary.value = f"<small>{html.escape(self.coordinates.summary)}</small>"
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
            (self.coordinates.blitter.full if full else self.coordinates.blitter.update)()
        finally:
            self._moving = False

    def _redraw(self, step, full):
        """Place the cursor; fully redraw the parts in `full` (their data changed), blit the others."""
        self._moving = True
        try:
            _, coordinates_moved = self._place(step)
            full = (*full, self.coordinates) if coordinates_moved else full
            for part in (self.timeline, self.layer_map, self.coordinates):
                (part.blitter.full if part in full else part.blitter.update)()
        finally:
            self._moving = False

    def _prepare(self, step):
        """Read what every part shows at `step`, without drawing."""
        self._moving = True
        try:
            if self.data.rows and self.layer_map.quantity != self.quantity:
                self.layer_map.set_quantity(self.quantity)
            if self.data.rows and self.coordinates.tensor != self.tensor and self.tensor:
                self.coordinates.set_tensor(self.tensor)
                self.layer_map.set_tensor(self.tensor)
            self._place(step)
        finally:
            self._moving = False

    def draw(self):
        """Fully draw every part now (what showing the view costs) and send it to any browser."""
        with self._lock:
            for part in (self.timeline, self.layer_map, self.coordinates):
                part.blitter.full()

    def _redraw_all(self, step):
        self._prepare(step)
        self._moving = True
        try:
            for part in (self.timeline, self.layer_map, self.coordinates):
                part.blitter.full()
        finally:
            self._moving = False

    # --- live -----------------------------------------------------------------------------------
    def refresh(self):
        """Show steps written since the view opened; the cursor stays unless it was at the end."""
        with self._lock:
            if getattr(self, "_stopped", False):
                return False                         # a closed view stays as it was
            old_rows, step_before = self.data.rows, self.step
            at_end = old_rows == 0 or self.step >= int(self.data.steps[-1])
            self.run.refresh()
            self.data.reload()
            if self.data.rows == old_rows:
                return False
            self.timeline.load(self.findings)
            self.layer_map.quantity = None          # re-read the heatmap
            self.coordinates.tensor = None          # and the histogram image
            last = int(self.data.steps[-1])
            self.slider.max = self.play.max = last
            if old_rows == 0:
                self.slider.min = self.play.min = int(self.data.steps[0])
            # A cursor moved from another thread while this ran (the trait is set before its
            # observers wait for the lock) is the user's choice: it wins over following the end.
            target = last if at_end and self.step == step_before else self.step
            self._prepare_busy_frontends()
            self._redraw_all(target)
            if self.step != target:
                self._moving = True
                try:
                    self.step = target
                finally:
                    self._moving = False
            return True

    def _prepare_busy_frontends(self):
        """Make full frames reach a browser whose canvases the kernel has not heard from yet.

        A canvas shown while the kernel runs a training loop never gets its "initialized" message
        handled, so ipympl never sends the "resize" that sizes the page's canvas, and it has no base
        image for diff frames. Sending the resize here and forcing full frames lets a live view draw.
        """
        for part in (self.timeline, self.layer_map, self.coordinates):
            canvas = part.canvas
            if canvas.syncing_data_url:              # ipympl: True until the browser said "initialized"
                width, height = part.figure.bbox.size
                canvas.manager.resize(int(width), int(height))
                canvas._force_full = True

    def _on_recorder_step(self, recorder):
        """Called after each optimizer step of a live Recorder (same kernel, inside the training loop):
        no widget message or timer is handled then, and ipympl's draw_idle would wait for the browser,
        so the view draws and pushes its images itself (canvas.draw sends them at once). Never raises:
        a view error must not break training."""
        try:
            self._live_step(recorder)
        except Exception as exc:                     # noqa: BLE001 - shown in the view, training goes on
            safe_call(self._show_error, f"live refresh failed: {exc!r}")

    def _live_step(self, recorder):
        now = time.monotonic()
        if now - self._last_live < max(LIVE_MIN_INTERVAL, LIVE_COST_FACTOR * self._live_cost):
            return
        self._last_live = now
        # The Recorder has no public "commit soon, don't wait" call: ask its writer directly. The
        # rows queued so far reach the disk within a few ms; this refresh shows what is committed.
        writer = getattr(recorder, "_writer", None)
        if writer is not None and hasattr(writer, "flush"):
            writer.flush(timeout=0)
        safe_call(self.refresh, on_error=self._show_error)
        self._live_cost = time.monotonic() - now

    def _poll(self):
        """A recording another process writes (or the tail of a live one) is picked up here."""
        while not getattr(self, "_stopped", False):
            time.sleep(POLL_SECONDS)
            if getattr(self, "_stopped", False):
                return                               # closed while this slept
            try:
                from nbkit.store.files import COMMITTED_FILE, read_json

                committed = read_json(self.run.path / COMMITTED_FILE)
                if int(committed.get("rows", 0)) != self.data.rows:
                    safe_call(self.refresh, on_error=self._show_error)
                if committed.get("closed") and int(committed.get("rows", 0)) == self.data.rows:
                    return
            except (OSError, ValueError):
                continue                             # the file is being replaced; try again

    def close(self):
        with getattr(self, "_lock", threading.RLock()):  # waits for a refresh in flight
            self._stopped = True
        if getattr(self, "_findings_timer", None) is not None:
            self._findings_timer.cancel()
        if getattr(self, "_live_handle", None) is not None:
            self._live_handle.remove()
        for name in ("timeline", "layer_map", "coordinates"):
            if hasattr(self, name):
                getattr(self, name).blitter.stop()
                getattr(self, name).canvas.close()
        super().close()

    # --- static output --------------------------------------------------------------------------
    def png_bytes(self) -> bytes:
        with self._lock:
            images = [[figure_png(self.timeline.figure)],
                      [figure_png(self.layer_map.figure), figure_png(self.coordinates.figure)]]
            lines = [f"{self.run.path.name}: step {self.step}, layer map of {self.quantity}; {self.coordinates.summary}"]
            lines += [label for label, _ in self._finding_options()[:8]] or [self.findings_note.value
                                                                                .replace("<small>", "")
                                                                                .replace("</small>", "")]
            return compose_png(images, "\n".join(lines))




def explore(run, *, quantity: str = DEFAULT_QUANTITY) -> Explorer:
    """The explorer of `run`: a Recording, a recording's path, or a live Recorder (same kernel).

    quantity="update_ratio": the layer map's quantity at start (any name in run.quantities).
    """
    return Explorer(run, quantity=quantity)

"""The explorer's findings: searched for on a background thread, then listed; a pick jumps to one."""
from __future__ import annotations

import html
import threading

import ipywidgets as widgets

from nbkit.views.base import safe_call

FINDINGS_START_SECONDS = 5.0   # findings start at the latest this long after the view opened
FINDINGS_NOTE = ("Findings are heuristics: each points at the step and tensor where a known failure pattern "
                 "starts. Verify one with a replay (nbkit.replay) from the keyframe before its first step "
                 "before acting on it.")


def finding_label(finding) -> str:
    """One line for the findings list: severity, kind, step range, tensors, suggestion, source."""
    f = finding
    where = ", ".join(f.tensors[:3]) + (" …" if len(f.tensors) > 3 else "") if f.tensors else "whole run"
    return (f"[{f.severity}] {f.kind} · steps {f.first_step}–{f.last_step} · {where} · "
            f"{f.suggestion} (source: {f.source})")


class FindingsPanel:
    """The findings list of one recording and the background search that fills it.

    Findings can take seconds on a long recording, so they run on a thread that starts once every
    canvas given to `start_after_first_draws` has been drawn (so it does not slow the first image
    down), or after FINDINGS_START_SECONDS if nothing draws the view (a script), or when someone
    waits for them. on_pick(finding) is called when the user selects one; on_found() after the
    search found at least one (under `lock`; an error in it goes to show_error(traceback text)).
    """

    def __init__(self, run, *, lock, on_pick, on_found, show_error):
        self.run = run
        self.lock = lock
        self.on_pick, self.on_found, self.show_error = on_pick, on_found, show_error
        self.findings: list = []                 # Finding objects, in the order listed
        self.list = widgets.Select(options=self.options(), rows=3, layout=widgets.Layout(width="980px"))
        self.list.add_class("nbkit-findings")
        self.list.observe(self._on_select, "value")
        self.note = widgets.HTML(f"<small>{html.escape('Looking for findings in the background …')}</small>")
        self.box = widgets.VBox([widgets.HTML("<b>findings</b>"), self.note, self.list])
        self.box.add_class("nbkit-findings-box")
        self._done = threading.Event()
        self._started = False
        self._drawn: set = set()
        self._timer = None

    def options(self) -> list[tuple[str, int]]:
        """(label, position in `findings`) for the list widget."""
        return [(finding_label(f), k) for k, f in enumerate(self.findings)]

    def note_text(self) -> str:
        """The note above the list as plain text (what the search found, or why it found nothing)."""
        return self.note.value.replace("<small>", "").replace("</small>", "")

    def start_after_first_draws(self, canvases) -> None:
        """Start the search once each canvas has drawn, or after FINDINGS_START_SECONDS at the latest."""
        for canvas in canvases:
            canvas.mpl_connect("draw_event", lambda event, key=id(canvas), count=len(canvases):
                               self._canvas_drawn(key, count))
        self._timer = threading.Timer(FINDINGS_START_SECONDS, self.start)
        self._timer.daemon = True
        self._timer.start()

    def _canvas_drawn(self, key, count):
        self._drawn.add(key)
        if len(self._drawn) == count:
            self.start()

    def start(self) -> None:
        """Start the background search now (nothing happens if it already started)."""
        with self.lock:
            if self._started:
                return
            self._started = True
        threading.Thread(target=self._find, name="nbkit-explorer-findings", daemon=True).start()

    def wait(self, timeout: float | None = None) -> bool:
        """Start the search if needed and block until it is done (True) or `timeout` seconds passed."""
        self.start()
        return self._done.wait(timeout)

    def stop(self) -> None:
        """Cancel a search that has not started yet (a running one finishes on its own)."""
        if self._timer is not None:
            self._timer.cancel()

    def _find(self):
        """Run the findings off the opening path, then show them (list, and on_found for the marks)."""
        try:
            found, note = self._read_findings()
        except Exception as exc:                     # noqa: BLE001 - a findings error must not break the view
            found, note = [], f"Finding the findings failed ({exc!r}). " + FINDINGS_NOTE
        with self.lock:
            self.findings = found
            self.note.value = f"<small>{html.escape(note)}</small>"
            self.list.options = self.options()
            self.list.rows = min(8, max(3, len(found)))
            if found:
                safe_call(self.on_found, on_error=self.show_error)
        self._done.set()

    def _read_findings(self):
        try:
            found = list(self.run.findings())
        except ImportError:
            return [], ("No findings yet: the findings module (nbkit.analyze.findings) is not part of this "
                        "installation. " + FINDINGS_NOTE)
        if not found:
            return [], "No findings for this recording. " + FINDINGS_NOTE
        return found, FINDINGS_NOTE

    def _on_select(self, change):
        if change["new"] is not None:
            self.on_pick(self.findings[change["new"]])

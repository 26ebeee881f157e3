"""The explorer's "try the remedies" button: replay the selected finding's remedies beside the control on a
background thread, show the replay's progress, then the verdict table and the comparison of the replays.

The numbers come from nbkit.try_remedies (nbkit.replay.remedies) and nbkit.analyze.remedies; this module
only turns its TriedRemedies into table rows (remedy_rows, a pure function) and lays them out. The
verdicts are heuristics, as the findings are: a replay of one window on the recorded batches, and the
interval is a bootstrap over its steps; the note under the table says so.
"""
from __future__ import annotations

import html
import threading
import time
import traceback

import ipywidgets as widgets
import numpy as np
from tqdm.std import tqdm as tqdm_std

from nbkit.analyze.remedies import remedies_for
from nbkit.replay.remedies import try_remedies
from nbkit.views.base import safe_call
from nbkit.views.compare import compare

PROGRESS_SECONDS = 0.1   # how often the progress bar reads the replay's step counter
REMEDIES_NOTE = ("Verdicts are heuristics: one window replayed from the keyframe before the finding on the "
                 "recorded batches; “gone” means the finding's rule no longer fires there, and the interval is a "
                 "moving-block bootstrap of the paired per-step loss difference (Künsch 1989).")


def remedy_rows(tried) -> list[dict]:
    """One row per verdict of a TriedRemedies: {"kind", "remedy", "replay", "outcome", "finding", "loss",
    "interval"} as display strings ("replay": its name in the comparison; "finding": "gone", "still found" or
    "—" where the remedy did not run)."""
    rows = []
    for v in tried.verdicts:
        ran = v.outcome not in ("skipped", "failed")
        mean, low, high = v.difference
        rows.append({
            "kind": v.remedy.kind,
            "remedy": v.remedy.description,
            "replay": (v.replay.meta.get("replay") or {}).get("optimizer", v.replay.path.name) if v.replay else "—",
            "outcome": v.outcome if ran else f"{v.outcome}: {v.why}",
            "finding": ("still found" if v.still_fires else "gone") if ran and v.still_fires is not None else "—",
            "loss": f"{v.loss:.4g} against {v.control_loss:.4g}" if ran else "—",
            "interval": (f"{mean:+.3g} ({low:+.3g} … {high:+.3g})" if ran and np.isfinite(mean) else "—"),
        })
    return rows


def remedies_html(tried) -> str:
    """The verdict of a TriedRemedies as a small HTML table (page text, not figure text)."""
    f = tried.finding
    control = "still shows it" if tried.control_still_fires else "does not show it"
    head = (f"<p><b>Remedies for {html.escape(f.kind)}</b> from step {f.first_step}: replayed steps "
            f"{tried.start}–{tried.start + tried.steps - 1} from keyframe {tried.start}; the control (the recorded "
            f"optimizer, unchanged) {control}.</p>")
    cells = ("remedy", "outcome", "finding", "loss", "interval")
    header = ("<tr><th>remedy</th><th>outcome</th><th>finding</th><th>mean loss from step "
              f"{f.first_step}, remedy against control</th><th>per-step difference (95 % interval)</th></tr>")
    body = ""
    for row in remedy_rows(tried):
        row = {**row, "remedy": f"{row['kind']} ({row['replay']}): {row['remedy']}"}
        body += "<tr>" + "".join(f"<td>{html.escape(row[c])}</td>" for c in cells) + "</tr>"
    return (f"<div class='nbkit-remedies'>{head}<table class='nbkit-remedies-table'>{header}{body}</table>"
            f"<p><small>{html.escape(REMEDIES_NOTE)}</small></p></div>")


class _ReplayProgress:
    """Mirrors the step counter of the replays' progress bars (tqdm, which nbkit.replay drives) into an
    IntProgress widget and a line of text, so a replay on a background thread shows its progress in the
    view. Bars are recognised by their description ("replay …") and by being new since start()."""

    def __init__(self, bar: widgets.IntProgress, text: widgets.HTML):
        self.bar, self.text = bar, text
        self._before: set = set()
        self._seen: list = []                # the replays' bars, kept after they close (n and total stay)
        self._stop = threading.Event()

    def start(self) -> None:
        with tqdm_std.get_lock():
            self._before = {id(b) for b in tqdm_std._instances}
        self._stop.clear()
        threading.Thread(target=self._follow, name="nbkit-remedies-progress", daemon=True).start()

    def stop(self) -> None:
        self._stop.set()
        self.update()

    def _follow(self):
        while not self._stop.wait(PROGRESS_SECONDS):
            self.update()

    def update(self) -> None:
        with tqdm_std.get_lock():
            bars = [b for b in tqdm_std._instances if id(b) not in self._before
                    and str(getattr(b, "desc", "")).startswith("replay")]
        for b in bars:
            if all(b is not s for s in self._seen):
                self._seen.append(b)
        if not self._seen:
            return
        bar = self._seen[-1]
        total, done = int(bar.total or 0), int(bar.n)
        self.bar.max, self.bar.value = max(total, 1), min(done, max(total, 1))
        self.text.value = (f"<small>{html.escape(str(bar.desc))}: step {done} of {total} replayed "
                           f"(bar {len(self._seen)})</small>")


class RemediesControl:
    """The "try the remedies" button for the finding selected in the explorer, its note, the replay's
    progress, the verdict table and the comparison of the control with each remedy's replay.

    run: the Recording; model, step_fn: as nbkit.explore (without a model the button is disabled and the
    note says why); show_error(text) reports an error of the background thread. Set `finding` (the
    explorer does on a pick); `thread` is the running (or last) background thread.
    """

    def __init__(self, run, model, step_fn, show_error):
        self.run, self.model, self.step_fn, self.show_error = run, model, step_fn, show_error
        self.button = widgets.Button(description="try the remedies", icon="flask",
                                     layout=widgets.Layout(width="150px"), disabled=True)
        self.button.add_class("nbkit-remedies")
        self.note = widgets.HTML()
        self.note.add_class("nbkit-remedies-note")
        self.progress = widgets.IntProgress(value=0, min=0, max=0, layout=widgets.Layout(width="200px",
                                                                                        visibility="hidden"))
        self.progress_text = widgets.HTML()
        self.verdict = widgets.HTML()
        self.verdict.add_class("nbkit-remedies-verdict")
        self.comparison_box = widgets.VBox()
        self.box = widgets.VBox([widgets.HBox([self.button, self.note]),
                                 widgets.HBox([self.progress, self.progress_text]),
                                 self.verdict, self.comparison_box])
        self.box.add_class("nbkit-remedies-box")
        self.finding = None
        self.tried = None                    # the last TriedRemedies
        self.comparison = None               # the last comparison (nbkit.compare) of its replays
        self.thread: threading.Thread | None = None
        self._busy = False
        self._follower = _ReplayProgress(self.progress, self.progress_text)
        self.button.on_click(lambda _: self.request())
        self.select(None)

    @property
    def running(self) -> bool:
        """A replay of remedies is in progress (the button is off meanwhile)."""
        return self._busy

    def say(self, text: str) -> None:
        self.note.value = f"<small>{html.escape(text)}</small>"

    def reason_disabled(self, finding) -> str | None:
        """Why the button cannot run for `finding` (None: it can)."""
        if self.model is None:
            return ("pass model= to nbkit.explore to try a finding's remedies (each is a replay from the keyframe "
                    "before the finding, beside the recorded optimizer unchanged)")
        if finding is None:
            return "select a finding to try its remedies"
        if self.running:
            return "the remedies of a finding are being replayed; wait for their verdict"
        try:
            proposed = remedies_for(finding, self.run.meta, None, self.run.steps)
        except Exception as exc:             # noqa: BLE001 - a finding the remedies cannot read: say so
            return f"its remedies could not be listed ({exc!r})"
        if not proposed:
            return f"a {finding.kind} finding proposes no remedy to replay"
        return None

    def select(self, finding) -> None:
        """The finding the button acts on (the explorer's pick)."""
        self.finding = finding
        if self.running:
            return                           # the button stays off until the replay is done
        why = self.reason_disabled(finding)
        self.button.disabled = why is not None
        self.say(why if why else f"replay the remedies of {finding.kind} from step {finding.first_step} "
                                 f"beside the recorded optimizer (a replay from the keyframe before it)")

    def request(self):
        """Start try_remedies for the selected finding on a background thread (returns it, or None)."""
        finding = self.finding
        why = self.reason_disabled(finding)
        if why is not None:
            self.say(why)
            return None
        self._busy = True
        self.button.disabled = True
        self.verdict.value = ""
        self.comparison_box.children = ()
        self.progress.value, self.progress.max = 0, 0
        self.progress.layout.visibility = "visible"
        self.progress_text.value = "<small>starting the replays …</small>"
        self.say(f"replaying the remedies of {finding.kind} from step {finding.first_step}; the view stays usable")
        self._follower.start()
        self.thread = threading.Thread(target=self._try, args=(finding,), name="nbkit-explorer-remedies",
                                       daemon=True)
        self.thread.start()
        return self.thread

    def wait(self, timeout: float | None = None) -> bool:
        """Block until the background replay is done (True) or `timeout` seconds passed."""
        if self.thread is None:
            return True
        self.thread.join(timeout)
        return not self.thread.is_alive()

    def _try(self, finding):
        started = time.monotonic()
        try:
            tried = try_remedies(self.run, finding, self.model, step_fn=self.step_fn, progress=True)
        except Exception as exc:             # noqa: BLE001 - a failed replay must not break the view
            self._follower.stop()
            self._done()
            self.say(f"could not try the remedies of {finding.kind}: {type(exc).__name__}: {exc}")
            safe_call(self.show_error, traceback.format_exc())
            return
        self._follower.stop()
        self.tried = tried
        self.verdict.value = remedies_html(tried)
        runs = [tried.control, *(v.replay for v in tried.verdicts if v.replay is not None)]
        note = (f"{len(runs) - 1} remedies replayed beside the control in {time.monotonic() - started:.0f} s; "
                "their comparison is below")
        try:
            self.comparison = compare(*runs)
            self.comparison.step = self.comparison.snap(int(finding.first_step))
            self.comparison_box.children = (self.comparison,)
        except Exception:                    # noqa: BLE001 - the table stands without the comparison
            safe_call(self.show_error, traceback.format_exc())
        self._done()
        self.say(note)

    def _done(self):
        self._busy = False
        self.progress_text.value = self.progress_text.value.replace("replayed", "replayed, done")
        self.select(self.finding)        # the finding picked meanwhile, if any, decides the button

    def close(self) -> None:
        self._follower.stop()
        if self.comparison is not None:
            self.comparison.close()

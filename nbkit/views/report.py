"""A self-contained, static HTML report of recordings: figures as embedded PNG, findings, commands.

The page has no script and loads nothing from the network, so it can be mailed or archived as the
evidence of a run. It only composes what the views render and what the findings say.
"""
from __future__ import annotations

import base64
import datetime
import html
import tempfile
from pathlib import Path

import numpy as np

from nbkit.version import __version__
from nbkit.views.compare import compare
from nbkit.views.landscape import run_names
from nbkit.views.verdict_table import verdict_html, verdict_of
from nbkit.views.explorer import explore
from nbkit.views.profile import profile_png

CAUTION = ("Findings are heuristics: each points at a step and tensor worth a look, not a proven cause. "
           "Verify a finding with a replay from a keyframe before acting on it. Recordings (and this report) "
           "can hold traces of the training data: treat them like the data itself.")

_STYLE = """
body { font-family: system-ui, sans-serif; max-width: 1180px; margin: 2em auto; color: #222; line-height: 1.45; }
h1 { font-size: 1.6em; } h2 { margin-top: 1.8em; border-bottom: 1px solid #ccc; }
table { border-collapse: collapse; margin: 0.6em 0; font-size: 0.92em; }
td, th { border: 1px solid #ccc; padding: 0.25em 0.6em; text-align: left; vertical-align: top; }
th { background: #f2f2f2; } .error { color: #b00020; font-weight: 600; } .warning { color: #a05a00; font-weight: 600; }
.caution { background: #fff8e1; border-left: 4px solid #e0a800; padding: 0.6em 1em; }
img { max-width: 100%; border: 1px solid #ddd; } code, pre { background: #f5f5f5; padding: 0.1em 0.3em; }
"""


def _png_data_uri(view) -> str:
    with tempfile.TemporaryDirectory() as folder:
        target = Path(folder) / "view.png"
        view.to_png(target)
        return "data:image/png;base64," + base64.b64encode(target.read_bytes()).decode()


def _figure(title: str, uri: str, caption: str = "") -> str:
    note = f"<p>{html.escape(caption)}</p>" if caption else ""
    return f"<h3>{html.escape(title)}</h3>{note}<img alt='{html.escape(title)}' src='{uri}'>"


def findings_table(findings) -> str:
    if not findings:
        return "<p>No findings: none of the checks fired on this recording.</p>"
    rows = []
    for f in findings:
        tensors = ", ".join(f.tensors[:4]) + (" …" if len(f.tensors) > 4 else "")
        evidence = ", ".join(f"{k}={_number(v)}" for k, v in list(f.evidence.items())[:5])
        steps = f"{f.first_step}" if f.first_step == f.last_step else f"{f.first_step}–{f.last_step}"
        rows.append(f"<tr><td class='{f.severity}'>{f.severity}</td><td>{html.escape(f.kind)}</td>"
                    f"<td>{steps}</td><td>{html.escape(tensors)}</td><td>{html.escape(evidence)}</td>"
                    f"<td>{html.escape(f.suggestion)}</td><td>{html.escape(f.source)}</td></tr>")
    return ("<table><tr><th>severity</th><th>kind</th><th>steps</th><th>tensors</th><th>evidence</th>"
            "<th>suggestion</th><th>source</th></tr>" + "".join(rows) + "</table>")


def _focus(findings):
    """The finding a static picture should show: the most severe one that names a tensor, earliest first."""
    rank = {"error": 0, "warning": 1, "info": 2}
    named = [f for f in findings if f.tensors and f.kind not in ("orphan", "no-gradient")]
    return min(named, key=lambda f: (rank[f.severity], f.first_step), default=None)


def profile_focus(run, findings):
    """(tensor, step, finding or None) for the report's profile picture: the first eps-dominated finding
    naming a profiled tensor, else the first finding naming one, else the first profiled tensor at the
    last step; None when the recording has no profiles."""
    profiled = run.profile_tensors
    if not profiled:
        return None
    ordered = [f for f in findings if f.kind == "eps-dominated"] + [f for f in findings if f.kind != "eps-dominated"]
    for finding in ordered:
        named = [t for t in finding.tensors if t in profiled]
        if named:
            return named[0], int(finding.first_step), finding
    return profiled[0], int(run.steps[-1]) if len(run.steps) else 0, None


def _profile_figure(run, findings) -> str:
    focus = profile_focus(run, findings)
    if focus is None or not len(run.steps):
        return ""
    tensor, step, finding = focus
    uri = "data:image/png;base64," + base64.b64encode(profile_png(run, tensor, step)).decode()
    why = (f"the tensor the {finding.kind} finding names (a heuristic), at its first step {step}" if finding
           else f"the first profiled tensor (no finding names one), at the last step {step}")
    return _figure(f"Unit profile of {tensor}", uri,
                   f"Each unit's gain over the median unit's gain, output units above and input features below; "
                   f"{why}. Blue: damped (below ×½), orange: accelerated (above ×2), grey: no value.")


def _number(value) -> str:
    if isinstance(value, float):
        return f"{value:.4g}"
    return str(value)


def _hyper(value) -> str:
    if isinstance(value, float):
        return f"{value:.4g}"
    if isinstance(value, (list, tuple)):
        return "(" + ", ".join(_hyper(v) for v in value) + ")"
    return str(value)


def _run_table(run) -> str:
    meta = run.meta
    steps = run.steps
    groups = meta.get("param_groups", [])
    hyper = "; ".join(", ".join(f"{k}={_hyper(v)}" for k, v in g.items() if k in ("lr", "betas", "eps", "momentum",
                                                                             "weight_decay", "alpha"))
                      for g in groups)
    replay = meta.get("replay") or {}
    lr = run.lr
    lr_range = ""
    if lr.size and np.isfinite(lr).any():
        low, high = np.nanmin(lr), np.nanmax(lr)
        lr_range = f"{low:.4g}" if low == high else f"{low:.4g} … {high:.4g} (varies over the run)"
    rows = [("path", str(run.path)), ("optimizer", f"{meta['optimizer']['class']} ({hyper})"),
            ("learning rate recorded", lr_range or "unknown"),
            ("steps", f"{len(steps)} ({steps[0]}–{steps[-1]})" if len(steps) else "none"),
            ("tensors", str(len(run.tensors))), ("keyframes", ", ".join(map(str, run.keyframes))),
            ("closed cleanly", "yes" if run.closed_cleanly else "no"),
            ("torch / threads", f"{meta.get('torch_version')} / {meta.get('threads')}")]
    if replay:
        rows.append(("replay of", f"{replay.get('parent')} from step {replay.get('start')}"))
    return "<table>" + "".join(f"<tr><th>{html.escape(k)}</th><td>{html.escape(v)}</td></tr>" for k, v in rows) + "</table>"


def write_report(runs, path, *, title: str = "nbkit report", findings=None, landscape=None,
                 commands: list[str] | None = None, intro: str = "", remedies=None) -> Path:
    """Write the report of `runs` (Recordings) to `path`; returns the path.

    findings: {run path: [Finding]} to reuse already computed findings (else run.findings()).
    landscape: a landscape view (anything with .to_png) to include. commands: shell lines that
    reproduce the report. remedies: nbkit.try_remedies results, shown as a table each.
    """
    runs = list(runs)
    parts = [f"<h1>{html.escape(title)}</h1>",
             f"<p>Written {datetime.datetime.now().strftime('%Y-%m-%d %H:%M')} by nbkit {__version__}.</p>"]
    if intro:
        parts.append(f"<p>{html.escape(intro)}</p>")
    parts.append(f"<p class='caution'>{html.escape(CAUTION)}</p>")
    if len(runs) > 1:                              # the report opens with the verdict (DESIGN §2)
        named = run_names(runs)
        known = {name: (findings or {}).get(str(run.path)) for name, run in named.items()}
        parts.append("<h2>Verdict</h2>" + verdict_html(verdict_of(named, {k: f for k, f in known.items() if f is not None})))
    for run in runs:
        found = (findings or {}).get(str(run.path))
        if found is None:
            found = run.findings()
        parts.append(f"<h2>{html.escape(run.path.name)}</h2>")
        parts.append(_run_table(run))
        parts.append("<h3>Findings</h3>" + findings_table(found))
        explorer = explore(run)
        caption = "Timeline, layer map and coordinate view, as the notebook view shows them"
        focus = _focus(found)
        explorer.wait_for_findings(timeout=120)     # the picture shows the finding marks (png_bytes waits too)
        if focus is not None:
            with explorer.hold_sync():
                explorer.step, explorer.tensor = focus.first_step, focus.tensors[0]
            caption += f", with the cursor on the {focus.kind} finding at step {focus.first_step} in {focus.tensors[0]}"
        parts.append(_figure("Explorer", _png_data_uri(explorer), caption + "."))
        explorer.close()
        parts.append(_profile_figure(run, found))
    if len(runs) > 1:
        parts.append("<h2>Comparison</h2>")
        comparison = compare(*runs)
        shared = max(int(r.steps[0]) for r in runs if len(r.steps))
        comparison.step = shared
        parts.append(_figure("Runs side by side", _png_data_uri(comparison),
                             f"Replays share the first run's step numbers and batches; cursor at step {shared}, "
                             "the first step every run holds."))
    if landscape is not None:
        parts.append("<h2>Loss landscape slice</h2>")
        parts.append(_figure("Loss on the plane through the start point and the runs' end points",
                             _png_data_uri(landscape)))
    if remedies:
        parts.append("<h2>Remedies tried</h2>" + "".join(remedies_table(t) for t in remedies))
    if commands:
        parts.append("<h2>Reproduce</h2><pre>" + html.escape("\n".join(commands)) + "</pre>")
    page = (f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>{html.escape(title)}</title>"
            f"<style>{_STYLE}</style></head><body>{''.join(parts)}</body></html>")
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(page, encoding="utf-8")
    return path


def remedies_table(tried) -> str:
    """One finding's remedies (nbkit.try_remedies) as an HTML table: outcome, whether the finding is still
    found in the window, loss against the unchanged control and the 95 % interval of their difference."""
    f = tried.finding
    head = (f"<p><b>{html.escape(f.kind)}</b> from step {f.first_step}: steps {tried.start}-"
            f"{tried.start + tried.steps - 1} replayed from keyframe {tried.start}; the control (the recorded "
            f"optimizer, unchanged) {'still shows it' if tried.control_still_fires else 'does not show it'}. "
            "A heuristic over this window: confirm before changing the run.</p>")
    rows = []
    for v in tried.verdicts:
        mean, low, high = v.difference
        fires = "-" if v.still_fires is None else ("still found" if v.still_fires else "gone")
        numbers = (f"<td>{v.loss:.4g}</td><td>{v.control_loss:.4g}</td><td>{mean:+.3g} [{low:+.3g}, {high:+.3g}]</td>"
                   if v.outcome not in ("skipped", "failed") else f"<td colspan='3'>{html.escape(v.why)}</td>")
        rows.append(f"<tr><td>{html.escape(v.remedy.description)}</td><td>{html.escape(v.outcome)}</td>"
                    f"<td>{fires}</td>{numbers}</tr>")
    return (head + "<table><tr><th>remedy</th><th>outcome</th><th>finding</th><th>loss</th><th>control loss</th>"
            "<th>per-step difference [95 % interval]</th></tr>" + "".join(rows) + "</table>")

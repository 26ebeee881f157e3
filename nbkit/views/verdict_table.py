"""The verdict table that opens the comparison and the report: selects from the recordings, the
numbers come from nbkit.analyze.verdict."""
from __future__ import annotations

import html

import numpy as np

from nbkit.analyze.verdict import Verdict, verdict

SOURCE = ("moving-block bootstrap over steps of the paired per-step loss differences (Künsch 1989, "
          "“The jackknife and the bootstrap for general stationary observations”)")


def verdict_of(runs: dict, findings: dict | None = None) -> Verdict:
    """The verdict of {name: Recording}; findings {name: [Finding]} (default: each run's run.findings())."""
    losses, full, metas, found = {}, {}, {}, {}
    for name, run in runs.items():
        steps = np.asarray(run.steps, dtype=np.int64)
        losses[name] = (steps, np.asarray(run.loss, dtype=np.float64))
        full[name] = steps[np.asarray(run.heavy, dtype=bool)] if len(steps) else steps
        metas[name] = run.meta
        if findings is not None and name in findings:
            found[name] = findings[name]
        else:
            try:
                found[name] = list(run.findings())
            except Exception:                       # noqa: BLE001 - no findings module: the table says so
                found[name] = []
    return verdict(losses, findings=found, full_steps=full, metas=metas)


def _number(value: float) -> str:
    return f"{value:.4g}" if np.isfinite(value) else "undefined: no finite loss in the window"


def verdict_html(v: Verdict, colours: dict | None = None) -> str:
    """The verdict as an HTML table with a sentence on the margin (page text, not figure text)."""
    if v.window is None:
        return f"<p class='nbkit-verdict'><b>Verdict:</b> {html.escape(v.note)}</p>"
    head = (f"<p><b>Verdict</b> over the steps every run recorded, {v.window[0]}–{v.window[1]}; final window "
            f"{v.final[0]}–{v.final[1]} (its last 10 %). Findings are counted at the steps every run recorded "
            "in full; they are heuristics.</p>")
    rows = []
    for r in v.rows:
        swatch = f"<span style='color:{colours[r.name]}'>■</span> " if colours and r.name in colours else ""
        mark = " ★ best" if r.name == v.best else (" ★ tied with the best" if r.name in v.ties else "")
        kinds = ", ".join(f"{k} ×{n}" for k, n in r.findings.items()) or "none"
        best = f"{_number(r.best_loss)} (step {r.best_step})" if r.best_step is not None else _number(r.best_loss)
        rows.append(f"<tr><td>{swatch}<b>{html.escape(r.name)}</b>{mark}</td><td>{_number(r.final_loss)}</td>"
                    f"<td>{best}</td><td>{html.escape(kinds)}</td><td>{html.escape(r.fidelity or '—')}</td></tr>")
    table = ("<table class='nbkit-verdict'><tr><th>run</th><th>final-window loss (mean)</th><th>best loss</th>"
             "<th>findings in the window</th><th>fidelity (self-replay)</th></tr>" + "".join(rows) + "</table>")
    m = v.margin
    if m is not None:
        judged = "a clear margin" if m.clear else "within the noise"
        tail = (f"<p>{html.escape(v.best)} is ahead of {html.escape(m.runner_up)} by {m.difference:.3g} in loss "
                f"(95 % interval {m.low:.3g} … {m.high:.3g}, {m.steps} paired steps, blocks of {m.block}): "
                f"{judged}. Interval from a {html.escape(SOURCE)}.</p>")
    else:
        tail = f"<p>{html.escape(v.note)}</p>" if v.note else ""
    return f"<div class='nbkit-verdict'>{head}{table}{tail}</div>"


def verdict_lines(v: Verdict) -> list[str]:
    """The verdict as plain lines (a static picture's footer)."""
    if v.window is None:
        return [f"Verdict: {v.note}"]
    lines = [f"Verdict over steps {v.window[0]}–{v.window[1]} (final window {v.final[0]}–{v.final[1]}):"]
    for r in v.rows:
        kinds = ", ".join(f"{k} ×{n}" for k, n in r.findings.items()) or "no findings"
        fidelity = f"; {r.fidelity}" if r.fidelity else ""
        best = " (best)" if r.name == v.best else (" (tied with the best)" if r.name in v.ties else "")
        lines.append(f"  {r.name}{best}: final-window loss {_number(r.final_loss)}, "
                     f"best {_number(r.best_loss)}; {kinds}{fidelity}")
    if v.margin is not None:
        m = v.margin
        lines.append(f"  margin over {m.runner_up}: {m.difference:.3g} (95 % {m.low:.3g} … {m.high:.3g}, moving-block "
                     f"bootstrap, Künsch 1989): {'clear' if m.clear else 'within the noise'}")
    elif v.note:
        lines.append("  " + v.note)
    return lines

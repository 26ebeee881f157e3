"""nbkit.try_remedies: replay a finding's remedies from the keyframe before it, on the same batches, beside
the recorded optimizer replayed unchanged (the control), and say per remedy whether the symptom went away.

A top-level function rather than a Finding method: a Finding is plain data of the analysis layer, which
cannot run replays (the layers point one way), and findings loaded from JSON stay plain.
"""
from __future__ import annotations

import re
import warnings
from dataclasses import dataclass

import numpy as np

from nbkit.analyze.findings.rules import find
from nbkit.analyze.findings.thresholds import Thresholds
from nbkit.analyze.remedies import Remedy, RemedyVerdict, outcome_of, paired_difference, remedies_for
from nbkit.errors import ReplayError
from nbkit.recording import Recording, load
from nbkit.replay.changes import Change
from nbkit.replay.replay import replay

MAX_WINDOW = 400        # steps replayed at most (the finding's span plus a margin)
MAX_REMEDIES = 4        # remedies tried at most per call
MARGIN = 50             # steps after the finding's last step, at least
CONTROL = "control"


@dataclass
class TriedRemedies:
    """The outcome of nbkit.try_remedies: the window, the control replay and one verdict per remedy."""

    finding: object
    start: int
    steps: int
    control: Recording | None
    control_still_fires: bool | None
    verdicts: list

    def table(self) -> str:
        """The verdict as plain text, one line per remedy."""
        lines = [f"{self.finding.kind} from step {self.finding.first_step}: replayed steps {self.start}-"
                 f"{self.start + self.steps - 1} from keyframe {self.start}; the control (the recorded optimizer, "
                 f"unchanged) {'still shows it' if self.control_still_fires else 'does not show it'}"]
        for v in self.verdicts:
            if v.outcome in ("skipped", "failed"):
                lines.append(f"  {v.remedy.description}: {v.outcome} ({v.why})")
                continue
            mean, low, high = v.difference
            lines.append(f"  {v.remedy.description}: {v.outcome}; finding {'still fires' if v.still_fires else 'gone'}; "
                         f"loss {v.loss:.4g} against {v.control_loss:.4g} (per-step difference {mean:+.3g}, 95 % "
                         f"interval {low:+.3g} … {high:+.3g})")
        return "\n".join(lines)


def try_remedies(run, finding, model, step_fn=None, batches=None, steps=None, start=None, remedies=None,
                 to=None, workers=1, progress=True) -> TriedRemedies:
    """Replay `finding`'s remedies (default: remedies_for(finding); at most MAX_REMEDIES) and the control
    from the keyframe at or before the finding's first step (or `start`), for the finding's span plus
    MARGIN steps (at most MAX_WINDOW; `steps` overrides), on the recorded batches (kept, or `batches` with
    `step_fn`, as nbkit.replay). Each verdict says whether the finding's kind is still found in the
    window, the mean loss from the finding's first step to the window's end against the control, and
    whether their paired per-step difference is clearly below or above zero (moving-block bootstrap).
    A remedy that cannot apply is skipped with the reason; one whose replay fails is marked failed with
    the error, and the others still run."""
    run = run if isinstance(run, Recording) else load(run)
    start = _start(run, finding, start)
    last = int(run.steps[-1])
    if steps is None:
        steps = min(MAX_WINDOW, finding.last_step - start + 1 + max(MARGIN, (finding.last_step - finding.first_step) // 2))
    steps = max(1, min(steps, last - start + 1))
    proposed = list(remedies) if remedies is not None else remedies_for(
        finding, run.meta, run.grad_norm, run.steps)
    proposed = proposed[:MAX_REMEDIES]
    verdicts, lanes = [], {CONTROL: None}
    names = {}
    for k, remedy in enumerate(proposed):
        if remedy.skip:
            verdicts.append(_skipped(remedy, remedy.skip))
            continue
        why = _not_applicable(remedy, run.meta)
        if why:
            verdicts.append(_skipped(remedy, why))
            continue
        name = f"remedy-{k}-{re.sub(r'[^a-z0-9]+', '-', remedy.kind.lower())}"
        lanes[name], names[name] = Change(**remedy.change), remedy
    target = to if to is not None else f"{run.path}.remedies/{finding.kind}-{finding.first_step}"
    options = dict(step_fn=step_fn, batches=batches, start=start, steps=steps, to=target, workers=workers,
                   progress=progress)
    try:
        replays = replay(run, model, optimizers=lanes, **options)
    except Exception:                          # noqa: BLE001 - find which lane fails: each alone
        replays = {}
        for name, change in lanes.items():
            try:
                replays.update(replay(run, model, optimizers={name: change}, **options))
            except Exception as exc:            # noqa: BLE001 - reported in the verdict
                if name == CONTROL:
                    raise
                verdicts.append(RemedyVerdict(names[name], None, np.nan, np.nan, (np.nan,) * 3, "failed",
                                              f"{type(exc).__name__}: {exc}"))
                names.pop(name)
    control = replays[CONTROL]
    window = (finding.first_step, start + steps - 1)
    control_loss = _loss_over(control, *window)
    control_fires = _still_fires(control, finding, window, run)
    for name, remedy in names.items():
        recording = replays[name]
        loss = _loss_over(recording, *window)
        difference = paired_difference(loss, control_loss)
        fires = _still_fires(recording, finding, window, run)
        verdicts.append(RemedyVerdict(remedy, fires, _mean(loss), _mean(control_loss), difference,
                                      outcome_of(difference, fires, loss), replay=recording))
    verdicts.sort(key=lambda v: next((i for i, r in enumerate(proposed) if r is v.remedy), len(proposed)))
    return TriedRemedies(finding, start, steps, control, control_fires, verdicts)


def _start(run, finding, start) -> int:
    keyframes = sorted(run.keyframes)
    if start is not None:
        return int(start)
    before = [k for k in keyframes if k <= finding.first_step]
    if not before:
        nearest = min(keyframes, key=lambda k: abs(k - finding.first_step)) if keyframes else None
        raise ReplayError(f"No keyframe at or before step {finding.first_step}, where the {finding.kind} finding "
                          f"starts (keyframes: {keyframes[:10]}); the nearest is {nearest}: pass "
                          f"start={nearest} to try the remedies from there")
    return before[-1]


def _not_applicable(remedy: Remedy, meta: dict) -> str | None:
    groups = meta.get("param_groups") or [{}]
    optimizer = (meta.get("optimizer") or {}).get("class", "")
    if remedy.change.get("eps") is not None and "eps" not in groups[0]:
        return f"{optimizer} has no ε"
    if remedy.change.get("decoupled_decay") and "decoupled_weight_decay" not in groups[0]:
        return f"{optimizer} has no decoupled form of its weight decay"
    return None


def _skipped(remedy, why):
    return RemedyVerdict(remedy, None, np.nan, np.nan, (np.nan,) * 3, "skipped", why)


def _loss_over(recording, first, last) -> np.ndarray:
    steps, loss = recording.steps, np.asarray(recording.loss, dtype=np.float64)
    return loss[(steps >= first) & (steps <= last)]


def _mean(values) -> float:
    values = np.asarray(values, dtype=np.float64)
    return float(values.mean()) if len(values) else np.nan


def _still_fires(recording, finding, window, parent=None) -> bool:
    """The finding's kind is found again in the window. Replays estimate no sharpness, so for
    over-stability-limit this is the rule's loss condition at the finding's first step s: the loss's
    median over steps s+1 … s+stability_window above stability_rise × its median over the window up to s
    (taken from the parent where the replay starts at s), or a non-finite loss."""
    if finding.kind == "over-stability-limit":
        t, s = Thresholds(), finding.first_step
        after = _loss_over(recording, s + 1, s + t.stability_window)
        source = recording if recording.steps[0] <= s - t.stability_window + 1 or parent is None else parent
        before = _loss_over(source, s - t.stability_window + 1, s)
        if not len(after) or not len(before):
            return False
        return bool(not np.isfinite(after).all() or np.median(after) > t.stability_rise * np.median(before))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        found = find(recording)
    first, last = window
    return any(f.kind == finding.kind and f.first_step <= last and f.last_step >= first
               and (not finding.tensors or set(f.tensors) & set(finding.tensors)) for f in found)

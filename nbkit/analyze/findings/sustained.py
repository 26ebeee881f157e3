"""Sustained patterns: stretches of recorded rows that meet a condition, findings per tensor over them, merging.

"Sustained" means: in some window of `window` consecutive recorded (heavy) rows, at least
`sustained_share` of the rows meet the condition; the finding spans the first to the last such row.
"""
from __future__ import annotations

import math

import numpy as np

from nbkit.analyze.finding import Finding

REPLAY_HINT = "Verify with a replay from the keyframe before step {step} (nbkit.replay)"


def sustained_segments(mask: np.ndarray, window: int, share: float) -> list[tuple[int, int]]:
    """(first, last) row positions of sustained stretches of `mask` (module docstring)."""
    n = len(mask)
    if n == 0:
        return []
    window = min(window, n)
    if window < 5:
        return []
    need = math.ceil(share * window)
    counts = np.convolve(mask.astype(np.int64), np.ones(window, dtype=np.int64), mode="valid")  # (n-w+1,)
    covered = np.zeros(n + 1, dtype=bool)
    for start in np.flatnonzero(counts >= need):
        covered[start:start + window] = True
    out, start = [], None
    for i in range(n + 1):                       # runs of covered rows, trimmed to rows meeting the mask
        if covered[i] and start is None:
            start = i
        elif not covered[i] and start is not None:
            hits = np.flatnonzero(mask[start:i])
            out.append((start + int(hits[0]), start + int(hits[-1])))
            start = None
    return out


def merge_findings(findings: list[Finding]) -> list[Finding]:
    """One finding per kind and overlapping step range; the tensors of merged findings are united."""
    merged: list[Finding] = []
    for f in sorted(findings, key=lambda f: (f.kind, f.severity, f.first_step)):
        last = merged[-1] if merged else None
        if last and last.kind == f.kind and last.severity == f.severity and f.first_step <= last.last_step:
            evidence = dict(last.evidence)
            for key, value in f.evidence.items():
                evidence[key] = max(evidence.get(key, value), value) if key.startswith("max") else evidence.get(key, value)
            units = {name: {axis: list(names) for axis, names in axes.items()} for name, axes in last.units.items()}
            for name, axes in f.units.items():
                for axis, names in axes.items():
                    kept = units.setdefault(name, {}).setdefault(axis, [])
                    kept.extend(n for n in names if n not in kept)
            merged[-1] = Finding(last.kind, last.tensors + [x for x in f.tensors if x not in last.tensors],
                                 last.first_step, max(last.last_step, f.last_step), last.severity, evidence,
                                 last.suggestion, last.source, units)
        else:
            merged.append(f)
    return merged


def per_tensor_findings(data, t, kind, severity, condition, describe, suggestion, source="common practice",
                        tensors=None, window=None, share=None, merge=True) -> list[Finding]:
    """Findings where `condition(k) -> bool mask over heavy rows` is sustained for tensor k.

    data: the FindingInputs; t: the Thresholds; describe(k, a, b) -> the evidence of rows a..b of tensor k;
    suggestion: the advice, to which the replay hint is added; tensors=None: every tensor, else the
    indices to judge; window, share: override t.window and t.sustained_share; merge=False keeps one
    finding per tensor and stretch.
    """
    out = []
    for k, name in enumerate(data.tensors):
        if tensors is not None and k not in tensors:
            continue
        with np.errstate(invalid="ignore"):
            mask = condition(k)
        for a, b in sustained_segments(mask, window or t.window, t.sustained_share if share is None else share):
            first, last = int(data.heavy_steps[a]), int(data.heavy_steps[b])
            out.append(Finding(kind, [name], first, last, severity, describe(k, a, b),
                               suggestion + " " + REPLAY_HINT.format(step=first) + ".", source))
    return merge_findings(out) if merge else out

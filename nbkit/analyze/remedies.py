"""Remedies: what a finding proposes to change in a replay, as plain data, and the verdict on a remedy's
replay against the control (the recorded optimizer replayed unchanged over the same window).

A Remedy is readable (`description`) and executable: `change` holds the keyword arguments of
nbkit.replay.Change (the recorded optimizer replayed with its whole schedule, then this change). Users
can write their own: Remedy("mine", "lr x0.3", {"lr_scale": 0.3}). nbkit.try_remedies runs them.
Like findings, verdicts are heuristics over one window: they say whether the symptom went away there.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

BOOTSTRAP_SAMPLES = 2000
BOOTSTRAP_SEED = 20261203


@dataclass(frozen=True)
class Remedy:
    """One proposed fix. kind: a plain name ("lower-lr", "clip", "add-to-optimizer", "decouple-decay",
    "lower-eps", "rescale-inputs", "raise-lr"); change: nbkit.replay.Change keyword arguments; data: it
    changes the batches (a data remedy), not the optimizer; skip: why it cannot apply here (None: it can)."""

    kind: str
    description: str
    change: dict = field(default_factory=dict)
    data: bool = False
    skip: str | None = None


def remedies_for(finding, meta: dict, grad_norm: np.ndarray | None = None, steps: np.ndarray | None = None) -> list:
    """The remedies a finding proposes (an empty list for kinds without one). meta: the recording's
    metadata; grad_norm, steps: the run's per-step pre-clip gradient norm and step numbers (for clipping
    at the running median norm)."""
    kind = finding.kind
    groups = meta.get("param_groups") or [{}]
    optimizer = (meta.get("optimizer") or {}).get("class", "")
    if kind in ("over-stability-limit", "oversized-updates"):
        return [Remedy("lower-lr", f"the recorded learning-rate schedule × {s} from the keyframe on", {"lr_scale": s})
                for s in (0.5, 0.25, 0.1)]
    if kind == "grad-spike":
        norm = _running_median(grad_norm, steps, finding.first_step)
        if not np.isfinite(norm) or norm <= 0:
            return [Remedy("clip", "clip at 2 × the running median gradient norm", skip="no gradient norms were "
                           "recorded before the spike")]
        return [Remedy("clip", f"clip the gradient norm at 2 × its running median before the spike ({2 * norm:.3g})",
                       {"clip_norm": float(2 * norm)})]
    if kind == "orphan":
        return [Remedy("add-to-optimizer", f"add {', '.join(finding.tensors)} to the optimizer (a new group with "
                       "group 0's settings)", {"add_tensors": tuple(finding.tensors)})]
    if kind == "coupled-decay":
        return [Remedy("decouple-decay", f"{optimizer}'s weight decay applied decoupled (AdamW's rule, same decay)",
                       {"decoupled_decay": True})]
    if kind == "eps-dominated":
        eps = float(groups[0].get("eps", math.nan))
        out = [Remedy("lower-eps", f"ε lowered 1000 × (to {eps / 1000:.3g})", {"eps": eps / 1000})
               if math.isfinite(eps) else Remedy("lower-eps", "ε lowered", skip=f"{optimizer} has no ε")]
        out += _rescaled_inputs(finding, meta)
        return out
    if kind == "stalled-updates":
        group = _group_of(finding.tensors[0], meta) if finding.tensors else 0
        return [Remedy("raise-lr", f"the learning rate of parameter group {group} × 4", {"group_lr_scale": {group: 4.0}})]
    return []


def _rescaled_inputs(finding, meta) -> list:
    """eps-dominated columns of the first weight, which reads the model's input: a data remedy rescaling
    those input columns by the inverse of their measured gradient ratio (a power of 10)."""
    units = getattr(finding, "units", None) or {}
    evidence = finding.evidence or {}
    ratio = evidence.get("unit_grad_ratio", evidence.get("input_scale"))
    first_weight = next((t["name"] for t in meta.get("tensors", []) if len(t["shape"]) >= 2), None)
    if not units or first_weight not in units or "columns" not in units[first_weight] or not ratio or ratio <= 0:
        return []
    names = units[first_weight]["columns"]
    labels = (((meta.get("profiles") or {}).get("unit_names") or {}).get(first_weight) or {}).get("columns")
    columns = tuple(labels.index(n) if labels and n in labels else int(n) for n in names)
    factor = float(10 ** round(-math.log10(ratio)))
    return [Remedy("rescale-inputs", f"data remedy: the model input's columns {list(columns)} × {factor:g} in the "
                   f"kept batches (assumes {first_weight} reads the model's first input directly)",
                   {"input_scale": ((0, columns, factor),)}, data=True)]


def _group_of(tensor: str, meta: dict) -> int:
    for g, group in enumerate(meta.get("param_groups", [])):
        if tensor in group.get("params", []):
            return g
    return 0


def _running_median(values, steps, before: int, window: int = 50) -> float:
    if values is None or steps is None or not len(values):
        return math.nan
    rows = np.flatnonzero((steps < before) & (steps >= before - window))
    part = np.asarray(values, dtype=np.float64)[rows]
    part = part[np.isfinite(part)]
    return float(np.median(part)) if len(part) else math.nan


@dataclass
class RemedyVerdict:
    """One remedy's replay against the control over the window."""

    remedy: Remedy
    still_fires: bool | None        # the finding's kind still found in the window (None: not run)
    loss: float                     # mean loss over the last `tail` steps of the window
    control_loss: float
    difference: tuple               # (mean remedy − control loss per step over the tail, low, high): 95 % interval
    outcome: str                    # "better", "worse", "no clear difference", "skipped", "failed"
    why: str = ""
    replay: object = None           # the remedy's Recording


def paired_difference(remedy_loss: np.ndarray, control_loss: np.ndarray, seed: int = BOOTSTRAP_SEED) -> tuple:
    """(mean, low, high) of the per-step loss difference remedy − control, with a 95 % moving-block
    bootstrap interval (Künsch 1989, "The jackknife and the bootstrap for general stationary
    observations"; block length n^(1/3), the order Hall, Horowitz & Jing 1995 give, from memory): the
    steps are paired (same batches), neighbouring differences are correlated, blocks keep that."""
    d = np.asarray(remedy_loss, dtype=np.float64) - np.asarray(control_loss, dtype=np.float64)
    d = d[np.isfinite(d)]
    n = len(d)
    if n == 0:
        return math.nan, math.nan, math.nan
    if n < 3:
        return float(d.mean()), float(d.min()), float(d.max())
    block = max(1, round(n ** (1 / 3)))
    starts = n - block + 1
    rng = np.random.default_rng(seed)
    picks = rng.integers(0, starts, size=(BOOTSTRAP_SAMPLES, -(-n // block)))
    index = (picks[:, :, None] + np.arange(block)).reshape(BOOTSTRAP_SAMPLES, -1)[:, :n]
    means = d[index].mean(axis=1)
    return float(d.mean()), float(np.percentile(means, 2.5)), float(np.percentile(means, 97.5))


def outcome_of(difference: tuple, still_fires: bool | None, remedy_loss: np.ndarray) -> str:
    """better / worse / no clear difference, from the interval of the paired difference; a replay whose
    loss went non-finite is worse."""
    if not np.isfinite(np.asarray(remedy_loss, dtype=np.float64)).all():
        return "worse"
    mean, low, high = difference
    if not math.isfinite(mean):
        return "no clear difference"
    if high < 0:
        return "better"
    if low > 0:
        return "worse"
    return "no clear difference"

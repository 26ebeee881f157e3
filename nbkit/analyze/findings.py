"""Automatic findings: known failure patterns located at a step range and tensor of a recording.

`find(run, **thresholds)` (run.findings) reads the recorded series and returns Finding objects sorted by
step. Every finding is a heuristic: its suggestion says to verify it with a replay. Thresholds are the
fields of `Thresholds` (README.md, "Findings", explains each); any can be overridden by keyword.

"Sustained" means: in some window of `window` consecutive recorded (heavy) rows, at least
`sustained_share` of the rows meet the condition; the finding spans the first to the last such row.
"""
from __future__ import annotations

from dataclasses import dataclass, fields

import numpy as np

from nbkit.analyze.curvature import AnalysisError
from nbkit.analyze.finding import Finding
from nbkit.analyze.findings_patterns import (REPLAY, _dead_units, _eps_dominated, _grad_spike, _lost_updates,
                                             _merge, _noise_scale, _over_stability_limit, _oscillation,
                                             _overshoot, _plateau, _update_ratio)
from nbkit.analyze.stability import ADAM_FAMILY, coupled_weight_decay



@dataclass(frozen=True)
class Thresholds:
    """Documented defaults; the reason for each is beside it (README.md, "Findings")."""

    window: int = 20                  # heavy rows a pattern must last to count as sustained
    sustained_share: float = 0.8      # share of the window's rows that must meet the condition
    spike_factor: float = 10.0        # grad-spike: global gradient norm above 10× its running median ...
    spike_over_max: float = 1.5       # ... and 1.5× the largest of the history (not an ordinary swing)
    spike_history: int = 50           # rows of running history
    spike_min_history: int = 10       # rows needed before spikes are judged
    update_ratio_high: float = 0.25   # 250× the common-practice 1e-3: weights rewritten every few steps
    update_ratio_extreme: float = 1.0 # any single step that moves a weight by more than its own norm
    update_ratio_low: float = 1e-5    # 100× below 1e-3 while the learning rate is not decayed
    eps_share: float = 0.5            # "most coordinates": ε outweighs √v̂ for over half of them
    relevant_grad: float = 1e-4       # eps-dominated, lost-updates: only tensors whose gradient RMS is at
                                      # least 1e-4 × the median tensor's (others barely matter to the loss)
    tiny_input: float = 1e-3          # ... or weights whose gradient RMS is below 1e-3 × their own layer's
                                      # bias gradient RMS: the layer's inputs are ~1000× below unit scale
    sign_flip: float = 0.25           # oscillation: a quarter of the coordinates flip sign (the sharp
                                      # directions that oscillate are few, but dominate the gradient) ...
    grad_cosine: float = -0.3         # ... with consecutive gradients pointing against each other ...
    oscillation_decay: float = 0.5    # ... a gradient norm that does not decay (a converging zig-zag) ...
    oscillation_progress: float = 0.05  # ... a loss that does not fall by 5 % meanwhile ...
    oscillation_gap: float = 0.1      # ... and sits above its best by 10 % of the run's loss range
    reversed_share: float = 0.3       # overshoot: many updates move against the gradient ...
    reversed_over_flip: float = 2.0   # ... twice as often as gradients flip sign (noise reverses about as
                                      # often as it flips; momentum carried past a minimum reverses more)
    dead_share: float = 0.25          # dead-units: a quarter of a weight's rows without gradient (info;
    dead_share_warning: float = 0.5   # half of them: warning) ...
    dead_window: int = 50             # ... in every row of this many heavy rows
    lost_share: float = 0.25          # lost-updates: a quarter of the updates round to nothing
    plateau_window: int = 100         # plateau: loss rows per window
    plateau_flat: float = 0.02        # loss change within the window, as a share of the run's progress
    plateau_gap: float = 0.2          # window loss above the best by this share of the progress
    plateau_grad: float = 0.1         # global gradient norm below this share of its peak level
    stability_margin: float = 1.25    # sharpness above 1.25× the limit (edge of stability hovers near 1×)
    noise_factor: float = 10.0        # batch size 10× below / above the gradient noise scale


def find(run, **thresholds) -> list[Finding]:
    """All findings of a recording, sorted by first step. Keyword arguments override Thresholds."""
    valid = {f.name for f in fields(Thresholds)}
    unknown = sorted(set(thresholds) - valid)
    if unknown:
        raise AnalysisError(f"Unknown finding threshold(s) {unknown}; valid names are {sorted(valid)}")
    t = Thresholds(**thresholds)
    data = _RunData(run)
    found: list[Finding] = []
    if not len(data.steps):                   # nothing recorded yet: only the configuration can be judged
        return _orphans(data, t) + _coupled_decay(data, t)
    for check in (_orphans, _no_gradient, _nonfinite, _grad_spike, _update_ratio, _eps_dominated,
                  _oscillation, _overshoot, _dead_units, _lost_updates, _plateau, _over_stability_limit,
                  _coupled_decay, _noise_scale):
        found.extend(check(data, t))
    rank = {"error": 0, "warning": 1, "info": 2}
    return sorted(found, key=lambda f: (f.first_step, rank[f.severity], f.kind))


class _RunData:
    """The recording's arrays, read once: heavy rows for per-tensor series, all rows for loss."""

    def __init__(self, run):
        self.run, self.meta = run, run.meta
        self.tensors = run.tensors
        self.steps = run.steps
        self.heavy_rows = np.flatnonzero(run.heavy) if len(self.steps) else np.zeros(0, dtype=np.int64)
        self.heavy_steps = self.steps[self.heavy_rows]
        self.loss = np.asarray(run.loss, dtype=np.float64)
        self._series: dict = {}

    def series(self, q) -> np.ndarray:
        """(heavy rows, tensors) float64."""
        if q not in self._series:
            if q not in self.run.quantities or not len(self.heavy_rows):
                self._series[q] = np.full((len(self.heavy_rows), len(self.tensors)), np.nan)
            else:
                self._series[q] = np.asarray(self.run.series(q), dtype=np.float64)[self.heavy_rows]
        return self._series[q]

    def shape(self, k):
        return self.meta["tensors"][k]["shape"]

    def global_grad_norm(self) -> np.ndarray:
        g = self.series("grad_norm")
        with np.errstate(all="ignore"):
            total = np.sqrt(np.nansum(g ** 2, axis=1))
        total[~np.isfinite(g).any(axis=1) | ~np.isfinite(total)] = np.nan
        return total


# --- configuration findings ---------------------------------------------------------------------
def _orphans(data, t):
    orphans = list(data.meta.get("orphans", []))
    if not orphans:
        return []
    last = int(data.steps[-1]) if len(data.steps) else 0
    return [Finding("orphan", orphans, 0, last, "warning", {"tensors": len(orphans)},
                    "These tensors require grad and get gradients, but no parameter group holds them, so they "
                    "never change. Add them to the optimizer (or set requires_grad=False if they are meant to "
                    "stay fixed).", "common practice")]


def _no_gradient(data, t):
    missing, norm = data.series("grad_missing"), data.series("grad_norm")
    if not len(missing):
        return []
    out = []
    for k, name in enumerate(data.tensors):
        never = bool((missing[:, k] == 1).all()) or bool((norm[:, k] == 0).all())
        if never:
            out.append(Finding("no-gradient", [name], int(data.heavy_steps[0]), int(data.heavy_steps[-1]),
                               "warning", {"recorded_steps": len(missing), "grad_none_steps": int((missing[:, k] == 1).sum())},
                               "The optimizer holds this tensor but it never received a (non-zero) gradient: it is "
                               "not used in the loss, or its path is detached. Check the forward pass.",
                               "common practice"))
    return _merge(out)


def _coupled_decay(data, t):
    name = data.meta.get("optimizer", {}).get("class", "")
    if name not in ADAM_FAMILY:
        return []
    out = []
    last = int(data.steps[-1]) if len(data.steps) else 0
    for g, group in enumerate(data.meta.get("param_groups", [])):
        decay = coupled_weight_decay(name, group)
        if decay > 0:
            out.append(Finding("coupled-decay", list(group.get("params", [])), 0, last, "info",
                               {"group": g, "weight_decay": decay},
                               f"{name} adds weight_decay={decay:g} to the gradient, so the second moment rescales "
                               "it and heavily-updated weights decay less (L2 is not weight decay for Adam). "
                               "Use AdamW or decoupled_weight_decay=True; retune the decay. " +
                               REPLAY.format(step=0) + ".",
                               "Loshchilov & Hutter 2019, Decoupled Weight Decay Regularization"))
    return out


# --- non-finite values, traced to their origin in causal order -----------------------------------
def _nonfinite(data, t):
    n = len(data.steps)
    if n == 0:
        return []
    fp = data.run.fingerprints                                        # (steps, 2, width)
    present = np.isfinite(fp[:, :, 0]) & (np.nan_to_num(fp[:, :, 0]) > 0)
    batch_bad = present & ~np.isfinite(fp[:, :, 3])                  # (steps, 2): inputs, targets
    known = np.isfinite(data.loss)
    seen = np.maximum.accumulate(known)
    loss_bad = np.isinf(data.loss) | (np.isnan(data.loss) & np.concatenate([[False], seen[:-1]]))
    per_tensor = {}
    for q in ("weight_nonfinite", "nonfinite", "update_nonfinite", "state_nonfinite"):
        full = np.zeros((n, len(data.tensors)), dtype=bool)
        with np.errstate(invalid="ignore"):
            full[data.heavy_rows] = data.series(q) > 0
        per_tensor[q] = full
    any_bad = batch_bad.any(1) | loss_bad | np.any([v.any(1) for v in per_tensor.values()], axis=0)
    if not any_bad.any():
        return []
    row = int(np.argmax(any_bad))
    step, last = int(data.steps[row]), int(data.steps[np.flatnonzero(any_bad)[-1]])
    names = np.array(data.tensors)
    order = [
        ("weight_nonfinite", "a parameter before the forward pass",
         "The parameter already held NaN/Inf before this step's forward pass: it was written outside the "
         "optimizer (in-place edit, loading a bad checkpoint) or by an earlier unrecorded step."),
        ("inputs", "the input batch", "The model inputs of this step hold NaN/Inf: check the data pipeline "
         "(division by zero in normalisation, missing values) for this batch."),
        ("targets", "the targets", "The targets given to the criterion hold NaN/Inf: check the labels of this batch."),
        ("loss", "the loss", "The loss is non-finite while parameters and batch are finite: look for log(0), "
         "division by zero or overflow in the loss; lower the learning rate if the loss was growing."),
        ("nonfinite", "the gradients", "The loss is finite but the gradients are not: an operation with an "
         "infinite derivative (sqrt or pow at 0, a norm of zero) or overflow in the backward pass."),
        ("update_nonfinite", "the update", "Gradients are finite but the update is not: the optimizer divided by "
         "zero or overflowed (eps=0, a huge learning rate)."),
        ("state_nonfinite", "the optimizer state", "The optimizer's state became non-finite (overflow of the "
         "second moment with very large gradients)."),
    ]
    for key, where, advice in order:
        if key == "inputs":
            hit, tensors = batch_bad[row, 0], []
        elif key == "targets":
            hit, tensors = batch_bad[row, 1], []
        elif key == "loss":
            hit, tensors = loss_bad[row], []
        else:
            hit = per_tensor[key][row].any()
            tensors = names[per_tensor[key][row]].tolist()
        if hit:
            evidence = {"step": step, "loss": float(data.loss[row]), "tensors": len(tensors),
                        "steps_with_nonfinite": int(any_bad.sum())}
            return [Finding("nonfinite", tensors, step, last, "error", evidence,
                            f"First non-finite value at step {step}, in {where}. {advice} " +
                            REPLAY.format(step=step) + " to confirm.", "common practice")]
    return []

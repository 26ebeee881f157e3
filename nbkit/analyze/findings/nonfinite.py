"""The nonfinite finding rule: the first NaN/Inf of a run, traced to its origin in causal order."""
from __future__ import annotations

import numpy as np

from nbkit.analyze.finding import Finding
from nbkit.analyze.findings.sustained import REPLAY_HINT

# Where a non-finite value can first appear, in the order a training step produces them: the key of
# the check, the words for the place, and the advice for it.
CAUSAL_ORDER = (
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
)


def nonfinite(data, t) -> list[Finding]:
    """nonfinite: one finding at the first row with a non-finite value, naming the earliest place in
    CAUSAL_ORDER that holds one at that row; it spans to the last row with a non-finite value."""
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
    for key, where, advice in CAUSAL_ORDER:
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
                            REPLAY_HINT.format(step=step) + " to confirm.", "common practice")]
    return []

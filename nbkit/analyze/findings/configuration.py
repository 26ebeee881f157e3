"""Finding rules about how the run is set up: tensors left out of the optimizer or never reached by a
gradient, L2 weight decay inside an Adam-family update, and a batch size far from the gradient noise scale."""
from __future__ import annotations

import numpy as np

from nbkit.analyze.finding import Finding
from nbkit.analyze.findings.sustained import REPLAY_HINT, merge_findings
from nbkit.analyze.stability import ADAM_FAMILY, coupled_weight_decay


def orphans(data, t) -> list[Finding]:
    """orphan: tensors that require grad but are in no parameter group (listed by the recorder)."""
    orphan_names = list(data.meta.get("orphans", []))
    if not orphan_names:
        return []
    last = int(data.steps[-1]) if len(data.steps) else 0
    return [Finding("orphan", orphan_names, 0, last, "warning", {"tensors": len(orphan_names)},
                    "These tensors require grad and get gradients, but no parameter group holds them, so they "
                    "never change. Add them to the optimizer (or set requires_grad=False if they are meant to "
                    "stay fixed).", "common practice")]


def no_gradient(data, t) -> list[Finding]:
    """no-gradient: a tensor the optimizer holds whose gradient is missing or zero at every recorded row."""
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
    return merge_findings(out)


def coupled_decay(data, t) -> list[Finding]:
    """coupled-decay: a parameter group of an Adam-family optimizer with L2 weight decay in its gradient."""
    name = data.meta.get("optimizer", {}).get("class", "")
    if name not in ADAM_FAMILY:
        return []
    out = []
    last = int(data.steps[-1]) if len(data.steps) else 0
    scheduled = data.run.settings.get("weight_decay") if len(data.steps) else None    # (steps, groups)
    for g, group in enumerate(data.meta.get("param_groups", [])):
        first, decay = 0, coupled_weight_decay(name, group)
        if scheduled is not None:                      # a decay schedule: its largest value, from its first
            values = np.array([coupled_weight_decay(name, {**group, "weight_decay": v}) for v in scheduled[:, g]])
            on = np.flatnonzero(values > 0)
            first, decay = (int(data.steps[on[0]]), float(values.max())) if len(on) else (0, 0.0)
        if decay > 0:
            out.append(Finding("coupled-decay", list(group.get("params", [])), first, last, "info",
                               {"group": g, "weight_decay": decay},
                               f"{name} adds weight_decay={decay:g} to the gradient, so the second moment rescales "
                               "it and heavily-updated weights decay less (L2 is not weight decay for Adam). "
                               "Use AdamW or decoupled_weight_decay=True; retune the decay. " +
                               REPLAY_HINT.format(step=first) + ".",
                               "Loshchilov & Hutter 2019, Decoupled Weight Decay Regularization"))
    return out


def noise_scale(data, t) -> list[Finding]:
    """noise-scale: the batch size t.noise_factor× below or above the median recorded gradient noise scale."""
    noise = np.asarray(data.run.series("noise_scale"), dtype=np.float64)[:, 0] if len(data.steps) else np.zeros(0)
    size = data.meta.get("noise_batch_size")
    finite = noise[np.isfinite(noise) & (noise > 0)]
    if not len(finite) or not size:
        return []
    median = float(np.median(finite))
    rows = np.flatnonzero(np.isfinite(noise))
    first, last = int(data.steps[rows[0]]), int(data.steps[rows[-1]])
    evidence = {"median_noise_scale": median, "batch_size": float(size)}
    if size * t.noise_factor < median:
        text = (f"The batch ({size}) is far below the gradient noise scale (median {median:.3g}): steps are "
                "dominated by noise; larger batches (or a lower learning rate) would make each step count more.")
    elif size > t.noise_factor * median:
        text = (f"The batch ({size}) is far above the gradient noise scale (median {median:.3g}): extra examples "
                "per step buy little; smaller batches would give more steps for the same compute.")
    else:
        return []
    return [Finding("noise-scale", [], first, last, "info", evidence, text + " " + REPLAY_HINT.format(step=first) + ".",
                    "McCandlish et al. 2018, An Empirical Model of Large-Batch Training")]

"""Finding rules over update series: oversized and stalled updates, ε-dominated denominators, lost updates.

oversized-updates and stalled-updates are the two sides of the update-to-weight ratio ‖Δθ‖/‖θ‖
(common practice aims near 1e-3); they were one kind, update-ratio, up to nbkit 0.1.0.
"""
from __future__ import annotations

import warnings
from dataclasses import replace

import numpy as np

from nbkit.analyze.finding import Finding
from nbkit.analyze.findings import units as unit_rules
from nbkit.analyze.findings.data import finite_median
from nbkit.analyze.findings.sustained import REPLAY_HINT, merge_findings, per_tensor_findings

# stalled-updates judges only rows where the tensor's learning rate is at least this share of its
# group's peak: tiny updates under a decayed learning rate (the end of a schedule) are intended.
UNDECAYED_LR_SHARE = 0.1


def _ratio_evidence(ratio):
    return lambda k, a, b: {"median_update_ratio": finite_median(ratio[a:b + 1, k])}


def oversized_updates(data, t) -> list[Finding]:
    """oversized-updates: a weight's update ratio above t.oversized_ratio, sustained, or a single step above
    t.oversized_single_step (a step larger than the weight itself) not already inside a sustained finding."""
    ratio = data.series("update_ratio")
    weights = data.weight_columns()
    text = ("Each step changes this weight by a large share of its norm (common practice aims near 1e-3): the "
            "learning rate is likely too high for it.")
    norm = data.series("weight_norm")
    sized = ~_tiny_weights(data, norm, weights, t.tiny_weight)
    sustained = per_tensor_findings(data, t, "oversized-updates", "warning",
                                    lambda k: (ratio[:, k] > t.oversized_ratio) & sized[:, k], _ratio_evidence(ratio),
                                    text, tensors=weights)
    # one step larger than the weight itself; a zero-initialised weight (norm 0 at its first recorded step)
    # is left alone for its first `window` rows, where such steps are harmless
    grown = np.ones_like(norm, dtype=bool)
    grown[:t.window, norm[0] == 0] = False
    single = []
    for k in weights:
        rows = np.flatnonzero((ratio[:, k] > t.oversized_single_step) & grown[:, k] & sized[:, k])
        if len(rows) and not any(data.tensors[k] in f.tensors and f.first_step <= data.heavy_steps[rows[0]]
                                 for f in sustained):
            first = int(data.heavy_steps[rows[0]])
            single.append(Finding("oversized-updates", [data.tensors[k]], first, int(data.heavy_steps[rows[-1]]),
                                  "warning", {"max_update_ratio": float(np.nanmax(ratio[rows, k])), "steps": len(rows)},
                                  text + " One step moved it by more than its own norm. " +
                                  REPLAY_HINT.format(step=first) + ".", "common practice"))
    return merge_findings(sustained + single)


def _tiny_weights(data, norm, weights, floor) -> np.ndarray:
    """(heavy rows, tensors) True where a weight's RMS (‖θ‖/√n) is below `floor` × the median RMS of the
    weights at that row: a class token or position embedding initialised near 0, a zero-initialised
    gate. Its update ratio divides by almost nothing, so a normal first step reads as a huge one."""
    tiny = np.zeros(norm.shape, dtype=bool)
    if not weights:
        return tiny
    sizes = np.array([max(1, int(np.prod(data.shape(k)))) for k in weights], dtype=np.float64)
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        rms = norm[:, weights] / np.sqrt(sizes)
        typical = np.nanmedian(rms, axis=1, keepdims=True)
        tiny[:, weights] = rms < floor * typical
    return tiny


def stalled_updates(data, t) -> list[Finding]:
    """stalled-updates: a weight's update ratio below t.stalled_ratio, sustained, while its learning rate
    is at least UNDECAYED_LR_SHARE of its group's peak."""
    ratio = data.series("update_ratio")
    lr_share = data.group_lr_share()
    return per_tensor_findings(data, t, "stalled-updates", "info",
                               lambda k: (ratio[:, k] < t.stalled_ratio) & (lr_share[:, k] >= UNDECAYED_LR_SHARE),
                               _ratio_evidence(ratio),
                               "Updates are tiny relative to the weight (common practice aims near 1e-3) although "
                               "the learning rate is not decayed: it may be too low for this tensor.",
                               tensors=data.weight_columns())


def _layer_biases(data) -> dict[int, int]:
    """Weight tensor index -> the index of its own layer's bias ("x.weight" -> "x.bias")."""
    index = {name: k for k, name in enumerate(data.tensors)}
    pairs = {k: index.get(data.tensors[k][:-len("weight")] + "bias") for k in data.weight_columns()
             if data.tensors[k].endswith("weight")}
    return {k: bias for k, bias in pairs.items() if bias is not None}


def _input_scale(data, biases) -> np.ndarray:
    """(heavy rows, tensors): a weight's gradient RMS over its own layer's bias gradient RMS (NaN where
    there is no bias). For a linear map the weight gradient is δ·xᵀ and the bias gradient δ, so the
    ratio estimates the scale of the layer's inputs: far below 1 means inputs in the wrong unit."""
    rms = data.series("grad_rms")
    out = np.full(rms.shape, np.nan)
    with np.errstate(all="ignore"):
        for k, bias in biases.items():
            out[:, k] = rms[:, k] / rms[:, bias]
    return out


def eps_dominated(data, t) -> list[Finding]:
    """eps-dominated: ε outweighs √v̂ for more than t.eps_share of a relevant tensor's coordinates, sustained;
    or of a weight whose own gradient is negligible because its layer's inputs are tiny; or, where the
    recording has profiles, of a set of a weight's units (rows or columns) although not of the whole tensor
    (nbkit.analyze.findings.units.eps_dominated_units)."""
    share = data.series("eps_share")
    relevant = data.relevant(t.relevant_grad)
    biases = _layer_biases(data)
    scale = _input_scale(data, biases)
    # a weight whose inputs are tiny matters although its own gradient is negligible: its bias must matter
    tiny_inputs = np.zeros_like(relevant)
    with np.errstate(invalid="ignore"):
        for k, bias in biases.items():
            tiny_inputs[:, k] = (scale[:, k] < t.tiny_input) & relevant[:, bias]
    plain = per_tensor_findings(data, t, "eps-dominated", "warning",
                                lambda k: (share[:, k] > t.eps_share) & relevant[:, k],
                                lambda k, a, b: {"median_eps_share": finite_median(share[a:b + 1, k])},
                                "ε outweighs √v̂ in the update's denominator for most coordinates, so the optimizer "
                                "behaves like SGD with learning rate lr/ε there. Lower eps, or check the gradient "
                                "scale (a loss scaled far down).", source="common practice")
    inputs = per_tensor_findings(data, t, "eps-dominated", "warning",
                                 lambda k: (share[:, k] > t.eps_share) & tiny_inputs[:, k] & ~relevant[:, k],
                                 lambda k, a, b: {"median_eps_share": finite_median(share[a:b + 1, k]),
                                                  "input_scale": finite_median(scale[a:b + 1, k])},
                                 "ε outweighs √v̂ for most coordinates because this weight's gradient is tiny while "
                                 "its layer's bias gradient is not: the layer's inputs are about input_scale of unit "
                                 "size. Check the units and normalisation of the features feeding this layer.",
                                 source="common practice: normalise inputs to unit scale (LeCun et al. 1998, "
                                        "Efficient BackProp; from memory)")
    inputs = [replace(f, suggestion=f.suggestion.replace("about input_scale", f"about {f.evidence['input_scale']:.1g}"))
              for f in inputs]
    matters = relevant.copy()                 # a weight matters to the loss if it or its own bias does
    for k, bias in biases.items():
        matters[:, k] |= relevant[:, bias]
    return plain + inputs + unit_rules.eps_dominated_units(data, t, matters, plain + inputs)


def lost_updates(data, t) -> list[Finding]:
    """lost-updates: more than t.lost_share of a relevant tensor's updates round to exactly zero, sustained."""
    lost = data.series("lost_update_share")
    dtypes = [x["dtype"] for x in data.meta["tensors"]]
    relevant = data.relevant(t.relevant_grad)
    return per_tensor_findings(data, t, "lost-updates", "warning",
                               lambda k: (lost[:, k] > t.lost_share) & relevant[:, k],
                               lambda k, a, b: {"median_lost_update_share": finite_median(lost[a:b + 1, k])},
                               "Many updates round to exactly zero in this tensor's precision "
                               f"({'/'.join(sorted(set(dtypes)))}): the step is below half a unit in the last "
                               "place. Keep a float32 master copy of the weights, or raise the learning rate.")

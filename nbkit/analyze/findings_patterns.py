"""Finding rules over gradient, update, loss and curvature series, and the helpers they share.

Used by nbkit.analyze.findings.find; each rule takes the run's data (findings._RunData) and the
Thresholds, and returns Finding objects. "Sustained" is defined in nbkit.analyze.findings.
"""
from __future__ import annotations

import math
import warnings
from dataclasses import replace

import numpy as np

from nbkit.analyze.finding import Finding
from nbkit.analyze.stability import ADAM_FAMILY, stability_limit

REPLAY = "Verify with a replay from the keyframe before step {step} (nbkit.replay)"


def _segments(mask: np.ndarray, window: int, share: float) -> list[tuple[int, int]]:
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


def _merge(findings: list[Finding]) -> list[Finding]:
    """One finding per kind and overlapping step range; the tensors of merged findings are united."""
    merged: list[Finding] = []
    for f in sorted(findings, key=lambda f: (f.kind, f.severity, f.first_step)):
        last = merged[-1] if merged else None
        if last and last.kind == f.kind and last.severity == f.severity and f.first_step <= last.last_step:
            evidence = dict(last.evidence)
            for key, value in f.evidence.items():
                evidence[key] = max(evidence.get(key, value), value) if key.startswith("max") else evidence.get(key, value)
            merged[-1] = Finding(last.kind, last.tensors + [x for x in f.tensors if x not in last.tensors],
                                 last.first_step, max(last.last_step, f.last_step), last.severity, evidence,
                                 last.suggestion, last.source)
        else:
            merged.append(f)
    return merged


def _per_tensor(data, t, kind, severity, condition, describe, suggestion, source="common practice",
                tensors=None, window=None, share=None, merge=True):
    """Findings where `condition(column k) -> bool mask over heavy rows` is sustained for tensor k."""
    out = []
    for k, name in enumerate(data.tensors):
        if tensors is not None and k not in tensors:
            continue
        with np.errstate(invalid="ignore"):
            mask = condition(k)
        for a, b in _segments(mask, window or t.window, t.sustained_share if share is None else share):
            first, last = int(data.heavy_steps[a]), int(data.heavy_steps[b])
            out.append(Finding(kind, [name], first, last, severity, describe(k, a, b),
                               suggestion + " " + REPLAY.format(step=first) + ".", source))
    return _merge(out) if merge else out


def _median(x):
    x = x[np.isfinite(x)]
    return float(np.median(x)) if len(x) else math.nan


# --- gradient and update patterns ----------------------------------------------------------------
def _grad_spike(data, t):
    g = data.global_grad_norm()
    per = data.series("grad_norm")
    hits = []
    for i in range(len(g)):
        history = g[max(0, i - t.spike_history):i]
        history = history[np.isfinite(history)]
        if len(history) < t.spike_min_history or not np.isfinite(g[i]):
            continue
        median = float(np.median(history))
        if median > 0 and g[i] > t.spike_factor * median and g[i] > t.spike_over_max * history.max():
            hits.append((i, g[i] / median))
    out = []
    for i, ratio in hits:
        if out and i - out[-1][1] <= 5:
            out[-1] = (out[-1][0], i, max(out[-1][2], ratio))
        else:
            out.append((i, i, ratio))
    findings = []
    for a, b, ratio in out:
        history = per[max(0, a - t.spike_history):a]
        with warnings.catch_warnings(), np.errstate(all="ignore"):
            warnings.simplefilter("ignore", RuntimeWarning)
            own = per[a] / np.nanmedian(history, axis=0)
        own = np.where(np.isfinite(own), own, -np.inf)
        tensors = [data.tensors[k] for k in np.argsort(-own) if own[k] >= t.spike_factor] or \
                  [data.tensors[int(np.argmax(own))]]
        first = int(data.heavy_steps[a])
        findings.append(Finding("grad-spike", tensors, first, int(data.heavy_steps[b]), "warning",
                                {"max_ratio_to_median": float(ratio), "grad_norm": float(g[a])},
                                "The gradient norm jumped far above its running median. Look at this step's batch "
                                "(an outlier?) and the learning rate; gradient clipping bounds such steps. " +
                                REPLAY.format(step=first) + ".", "common practice"))
    return findings


def _relevant(data, t) -> np.ndarray:
    """(heavy rows, tensors): tensors whose gradient RMS is at least t.relevant_grad × the median tensor's.
    A tensor with a negligible gradient (a bias cancelled by a following BatchNorm) has no update worth
    protecting: ε dominating it, or its updates rounding away, is harmless."""
    rms = data.series("grad_rms")
    with warnings.catch_warnings(), np.errstate(all="ignore"):
        warnings.simplefilter("ignore", RuntimeWarning)
        typical = np.nanmedian(rms, axis=1, keepdims=True)
        return rms >= t.relevant_grad * typical


def _weights(data):
    return [k for k in range(len(data.tensors)) if len(data.shape(k)) >= 2]


def _group_lr_share(data):
    """(heavy rows, tensors): each tensor's learning rate as a share of its group's largest."""
    lr = np.asarray(data.run.lr, dtype=np.float64)[data.heavy_rows]            # (rows, groups)
    with np.errstate(all="ignore"):
        share = lr / np.nanmax(np.asarray(data.run.lr, dtype=np.float64), axis=0)
    groups = [t["group"] for t in data.meta["tensors"]]
    return share[:, groups]


def _update_ratio(data, t):
    ratio = data.series("update_ratio")
    weights = _weights(data)
    lr_share = _group_lr_share(data)

    def describe(k, a, b):
        return {"median_update_ratio": _median(ratio[a:b + 1, k])}

    text = ("Each step changes this weight by a large share of its norm (common practice aims near 1e-3): the "
            "learning rate is likely too high for it.")
    high = _per_tensor(data, t, "update-ratio", "warning", lambda k: ratio[:, k] > t.update_ratio_high, describe,
                       text, tensors=weights)
    # one step larger than the weight itself; a zero-initialised weight (norm 0 at its first recorded step)
    # is left alone for its first `window` rows, where such steps are harmless
    norm = data.series("weight_norm")
    grown = np.ones_like(norm, dtype=bool)
    grown[:t.window, norm[0] == 0] = False
    single = []
    for k in weights:
        rows = np.flatnonzero((ratio[:, k] > t.update_ratio_extreme) & grown[:, k])
        if len(rows) and not any(data.tensors[k] in f.tensors and f.first_step <= data.heavy_steps[rows[0]]
                                 for f in high):
            first = int(data.heavy_steps[rows[0]])
            single.append(Finding("update-ratio", [data.tensors[k]], first, int(data.heavy_steps[rows[-1]]),
                                  "warning", {"max_update_ratio": float(np.nanmax(ratio[rows, k])), "steps": len(rows)},
                                  text + " One step moved it by more than its own norm. " + REPLAY.format(step=first)
                                  + ".", "common practice"))
    high = _merge(high + single)
    low = _per_tensor(data, t, "update-ratio", "info",
                      lambda k: (ratio[:, k] < t.update_ratio_low) & (lr_share[:, k] >= 0.1), describe,
                      "Updates are tiny relative to the weight (common practice aims near 1e-3) although the "
                      "learning rate is not decayed: it may be too low for this tensor.", tensors=weights)
    return high + low


def _layer_biases(data) -> dict[int, int]:
    """Weight tensor index -> the index of its own layer's bias ("x.weight" -> "x.bias")."""
    index = {name: k for k, name in enumerate(data.tensors)}
    pairs = {k: index.get(data.tensors[k][:-len("weight")] + "bias") for k in _weights(data)
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


def _eps_dominated(data, t):
    share = data.series("eps_share")
    relevant = _relevant(data, t)
    biases = _layer_biases(data)
    scale = _input_scale(data, biases)
    # a weight whose inputs are tiny matters although its own gradient is negligible: its bias must matter
    tiny_inputs = np.zeros_like(relevant)
    with np.errstate(invalid="ignore"):
        for k, bias in biases.items():
            tiny_inputs[:, k] = (scale[:, k] < t.tiny_input) & relevant[:, bias]
    plain = _per_tensor(data, t, "eps-dominated", "warning",
                        lambda k: (share[:, k] > t.eps_share) & relevant[:, k],
                        lambda k, a, b: {"median_eps_share": _median(share[a:b + 1, k])},
                        "ε outweighs √v̂ in the update's denominator for most coordinates, so the optimizer "
                        "behaves like SGD with learning rate lr/ε there. Lower eps, or check the gradient scale "
                        "(a loss scaled far down).", source="common practice")
    inputs = _per_tensor(data, t, "eps-dominated", "warning",
                         lambda k: (share[:, k] > t.eps_share) & tiny_inputs[:, k] & ~relevant[:, k],
                         lambda k, a, b: {"median_eps_share": _median(share[a:b + 1, k]),
                                          "input_scale": _median(scale[a:b + 1, k])},
                         "ε outweighs √v̂ for most coordinates because this weight's gradient is tiny while its "
                         "layer's bias gradient is not: the layer's inputs are about input_scale of unit size. "
                         "Check the units and normalisation of the features feeding this layer.",
                         source="common practice: normalise inputs to unit scale (LeCun et al. 1998, "
                                "Efficient BackProp; from memory)")
    inputs = [replace(f, suggestion=f.suggestion.replace("about input_scale", f"about {f.evidence['input_scale']:.1g}"))
              for f in inputs]
    return plain + inputs


def _oscillation(data, t):
    flips, cos = data.series("sign_flip"), data.series("grad_cosine")
    norm = data.series("grad_norm")

    def growing(f):
        """Gradient descent with 1 < lr·λ < 2 converges while alternating, and momentum methods zig-zag
        along sharp directions while the loss keeps falling: both healthy. Kept only where the gradient
        norm does not shrink (last quarter ≥ oscillation_decay × the first quarter's) and the loss does
        not improve (last quarter's median ≥ (1 − oscillation_progress) × the first quarter's)."""
        k, (a, b) = data.tensors.index(f.tensors[0]), np.searchsorted(data.heavy_steps, [f.first_step, f.last_step])
        quarter = max(1, (b - a + 1) // 4)
        if _median(norm[b + 1 - quarter:b + 1, k]) < t.oscillation_decay * _median(norm[a:a + quarter, k]):
            return False
        rows = data.run.rows_for_steps(f.first_step, f.last_step)
        loss = data.loss[rows]
        span = max(1, len(loss) // 4)
        first, last = _median(loss[:span]), _median(loss[-span:])
        if last < (1 - t.oscillation_progress) * first:
            return False
        # a zig-zag at the noise floor of a converged run is harmless: the loss must sit above its best
        # by oscillation_gap of the run's loss range
        return not (_median(loss) - low < t.oscillation_gap * (high - low))

    finite = data.loss[np.isfinite(data.loss)]
    smooth = _rolling_median(finite, 11) if len(finite) else finite
    low, high = (float(smooth.min()), float(smooth.max())) if len(smooth) else (math.nan, math.nan)

    found = _per_tensor(data, t, "oscillation", "warning",
                       lambda k: (flips[:, k] > t.sign_flip) & (cos[:, k] < t.grad_cosine),
                       lambda k, a, b: {"median_sign_flip": _median(flips[a:b + 1, k]),
                                        "median_grad_cosine": _median(cos[a:b + 1, k])},
                       "Gradients keep flipping sign and point against the previous step: the iterate bounces "
                       "across a valley. Lower the learning rate (or the momentum).", merge=False)
    return _merge([f for f in found if growing(f)])


def _overshoot(data, t):
    rev, flips = data.series("reversed"), data.series("sign_flip")
    return _per_tensor(data, t, "overshoot", "warning",
                       lambda k: (rev[:, k] > t.reversed_share) & (rev[:, k] > t.reversed_over_flip * flips[:, k]),
                       lambda k, a, b: {"median_reversed": _median(rev[a:b + 1, k]),
                                        "median_sign_flip": _median(flips[a:b + 1, k])},
                       "Most updates move against the current gradient: momentum carries the weights past the "
                       "minimum. Lower the learning rate or the momentum (β1).")


def _dead_units(data, t):
    dead = data.series("dead_rows")
    rows = np.array([max(1, s[0]) if s else 1 for s in (data.shape(k) for k in range(len(data.tensors)))], float)
    share = dead / rows
    candidates = _per_tensor(data, t, "dead-units", "warning", lambda k: share[:, k] >= t.dead_share,
                             lambda k, a, b: {"min_dead_share": float(np.nanmin(share[a:b + 1, k])),
                                              "max_dead_rows": float(np.nanmax(dead[a:b + 1, k]))},
                             "Whole output units of this weight get no gradient at all (dead ReLUs, saturated "
                             "units). Lower the learning rate, use a leaky activation or check the initialisation.",
                             window=t.dead_window, share=1.0)
    out = []
    for f in candidates:
        if _probes_confirm_dead(data, f):
            severity = "warning" if f.evidence["min_dead_share"] >= t.dead_share_warning else "info"
            out.append(Finding(f.kind, f.tensors, f.first_step, f.last_step, severity, f.evidence, f.suggestion,
                               f.source))
    return out


def _probes_confirm_dead(data, finding) -> bool:
    """Dead units keep the same coordinates at zero gradient; rows absent from a batch (embeddings) do not.
    Confirmed when enough probe coordinates have zero gradient in every row of the stretch."""
    name = finding.tensors[0]
    try:
        grad = data.run.probes(name, rows=data.run.rows_for_steps(finding.first_step, finding.last_step)).get("grad")
    except Exception:
        return True
    if grad is None or grad.shape[1] == 0:
        return True
    heavy = np.isfinite(grad).all(axis=1)
    if not heavy.any():
        return True
    always_zero = float((grad[heavy] == 0).all(axis=0).mean())
    return always_zero >= 0.5 * finding.evidence["min_dead_share"]


def _lost_updates(data, t):
    lost = data.series("lost_update_share")
    dtypes = [x["dtype"] for x in data.meta["tensors"]]
    relevant = _relevant(data, t)
    return _per_tensor(data, t, "lost-updates", "warning", lambda k: (lost[:, k] > t.lost_share) & relevant[:, k],
                       lambda k, a, b: {"median_lost_update_share": _median(lost[a:b + 1, k])},
                       "Many updates round to exactly zero in this tensor's precision "
                       f"({'/'.join(sorted(set(dtypes)))}): the step is below half a unit in the last place. Keep a "
                       "float32 master copy of the weights, or raise the learning rate.")


# --- loss and curvature --------------------------------------------------------------------------
def _rolling_median(x, width):
    if len(x) < width:
        return x.copy()
    windows = np.lib.stride_tricks.sliding_window_view(x, width)
    core = np.median(windows, axis=1)
    pad = width // 2
    return np.concatenate([np.full(pad, core[0]), core, np.full(len(x) - len(core) - pad, core[-1])])


def _plateau(data, t):
    finite = np.flatnonzero(np.isfinite(data.loss))
    w = t.plateau_window
    if len(finite) < 2 * w:
        return []
    loss = _rolling_median(data.loss[finite], 11)
    steps = data.steps[finite]
    start, best = float(np.median(loss[:10])), float(loss.min())
    progress = start - best
    if not progress > 0:
        return []
    g = data.global_grad_norm()
    level = _rolling_median(np.nan_to_num(g, nan=0.0), 11) if len(g) else g
    peak = float(level.max()) if len(level) else math.nan
    hits = []
    for i in range(0, len(loss) - w + 1, max(1, w // 10)):
        part = loss[i:i + w]
        flat = abs(float(np.median(part[w // 2:])) - float(np.median(part[:w // 2]))) <= t.plateau_flat * progress
        above = float(np.median(part)) - best >= t.plateau_gap * progress
        if not (flat and above):
            continue
        inside = (data.heavy_steps >= steps[i]) & (data.heavy_steps <= steps[i + w - 1])
        grads = g[inside]
        if np.isfinite(peak) and peak > 0 and np.isfinite(grads).any() and _median(grads) <= t.plateau_grad * peak:
            hits.append((int(steps[i]), int(steps[i + w - 1]), float(np.median(part)), _median(grads) / peak))
    out = []
    for first, last, level_loss, grad_share in hits:
        if out and first <= out[-1].last_step:
            f = out[-1]
            out[-1] = Finding(f.kind, f.tensors, f.first_step, last, f.severity, f.evidence, f.suggestion, f.source)
        else:
            out.append(Finding("plateau", [], first, last, "warning",
                               {"loss": level_loss, "best_loss": best, "grad_norm_share_of_peak": grad_share},
                               "The loss is flat well above its best while gradients are small: a saddle or a "
                               "badly scaled region. Try a larger learning rate, warm restarts, or another "
                               "optimizer from here. " + REPLAY.format(step=first) + ".", "common practice"))
    return out


def _over_stability_limit(data, t):
    sharp = np.asarray(data.run.series("sharpness"), dtype=np.float64) if "sharpness" in data.run.quantities else None
    if sharp is None or not len(sharp):
        return []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        values = np.nanmax(sharp, axis=1)                                          # (steps,)
    rows = np.flatnonzero(np.isfinite(values))
    name = data.meta.get("optimizer", {}).get("class", "")
    groups = data.meta.get("param_groups", [])
    if not len(rows) or not groups:
        return []
    lr = np.asarray(data.run.lr, dtype=np.float64)
    hits = []
    beta1 = float((groups[0].get("betas") or (0.9, 0.999))[0])
    for r in rows:
        # Adam's analysis assumes a slowly changing preconditioner; in the bias-correction transient
        # (1 − β1^t < 0.9: the first 22 steps at β1 = 0.9) it does not hold, so those rows are skipped
        if name in ADAM_FAMILY and 1 - beta1 ** (data.steps[r] + 1) < 0.9:
            continue
        limit = stability_limit(name, {**groups[0], "lr": float(lr[r, 0])})
        if limit is not None and values[r] > t.stability_margin * limit.limit:
            hits.append((r, values[r], limit))
    out = []
    for r, value, limit in hits:
        if out and out[-1][1] == rows[max(0, np.searchsorted(rows, r) - 1)]:
            out[-1] = (out[-1][0], r, max(out[-1][2], value / limit.limit), out[-1][3], out[-1][4])
        else:
            out.append((r, r, value / limit.limit, value, limit))
    findings = []
    for a, b, ratio, value, limit in out:
        step = int(data.steps[a])
        after = data.loss[a:a + 11]
        rise = float(np.nanmax(after) / data.loss[a]) if np.isfinite(after).any() and data.loss[a] > 0 else math.nan
        kind = "preconditioned sharpness" if limit.preconditioned else "sharpness"
        findings.append(Finding("over-stability-limit", [], step, int(data.steps[b]), "warning",
                                {"sharpness": float(value), "limit": float(limit.limit), "max_ratio": float(ratio),
                                 "lr": float(lr[a, 0]), "loss_rise_next_10_steps": rise},
                                f"The {kind} ({value:.4g}) is above the stability limit {limit.rule} = "
                                f"{limit.limit:.4g} of {name} at lr={lr[a, 0]:.3g}: steps along the sharpest "
                                "direction grow instead of shrinking. Lower the learning rate (or add warm-up). " +
                                REPLAY.format(step=step) + ".", limit.source))
    return findings


def _noise_scale(data, t):
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
    return [Finding("noise-scale", [], first, last, "info", evidence, text + " " + REPLAY.format(step=first) + ".",
                    "McCandlish et al. 2018, An Empirical Model of Large-Batch Training")]

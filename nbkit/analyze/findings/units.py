"""Finding rules over per-unit profiles: ε-dominated sets of units, damped units, and dead units counted exactly.

A profile (nbkit.measure.profiles) holds, at each heavy step, one value per output unit ("rows") and per
input feature ("columns") of every weight with two or more dimensions. A pattern is sustained for a unit
as for a tensor (nbkit.analyze.findings.sustained); units whose sustained stretches overlap are one
finding, which names them (Finding.units and the suggestion). Every rule here returns nothing for a
tensor without a profile (recordings before profiles, profiles=False): the tensor-level rules judge it.
"""
from __future__ import annotations

import warnings

import numpy as np

from nbkit.analyze.finding import Finding
from nbkit.analyze.findings.data import finite_median
from nbkit.analyze.findings.sustained import REPLAY_HINT, sustained_segments
from nbkit.measure.profiles import AXES

# damped-units compares a unit with the median unit of its tensor: with fewer units than this the median
# is one of a handful of values and says little about what is normal for the tensor.
MIN_UNITS = 4
NAMED_UNITS = 8          # a suggestion names at most this many units, then says how many in all


def unit_segments(mask: np.ndarray, window: int, share: float) -> list[tuple[int, int, list[int]]]:
    """(first row, last row, units) of sustained stretches of mask (heavy rows, units): each unit's
    sustained stretches (sustained_segments), and units whose stretches overlap joined into one."""
    pieces = sorted((a, b, u) for u in range(mask.shape[1]) for a, b in sustained_segments(mask[:, u], window, share))
    out: list[tuple[int, int, list[int]]] = []
    for a, b, u in pieces:
        if out and a <= out[-1][1]:
            first, last, units = out[-1]
            out[-1] = (first, max(last, b), units + [u] if u not in units else units)
        else:
            out.append((a, b, [u]))
    return [(a, b, sorted(units)) for a, b, units in out]


def describe_units(data, k, axis, units) -> str:
    """'columns 4, 5, 6 of stem.0.weight', with the units' names where record(unit_names=...) gave them:
    'columns 9, 10, 11 (light above canopy, ...) of first.0.weight'."""
    names = data.unit_names(k, axis)
    shown = units[:NAMED_UNITS]
    text = f"{axis} " + ", ".join(str(u) for u in shown)
    if any(names[u] != str(u) for u in shown):
        text += " (" + ", ".join(names[u] for u in shown) + ")"
    if len(units) > len(shown):
        text += f" and {len(units) - len(shown)} more ({len(units)} of {len(names)})"
    return f"{text} of {data.tensors[k]}"


def unit_finding(data, k, axis, kind, severity, a, b, units, evidence, text, source="common practice") -> Finding:
    """A Finding over heavy rows a..b naming `units` of tensor k along axis; text is the advice after the
    units' description, to which the replay hint is added."""
    first, last = int(data.heavy_steps[a]), int(data.heavy_steps[b])
    names, which = data.unit_names(k, axis), describe_units(data, k, axis, units)
    return Finding(kind, [data.tensors[k]], first, last, severity, {"units": len(units), **evidence},
                   which[0].upper() + which[1:] + ": " + text + " " + REPLAY_HINT.format(step=first) + ".", source,
                   {data.tensors[k]: {axis: [names[u] for u in units]}})


def _median_over_units(x: np.ndarray) -> np.ndarray:
    """(rows, 1): the median over units of each row's finite values (NaN where none is finite)."""
    with warnings.catch_warnings(), np.errstate(all="ignore"):
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanmedian(np.where(np.isfinite(x), x, np.nan), axis=1, keepdims=True)


def _ratio_to_median(x, a, b, units) -> float:
    """The median over rows a..b of the units' values over the tensor's median unit's."""
    with np.errstate(all="ignore"):
        return finite_median((x[a:b + 1, units] / _median_over_units(x[a:b + 1])).ravel())


def profiled_weights(data) -> list[int]:
    """Indices of the weights with a per-unit profile."""
    return [k for k in data.weight_columns() if data.tensors[k] in data.profile_tensors]


def eps_dominated_units(data, t, matters: np.ndarray, tensor_findings: list[Finding]) -> list[Finding]:
    """eps-dominated per set of units: ε outweighs √v̂ for more than t.eps_share of a unit's coordinates,
    sustained, in units whose gradient is not zero (a unit without any gradient has v̂ = 0 and no update to
    protect: dead-units' business) of a weight that matters (matters: (heavy rows, tensors), the tensor-level
    rule's relevance filter). Not reported where every unit of the axis is dominated (the tensor as a
    whole: the tensor-level rule judges it) nor where a tensor-level finding covers the same steps.

    Adam's step is lr·m̂/(√v̂ + ε) (Kingma & Ba 2015, Algorithm 1): where √v̂ ≪ ε it is lr·m̂/ε, plain
    SGD with a learning rate lr/ε that is far smaller than the rest of the tensor effectively gets. Three
    input features in the wrong unit are 3 of 12 columns of the first layer: a quarter of the coordinates,
    so the tensor-level share stays low while those columns barely learn."""
    share = data.series("eps_share")
    out = []
    for k in profiled_weights(data):
        for axis in AXES:
            eps, grad = data.profile(k, "eps_share", axis), data.profile(k, "grad_rms", axis)
            if eps is None or not np.isfinite(eps).any():
                continue                                     # no axis, or an optimizer without a second moment
            with np.errstate(invalid="ignore"):
                mask = (eps > t.eps_share) & (grad > 0) & matters[:, k:k + 1]
            for a, b, units in unit_segments(mask, t.window, t.sustained_share):
                first, last = int(data.heavy_steps[a]), int(data.heavy_steps[b])
                if len(units) == eps.shape[1] or any(
                        data.tensors[k] in f.tensors and f.first_step <= last and first <= f.last_step
                        for f in tensor_findings):
                    continue
                ratio = _ratio_to_median(grad, a, b, units)
                why = (f"their gradient RMS is about {ratio:.1g} of the tensor's median {axis[:-1]}'s, "
                       if np.isfinite(ratio) and ratio < 0.1 else "")
                advice = ("check the units and normalisation of these input features (a feature far below unit "
                          "scale has a gradient far below the others')" if axis == "columns" else
                          "check what scales these output units' gradients down")
                out.append(unit_finding(
                    data, k, axis, "eps-dominated", "warning", a, b, units,
                    {"median_eps_share": finite_median(eps[a:b + 1, units].ravel()),
                     "tensor_eps_share": finite_median(share[a:b + 1, k]), "unit_grad_ratio": ratio},
                    "ε outweighs √v̂ in the update's denominator for most of their coordinates although not for the "
                    f"tensor as a whole; {why}so the optimizer treats them as SGD with learning rate lr/ε. "
                    f"Lower eps, or {advice}.",
                    source="Kingma & Ba 2015 (Adam, Algorithm 1); inputs at unit scale: LeCun et al. 1998, "
                           "Efficient BackProp (from memory)"))
    return out


def damped_units(data, t) -> list[Finding]:
    """damped-units: a set of units whose update RMS stays below t.damped_update × the tensor's median
    unit's AND whose gain (update RMS ÷ lr·gradient RMS) stays below t.damped_gain × the median unit's
    gain, sustained, while their gradient is not zero and the learning rate is not 0.

    Why both: under SGD a unit with small gradients has a small update by design (its gain is the same
    as every other unit's: 1 for plain SGD, about 1/(1−β) with momentum on a steady gradient); a low gain
    as well says the step is cut below what the optimizer's rule gives its gradient. Under Adam the
    update RMS is about lr for every unit whatever its gradient scale (m̂/√v̂ normalises each coordinate;
    Kingma & Ba 2015, section 2.1), and a unit with small gradients gets a high gain, not a low one; a
    noisy unit (m̂ averaging to about 0) has both lower, by about √((1−β1)/(1+β1)) ≈ 0.23 at β1 = 0.9
    for pure noise, far above the default 0.05. What remains are steps cut by something outside the
    rule: a per-unit learning-rate mask, a hook that rescales the update after the optimizer, units
    "frozen" by scaling while still in the optimizer. Tensors with fewer than MIN_UNITS units are skipped."""
    lr = data.tensor_lr()
    out = []
    for k in profiled_weights(data):
        for axis in AXES:
            update, gain = data.profile(k, "update_rms", axis), data.profile(k, "gain", axis)
            grad = data.profile(k, "grad_rms", axis)
            if update is None or update.shape[1] < MIN_UNITS:
                continue
            with np.errstate(invalid="ignore"):
                mask = ((update < t.damped_update * _median_over_units(update))
                        & (gain < t.damped_gain * _median_over_units(gain))
                        & (grad > 0) & (lr[:, k:k + 1] > 0))
            for a, b, units in unit_segments(mask, t.window, t.sustained_share):
                out.append(unit_finding(
                    data, k, axis, "damped-units", "warning", a, b, units,
                    {"median_update_ratio": _ratio_to_median(update, a, b, units),
                     "median_gain_ratio": _ratio_to_median(gain, a, b, units)},
                    "their updates stay far below the tensor's median unit's although their gradients are not zero, "
                    "and far below what the optimizer's rule gives such gradients (their gain is low too): "
                    "something cuts their step. Check per-unit learning-rate masks, hooks that rescale updates "
                    "after the optimizer step, and units meant to be frozen."))
    return out


def dead_units(data, t, k) -> list[Finding]:
    """dead-units of weight k from its rows profile: at least t.dead_share of its output units have a gradient
    that is exactly zero (grad_rms == 0: every coordinate zero, summed in float64) in every one of
    t.dead_window heavy rows, the same units throughout, while the learning rate is not 0 (with a zero rate
    nothing trains, and nothing has died of training: a warm-up from 0, a frozen phase). A warning from
    t.dead_share_warning, else info. [] where the tensor has no rows profile."""
    grad = data.profile(k, "grad_rms", "rows")
    if grad is None:
        return []
    units = grad.shape[1]
    zero = (grad == 0) & (data.tensor_lr()[:, k:k + 1] > 0)          # (rows, units)
    share = zero.sum(axis=1) / units
    out = []
    for a, b in sustained_segments(share >= t.dead_share, t.dead_window, 1.0):
        dead = [int(u) for u in np.flatnonzero(zero[a:b + 1].all(axis=0))]     # the same units all along
        if len(dead) < t.dead_share * units:
            continue                                       # a changing set: rows absent from batches, not dead
        severity = "warning" if len(dead) >= t.dead_share_warning * units else "info"
        out.append(unit_finding(
            data, k, "rows", "dead-units", severity, a, b, dead,
            {"min_dead_share": len(dead) / units, "max_dead_rows": float(zero[a:b + 1].sum(axis=1).max())},
            "these output units get exactly zero gradient at every recorded step (dead ReLUs, saturated units). "
            "Lower the learning rate, use a leaky activation or check the initialisation."))
    return out

"""Finding rules over the loss and the recorded sharpness: plateaus, and sharpness past the stability limit."""
from __future__ import annotations

import math
import warnings

import numpy as np

from nbkit.analyze.finding import Finding
from nbkit.analyze.findings.data import finite_median, rolling_median
from nbkit.analyze.findings.sustained import REPLAY_HINT
from nbkit.analyze.stability import ADAM_FAMILY, stability_limit


def plateau(data, t) -> list[Finding]:
    """plateau: in windows of t.plateau_window loss rows, the loss flat (t.plateau_flat of the run's progress)
    and above its best (t.plateau_gap of the progress) while the global gradient norm is below t.plateau_grad
    of its peak level; overlapping windows are one finding."""
    finite = np.flatnonzero(np.isfinite(data.loss))
    w = t.plateau_window
    if len(finite) < 2 * w:
        return []
    loss = rolling_median(data.loss[finite], 11)
    steps = data.steps[finite]
    start, best = float(np.median(loss[:10])), float(loss.min())
    progress = start - best
    if not progress > 0:
        return []
    g = data.global_grad_norm()
    level = rolling_median(np.nan_to_num(g, nan=0.0), 11) if len(g) else g
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
        quiet = np.isfinite(grads).any() and finite_median(grads) <= t.plateau_grad * peak
        if np.isfinite(peak) and peak > 0 and quiet:
            hits.append((int(steps[i]), int(steps[i + w - 1]), float(np.median(part)), finite_median(grads) / peak))
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
                               "optimizer from here. " + REPLAY_HINT.format(step=first) + ".", "common practice"))
    return out


def over_stability_limit(data, t) -> list[Finding]:
    """over-stability-limit: a divergence along the sharpest direction, as a practitioner would call it.

    At each row with a sharpness estimate: the optimizer's stability limit at that step's settings
    (nbkit.analyze.stability: learning rate, momentum, betas, ... of every group, FindingInputs.group_settings;
    the lowest group limit counts). For optimizers without a preconditioner the sharpness is compared at
    the step actually taken: × the recorded clip factor (a clipped step is a shorter step). The row counts
    when sharpness is above t.stability_margin × the limit and the loss rises over the next
    t.stability_window steps (their median above t.stability_rise × the median of the window up to the row),
    or when it is above t.stability_far × the limit and the loss rises at all. Consecutive such rows are one
    finding. Evidence: the sharpness, the limit, their ratio, the clip factor used, the loss after ÷ before,
    the gradient-norm growth, whether the learning rate was still rising (warm-up), and how far the
    nearest estimates were apart (a thinned recording estimates rarely)."""
    sharp = np.asarray(data.run.series("sharpness"), dtype=np.float64) if "sharpness" in data.run.quantities else None
    if sharp is None or not len(sharp):
        return []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        values = np.nanmax(sharp, axis=1)                                          # (steps,)
    rows = np.flatnonzero(np.isfinite(values))
    name = data.meta.get("optimizer", {}).get("class", "")
    if not len(rows) or not data.meta.get("param_groups"):
        return []
    clip = np.asarray(data.run.clip_factor, dtype=np.float64)    # NaN in recordings before backward statistics
    grad_norm = np.asarray(data.run.grad_norm, dtype=np.float64)
    lr0 = np.asarray(data.run.lr, dtype=np.float64)[:, 0] if len(data.steps) else np.zeros(0)
    w = t.stability_window
    hits = []
    for r in rows:
        limits = []
        for g, group in enumerate(data.group_settings(r)):
            # Adam's analysis assumes a slowly changing preconditioner; in the bias-correction transient
            # (1 − β1^t < 0.9: the first 22 steps at β1 = 0.9) it does not hold, so those rows are skipped
            beta1 = float((group.get("betas") or (0.9, 0.999))[0])
            if name in ADAM_FAMILY and 1 - beta1 ** (data.steps[r] + 1) < 0.9:
                continue
            limit = stability_limit(name, group)
            if limit is not None:
                limits.append((limit.limit, g, limit, float(group.get("lr", math.nan)), group))
        if not limits:
            continue
        _, g, limit, lr, group = min(limits, key=lambda item: item[0])
        factor = 1.0 if limit.preconditioned or not np.isfinite(clip[r]) else float(min(1.0, clip[r]))
        ratio = values[r] * factor / limit.limit
        before, after = _median(data.loss[max(0, r - w + 1):r + 1]), _median(data.loss[r + 1:r + 1 + w])
        rise = after / before if before > 0 and np.isfinite(after) else math.nan
        rising = np.isfinite(rise) and ((ratio > t.stability_margin and rise > t.stability_rise)
                                        or (ratio > t.stability_far and rise > 1.0))
        if not rising:
            continue
        growth = _median(grad_norm[r + 1:r + 1 + w]) / _median(grad_norm[max(0, r - w + 1):r + 1])
        warming = bool(len(lr0) > r + w and lr0[min(len(lr0) - 1, r + w)] > lr0[r] * 1.01)
        hits.append((r, values[r], ratio, limit, g, lr, factor, rise, growth, warming, group))
    gaps = np.diff(data.steps[rows]) if len(rows) > 1 else np.zeros(0)
    spacing = int(np.median(gaps)) if len(gaps) else 0
    out = []                                        # [first hit, last row, largest ratio]
    for hit in hits:
        r = hit[0]
        if out and out[-1][1] == rows[max(0, np.searchsorted(rows, r) - 1)]:    # the previous estimate's row
            out[-1][1], out[-1][2] = r, max(out[-1][2], hit[2])
        else:
            out.append([hit, r, hit[2]])
    findings = []
    groups = len(data.meta["param_groups"])
    for (r, value, _, limit, g, lr, factor, rise, growth, warming, group), last, ratio in out:
        step = int(data.steps[r])
        kind = "preconditioned sharpness" if limit.preconditioned else "sharpness"
        where = f" (parameter group {g}, the lowest limit of {groups})" if groups > 1 else ""
        evidence = {"sharpness": float(value), "limit": float(limit.limit), "max_ratio": float(ratio),
                    "lr": lr, "clip_factor_used": factor, "loss_after_over_before": float(rise),
                    "grad_norm_growth": float(growth), "lr_still_rising": warming,
                    "estimate_spacing_steps": spacing}
        for key in ("momentum", "betas"):
            if key in group:
                evidence[key] = group[key] if not isinstance(group[key], (list, tuple)) else list(group[key])
        if groups > 1:
            evidence["group"] = g
        clipped = f", × the clip factor {factor:.3g} of that step" if factor < 1 else ""
        fix = ("The learning rate is still rising (warm-up): a lower peak or a longer warm-up. " if warming else
               "Lower the learning rate (or add warm-up). ")
        sparse = (f"Sharpness was estimated every {spacing} steps here: a dense self-replay of the window "
                  f"(nbkit.replay(run, model, start=..., every=1) with curvature on) shows where it crossed. "
                  if spacing > 2 * t.stability_window else "")
        findings.append(Finding(
            "over-stability-limit", [], step, int(data.steps[last]), "warning", evidence,
            f"The {kind} ({value:.4g}{clipped}) is {ratio:.3g} × the stability limit {limit.rule} = "
            f"{limit.limit:.4g} of {name} at lr={lr:.3g}{where}, and the loss rose {rise:.3g} × over the next "
            f"{t.stability_window} steps: steps along the sharpest direction grow instead of shrinking. " + fix +
            sparse + REPLAY_HINT.format(step=step) + ".", limit.source))
    return findings


def _median(values) -> float:
    values = np.asarray(values, dtype=np.float64)
    values = values[np.isfinite(values)]
    return float(np.median(values)) if len(values) else math.nan

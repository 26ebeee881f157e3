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
    """over-stability-limit: recorded sharpness above t.stability_margin × the optimizer's stability limit
    (nbkit.analyze.stability) at that step's settings (learning rate, momentum, betas, ... of every group:
    FindingInputs.group_settings; the lowest group limit counts); consecutive such rows are one finding,
    with the loss rise over the 10 steps after as evidence."""
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
                limits.append((limit.limit, g, limit, float(group.get("lr", math.nan))))
        if limits:
            _, g, limit, lr = min(limits, key=lambda item: item[0])
            if values[r] > t.stability_margin * limit.limit:
                hits.append((r, values[r], limit, g, lr))
    out = []
    for r, value, limit, g, lr in hits:
        if out and out[-1][1] == rows[max(0, np.searchsorted(rows, r) - 1)]:
            out[-1] = (out[-1][0], r, max(out[-1][2], value / limit.limit), *out[-1][3:])
        else:
            out.append((r, r, value / limit.limit, value, limit, g, lr))
    findings = []
    groups = len(data.meta["param_groups"])
    for a, b, ratio, value, limit, g, lr in out:
        step = int(data.steps[a])
        after = data.loss[a:a + 11]
        rise = float(np.nanmax(after) / data.loss[a]) if np.isfinite(after).any() and data.loss[a] > 0 else math.nan
        kind = "preconditioned sharpness" if limit.preconditioned else "sharpness"
        where = f" (parameter group {g}, the lowest limit of {groups})" if groups > 1 else ""
        evidence = {"sharpness": float(value), "limit": float(limit.limit), "max_ratio": float(ratio),
                    "lr": lr, "loss_rise_next_10_steps": rise}
        if groups > 1:
            evidence["group"] = g
        findings.append(Finding("over-stability-limit", [], step, int(data.steps[b]), "warning", evidence,
                                f"The {kind} ({value:.4g}) is above the stability limit {limit.rule} = "
                                f"{limit.limit:.4g} of {name} at lr={lr:.3g}{where}: steps along the sharpest "
                                "direction grow instead of shrinking. Lower the learning rate (or add warm-up). " +
                                REPLAY_HINT.format(step=step) + ".", limit.source))
    return findings

"""Finding rules over gradient series: spikes, oscillation across a valley, overshoot, and dead units."""
from __future__ import annotations

import math
import warnings

import numpy as np

from nbkit.analyze.finding import Finding
from nbkit.analyze.findings import units as unit_rules
from nbkit.analyze.findings.data import finite_median, rolling_median
from nbkit.analyze.findings.sustained import REPLAY_HINT, merge_findings, per_tensor_findings


def grad_spike(data, t) -> list[Finding]:
    """grad-spike: the global gradient norm above t.spike_factor × its running median and t.spike_over_max ×
    the largest of its history; spikes within 5 rows are one finding, naming the tensors that spiked."""
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
                                REPLAY_HINT.format(step=first) + ".", "common practice"))
    return findings


def oscillation(data, t) -> list[Finding]:
    """oscillation: sustained sign flipping with negative gradient cosine, kept only where it does not heal."""
    flips, cos = data.series("sign_flip"), data.series("grad_cosine")
    norm = data.series("grad_norm")
    finite = data.loss[np.isfinite(data.loss)]
    smooth = rolling_median(finite, 11) if len(finite) else finite
    low, high = (float(smooth.min()), float(smooth.max())) if len(smooth) else (math.nan, math.nan)

    def growing(f):
        """Gradient descent with 1 < lr·λ < 2 converges while alternating, and momentum methods zig-zag
        along sharp directions while the loss keeps falling: both healthy. Kept only where the gradient
        norm does not shrink (last quarter ≥ oscillation_decay × the first quarter's) and the loss does
        not improve (last quarter's median ≥ (1 − oscillation_progress) × the first quarter's)."""
        k, (a, b) = data.tensors.index(f.tensors[0]), np.searchsorted(data.heavy_steps, [f.first_step, f.last_step])
        quarter = max(1, (b - a + 1) // 4)
        if finite_median(norm[b + 1 - quarter:b + 1, k]) < t.oscillation_decay * finite_median(norm[a:a + quarter, k]):
            return False
        rows = data.run.rows_for_steps(f.first_step, f.last_step)
        loss = data.loss[rows]
        span = max(1, len(loss) // 4)
        first, last = finite_median(loss[:span]), finite_median(loss[-span:])
        if last < (1 - t.oscillation_progress) * first:
            return False
        # a zig-zag at the noise floor of a converged run is harmless: the loss must sit above its best
        # by oscillation_gap of the run's loss range
        return not (finite_median(loss) - low < t.oscillation_gap * (high - low))

    found = per_tensor_findings(data, t, "oscillation", "warning",
                                lambda k: (flips[:, k] > t.sign_flip) & (cos[:, k] < t.grad_cosine),
                                lambda k, a, b: {"median_sign_flip": finite_median(flips[a:b + 1, k]),
                                                 "median_grad_cosine": finite_median(cos[a:b + 1, k])},
                                "Gradients keep flipping sign and point against the previous step: the iterate "
                                "bounces across a valley. Lower the learning rate (or the momentum).", merge=False)
    return merge_findings([f for f in found if growing(f)])


def overshoot(data, t) -> list[Finding]:
    """overshoot: a large reversed share, well above the sign-flip share, sustained."""
    rev, flips = data.series("reversed"), data.series("sign_flip")
    return per_tensor_findings(data, t, "overshoot", "warning",
                               lambda k: (rev[:, k] > t.reversed_share)
                               & (rev[:, k] > t.reversed_over_flip * flips[:, k]),
                               lambda k, a, b: {"median_reversed": finite_median(rev[a:b + 1, k]),
                                                "median_sign_flip": finite_median(flips[a:b + 1, k])},
                               "Most updates move against the current gradient: momentum carries the weights past "
                               "the minimum. Lower the learning rate or the momentum (β1).")


def dead_units(data, t) -> list[Finding]:
    """dead-units: a share of a weight's rows without gradient in every row of t.dead_window; a warning from
    t.dead_share_warning, else info. A weight with a rows profile is judged on its exact per-unit gradient
    (nbkit.analyze.findings.units.dead_units, which names the units); others on the dead_rows series,
    confirmed by the probe coordinates."""
    profiled = set(unit_rules.profiled_weights(data))
    out = [f for k in sorted(profiled) for f in unit_rules.dead_units(data, t, k)]
    dead = data.series("dead_rows")
    rows = np.array([max(1, s[0]) if s else 1 for s in (data.shape(k) for k in range(len(data.tensors)))], float)
    share = dead / rows
    candidates = per_tensor_findings(data, t, "dead-units", "warning", lambda k: share[:, k] >= t.dead_share,
                                     lambda k, a, b: {"min_dead_share": float(np.nanmin(share[a:b + 1, k])),
                                                      "max_dead_rows": float(np.nanmax(dead[a:b + 1, k]))},
                                     "Whole output units of this weight get no gradient at all (dead ReLUs, saturated "
                                     "units). Lower the learning rate, use a leaky activation or check the "
                                     "initialisation.", window=t.dead_window, share=1.0,
                                     tensors=[k for k in range(len(data.tensors)) if k not in profiled])
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

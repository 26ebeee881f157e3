"""step-overran: steps that did worse on their own batch than their local model predicted, read from the stored
step-quality arrays (nbkit.step_quality), so the rule fires only on steps where those were computed."""
from __future__ import annotations

import numpy as np

from nbkit.analyze.finding import Finding
from nbkit.analyze.findings.sustained import REPLAY_HINT, sustained_segments
from nbkit.analyze.step_quality import RHO_LOW

SOURCE = "Nocedal & Wright, Numerical Optimization, 2nd ed., ch. 4, Algorithm 4.1 (ρ < 1/4: shrink the step)"
TOP_SHARE = 0.8        # name the tensors that together carry 80 % of the term (at most MAX_NAMED)
MAX_NAMED = 5


def overran_steps(quality, t) -> np.ndarray:
    """(steps,) bool: a step that raised its own batch's loss (ρ₁ < 0) or made it non-finite, or that lies in
    a sustained stretch (t.overran_window computed steps, t.sustained_share of them) with ρ₁ below
    t.overran_rho. Steps whose predicted change is within t.overran_noise × |loss| count for neither."""
    before, after = quality.loss_before, quality.loss_after
    predicted, rho = quality.predicted_first, quality.rho_first
    with np.errstate(invalid="ignore"):
        measurable = np.abs(predicted) > t.overran_noise * np.abs(before)
        blown = np.isfinite(before) & ~np.isfinite(after)
        raised = blown | (measurable & (predicted < 0) & (quality.actual > 0))
        low = measurable & (rho < t.overran_rho)
    flagged = raised.copy()
    computed = np.flatnonzero(np.isfinite(before))
    for a, b in sustained_segments(low[computed], t.overran_window, t.sustained_share):
        flagged[computed[a]:computed[b] + 1] |= low[computed[a]:computed[b] + 1]
    return flagged


def _stretches(steps: np.ndarray, flagged: np.ndarray) -> list[np.ndarray]:
    """Row indices of runs of flagged steps, a run continuing over gaps of at most one step."""
    rows = np.flatnonzero(flagged)
    if not len(rows):
        return []
    cut = np.flatnonzero(np.diff(steps[rows]) > 2) + 1
    return np.split(rows, cut)


def _carriers(terms: np.ndarray, tensors: list) -> tuple[list, dict]:
    """The tensors that carry most of a term summed over some steps: (names, {name: share})."""
    total = np.nansum(terms, axis=0)                       # (tensors,)
    sign = np.sign(np.nansum(total)) or 1.0
    weight = np.clip(sign * total, 0, None)                # the tensors pushing the term its way
    if not np.any(weight > 0):
        return [], {}
    order = np.argsort(-weight)
    share = weight / weight.sum()
    names, covered = [], 0.0
    for k in order[:MAX_NAMED]:
        if covered >= TOP_SHARE or weight[k] <= 0:
            break
        names.append(tensors[k])
        covered += share[k]
    return names, {tensors[k]: round(float(share[k]), 4) for k in order[:len(names)]}


def step_overran(data, t) -> list[Finding]:
    """Findings of kind step-overran (module docstring)."""
    quality = data.run.step_quality() if hasattr(data.run, "step_quality") else None
    if quality is None or not len(quality.step):
        return []
    flagged = overran_steps(quality, t)
    out = []
    rho1, rho2, actual = quality.rho_first, quality.rho_second, quality.actual
    for rows in _stretches(quality.step, flagged):
        second = quality.second_order_terms[rows]
        with_hvp = bool(np.isfinite(quality.predicted_second[rows]).all())
        terms = second if with_hvp else -quality.first_order_terms[rows]
        names, shares = _carriers(terms, list(quality.tensors))
        first, last = int(quality.step[rows[0]]), int(quality.step[rows[-1]])
        finite_rho = rho1[rows][np.isfinite(rho1[rows])]
        evidence = {"steps_flagged": int(len(rows)),
                    "min_rho_first": float(finite_rho.min()) if len(finite_rho) else float("nan"),
                    "min_rho_second": float(np.nanmin(rho2[rows])) if np.isfinite(rho2[rows]).any() else float("nan"),
                    "max_actual_change": float(np.nanmax(actual[rows])),
                    "nonfinite_loss_after": int((~np.isfinite(quality.loss_after[rows])).sum()),
                    "named_by": "second-order term ½ΔθᵀHΔθ" if with_hvp else "first-order term gᵀΔθ",
                    "tensor_shares": shares, "rho_low": RHO_LOW}
        suggestion = (f"The step went past where its local model holds (ρ below {RHO_LOW}, below 0 where it raised "
                      "its own batch's loss); take a shorter step on these tensors (a lower learning rate, or "
                      "gradient clipping). " + REPLAY_HINT.format(step=first) +
                      " with a lower learning rate, then nbkit.step_quality on the replay.")
        out.append(Finding("step-overran", names, first, last, "warning", evidence, suggestion, SOURCE))
    return out

"""Step quality: did a step change its own batch's loss as its local model predicted? The pure maths.

For a step Δθ = θ_after − θ_before taken on batch B with loss L(θ) = L(θ; B) (the trained loss: the sum
over micro-batches of loss × its back-propagated scale), the local models of L around θ_before are

    first order   m₁(Δθ) − L(θ) = gᵀΔθ                      g = ∇L(θ_before), before any clipping
    second order  m₂(Δθ) − L(θ) = gᵀΔθ + ½ ΔθᵀHΔθ           H = ∇²L(θ_before), one Hessian-vector product

and the trust-region ratio ρ = actual / predicted, actual = L(θ_after; B) − L(θ_before; B) evaluated with
the step's own random state (dropout draws the same masks). Nocedal & Wright, *Numerical Optimization*,
2nd ed. (2006), ch. 4, eq. 4.4 and Algorithm 4.1: ρ < 1/4 means the model was a poor guide (the trust
region is shrunk), ρ > 3/4 a good one. ρ < 0 means the step raised the loss of the very batch it was
computed on. On a quadratic the second-order model is exact, so ρ₂ = 1 to rounding; on least squares a
gradient-descent step along an eigenvector of eigenvalue λ has ρ₁ = 1 − lr·λ/2 (tests/test_step_quality.py).

Everything here takes arrays or tensors and touches no recording; nbkit.replay.step_quality runs the
passes and nbkit.store.quality stores what they measured.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch

# Nocedal & Wright, Numerical Optimization, 2nd ed., ch. 4, Algorithm 4.1 (η thresholds 1/4 and 3/4)
RHO_LOW, RHO_HIGH = 0.25, 0.75
# The class names of a step by its ρ (ours): below RHO_LOW, between, above RHO_HIGH; "unknown": NaN
RHO_CLASSES = ("poor", "fair", "good")


@dataclass(frozen=True)
class StepQuality:
    """The measured step-quality arrays of some steps (nbkit.step_quality, run.step_quality()).

    Stored fields (nbkit.store.quality); the derived ones are properties, so each fact has one owner.
    """

    tensors: list                   # tensor names, the recording's order
    step: np.ndarray                # (steps,) int64 optimizer steps
    loss_before: np.ndarray         # (steps,) float64 L(θ_before; B), NaN where not computed
    loss_after: np.ndarray          # (steps,) float64 L(θ_after; B): ±inf / NaN kept as evidence
    predicted_first: np.ndarray     # (steps,) float64 gᵀΔθ over every tensor
    predicted_second: np.ndarray    # (steps,) float64 gᵀΔθ + ½ΔθᵀHΔθ; NaN without a Hessian-vector product
    first_order_terms: np.ndarray   # (steps, tensors) float64 g_t·Δθ_t per tensor (NaN: not in the model)
    second_order_terms: np.ndarray  # (steps, tensors) float64 ½ Δθ_t·(HΔθ)_t per tensor (sums to ½ΔθᵀHΔθ)

    @property
    def actual(self) -> np.ndarray:
        """(steps,) L(θ_after; B) − L(θ_before; B)."""
        return actual_change(self.loss_before, self.loss_after)

    @property
    def rho_first(self) -> np.ndarray:
        return trust_region_ratio(self.actual, self.predicted_first)

    @property
    def rho_second(self) -> np.ndarray:
        return trust_region_ratio(self.actual, self.predicted_second)

    def as_arrays(self) -> dict:
        """Every stored and derived array by name (plain numpy, no pandas)."""
        return {"step": self.step, "loss_before": self.loss_before, "loss_after": self.loss_after,
                "actual": self.actual, "predicted_first": self.predicted_first,
                "predicted_second": self.predicted_second, "rho_first": self.rho_first,
                "rho_second": self.rho_second, "first_order_terms": self.first_order_terms,
                "second_order_terms": self.second_order_terms,
                "first_order_share": term_shares(self.first_order_terms),
                "second_order_share": term_shares(self.second_order_terms)}


def actual_change(loss_before, loss_after) -> np.ndarray:
    """L_after − L_before; +inf where the loss after is +inf (or NaN) and the one before finite: a step that
    made the loss non-finite raised it without bound. NaN where the loss before is unknown."""
    before, after = np.asarray(loss_before, dtype=np.float64), np.asarray(loss_after, dtype=np.float64)
    with np.errstate(invalid="ignore"):
        change = after - before
    blown = np.isfinite(before) & ~np.isfinite(after)
    return np.where(blown, np.inf, change)


def trust_region_ratio(actual, predicted) -> np.ndarray:
    """ρ = actual / predicted (Nocedal & Wright 2006, eq. 4.4); NaN where predicted is 0 or not finite."""
    actual, predicted = np.asarray(actual, dtype=np.float64), np.asarray(predicted, dtype=np.float64)
    ok = np.isfinite(predicted) & (predicted != 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(ok, actual / np.where(ok, predicted, 1.0), np.nan)


def term_shares(terms) -> np.ndarray:
    """(steps, tensors) each tensor's share of its step's total (terms / their sum; NaN tensors left out,
    so shares of a step sum to 1); NaN where the total is 0 or not finite. A share can be negative (a tensor
    whose term has the other sign) or above 1."""
    terms = np.asarray(terms, dtype=np.float64)
    total = np.nansum(terms, axis=-1, keepdims=True)
    all_nan = np.all(np.isnan(terms), axis=-1, keepdims=True)
    ok = np.isfinite(total) & (total != 0) & ~all_nan
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(ok, terms / np.where(ok, total, 1.0), np.nan)


def rho_class(rho) -> np.ndarray:
    """Per step "poor" (ρ < RHO_LOW), "fair", "good" (ρ > RHO_HIGH) or "unknown" (NaN)."""
    rho = np.asarray(rho, dtype=np.float64)
    out = np.full(rho.shape, "fair", dtype=object)
    with np.errstate(invalid="ignore"):
        out[rho < RHO_LOW] = "poor"
        out[rho > RHO_HIGH] = "good"
    out[np.isnan(rho)] = "unknown"
    return out


def select_window(quality: StepQuality, first: int, last: int, at: int | None = None) -> dict:
    """What a timeline draws of steps first..last (inclusive): predicted vs actual change, ρ with its
    thresholds and classes, and at step `at` (default: none) each tensor's share of gᵀΔθ and of ½ΔθᵀHΔθ.

    Returns {"step", "actual", "predicted_first", "predicted_second", "rho_first", "rho_second",
    "class_first", "class_second": (n,) arrays; "thresholds": (RHO_LOW, RHO_HIGH); "source": the
    citation; "shares": None or {"step", "tensors", "first_order", "second_order"}}.
    """
    keep = (quality.step >= first) & (quality.step <= last)
    rho_first, rho_second = quality.rho_first[keep], quality.rho_second[keep]
    out = {"step": quality.step[keep], "actual": quality.actual[keep],
           "predicted_first": quality.predicted_first[keep], "predicted_second": quality.predicted_second[keep],
           "rho_first": rho_first, "rho_second": rho_second,
           "class_first": rho_class(rho_first), "class_second": rho_class(rho_second),
           "thresholds": (RHO_LOW, RHO_HIGH),
           "source": "Nocedal & Wright, Numerical Optimization, 2nd ed., ch. 4, Algorithm 4.1", "shares": None}
    if at is not None:
        rows = np.flatnonzero(quality.step == at)
        if len(rows):
            r = rows[-1]
            out["shares"] = {"step": int(at), "tensors": list(quality.tensors),
                             "first_order": term_shares(quality.first_order_terms[r]),
                             "second_order": term_shares(quality.second_order_terms[r])}
    return out


def step_terms(loss: torch.Tensor, params: list, delta: list, second_order: bool = True):
    """Per-tensor terms of the local models of `loss` at the parameters `params` for the step `delta`.

    loss: a scalar built from `params` with gradients on; delta: one tensor per param (Δθ). Returns
    (first (T,) float64 g_t·Δθ_t, second (T,) float64 ½ Δθ_t·(HΔθ)_t or None without second_order). HΔθ
    is the vector-Jacobian product of g = ∇L with Δθ as its output gradient (Pearlmutter 1994, "Fast exact
    multiplication by the Hessian"; H is symmetric). A param the loss does not reach has terms 0.
    """
    grads = torch.autograd.grad(loss, params, create_graph=second_order, allow_unused=True)
    first = np.array([0.0 if g is None else float((g.detach().double() * d.double()).sum())
                      for g, d in zip(grads, delta)], dtype=np.float64)
    if not second_order:
        return first, None
    live = [k for k, g in enumerate(grads) if g is not None and g.requires_grad]
    second = np.zeros(len(params), dtype=np.float64)
    if live:
        hv = torch.autograd.grad([grads[k] for k in live], [params[k] for k in live],
                                 grad_outputs=[delta[k].to(grads[k].dtype) for k in live], allow_unused=True)
        for k, h in zip(live, hv):
            if h is not None:
                second[k] = 0.5 * float((h.double() * delta[k].double()).sum())
    return first, second

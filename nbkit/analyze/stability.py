"""Stability limits: the sharpness above which an optimizer at a learning rate cannot stay stable.

On a quadratic with Hessian eigenvalue λ each update rule below is a linear recurrence; it diverges
iff its iteration matrix has spectral radius > 1, i.e. iff the sharpness passes the limit:

  gradient descent                 λ > 2 / lr                       (classical; Cohen et al. 2021)
  heavy ball, momentum β,          λ > 2(1 + β) / ((1 − d)·lr)      (Polyak 1964; torch's dampening d
    dampening d (torch.optim.SGD)                                     scales the step by 1 − d)
  Nesterov momentum β              λ > (2 + 2β) / ((1 + 2β)·lr)     (Cohen et al. 2021)
  Adam family, β1 (preconditioned) λ > (2 + 2β1) / ((1 − β1)·lr)    (Cohen et al. 2022; 38/lr at 0.9)

For Adam the sharpness is that of the preconditioned Hessian P^-1/2 H P^-1/2 (nbkit.analyze.curvature
says which P). Coupled L2 weight decay wd adds wd·I to the Hessian the update sees, so it adds wd to
the sharpness that counts (curvature.sharpness includes it when given the optimizer).
tests/test_curvature.py checks every limit by simulation and by the spectral radius of the iteration
matrix with NumPy.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

# Optimizers whose update divides by a second-moment estimate: their sharpness is preconditioned.
ADAM_FAMILY = ("Adam", "AdamW", "NAdam", "RAdam", "Adamax")
# Optimizers whose weight_decay is always decoupled (applied outside the gradient).
ALWAYS_DECOUPLED = ("AdamW",)


@dataclass(frozen=True)
class StabilityLimit:
    limit: float            # the largest stable sharpness
    preconditioned: bool    # True: compare with the preconditioned sharpness
    rule: str               # the formula, for evidence and reports
    source: str


def stability_limit(optimizer_class: str, group: dict) -> StabilityLimit | None:
    """The stability limit of one parameter group's hyper-parameters, or None where none is known.

    optimizer_class: e.g. "SGD", "Adam" (as in run.meta["optimizer"]["class"]); group: the group's
    hyper-parameters (lr, momentum, dampening, nesterov, betas, ...), as in run.meta["param_groups"].
    """
    lr = float(group.get("lr", 0) or 0)
    if lr <= 0:
        return None
    if optimizer_class == "SGD":
        beta = float(group.get("momentum", 0) or 0)
        if beta == 0:
            return StabilityLimit(2 / lr, False, "2/lr", "gradient descent on a quadratic (Cohen et al. 2021)")
        if group.get("nesterov", False):
            return StabilityLimit((2 + 2 * beta) / ((1 + 2 * beta) * lr), False, "(2+2β)/((1+2β)·lr)",
                                  "Nesterov momentum (Cohen et al. 2021)")
        dampening = float(group.get("dampening", 0) or 0)
        if dampening >= 1:
            return None
        return StabilityLimit(2 * (1 + beta) / ((1 - dampening) * lr), False, "2(1+β)/((1−d)·lr)",
                              "heavy-ball momentum (Polyak 1964)")
    if optimizer_class in ADAM_FAMILY:
        beta1 = float((group.get("betas") or (0.9, 0.999))[0])
        return StabilityLimit((2 + 2 * beta1) / ((1 - beta1) * lr), True, "(2+2β1)/((1−β1)·lr)",
                              "preconditioned sharpness of Adam (Cohen et al. 2022)")
    return None


def coupled_weight_decay(optimizer_class: str, group: dict) -> float:
    """The L2 weight decay that enters the gradient (0 when decay is decoupled or absent)."""
    decay = float(group.get("weight_decay", 0) or 0)
    if not decay or optimizer_class in ALWAYS_DECOUPLED or group.get("decoupled_weight_decay", False):
        return 0.0
    return decay


def iteration_matrix(rule: str, lr: float, curvature: float, *, beta: float = 0.0, dampening: float = 0.0):
    """The 2×2 matrix mapping (θ_t, b_t) to (θ_{t+1}, b_{t+1}) on f(θ) = λθ²/2, b the momentum buffer,
    written from the torch.optim.SGD documentation's pseudo-code: "gd", "heavy-ball" (momentum with
    dampening d), "nesterov", "adam" (Adam's first moment m = β1·m + (1−β1)·g with a frozen
    preconditioner folded into λ: heavy ball with d = β1). Used to check the limits above."""
    lam = curvature
    if rule == "gd":
        return np.array([[1 - lr * lam, 0.0], [0.0, 0.0]])
    if rule == "adam":
        rule, dampening = "heavy-ball", beta
    if rule == "heavy-ball":             # b' = β·b + (1−d)·λθ;  θ' = θ − lr·b'
        return np.array([[1 - lr * (1 - dampening) * lam, -lr * beta], [(1 - dampening) * lam, beta]])
    if rule == "nesterov":               # b' = β·b + λθ;  θ' = θ − lr·(λθ + β·b')
        return np.array([[1 - lr * lam * (1 + beta), -lr * beta * beta], [lam, beta]])
    raise ValueError(f"Unknown rule {rule!r}; expected 'gd', 'heavy-ball', 'nesterov' or 'adam'")

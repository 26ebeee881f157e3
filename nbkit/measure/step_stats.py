"""Statistics of one optimizer step over a list of tensors: whole-tensor passes and sampled ones.

`whole_tensor_statistics` makes a few fused passes over every coordinate (norms, dot products,
dead rows); `sampled_statistics` works on (T, S) matrices of sampled coordinates (gain classes,
factors, shares, histograms, probes). Both are pure apart from the buffers they are told to reuse.
"""
from __future__ import annotations

import torch

from nbkit.measure.quantities import (HISTOGRAM_LOW, cosine, gain_classes, log2_histograms, masked_median,
                                      masked_share, sign_flip_share)
from nbkit.record.adapters import Adapter, StepContext

NAN = float("nan")


def _norms(tensors):
    if not tensors:
        return torch.zeros(0, dtype=torch.float32)
    return torch.stack(torch._foreach_norm(tensors, 2, dtype=torch.float32)).to(torch.float64)


def _dot(a, b):
    """Dot product of two same-shaped tensors in at least float32 (half precision would overflow)."""
    a, b = a.reshape(-1), b.reshape(-1)
    if a.dtype not in (torch.float32, torch.float64):
        a, b = a.float(), b.float()
    return torch.dot(a, b).double()


def whole_tensor_statistics(grads, befores, params, previous_grads, previous_norms):
    """Exact statistics over all coordinates of each tensor.

    grads, params: the tensors' gradients and values after the step; befores: copies of the values
    before the step, turned in place into −Δθ (the buffers are reused next step); previous_grads,
    previous_norms: the gradients (or None) and their norms at the previous recorded step.
    Returns a dict of (T,) float64 tensors.
    """
    T = len(grads)
    grad_norm = _norms(grads)
    weight_norm = _norms(befores)
    torch._foreach_sub_(befores, params)                      # befores := θ_before − θ_after = −Δθ
    update_norm = _norms(befores)
    out = {name: torch.full((T,), NAN, dtype=torch.float64) for name in
           ("grad_max", "grad_cosine", "update_grad_cosine", "dead_rows", "nonfinite",
            "weight_nonfinite", "update_nonfinite")}
    for i, (g, minus_update, p) in enumerate(zip(grads, befores, params)):
        low, high = torch.aminmax(g.reshape(-1))
        out["grad_max"][i] = torch.maximum(-low, high).double()
        # cos(Δθ, −g) = (−Δθ)·g / (|Δθ||g|): +1 means the update points straight down the gradient.
        out["update_grad_cosine"][i] = _dot(minus_update, g)
        if previous_grads[i] is not None:
            out["grad_cosine"][i] = _dot(g, previous_grads[i])
        if g.dim() >= 2:
            row_norms = torch.linalg.vector_norm(g.reshape(g.shape[0], -1), dim=1, dtype=torch.float32)
            out["dead_rows"][i] = (row_norms == 0).sum()
        out["nonfinite"][i] = 0.0 if torch.isfinite(grad_norm[i]) else (~torch.isfinite(g)).sum()
        if not torch.isfinite(weight_norm[i]):
            out["weight_nonfinite"][i] = (~torch.isfinite(minus_update + p)).sum()
        else:
            out["weight_nonfinite"][i] = 0.0
        out["update_nonfinite"][i] = 0.0 if torch.isfinite(update_norm[i]) else (~torch.isfinite(p)).sum()
    out["grad_norm"], out["weight_norm"], out["update_norm"] = grad_norm, weight_norm, update_norm
    out["update_grad_cosine"] = cosine(out["update_grad_cosine"], update_norm, grad_norm)
    out["grad_cosine"] = cosine(out["grad_cosine"], grad_norm, previous_norms)
    numel = torch.tensor([g.numel() for g in grads], dtype=torch.float64)
    out["grad_rms"] = grad_norm / numel.sqrt()
    out["update_ratio"] = torch.where(weight_norm > 0, update_norm / weight_norm, NAN)
    return out


def sampled_statistics(*, grad, theta_before, theta_after, valid, before, after, step, group, lr,
                       adapter: Adapter, previous_grad=None, probes: int):
    """Statistics over sampled coordinates of the tensors of one parameter group.

    grad, theta_before, theta_after, before[k], after[k]: (T, S) float64 sampled values; valid:
    (T, S) bool (False for padding). Returns (quantities dict of (T,) tensors, histograms
    (3, T, bins + 2) int64 for grad/update/gain, probe values dict of (T, probes) tensors).
    """
    update = theta_after - theta_before
    finite_grad = torch.isfinite(grad)
    nonzero = valid & finite_grad & (grad != 0)
    quantities = {
        "zero_grad_share": masked_share(grad == 0, valid & finite_grad),
        "lost_update_share": masked_share(update == 0, nonzero),
    }
    if previous_grad is not None:
        quantities["sign_flip"] = sign_flip_share(grad, previous_grad, valid)
    gain = torch.full_like(grad, NAN)
    probe_values = {"grad": grad[:, :probes], "update": update[:, :probes]}
    for key, value in after.items():
        probe_values[adapter.probe_field(key)] = value[:, :probes]
    if adapter.gain_applicable:
        gain = torch.where(nonzero, update / (-lr * torch.where(nonzero, grad, 1.0)), NAN)
        defined = nonzero & torch.isfinite(gain)
        quantities.update(gain_classes(gain, defined))
        context = StepContext(grad=grad, theta=theta_before, update=update, before=before, after=after,
                              step=step, group=group, lr=lr)
        factors = adapter.factors(context) if adapter.factors else None
        if factors is not None:
            quantities["momentum_factor_median"] = masked_median(factors.momentum.expand_as(gain), defined)
            quantities["scale_factor_median"] = masked_median(factors.scale.expand_as(gain), defined)
            quantities["residual_median"] = masked_median(factors.residual.expand_as(gain), defined)
            if factors.eps_dominated is not None:
                quantities["eps_share"] = masked_share(factors.eps_dominated.expand_as(gain), valid)
            probe_values["momentum_factor"] = factors.momentum.expand_as(gain)[:, :probes]
            probe_values["scale_factor"] = factors.scale.expand_as(gain)[:, :probes]
            probe_values["residual"] = factors.residual.expand_as(gain)[:, :probes]
    histograms = torch.stack([
        log2_histograms(grad, valid, HISTOGRAM_LOW["grad"]),
        log2_histograms(update, valid, HISTOGRAM_LOW["update"]),
        log2_histograms(gain, valid & (grad != 0) & ~(gain < 0), HISTOGRAM_LOW["gain"]),
    ])
    return quantities, histograms, probe_values

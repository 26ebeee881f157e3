"""Statistics of one optimizer step over a list of tensors: whole-tensor passes and sampled ones.

`whole_tensor_statistics` makes a few fused passes over every coordinate (norms, dot products,
dead rows); `sampled_statistics` works on (T, S) matrices of sampled coordinates (gain classes,
factors, shares, histograms, probes). Both are pure apart from the buffers they are told to reuse.
"""
from __future__ import annotations

import torch

from nbkit.measure.quantities import (HISTOGRAM_BINS, HISTOGRAM_LOW, NONFINITE_COLUMN, ZERO_COLUMN, cosine,
                                      gain_classes, log2_histograms, masked_median, masked_share, sign_flip_share)
from nbkit.measure.update_rules import Adapter, StepContext

NAN = float("nan")
# What the recording states of its series: computed over every coordinate, or over the sampled ones
EXACT_QUANTITIES = ["grad_norm", "grad_rms", "grad_max", "weight_norm", "update_norm", "update_ratio", "grad_cosine",
                    "update_grad_cosine", "dead_rows", "nonfinite", "weight_nonfinite", "update_nonfinite",
                    "grad_missing", "predicted_change"]
SAMPLED_QUANTITIES = ["gain_median", "accelerated", "damped", "reversed", "momentum_factor_median",
                      "scale_factor_median", "residual_median", "sign_flip", "eps_share", "zero_grad_share",
                      "lost_update_share", "state_nonfinite", "histograms"]


def _accumulation_dtype(tensor):
    """float32 for half and single precision (half would overflow), float64 for float64."""
    return torch.promote_types(tensor.dtype, torch.float32)


def norms(tensors):
    """(T,) float64 L2 norms, accumulated in at least float32 (float64 for float64 tensors)."""
    if not tensors:
        return torch.zeros(0, dtype=torch.float32)
    dtypes = {_accumulation_dtype(t) for t in tensors}
    if len(dtypes) == 1:
        values = torch._foreach_norm(tensors, 2, dtype=dtypes.pop())
    else:
        values = [torch.linalg.vector_norm(t, dtype=_accumulation_dtype(t)) for t in tensors]
    return torch.stack(values).double()


def _dot(a, b):
    """Dot product of two same-shaped tensors in at least float32 (half precision would overflow)."""
    a, b = a.reshape(-1), b.reshape(-1)
    if a.dtype not in (torch.float32, torch.float64):
        a, b = a.float(), b.float()
    return torch.dot(a, b).float()


def whole_tensor_statistics(grads, minus_updates, previous_grads, previous_norms, weight_norm):
    """Exact statistics over all coordinates of each tensor, in a few batched passes.

    grads: the tensors' gradients; minus_updates: θ_before − θ_after = −Δθ; previous_grads: the
    gradients at the previous recorded step (or None); previous_norms: their norms (T,);
    weight_norm: ‖θ‖ before the step (T,). Returns a dict of (T,) float64 tensors. The plain
    check is tests/test_step_stats.py, which recomputes every series from its NumPy definition.
    """
    T = len(grads)
    empty = torch.zeros(0, dtype=torch.float64)
    grad_norm = norms(grads)
    update_norm = norms(minus_updates)
    nan = torch.full((), NAN, dtype=torch.float32)
    grad_max, update_dot, previous_dot, dead_rows = [], [], [], []
    for g, minus_update, previous in zip(grads, minus_updates, previous_grads):
        low, high = torch.aminmax(g.reshape(-1))
        grad_max.append(torch.maximum(-low, high).float())
        # cos(Δθ, −g) = (−Δθ)·g / (|Δθ||g|): +1 means the update points straight down the gradient.
        update_dot.append(_dot(minus_update, g))
        previous_dot.append(_dot(g, previous) if previous is not None else nan)
        if g.dim() >= 2:
            rows = torch.linalg.vector_norm(g.reshape(g.shape[0], -1), dim=1, dtype=_accumulation_dtype(g))
            dead_rows.append((rows == 0).sum().float())
        else:
            dead_rows.append(nan)
    out = {"grad_norm": grad_norm, "weight_norm": weight_norm, "update_norm": update_norm}
    out["grad_max"] = torch.stack(grad_max).double() if T else empty
    out["dead_rows"] = torch.stack(dead_rows).double() if T else empty
    dots = torch.stack(update_dot).double() if T else empty
    previous_dots = torch.stack(previous_dot).double() if T else empty
    out["update_grad_cosine"] = cosine(dots, update_norm, grad_norm)
    # g·Δθ = −(−Δθ)·g: the first-order change of the loss the step predicts from this tensor (the
    # gradient the optimizer stepped with, so after clipping: ÷ the clip factor for the loss's own)
    out["predicted_change"] = -dots
    out["grad_cosine"] = cosine(previous_dots, grad_norm, previous_norms)
    numel = torch.tensor([g.numel() for g in grads], dtype=torch.float64)
    out["grad_rms"] = grad_norm / numel.sqrt()
    out["update_ratio"] = torch.where(weight_norm > 0, update_norm / weight_norm, NAN)
    # Non-finite counts: a finite norm means no NaN/Inf in the tensor, so only the rare tensors
    # with a non-finite norm are counted coordinate by coordinate (one check for all).
    out["nonfinite"] = torch.zeros(T, dtype=torch.float64)
    out["update_nonfinite"] = torch.zeros(T, dtype=torch.float64)
    both = torch.stack([grad_norm, update_norm]) if T else torch.zeros((2, 0))
    if T and not bool(torch.isfinite(both).all()):
        bad = (~torch.isfinite(both)).tolist()
        for i in range(T):
            if bad[0][i]:
                out["nonfinite"][i] = (~torch.isfinite(grads[i])).sum().double()
            if bad[1][i]:
                out["update_nonfinite"][i] = (~torch.isfinite(minus_updates[i])).sum().double()
    return out


def reference_sampled_statistics(*, grad, theta_before, update, valid, before, after, step, group, lr,
                                 adapter: Adapter, scalars=None, previous_grad=None, probes: int, finite=None):
    """Plain reference of `sampled_statistics`: one masked pass per quantity, easy to read.

    grad, theta_before, update (Δθ), before[k], after[k]: (T, S) float64 sampled values; valid:
    (T, S) bool (False for padding); scalars[k]: (T, 1) scalar optimizer state (NAdam's mu_product). Returns (quantities dict of (T,) tensors, histograms
    (3, T, bins + 2) int64 for grad/update/gain, probe values dict of (T, probes) tensors).
    """
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
                              scalars=scalars or {}, step=step, group=group, lr=lr)
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
        log2_histograms(gain, valid & (grad != 0) & ~((gain < 0) & torch.isfinite(gain)) & adapter.gain_applicable,
                        HISTOGRAM_LOW["gain"]),      # reversed gains are a series; non-finite ones are counted
    ])
    return quantities, histograms, probe_values


def fast_log2_histograms(values: torch.Tensor, include: torch.Tensor | None) -> torch.Tensor:
    """log2 |x| histograms of stacked (3, T, S) values (grad, update, gain) in one bincount.

    include: (3, T, S) bool or None (all). Returns (3, T, HISTOGRAM_BINS + 2) int64, the same
    counts as quantities.log2_histograms row by row. Everything is int32 bit arithmetic on the
    float32 pattern: on the CPU `where`, masked_fill and bool-times-int cost several times more.
    """
    Q, T, S = values.shape
    width = HISTOGRAM_BINS + 2
    magnitude = values.to(torch.float32).view(torch.int32) & 0x7FFFFFFF         # |x| bits
    field = magnitude >> 23                                                     # exponent bits
    low = torch.tensor([127 + HISTOGRAM_LOW[name] for name in ("grad", "update", "gain")][:Q],
                       dtype=torch.int32).view(Q, 1, 1)
    column = (field - low).clamp_(0, HISTOGRAM_BINS - 1)                       # subnormals: lowest bin
    column += ((field + 1) >> 8) * (NONFINITE_COLUMN - (HISTOGRAM_BINS - 1))  # field 255: inf, nan
    column += (((magnitude - 1) >> 31) & 1) * ZERO_COLUMN                     # exact zero: bin 0 -> 64
    column += (torch.arange(Q * T, dtype=torch.int32) * width).view(Q, T, 1)
    dump = Q * T * width
    if include is not None:
        column += (~include).to(torch.int32) * dump                            # excluded: past the end
    counts = torch.bincount(column.reshape(-1), minlength=2 * dump)
    return counts[:dump].view(Q, T, width)


def sampled_statistics(*, grad, theta_before, update, valid, before, after, step, group, lr,
                       adapter: Adapter, scalars=None, previous_grad=None, probes: int, finite=None, pad=None):
    """Statistics over sampled coordinates of the tensors of one parameter group (the fast path).

    Same arguments and results as `reference_sampled_statistics` (tested against it), computed
    with fewer passes: NaN stands for "undefined" so masks fold into comparisons, the four medians
    are one nanmedian call and the three histograms one bincount. finite: True when the caller knows
    every sampled gradient and update is finite (their norms are), which skips the isfinite passes;
    pad: (T, S) 0 where valid, NaN in the padding (computed from valid when None).
    """
    n_valid = valid.sum(dim=1).to(grad.dtype)                                 # (T,)
    # padding and undefined entries become NaN: NaN fails every comparison below
    g = grad + torch.where(valid, 0.0, NAN).to(grad.dtype) if pad is None else grad + pad
    nonzero = g.abs() > 0                    # valid, g != 0 (and not NaN)
    if not finite:
        finite_grad = torch.isfinite(g)
        nonzero &= finite_grad
        among_zero = finite_grad.sum(dim=1).to(grad.dtype)
        zeros = (g == 0).sum(dim=1).to(grad.dtype)
    else:
        among_zero = n_valid
    n_nonzero = nonzero.sum(dim=1).to(grad.dtype)
    if finite:
        zeros = n_valid - n_nonzero

    def share(hits, total):
        return torch.where(total > 0, hits / total.clamp(min=1), NAN)

    quantities = {
        "zero_grad_share": share(zeros, among_zero),
        "lost_update_share": share(((update == 0) & nonzero).sum(dim=1).to(grad.dtype), n_nonzero),
    }
    if previous_grad is not None:
        both = g * previous_grad                 # < 0: sign changed; NaN / 0: left out
        counted = torch.isfinite(both) & (both != 0)
        quantities["sign_flip"] = share(((both < 0) & counted).sum(dim=1).to(grad.dtype),
                                        counted.sum(dim=1).to(grad.dtype))
    probe_values = {"grad": grad[:, :probes], "update": update[:, :probes]}
    for key, value in after.items():
        probe_values[adapter.probe_field(key)] = value[:, :probes]
    gain = None
    if adapter.gain_applicable:
        gain = update / (-lr * g)
        if finite:                           # only g == 0 is undefined: 0 / False = NaN there
            defined = nonzero
            gain += 0.0 / (g != 0)
        else:
            defined = nonzero & torch.isfinite(gain)
            gain = gain.masked_fill_(~defined, NAN)
        n_defined = n_nonzero if finite else defined.sum(dim=1).to(grad.dtype)
        context = StepContext(grad=grad, theta=theta_before, update=update, before=before, after=after,
                              scalars=scalars or {}, step=step, group=group, lr=lr)
        factors = adapter.factors(context) if adapter.factors else None
        # one nanmedian call for the gain and every factor that varies by coordinate; a factor
        # that is constant along a tensor ((T, 1): no momentum, no decay) is its own median
        stacked = [torch.where(gain > 0, gain, NAN)]
        parts = (factors.momentum, factors.scale, factors.residual) if factors is not None else ()
        varying = [f for f in parts if f.shape[-1] != 1]
        stacked += [torch.where(defined, f, NAN) for f in varying]
        computed = iter(torch.stack(stacked).nanmedian(dim=2).values)        # (1 + varying, T)
        median = next(computed)
        any_defined = n_defined > 0
        factor_medians = [next(computed) if f.shape[-1] != 1 else torch.where(any_defined, f[:, 0], NAN)
                          for f in parts]
        relative = gain / median.unsqueeze(1)
        reversed_count = (gain < 0).sum(dim=1).to(grad.dtype)
        quantities["gain_median"] = median
        quantities["reversed"] = share(reversed_count, n_defined)
        quantities["accelerated"] = share((relative > 2).sum(dim=1).to(grad.dtype), n_defined)
        # relative < 1/2 holds for every reversed coordinate too (median > 0): take those out
        damped = (relative < 0.5).sum(dim=1).to(grad.dtype) - torch.where(median > 0, reversed_count, 0.0)
        quantities["damped"] = share(damped, n_defined)
        if factors is not None:
            (quantities["momentum_factor_median"], quantities["scale_factor_median"],
             quantities["residual_median"]) = factor_medians
            if factors.eps_dominated is not None:
                hits = (factors.eps_dominated & valid).sum(dim=1).to(grad.dtype)
                quantities["eps_share"] = share(hits, n_valid)
            probe_values["momentum_factor"] = factors.momentum.expand_as(gain)[:, :probes]
            probe_values["scale_factor"] = factors.scale.expand_as(gain)[:, :probes]
            probe_values["residual"] = factors.residual.expand_as(gain)[:, :probes]
    # gain histogram: positive gains, zeros and non-finite where g != 0 (reversed left out)
    if gain is None:                         # not applicable (LBFGS): no gain histogram
        gain, counted = torch.full_like(grad, NAN), torch.zeros_like(valid)
    else:
        counted = (g != 0) & valid & ~(gain < 0)       # gain is NaN (counted non-finite) where undefined
    histograms = fast_log2_histograms(torch.stack([grad, update, gain]), torch.stack([valid, valid, counted]))
    return quantities, histograms, probe_values

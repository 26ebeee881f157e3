"""Gradient noise scale B_simple = tr(Σ) / |G|² (McCandlish et al. 2018, "An Empirical Model of
Large-Batch Training", eq. 2.9), G the true gradient and Σ the per-example gradient covariance.

Both parts come from the two-batch-size estimator of their Appendix A.1: with |G_small|² and |G_big|²
the squared norms of mean gradients over B_small and B_big examples,
    |G|²  ≈ (B_big·|G_big|² − B_small·|G_small|²) / (B_big − B_small)
    tr(Σ) ≈ (|G_small|² − |G_big|²) / (1/B_small − 1/B_big)
each unbiased. Per-example gradients (torch.func: vmap over grad of functional_call) give B_small = 1
(|G_small|² averaged over the examples) and B_big = the batch; where the model does not allow them
(BatchNorm mixes the examples of a batch) micro-batch gradients give B_small = the micro-batch size.
A single batch gives a noisy ratio; average the parts over batches before dividing (`NoiseParts`,
and the recorder's running average) as the paper advises.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import torch
from torch.func import functional_call, grad, vmap
from torch.utils._pytree import tree_flatten, tree_unflatten

from nbkit.analyze.curvature import AnalysisError, loss_of, second_order, untouched

MICRO_BATCHES = 8          # micro-batches of the fallback (fewer when the batch is small)
VMAP_BUDGET = 1 << 26      # per-example gradient values held at once (chunks of examples)
PER_EXAMPLE_LIMIT = 1 << 24  # "auto" uses micro-batches above this many per-example gradient values
                             # (parameters × batch): per-example passes are memory-bound there
                             # (about 25 × a forward+backward on a 1.3M-parameter MLP at batch 64)


@dataclass(frozen=True)
class NoiseParts:
    grad_sq: float          # unbiased estimate of |G|²
    trace_cov: float        # unbiased estimate of tr(Σ)
    batch_size: int
    method: str             # "per-example" or "micro-batch"

    @property
    def noise_scale(self) -> float:
        return noise_ratio(self.trace_cov, self.grad_sq)


def noise_ratio(trace_cov: float, grad_sq: float) -> float:
    """tr(Σ)/|G|²; +inf when the |G|² estimate is not positive (the gradient is lost in the noise)."""
    if not (math.isfinite(trace_cov) and math.isfinite(grad_sq)):
        return math.nan
    return trace_cov / grad_sq if grad_sq > 0 else math.inf


def two_batch_estimates(small_sq: float, big_sq: float, small: float, big: float) -> tuple[float, float]:
    """(|G|², tr Σ) from mean squared gradient norms at two batch sizes (McCandlish et al. 2018, A.1)."""
    if not 0 < small < big:
        raise AnalysisError(f"The two batch sizes must satisfy 0 < small < big, got {small} and {big}")
    grad_sq = (big * big_sq - small * small_sq) / (big - small)
    trace_cov = (small_sq - big_sq) / (1 / small - 1 / big)
    return float(grad_sq), float(trace_cov)


def batch_size_of(batch) -> int:
    """The number of examples in `batch`: the first dimension of its first tensor that has one."""
    tensors = [t for t in tree_flatten(batch)[0] if isinstance(t, torch.Tensor) and t.dim() > 0]
    if not tensors:
        raise AnalysisError("The batch holds no tensor with a batch dimension; pass the batch step_fn takes, "
                            "e.g. (inputs, targets)")
    return int(tensors[0].shape[0])


def _take(batch, rows, size):
    """The batch restricted to `rows` along dimension 0 of every tensor whose first dimension is `size`."""
    leaves, spec = tree_flatten(batch)
    return tree_unflatten([t[rows] if isinstance(t, torch.Tensor) and t.dim() > 0 and t.shape[0] == size
                           else t for t in leaves], spec)


class _StepModule(torch.nn.Module):
    """Wraps model and step_fn so torch.func.functional_call can swap the model's parameters."""

    def __init__(self, model, step_fn):
        super().__init__()
        self.model, self.step_fn = model, step_fn

    def forward(self, batch):
        return self.step_fn(self.model, batch)


def _mixes_examples(model) -> bool:
    return any(isinstance(m, torch.nn.modules.batchnorm._BatchNorm) and m.training for m in model.modules())


def _per_example_parts(model, step_fn, batch, params, size) -> NoiseParts:

    wrapper = _StepModule(model, step_fn)
    names = {id(p): n for n, p in model.named_parameters()}
    chosen = {"model." + names[id(p)]: p.detach() for p in params}
    fixed = {"model." + n: b for n, b in model.named_buffers()}
    fixed.update({"model." + n: p.detach() for n, p in model.named_parameters() if id(p) not in
                  {id(q) for q in params}})
    leaves, spec = tree_flatten(batch)
    mapped = [isinstance(t, torch.Tensor) and t.dim() > 0 and t.shape[0] == size for t in leaves]
    dims = tree_unflatten([0 if m else None for m in mapped], spec)

    def one(theta, example):
        single = tree_unflatten([t.unsqueeze(0) if m else t for t, m in zip(tree_flatten(example)[0], mapped)],
                                spec)
        return functional_call(wrapper, {**theta, **fixed}, (single,)).reshape(())

    n = sum(p.numel() for p in params)
    chunk = max(1, min(size, VMAP_BUDGET // max(n, 1)))
    per_example = vmap(grad(one), in_dims=(None, dims), randomness="different", chunk_size=chunk)(chosen, batch)
    sq_norms = sum(g.double().reshape(size, -1).pow(2).sum(1) for g in per_example.values())      # (B,)
    mean_sq = sum(g.double().mean(0).pow(2).sum() for g in per_example.values())
    grad_sq, trace = two_batch_estimates(float(sq_norms.mean()), float(mean_sq), 1, size)
    return NoiseParts(grad_sq, trace, size, "per-example")


def _micro_batch_parts(model, step_fn, batch, params, size) -> NoiseParts:
    count = min(MICRO_BATCHES, size // 2)
    if count < 2:
        raise AnalysisError(f"A batch of {size} examples is too small for micro-batch gradient noise "
                            "estimates (BatchNorm needs at least 2 examples per micro-batch); use a batch of 4 or more")
    micro = size // count
    means = []
    for j in range(count):
        part = _take(batch, torch.arange(j * micro, (j + 1) * micro), size)
        grads = torch.autograd.grad(loss_of(step_fn, model, part), params, allow_unused=True)
        means.append(torch.cat([(g if g is not None else torch.zeros_like(p)).double().reshape(-1)
                                for g, p in zip(grads, params)]))
    stacked = torch.stack(means)                                                   # (count, n)
    small_sq = float(stacked.pow(2).sum(1).mean())
    big_sq = float(stacked.mean(0).pow(2).sum())
    grad_sq, trace = two_batch_estimates(small_sq, big_sq, micro, micro * count)
    return NoiseParts(grad_sq, trace, micro * count, "micro-batch")


def noise_parts(model, step_fn, batch, *, params=None, method="auto") -> NoiseParts:
    """Unbiased |G|² and tr(Σ) on one batch. step_fn(model, batch) must return the *mean* loss.

    params=None: all parameters requiring grad. method: "auto" (per-example unless the model has
    BatchNorm in training mode, parameters × batch exceeds PER_EXAMPLE_LIMIT, or vmap fails),
    "per-example" or "micro-batch". The RNG state and
    buffers are restored; .grad is not touched.
    """
    if method not in ("auto", "per-example", "micro-batch"):
        raise AnalysisError(f"Invalid method {method!r}; expected 'auto', 'per-example' or 'micro-batch'")
    params = [p for p in model.parameters() if p.requires_grad] if params is None else list(params)
    if not params:
        raise AnalysisError("No parameter requires grad: there is no gradient to estimate the noise of")
    size = batch_size_of(batch)
    if size < 2:
        raise AnalysisError(f"The gradient noise scale needs a batch of at least 2 examples, got {size}")
    with untouched(model), second_order():
        small = sum(p.numel() for p in params) * size <= PER_EXAMPLE_LIMIT
        if method == "per-example" or (method == "auto" and small and not _mixes_examples(model)):
            try:
                return _per_example_parts(model, step_fn, batch, params, size)
            except AnalysisError:
                raise
            except Exception:
                if method == "per-example":
                    raise
        return _micro_batch_parts(model, step_fn, batch, params, size)


def noise_scale(model, step_fn, batch) -> float:
    """B_simple = tr(Σ)/|G|² on one batch (McCandlish et al. 2018, eq. 2.9). A batch size far below it
    wastes steps on noise; far above it, extra examples per step buy little."""
    return noise_parts(model, step_fn, batch).noise_scale


class RunningNoise:
    """Exponential averages of the two parts, divided only after averaging (McCandlish et al. 2018)."""

    def __init__(self, weight: float = 0.2):
        self.weight, self.grad_sq, self.trace_cov = weight, math.nan, math.nan

    def add(self, parts: NoiseParts) -> float:
        if not (math.isfinite(parts.grad_sq) and math.isfinite(parts.trace_cov)):
            return math.nan
        if math.isnan(self.grad_sq):
            self.grad_sq, self.trace_cov = parts.grad_sq, parts.trace_cov
        else:
            w = self.weight
            self.grad_sq = (1 - w) * self.grad_sq + w * parts.grad_sq
            self.trace_cov = (1 - w) * self.trace_cov + w * parts.trace_cov
        return noise_ratio(self.trace_cov, self.grad_sq)


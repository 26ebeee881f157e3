"""Per-unit profiles of a weight: one value per output unit ("rows") and per input feature
("columns") at a step, over every coordinate.

For a weight W, with Δθ its update and g its gradient at the step, a unit u's profile is
  update_rms[u] = √(mean over u's coordinates of Δθ²)
  grad_rms[u]   = √(mean of g²)              (plain step RMS = lr · grad_rms: the reader multiplies)
  eps_share[u]  = share of u's coordinates where ε outweighs the rest of the optimizer's denominator
                  (optimizers with a second moment; NaN otherwise)
A unit's gain is update_rms ÷ (lr · grad_rms). Columns of a convolution are its input channels: the
kernel positions are part of every column's coordinates (and of every row's).

Which storage axis holds the output units depends on the owning module (`unit_axes`). Values are
stored as fixed-point log2 (`encode` / `decode`): unit gains span 1e-2…1e8 under Adam and RMS values
go below float16's range, and a code keeps exact zeros and non-finite values apart from the rest.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import torch

PROFILE_QUANTITIES = ("update_rms", "grad_rms", "eps_share")     # stored, in this order
READ_QUANTITIES = ("update_rms", "plain_rms", "gain", "eps_share", "grad_rms")   # run.profile(q=...)
AXES = ("rows", "columns")

# log2 codes: int16 = round(log2(x) · LOG2_SCALE): 1/200 of an octave is 0.35 % of the value, and
# ±163 octaves hold every float32 (2^-149 … 2^128); values beyond are clamped to the range.
LOG2_SCALE = 200
MISSING = -32768        # not measured at this step (a light step; eps_share without a second moment)
ZERO = -32767           # exactly zero
NAN = 32767             # NaN (a NaN in the unit's coordinates)
INFINITE = 32766        # infinite
_LIMIT = 32765          # largest finite code


@dataclass(frozen=True)
class UnitAxes:
    """Where a weight's output units and input features are: the storage axis of each (columns None:
    no input-feature axis, e.g. an embedding's rows are tokens), and how that was decided."""

    rows: int
    columns: int | None
    how: str


# module class name -> (rows axis, columns axis): torch.nn's documented weight shapes, and
# transformers' Conv1D ("Conv1D works like a Linear layer but the weights are transposed",
# transformers/pytorch_utils.py: weight (nx, nf) = [in, out]).
_KNOWN = {
    "Linear": (0, 1), "LazyLinear": (0, 1), "Bilinear": (0, 1), "NonDynamicallyQuantizableLinear": (0, 1),
    "Conv1d": (0, 1), "Conv2d": (0, 1), "Conv3d": (0, 1), "LazyConv1d": (0, 1), "LazyConv2d": (0, 1),
    "LazyConv3d": (0, 1),
    "ConvTranspose1d": (1, 0), "ConvTranspose2d": (1, 0), "ConvTranspose3d": (1, 0),   # [in, out/groups, k…]
    "Conv1D": (1, 0),
    "Embedding": (0, None), "EmbeddingBag": (0, None),
    "MultiheadAttention": (0, 1),    # in_proj_weight [3·E, E], out_proj is a Linear
}


def unit_axes(module: torch.nn.Module | None, shape: tuple) -> UnitAxes | None:
    """The unit axes of a parameter of `shape` held directly by `module`; None for 0-D and 1-D tensors
    (no profile). A module type not listed above is read as PyTorch's convention [out, in, …] and
    says so in `how`."""
    if len(shape) < 2:
        return None
    name = type(module).__name__ if module is not None else None
    if name in _KNOWN:
        rows, columns = _KNOWN[name]
        return UnitAxes(rows, columns, f"{name}: output units on axis {rows}"
                        + (f", input features on axis {columns}" if columns is not None else ", no input axis"))
    return UnitAxes(0, 1, f"{name or 'no module'}: not a known layer type, read as [out, in, ...] "
                          "(PyTorch's convention for weights)")


def unit_profiles(minus_update: torch.Tensor, grad: torch.Tensor, eps: tuple | None, dims: dict,
                  scratch: torch.Tensor | None = None) -> dict:
    """{axis: (units, 3) float64 [update_rms, grad_rms, eps_share]} for each axis -> storage dim in `dims`.

    minus_update is −Δθ (its square is Δθ²). eps: (state tensor, threshold): ε dominates where the
    tensor is below the threshold (the adapter's eps_threshold), or None (eps_share NaN). Each square is
    made once and summed along every axis in float32; a unit whose float32 sum is 0 or not finite (values
    below 1e-19 square to 0, above 1e19 to inf) is summed again from its own values in float64, so a unit's
    grad_rms is 0 exactly when every one of its gradients is 0. scratch: a flat float32 (float64 for
    float64 weights) buffer of at least grad.numel() values, reused between calls (a fresh tensor of a
    few MB costs its page faults on every call: 0.1 -> 0.8 ms here).
    """
    work = torch.float64 if grad.dtype == torch.float64 else torch.float32
    if scratch is None or scratch.numel() < grad.numel() or scratch.dtype != work:
        scratch = torch.empty(grad.numel(), dtype=work)
    buffer = scratch[:grad.numel()].view(grad.shape)
    out = {axis: np.empty((grad.shape[dim], 3)) for axis, dim in dims.items()}
    for k, x in enumerate((minus_update, grad)):
        square = torch.mul(x, x, out=buffer)
        for axis, dim in dims.items():
            out[axis][:, k] = _rms(x, square, dim)
    if eps is None:
        for values in out.values():
            values[:, 2] = np.nan            # stored as MISSING (no second moment), not as a NaN value
        return out
    state, threshold = eps
    # 0/1 as floats summed in their own dtype (exact below 2^24 per unit): a bool tensor, or a float64
    # accumulator, makes these sums 10-50 x slower here
    dominated = torch.lt(state, threshold, out=buffer)
    for axis, dim in dims.items():
        others = [d for d in range(grad.dim()) if d != dim]
        count = math.prod(grad.shape[d] for d in others)
        out[axis][:, 2] = dominated.sum(dim=others).double().numpy() / count
    return out


def _rms(x: torch.Tensor, square: torch.Tensor, dim: int) -> np.ndarray:
    others = [d for d in range(x.dim()) if d != dim]
    count = math.prod(x.shape[d] for d in others)
    sums = square.sum(dim=others)
    redo = torch.nonzero((sums == 0) | ~torch.isfinite(sums)).reshape(-1)
    rms = sums.double().div_(count).sqrt_()
    if len(redo):
        exact = torch.linalg.vector_norm(x.index_select(dim, redo), dim=others, dtype=torch.float64)
        rms[redo] = exact / math.sqrt(count)
    return rms.numpy()


def encode(values: np.ndarray) -> np.ndarray:
    """float values (≥ 0) -> int16 log2 codes; NaN -> NAN, ±inf -> INFINITE."""
    values = np.asarray(values, dtype=np.float64)
    codes = np.where(np.isnan(values), NAN, INFINITE).astype(np.int16)
    finite = np.isfinite(values)
    with np.errstate(divide="ignore", invalid="ignore"):
        scaled = np.round(np.log2(np.abs(np.where(finite, values, 1.0))) * LOG2_SCALE)
    codes[finite] = np.clip(scaled[finite], -_LIMIT, _LIMIT).astype(np.int16)
    codes[finite & (values == 0)] = ZERO
    return codes


def decode(codes: np.ndarray) -> np.ndarray:
    """int16 log2 codes -> float64 values: 0 for ZERO, inf for INFINITE, NaN for NAN and MISSING
    (`measured(codes)` tells them apart)."""
    codes = np.asarray(codes)
    values = np.exp2(codes.astype(np.float64) / LOG2_SCALE)
    values[codes == ZERO] = 0.0
    values[codes == INFINITE] = np.inf
    values[(codes == NAN) | (codes == MISSING)] = np.nan
    return values


def measured(codes: np.ndarray) -> np.ndarray:
    """True where a code holds a measured value (NaN values included)."""
    return np.asarray(codes) != MISSING

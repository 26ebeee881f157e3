"""Per-tensor quantities of one optimizer step, computed on whole tensors or on sampled coordinates.

Shapes in comments: T = tensors in the batch of work, S = sampled coordinates per tensor (padded).
"""
from __future__ import annotations

import numpy as np
import torch

# The series every recording holds, in storage order. Definitions are in README.md ("Quantities").
QUANTITIES = (
    "grad_norm", "grad_rms", "grad_max", "weight_norm", "update_norm", "update_ratio",
    "gain_median", "accelerated", "damped", "reversed",
    "momentum_factor_median", "scale_factor_median", "residual_median",
    "sign_flip", "grad_cosine", "update_grad_cosine", "eps_share",
    "zero_grad_share", "lost_update_share", "dead_rows", "nonfinite",
    "weight_nonfinite", "update_nonfinite", "state_nonfinite", "grad_missing",
    "sharpness", "noise_scale",
    "predicted_change",
)

# Quantities that are shares of coordinates, in [0, 1]
SHARE_QUANTITIES = frozenset({"accelerated", "damped", "reversed", "sign_flip", "eps_share", "zero_grad_share",
                              "lost_update_share"})

HISTOGRAM_BINS = 64
# Lowest log2 magnitude of each histogram's first bin; each bin spans one power of two. Values
# outside the range are counted in the first or last bin.
HISTOGRAM_LOW = {"grad": -48, "update": -48, "gain": -32}
ZERO_COLUMN, NONFINITE_COLUMN = HISTOGRAM_BINS, HISTOGRAM_BINS + 1   # extra columns after the bins


def log2_histograms(values: torch.Tensor, valid: torch.Tensor, low: int) -> torch.Tensor:
    """Counts per row of floor(log2 |x|), read from the float32 exponent bits.

    values, valid: (T, S). Returns (T, HISTOGRAM_BINS + 2) int64: the bins, then the count of exact
    zeros, then the count of non-finite values. Invalid (padding) entries are not counted.
    """
    x = values.to(torch.float32).abs()
    exponent = ((x.view(torch.int32) >> 23) & 255) - 127          # floor(log2 x) for normal floats
    bins = (exponent - low).clamp_(0, HISTOGRAM_BINS - 1)
    bins = torch.where(x == 0, ZERO_COLUMN, bins)
    bins = torch.where(torch.isfinite(x), bins, NONFINITE_COLUMN)
    width = HISTOGRAM_BINS + 2
    rows = torch.arange(values.shape[0]).unsqueeze(1) * width
    flat = (rows + bins)[valid]
    return torch.bincount(flat, minlength=values.shape[0] * width).view(values.shape[0], width)


def masked_share(condition: torch.Tensor, among: torch.Tensor) -> torch.Tensor:
    """Share of `among` entries where `condition` holds, per row; NaN where a row has none. (T,)"""
    total = among.sum(dim=1).to(torch.float64)
    hits = (condition & among).sum(dim=1).to(torch.float64)
    return torch.where(total > 0, hits / total.clamp(min=1), torch.nan)


def masked_median(values: torch.Tensor, among: torch.Tensor) -> torch.Tensor:
    """Median of the `among` entries per row (lower median, as torch.nanmedian); NaN if none. (T,)"""
    return torch.where(among, values, torch.nan).nanmedian(dim=1).values


def gain_classes(gain: torch.Tensor, defined: torch.Tensor) -> dict[str, torch.Tensor]:
    """Median gain and the reversed / accelerated / damped shares of each row.

    Classes are exclusive and tested in this order: gain < 0, relative gain > 2, relative gain < 1/2,
    where relative gain = gain / median of the row's defined positive gains. Shares are over the
    defined coordinates (g != 0, finite gain). Returns (T,) tensors and the (T, S) class codes
    (0 ordinary, 1 damped, 2 accelerated, 3 reversed, -1 undefined) for the probe view.
    """
    positive = defined & (gain > 0)
    median = masked_median(gain, positive)                          # (T,)
    relative = gain / median.unsqueeze(1)
    reversed_ = defined & (gain < 0)
    accelerated = defined & ~reversed_ & (relative > 2)
    damped = defined & ~reversed_ & ~accelerated & (relative < 0.5)
    return {
        "gain_median": median,
        "reversed": masked_share(reversed_, defined),
        "accelerated": masked_share(accelerated, defined),
        "damped": masked_share(damped, defined),
    }


GAIN_CLASS_NAMES = ("ordinary", "damped", "accelerated", "reversed")


def classify_gain(gain, median):
    """Class code per coordinate (numpy or torch): 0 ordinary, 1 damped, 2 accelerated, 3 reversed,
    -1 undefined (non-finite gain). Same rule as gain_classes, for views that hold one tensor."""
    gain = np.asarray(gain, dtype=np.float64)
    relative = gain / median
    code = np.zeros(gain.shape, dtype=np.int8)
    code[relative < 0.5] = 1
    code[relative > 2] = 2
    code[gain < 0] = 3
    code[~np.isfinite(gain)] = -1
    return code


def sign_flip_share(grad: torch.Tensor, previous: torch.Tensor, valid: torch.Tensor) -> torch.Tensor:
    """Share of coordinates, among those non-zero both times, whose gradient sign changed. (T,)"""
    both = valid & (grad != 0) & (previous != 0) & torch.isfinite(grad) & torch.isfinite(previous)
    return masked_share(torch.signbit(grad) != torch.signbit(previous), both)


def cosine(dot: torch.Tensor, norm_a: torch.Tensor, norm_b: torch.Tensor) -> torch.Tensor:
    """dot / (|a| |b|), NaN where either norm is zero or not finite."""
    denominator = norm_a * norm_b
    ok = (denominator > 0) & torch.isfinite(denominator)
    return torch.where(ok, dot / torch.where(ok, denominator, 1.0), torch.nan)

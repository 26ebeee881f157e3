"""Colour limits for heat maps: robust percentiles over what is shown, and per-row scaling.

Pure functions. Limits come from the 1st and 99th percentiles of the finite values shown (of the
positive ones on a log scale), so one extreme row (a class token's first update ratio of 1e3)
does not turn every other row dark; values beyond the limits are drawn in the colour bar's
over/under colours. Percentile clipping of a colour range is common practice, not a cited rule.
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

LOW_PERCENTILE, HIGH_PERCENTILE = 1.0, 99.0


@dataclass(frozen=True)
class Limits:
    """low, high: the colour range; below, above: whether some shown values lie outside it
    (the colour bar then extends); log: limits are for a log scale (positive values only)."""
    low: float
    high: float
    below: bool
    above: bool
    log: bool

    @property
    def extend(self) -> str:
        """matplotlib's colour-bar `extend` for these limits."""
        return {(True, True): "both", (True, False): "min", (False, True): "max"}.get((self.below, self.above), "neither")


def robust_limits(values: np.ndarray, *, log: bool = False, symmetric: bool = False) -> Limits | None:
    """1st–99th percentile limits of the finite values (positive ones when log); None without any.
    symmetric: limits ±max(|p1|, |p99|), for signed quantities centred on zero."""
    v = np.asarray(values, dtype=np.float64)
    v = v[np.isfinite(v)]
    if log:
        v = v[v > 0]
    if v.size == 0:
        return None
    low, high = np.percentile(v, [LOW_PERCENTILE, HIGH_PERCENTILE])
    if symmetric:
        bound = max(abs(low), abs(high), 1e-12)
        low, high = -bound, bound
    if high <= low:
        high = low * 10 if log else low + max(abs(low) * 0.1, 1e-12)
    return Limits(float(low), float(high), bool((v < low).any()), bool((v > high).any()), log)


def normalise_rows(values: np.ndarray, *, log: bool = False) -> np.ndarray:
    """Each row mapped to its own 1st–99th percentile range: 0 at the row's p1, 1 at its p99
    (in log10 units when log; non-positive values NaN then). A constant row maps to 0.5;
    all-NaN rows stay NaN. Values outside [0, 1] are the row's outliers."""
    v = np.asarray(values, dtype=np.float64)
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        if log:
            v = np.log10(np.where(v > 0, v, np.nan))
        low = np.nanpercentile(v, LOW_PERCENTILE, axis=1, keepdims=True)
        high = np.nanpercentile(v, HIGH_PERCENTILE, axis=1, keepdims=True)
        span = high - low
        return np.where(span > 0, (v - low) / np.where(span > 0, span, 1.0), np.where(np.isfinite(v), 0.5, np.nan))

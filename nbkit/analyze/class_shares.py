"""Gain-class shares of one tensor over steps, for a stacked chart: pure functions.

The recorder stores the reversed, damped and accelerated shares of the coordinates with a defined
gain (DESIGN §2); "ordinary" is the rest, so the four shares sum to 1 at every step that has them.
"""
from __future__ import annotations

import warnings

import numpy as np

STACK_ORDER = ("reversed", "damped", "ordinary", "accelerated")   # bottom to top
MAX_COLUMNS = 1500       # columns of the chart at most; each is the mean over its steps


def class_shares(steps: np.ndarray, reversed_: np.ndarray, damped: np.ndarray, accelerated: np.ndarray,
                 *, columns: int = MAX_COLUMNS) -> tuple[np.ndarray, np.ndarray]:
    """(column steps, (4, columns) shares in STACK_ORDER) from per-step shares (NaN where a step has
    none; those steps are dropped). Steps are averaged in equal runs when there are more than
    `columns`: a mean of shares that sum to 1 still sums to 1. Shares are clipped to [0, 1] and
    ordinary = 1 − the others, floored at 0 (then all four renormalised)."""
    stack = np.vstack([reversed_, damped, accelerated]).astype(np.float64)       # (3, steps)
    keep = np.isfinite(stack).all(axis=0)
    stack, steps = np.clip(stack[:, keep], 0, 1), np.asarray(steps)[keep]
    if stack.shape[1] == 0:
        return np.zeros(0, dtype=np.int64), np.zeros((4, 0))
    ordinary = np.maximum(0.0, 1.0 - stack.sum(axis=0))
    shares = np.vstack([stack[0], stack[1], ordinary, stack[2]])                 # STACK_ORDER
    shares /= shares.sum(axis=0, keepdims=True)
    n = shares.shape[1]
    if n > columns:
        edges = np.linspace(0, n, columns + 1).astype(np.int64)
        shares = np.add.reduceat(shares, edges[:-1], axis=1) / np.diff(edges)
        steps = steps[edges[:-1]]
    return steps, shares


def bucket_median(steps: np.ndarray, values: np.ndarray, column_steps: np.ndarray) -> np.ndarray:
    """Per chart column (its first step in column_steps), the median of the finite values from that
    step up to the next column's."""
    steps, values = np.asarray(steps), np.asarray(values, dtype=np.float64)
    out = np.full(len(column_steps), np.nan)
    bounds = np.searchsorted(steps, np.append(column_steps, np.iinfo(np.int64).max))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        for k in range(len(column_steps)):
            chunk = values[bounds[k]:max(bounds[k + 1], bounds[k] + 1)]
            out[k] = np.nanmedian(chunk) if np.isfinite(chunk).any() else np.nan
    return out

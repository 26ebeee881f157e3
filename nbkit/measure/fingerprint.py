"""A cheap fingerprint of a mini-batch, so a replay can check it sees the recorded batches.

Not a hash: shape, dtype, a float64 sum and a strided sample of the first tensor. Equal batches give
equal fingerprints on the same machine and thread count; different data almost always differ in
the sum or the sample. Layout of the vector (FINGERPRINT_WIDTH = 20 float64 values):
  [0] number of tensors   [1] total elements   [2] CRC32 of shapes and dtypes   [3] sum
  [4:20] 16 values sampled at an even stride from the first tensor (NaN-padded)
"""
from __future__ import annotations

import functools
import math
import zlib

import numpy as np
import torch
from torch.utils._pytree import tree_flatten

FINGERPRINT_WIDTH = 20   # float64 values per fingerprint (layout in the module docstring)
SAMPLES = FINGERPRINT_WIDTH - 4


def _tensors(value, out: list) -> bool:
    """Append the tensors in plain tuples, lists and dicts (in torch pytree order) to `out`; False
    when another container is met, so the caller falls back to tree_flatten."""
    if isinstance(value, torch.Tensor):
        out.append(value)
    elif type(value) in (tuple, list):
        for v in value:
            if not _tensors(v, out):
                return False
    elif type(value) is dict:
        for v in value.values():
            if not _tensors(v, out):
                return False
    elif isinstance(value, (tuple, list, dict)):
        return False                            # namedtuples, OrderedDicts...: pytree decides
    return True


def fingerprint(*values) -> np.ndarray:
    """Fingerprint of the tensors found (recursively) in `values`; NaN vector if there are none.

    Runs on every training forward pass of a recorded or replayed step, where each Python or torch
    call costs several times what it costs in a warm loop: plain containers take a short path, the
    sample is one `take` (no copy of a non-contiguous tensor) and the vector is built once. The values
    are those of torch's pytree flattening and float64 arithmetic either way.
    """
    tensors: list = []
    if not _tensors(values, tensors):
        tensors = [t for t in tree_flatten(values)[0] if isinstance(t, torch.Tensor)]
    if not tensors:
        return np.full(FINGERPRINT_WIDTH, np.nan)
    crc = _layout_crc(tuple([(tuple(t.shape), t.dtype) for t in tensors]))
    total, elements = 0.0, 0                  # float64 additions in order, as a sum of float64 scalars
    for t in tensors:
        if t.requires_grad:                   # detach(): no graph is built, so no no_grad() needed
            t = t.detach()
        elements += t.numel()
        total += float(t.sum(dtype=torch.float64) if not t.is_complex() else t.abs().sum(dtype=torch.float64))
    out = [len(tensors), elements, crc, total]
    first = tensors[0].detach()
    n = first.numel()
    if n:
        sample = first.take(_sample_index(n))   # elements 0, s, 2s, ... of the flattened tensor, s = n // 16
        out += sample.to(torch.float64).tolist() if sample.is_complex() else sample.tolist()
    out += [math.nan] * (FINGERPRINT_WIDTH - len(out))
    return np.array(out, dtype=np.float64)


@functools.lru_cache(maxsize=4096)
def _layout_crc(layout: tuple) -> int:
    """CRC32 of the shapes and dtypes, computed once per layout."""
    return zlib.crc32(";".join(f"{shape}:{dtype}" for shape, dtype in layout).encode())


@functools.lru_cache(maxsize=4096)
def _sample_index(n: int) -> torch.Tensor:
    """Flat indices 0, s, 2s, ... (s = n // 16) of the sampled elements of an n-element tensor."""
    return torch.arange(min(SAMPLES, n)) * max(1, n // SAMPLES)


def combine(prints: list[np.ndarray]) -> np.ndarray:
    """One fingerprint for several forward passes in one step (gradient accumulation)."""
    if not prints:
        return np.full(FINGERPRINT_WIDTH, np.nan)
    if len(prints) == 1:
        return prints[0]
    out = prints[0].copy()
    out[0] = sum(p[0] for p in prints)
    out[1] = sum(p[1] for p in prints)
    out[2] = zlib.crc32(np.array([p[2] for p in prints]).tobytes())
    out[3] = sum(p[3] for p in prints)
    return out


def same(a: np.ndarray, b: np.ndarray) -> bool:
    """True when two fingerprints agree (NaN equals NaN: a missing target is missing in both)."""
    return a.tobytes() == b.tobytes() or bool(np.array_equal(a, b, equal_nan=True))


def matches(recorded: np.ndarray, prints: list[np.ndarray]) -> bool:
    """True when the forward passes of one replayed step (`prints`) saw the recorded data.

    Equal when combined; or when a prefix of them combines to the recorded value (the replay ran
    more evaluations of the same batch, e.g. LBFGS against a one-pass recording); or when every
    replayed pass saw one batch and the recording holds a whole number of passes over that batch
    (the recording ran more evaluations than the replay).
    """
    if same(recorded, combine(prints)):
        return True
    for k in range(1, len(prints)):
        if same(recorded, combine(prints[:k])):
            return True
    if prints and all(same(p, prints[0]) for p in prints) and prints[0][0] > 0:
        repeats = recorded[0] / prints[0][0]
        if np.isfinite(repeats) and repeats == int(repeats) and 1 <= repeats <= 10_000:
            return same(recorded, combine([prints[0]] * int(repeats)))
    return False


def describe_difference(recorded: np.ndarray, seen: np.ndarray) -> str:
    """Which part of two fingerprints differs, in words, for error messages."""
    parts = (("the number of tensors", slice(0, 1)), ("the number of elements", slice(1, 2)),
             ("the shapes or dtypes", slice(2, 3)), ("the sum of the values", slice(3, 4)),
             ("the sampled values", slice(4, None)))
    differing = [name for name, where in parts if not np.array_equal(recorded[where], seen[where], equal_nan=True)]
    if np.isnan(recorded).all():
        return "the recording saw no training-mode forward pass at this step"
    if np.isnan(seen).all():
        return "the replay saw no training-mode forward pass at this step"
    return ", ".join(differing) or "nothing (equal)"

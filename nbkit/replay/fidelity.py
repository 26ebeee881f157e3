"""How far a replay is from its parent recording: the largest differences over the steps both hold.

Pure comparisons of two recordings (losses, probe values, keyframe parameters); a replay with the
recorded optimizer on the same batches and thread count should give zeros everywhere on a CPU.
"""
from __future__ import annotations

import math

import numpy as np
import torch


def _largest(a: np.ndarray, b: np.ndarray) -> float:
    """Largest |a - b|; NaN equals NaN; a NaN against a number counts as infinite."""
    a, b = np.asarray(a, dtype=np.float64), np.asarray(b, dtype=np.float64)
    if a.size == 0:
        return 0.0
    both_nan = np.isnan(a) & np.isnan(b)
    one_nan = np.isnan(a) ^ np.isnan(b)
    if one_nan.any():
        return math.inf
    with np.errstate(invalid="ignore"):
        difference = np.where(both_nan | (a == b), 0.0, np.abs(a - b))
    return float(np.nanmax(difference)) if difference.size else 0.0


def compare_recordings(parent, child) -> dict:
    """{"steps", "loss", "probes", "keyframes", "keyframe_steps", "identical"} for the common steps."""
    common, parent_rows, child_rows = np.intersect1d(parent.steps, child.steps, return_indices=True)
    out = {"steps": int(len(common)), "loss": 0.0, "probes": 0.0, "keyframes": 0.0, "keyframe_steps": []}
    if len(common):
        out["loss"] = _largest(parent.loss[parent_rows], child.loss[child_rows])
        for tensor in child.tensors:
            if tensor not in parent.tensors:
                continue
            a, b = parent.probes(tensor), child.probes(tensor)
            for field in set(a) & set(b) - {"index"}:
                out["probes"] = max(out["probes"], _largest(a[field][parent_rows], b[field][child_rows]))
    for step in sorted(set(parent.keyframes) & set(child.keyframes)):
        a, b = parent.keyframe(step)["model"], child.keyframe(step)["model"]
        for name in a.keys() & b.keys():
            if a[name].is_floating_point():
                out["keyframes"] = max(out["keyframes"], _largest(a[name].double().numpy(), b[name].double().numpy()))
            elif not torch.equal(a[name], b[name]):
                out["keyframes"] = math.inf
        out["keyframe_steps"].append(int(step))
    out["identical"] = out["loss"] == 0.0 and out["probes"] == 0.0 and out["keyframes"] == 0.0
    return out

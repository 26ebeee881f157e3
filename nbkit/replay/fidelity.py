"""How far a replay is from its parent recording: the largest differences over the steps both hold,
and the first step and the first tensor or setting where they part.

Pure comparisons of two recordings (losses, probe values, settings, keyframe parameters); a replay with
the recorded optimizer on the same batches and thread count should give zeros everywhere on a CPU.
"""
from __future__ import annotations

import math

import numpy as np
import torch

from nbkit.store.layout import setting_columns

FIELD_ORDER = ("grad", "update")     # at one step a gradient differs before the update and the state it makes


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


def first_differing_row(a: np.ndarray, b: np.ndarray) -> int | None:
    """The first row (axis 0) where a and b differ anywhere (NaN equals NaN); None when none does."""
    a, b = np.asarray(a, dtype=np.float64), np.asarray(b, dtype=np.float64)
    if a.size == 0:
        return None
    same = (a == b) | (np.isnan(a) & np.isnan(b))
    rows = np.flatnonzero(~same.reshape(len(same), -1).all(axis=1))
    return int(rows[0]) if len(rows) else None


def _settings(run) -> dict[str, np.ndarray]:
    """name -> (steps, groups) of every stored setting; lr from run.lr where settings were not stored."""
    values = run.setting_values()
    out = {c.name: values[:, :, s] for s, c in enumerate(setting_columns(run.meta))}
    out.setdefault("lr", run.lr)
    return out


def compare_recordings(parent, child) -> dict:
    """{"steps", "loss", "probes", "settings", "keyframes", "keyframe_steps", "identical", "first_step",
    "first_difference"} for the common steps. first_step: the first step where anything differs (None
    when identical); first_difference: what differs there, in words, a setting first (a cause), then
    the tensors in recording order, then the loss."""
    common, parent_rows, child_rows = np.intersect1d(parent.steps, child.steps, return_indices=True)
    out = {"steps": int(len(common)), "loss": 0.0, "probes": 0.0, "settings": 0.0, "keyframes": 0.0,
           "keyframe_steps": []}
    firsts: list[tuple[int, int, int, str]] = []      # (step, precedence at that step, order seen, what)

    def note(row, precedence, what):
        if row is not None:
            firsts.append((int(common[row]), precedence, len(firsts), what))

    if len(common):
        # a step whose loss the parent never knew (no loss source) cannot differ: the replay's own is kept
        parent_loss, child_loss = parent.loss[parent_rows], child.loss[child_rows].copy()
        child_loss[np.isnan(parent_loss)] = np.nan
        out["loss"] = _largest(parent_loss, child_loss)
        note(first_differing_row(parent_loss, child_loss), 3, "the loss")
        a, b = _settings(parent), _settings(child)
        for name in [n for n in a if n in b]:
            x, y = a[name][parent_rows], b[name][child_rows]
            if x.shape != y.shape:
                continue
            out["settings"] = max(out["settings"], _largest(x, y))
            row = first_differing_row(x, y)
            if row is not None:
                group = int(np.flatnonzero(~((x[row] == y[row]) | (np.isnan(x[row]) & np.isnan(y[row]))))[0])
                note(row, 0, f"setting {name!r} of group {group}")
        # probes exist on heavy rows only: a thinned parent (every="auto") is compared where both have them
        heavy = np.flatnonzero(parent.heavy[parent_rows] & child.heavy[child_rows])
        out["probe_steps"] = int(len(heavy))
        for tensor in child.tensors:
            if tensor not in parent.tensors:
                continue
            a, b = parent.probes(tensor), child.probes(tensor)
            fields = set(a) & set(b) - {"index"}
            for field in sorted(fields, key=lambda f: (FIELD_ORDER.index(f) if f in FIELD_ORDER else len(FIELD_ORDER), f)):
                x, y = a[field][parent_rows[heavy]], b[field][child_rows[heavy]]
                out["probes"] = max(out["probes"], _largest(x, y))
                row = first_differing_row(x, y)
                note(None if row is None else int(heavy[row]), 1, f"tensor {tensor!r} (probe {field})")
    for step in sorted(set(parent.keyframes) & set(child.keyframes)):
        a, b = parent.keyframe(step)["model"], child.keyframe(step)["model"]
        for name in sorted(a.keys() & b.keys()):
            if a[name].is_floating_point():
                difference = _largest(a[name].double().numpy(), b[name].double().numpy())
            else:
                difference = 0.0 if torch.equal(a[name], b[name]) else math.inf
            out["keyframes"] = max(out["keyframes"], difference)
            if difference:      # the state before step `step`: the update of the step before made it
                firsts.append((int(step) - 1, 2, len(firsts), f"tensor {name!r} (its parameters at keyframe {step})"))
        out["keyframe_steps"].append(int(step))
    out["identical"] = out["loss"] == 0.0 and out["probes"] == 0.0 and out["settings"] == 0.0 \
        and out["keyframes"] == 0.0
    first = min(firsts) if firsts else None
    out["first_step"] = None if first is None else first[0]
    out["first_difference"] = None if first is None else first[3]
    return out

"""Synthetic recordings for benchmarks and view tests: plausible numbers, written by the real writer.

Nothing here trains a model. Values are drawn from a seeded generator so that views and benchmarks
see the shapes of a real recording (decades of gradient norms, shares in [0, 1], a loss spike, probe
coordinates with moments) at any size, e.g. 64 tensors x 100,000 steps, in a minute or two.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np

from nbkit.measure.fingerprint import FINGERPRINT_WIDTH
from nbkit.measure.quantities import HISTOGRAM_BINS, HISTOGRAM_LOW, QUANTITIES, SHARE_QUANTITIES
from nbkit.store.layout import HISTOGRAMS, KEYFRAME_DIR, STEP_CHUNK, Row, new_meta
from nbkit.store.writer import RecordingWriter



def write_synthetic(path, *, steps: int = 1000, tensors: int = 64, probes: int = 16, heavy_every: int = 10,
                    keyframe_every: int = 0, seed: int = 0, spike_at: int | None = None) -> Path:
    """Write a synthetic Adam-like recording of `steps` rows and `tensors` tensors to `path`.

    heavy_every=10: per-tensor quantities, histograms and probes on 1 step in 10 (as every=10 does),
    which keeps 100,000 steps near 300 MB. spike_at: step of a gradient spike (default: 60 % in).
    keyframe_every=0: no keyframe files (the views only list their steps).
    """
    if steps < 1 or tensors < 1 or probes < 1 or heavy_every < 1:
        raise ValueError(f"write_synthetic needs steps, tensors, probes, heavy_every >= 1; got "
                         f"{steps}, {tensors}, {probes}, {heavy_every}")
    path = Path(path)
    rng = np.random.default_rng(seed)
    spike_at = int(steps * 0.6) if spike_at is None else spike_at
    names = [f"block{k // 2}.{'weight' if k % 2 == 0 else 'bias'}" for k in range(tensors)]
    meta = new_meta(
        model_class="Synthetic", gain_applicable=True,
        optimizer={"class": "Adam", "adapter": "adam", "first_moment": "exp_avg", "second_moment": "exp_avg_sq"},
        param_groups=[{"lr": 1e-3, "params": names}],
        tensors=[{"name": n, "shape": [256, 256] if n.endswith("weight") else [256], "dtype": "float32",
                  "numel": 65536 if n.endswith("weight") else 256, "group": 0, "layer": n.rsplit(".", 1)[0],
                  "probes": probes, "sample_size": 4096} for n in names],
        probes=probes, options={"every": heavy_every, "keyframe_every": keyframe_every},
        nbkit_version="synthetic", synthetic=True)
    probe_index = np.tile(np.arange(probes, dtype=np.int64), (tensors, 1))
    writer = RecordingWriter(path, meta, probe_index=probe_index, commit_seconds=3600.0)
    scale = 10.0 ** rng.uniform(-4, 0, size=tensors)                 # (T,) decades apart
    for start in range(0, steps, STEP_CHUNK):
        n = min(STEP_CHUNK, steps - start)
        for row in _rows(rng, start, n, steps, tensors, probes, heavy_every, scale, spike_at):
            writer.put_row(row)
        writer.flush(timeout=None)                                   # keeps the writer's queue short
        if keyframe_every:
            for s in range(start, start + n):
                if s % keyframe_every == 0:
                    (path / KEYFRAME_DIR).mkdir(exist_ok=True)
    writer.close(timeout=None)
    if writer.error is not None:
        raise writer.error
    return path


def _rows(rng, start, n, total, T, P, heavy_every, scale, spike_at):
    step = np.arange(start, start + n)
    heavy = step % heavy_every == 0
    decay = np.exp(-3.0 * step / max(total, 1))                        # (n,)
    spike = 1.0 + 30.0 * np.exp(-np.abs(step - spike_at) / 20.0)       # (n,)
    loss = 2.5 * decay + 0.05 + 0.02 * rng.standard_normal(n) + 0.5 * (spike - 1) / 30
    lr = 1e-3 * np.minimum(1.0, (step + 1) / 200.0)                     # warm-up, then flat
    noise = np.exp(0.3 * rng.standard_normal((n, T)))                   # (n, T)
    grad_norm = scale * decay[:, None] * spike[:, None] * noise
    q = np.full((n, len(QUANTITIES), T), np.nan, dtype=np.float32)
    values = {
        "grad_norm": grad_norm, "grad_rms": grad_norm / 64, "grad_max": grad_norm / 8,
        "weight_norm": 10 * scale ** 0.25 * np.ones((n, T)), "update_norm": 1e-3 * noise * np.sqrt(scale),
        "gain_median": np.exp(0.5 * rng.standard_normal((n, T))) / np.sqrt(scale),
        "momentum_factor_median": 1 + 0.1 * rng.standard_normal((n, T)),
        "residual_median": np.ones((n, T)),
        "grad_cosine": np.clip(0.5 + 0.2 * rng.standard_normal((n, T)), -1, 1),
        "update_grad_cosine": np.clip(0.8 + 0.1 * rng.standard_normal((n, T)), -1, 1),
        "dead_rows": np.zeros((n, T)), "nonfinite": np.zeros((n, T)),
    }
    values["update_ratio"] = values["update_norm"] / values["weight_norm"]
    values["scale_factor_median"] = values["gain_median"]
    for name in sorted(SHARE_QUANTITIES):
        values[name] = rng.beta(1, 8, size=(n, T))
    for i, name in enumerate(QUANTITIES):
        if name in values:
            q[:, i] = values[name]
    q[~heavy] = np.nan
    for k in range(n):
        row = Row(int(step[k]), float(loss[k]), np.array([lr[k]]), np.zeros((2, FINGERPRINT_WIDTH)), q[k],
                  np.zeros((3, T, HISTOGRAM_BINS + 2), dtype=np.uint32), heavy=bool(heavy[k]))
        if heavy[k]:
            row.histograms = _histograms(rng, T, grad_norm[k])
            row.probes = _probes(rng, T, P, grad_norm[k], lr[k], values["gain_median"][k])
        yield row


def _histograms(rng, T, grad_norm):
    hist = np.zeros((3, T, HISTOGRAM_BINS + 2), dtype=np.uint32)
    centres = {"grad": np.log2(grad_norm / 64), "update": np.full(T, -10.0), "gain": np.full(T, 2.0)}
    for h, name in enumerate(HISTOGRAMS):
        centre = centres[name]
        bins = np.clip(np.round(centre[:, None] + rng.normal(0, 2, (T, 200))) - HISTOGRAM_LOW[name],
                       0, HISTOGRAM_BINS - 1).astype(np.int64)
        for t in range(T):
            hist[h, t, :HISTOGRAM_BINS] = np.bincount(bins[t], minlength=HISTOGRAM_BINS)
    return hist


def _probes(rng, T, P, grad_norm, lr, gain_median):
    grad = (grad_norm[:, None] / 8) * rng.standard_normal((T, P))
    momentum = np.exp(0.4 * rng.standard_normal((T, P))) * np.where(rng.random((T, P)) < 0.05, -1, 1)
    scale = gain_median[:, None] * np.exp(rng.normal(0, 0.6, (T, P)))      # gain ~ momentum x scale
    update = -lr * grad * momentum * scale
    out = {"grad": grad, "update": update, "first_moment": grad * momentum, "second_moment": (grad / 0.1) ** 2,
           "momentum_factor": momentum, "scale_factor": scale, "residual": np.ones((T, P))}
    return {k: v.astype(np.float32) for k, v in out.items()}

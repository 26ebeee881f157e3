"""Recorder overhead on three models, measured side by side in one run (issue 2, item 6).

For each model (an MLP of 1.33M parameters, a small conv net with batch norm, a small transformer
encoder with many small tensors; default Adam) four copies train on the same batches, in
interleaved blocks so that machine noise hits them alike:

  unrecorded   plain fwd + bwd + optimizer.step()  (the optimizer step is also timed alone)
  recorded     the same with nbkit.record(..., every=1) (probes=64; kept batches at their default)
  naive        the same with a hand-written recorder: per-tensor NumPy copies of gradient, state
               and parameters, np.histogram, NumPy gain shares (what a user writes by hand)

Printed: median and p95 per step of each; the overhead, the median of the step-by-step differences
recorded − unrecorded (step k of each variant trains on the same batch), with its 95 % interval; and
the ratios overhead / optimizer step, overhead / unrecorded step, naive overhead / ours, bytes on
disk per step.
Budget (issue 2): overhead ≤ max(1.5 × optimizer step, 5 % of the unrecorded step); naive ≥ 3 ×.

    .venv/bin/python benchmarks/record_overhead.py [--steps 120] [--block 10] [--threads 1] [--in-hook]
"""
from __future__ import annotations

import argparse
import copy
import math
import os
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import torch
from torch import nn

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
import nbkit  # noqa: E402
from nbkit.record import pacing  # noqa: E402
from paired import median_interval  # noqa: E402


# --- the three models ---------------------------------------------------------------------------
def mlp():
    model = nn.Sequential(nn.Flatten(), nn.Linear(784, 1024), nn.ReLU(), nn.Linear(1024, 512), nn.ReLU(),
                          nn.Linear(512, 10))
    return model, (64, 1, 28, 28), 10


def conv():
    def block(i, o):
        return [nn.Conv2d(i, o, 3, padding=1, bias=False), nn.BatchNorm2d(o), nn.ReLU(), nn.MaxPool2d(2)]
    model = nn.Sequential(*block(3, 32), *block(32, 64), *block(64, 128), *block(128, 256),
                          nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(256, 10))
    return model, (64, 3, 32, 32), 10


class Encoder(nn.Module):
    def __init__(self, vocab=256, width=128, layers=2, heads=4, ff=512, seq=64):
        super().__init__()
        self.embed = nn.Embedding(vocab, width)
        self.position = nn.Parameter(torch.zeros(seq, width))
        layer = nn.TransformerEncoderLayer(width, heads, ff, dropout=0.0, batch_first=True)
        self.encoder = nn.TransformerEncoder(layer, layers, enable_nested_tensor=False)
        self.head = nn.Linear(width, vocab)

    def forward(self, tokens):
        return self.head(self.encoder(self.embed(tokens) + self.position)).flatten(0, 1)


def transformer():
    return Encoder(), (16, 64), 256


MODELS = {"mlp": mlp, "conv": conv, "transformer": transformer}


def batches(shape, classes, n, seed=0):
    generator = torch.Generator().manual_seed(seed)
    out = []
    for _ in range(n):
        if len(shape) == 2:        # token ids
            x = torch.randint(0, classes, shape, generator=generator)
            y = torch.randint(0, classes, (shape[0] * shape[1],), generator=generator)
        else:
            x = torch.randn(shape, generator=generator)
            y = torch.randint(0, classes, (shape[0],), generator=generator)
        out.append((x, y))
    return out


# --- the naive recorder: what a user writes by hand ---------------------------------------------
class NaiveRecorder:
    """Per-tensor NumPy copies of θ (before and after), g and optimizer state; np.histogram of
    log2 |g|, |Δθ| and gain; NumPy gain median and shares; rows kept in a list."""

    def __init__(self, model, optimizer):
        self.optimizer = optimizer
        self.names = {id(p): n for n, p in model.named_parameters()}
        self.rows = []
        self.before = {}
        optimizer.register_step_pre_hook(self.pre)
        optimizer.register_step_post_hook(self.post)

    def pre(self, optimizer, args, kwargs):
        self.before = {id(p): p.detach().numpy().copy() for g in optimizer.param_groups for p in g["params"]}

    def post(self, optimizer, args, kwargs):
        row = {}
        edges = np.arange(-48, 17, dtype=np.float64)
        for group in optimizer.param_groups:
            lr = group["lr"]
            for p in group["params"]:
                if p.grad is None:
                    continue
                g = p.grad.numpy().copy()
                after = p.detach().numpy().copy()
                state = {k: v.numpy().copy() for k, v in optimizer.state[p].items()
                         if torch.is_tensor(v) and v.shape == p.shape}
                update = after - self.before[id(p)]
                defined = g != 0
                gain = update[defined] / (-lr * g[defined])
                positive = gain[gain > 0]
                median = np.median(positive) if positive.size else np.nan
                relative = gain / median
                with np.errstate(divide="ignore", invalid="ignore"):
                    hist = [np.histogram(np.log2(np.abs(x[x != 0])), bins=edges)[0] for x in (g, update, positive)]
                row[self.names[id(p)]] = {
                    "grad_norm": float(np.linalg.norm(g)), "weight_norm": float(np.linalg.norm(after)),
                    "update_norm": float(np.linalg.norm(update)), "gain_median": float(median),
                    "reversed": float(np.mean(gain < 0)) if gain.size else np.nan,
                    "accelerated": float(np.mean(relative > 2)) if gain.size else np.nan,
                    "damped": float(np.mean(relative < 0.5)) if gain.size else np.nan,
                    "hist": hist, "probes": {k: v.reshape(-1)[:64].copy() for k, v in state.items()},
                }
        self.rows.append(row)


# --- timing ---------------------------------------------------------------------------------------
def train_step(model, optimizer, criterion, batch, timings):
    """One step; wall time, CPU time of this thread and of the whole process (all threads)."""
    x, y = batch
    start, start_cpu, start_all = time.perf_counter(), time.thread_time(), time.process_time()
    optimizer.zero_grad(set_to_none=False)
    loss = criterion(model(x), y)
    loss.backward()
    before_step, before_step_cpu = time.perf_counter(), time.thread_time()
    optimizer.step()
    end, end_cpu, end_all = time.perf_counter(), time.thread_time(), time.process_time()
    timings["step"].append(end - start)
    timings["optimizer"].append(end - before_step)
    timings["step_cpu"].append(end_cpu - start_cpu)
    timings["optimizer_cpu"].append(end_cpu - before_step_cpu)
    timings["step_all"].append(end_all - start_all)


KEYS = ("step", "optimizer", "step_cpu", "optimizer_cpu", "step_all")


def folder_bytes(path: Path, exclude: str | None = None) -> int:
    total = 0
    for root, dirs, files in os.walk(path):
        if exclude and exclude in Path(root).parts:
            continue
        total += sum(os.path.getsize(os.path.join(root, f)) for f in files)
    return total


def measure(name, steps, block, workdir, in_hook=False):
    torch.manual_seed(0)
    base, shape, classes = MODELS[name]()
    data = batches(shape, classes, steps + 2 * block)
    variants = {}
    for variant in ("unrecorded", "recorded", "naive"):
        model = copy.deepcopy(base)
        model.train()
        optimizer = torch.optim.Adam(model.parameters(), lr=1e-3)
        variants[variant] = {"model": model, "optimizer": optimizer, "criterion": nn.CrossEntropyLoss(),
                             "t": {k: [] for k in KEYS}, "i": 0}
    path = Path(workdir) / name
    rec = nbkit.record(variants["recorded"]["model"], variants["recorded"]["optimizer"], path,
                       criterion=variants["recorded"]["criterion"], every=1)   # every step in full
    # (every="auto", the default, is measured by benchmarks/auto_overhead.py)
    rec.background = not in_hook
    NaiveRecorder(variants["naive"]["model"], variants["naive"]["optimizer"])
    # warm-up: one block each, not timed (allocations, lazily created optimizer state)
    for v in variants.values():
        for _ in range(block):
            train_step(v["model"], v["optimizer"], v["criterion"], data[v["i"]], {k: [] for k in KEYS})
            v["i"] += 1
    done = 0
    background = pacing.BACKGROUND_CPU[0]
    while done < steps:
        for v in variants.values():
            for _ in range(block):
                train_step(v["model"], v["optimizer"], v["criterion"], data[v["i"]], v["t"])
                v["i"] += 1
        done += block
    background = (pacing.BACKGROUND_CPU[0] - background) / steps
    rec.close()
    params = sum(p.numel() for p in base.parameters())
    tensors = sum(1 for _ in base.parameters())
    rows = rec.step
    total = folder_bytes(path)
    keyframes = folder_bytes(path / "keyframes") if (path / "keyframes").exists() else 0
    shutil.rmtree(path, ignore_errors=True)
    return {"name": name, "params": params, "background": background, "tensors": tensors, "rows": rows,
            "row_bytes": (total - keyframes) / rows, "keyframe_bytes": keyframes / rows,
            **{k: v["t"] for k, v in variants.items()}}


def stats(values):
    a = np.asarray(values) * 1e3
    return float(np.median(a)), float(np.percentile(a, 95))


def paired(a, b):
    """Median of the per-step differences a[k] − b[k] in ms, with its 95 % interval. Step k of
    every variant trains on the same batch from the same state: pairing by step removes the
    batch-to-batch spread."""
    return median_interval((x - y) * 1e3 for x, y in zip(a, b))


def report(results, threads):
    print(f"nbkit recorder overhead, default Adam, every=1, probes=64, torch {torch.__version__}, "
          f"{threads} thread(s); ms per step, median (p95)")
    ok_all = True
    for clock, label in (("", "wall clock"), ("_cpu", "CPU time of the training thread")):
        print(f"\n[{label}]")
        print(f"{'model':<12}{'params':>9}{'T':>4} {'unrecorded':>15} {'opt step':>15} {'recorded':>15} "
              f"{'naive':>15} {'ovh (95% CI)':>21} {'ovh/opt':>8} {'ovh/step':>9} {'naive/ours':>10} {'budget':>7}")
        for r in results:
            u, u95 = stats(r["unrecorded"]["step" + clock])
            o, o95 = stats(r["unrecorded"]["optimizer" + clock])
            c, c95 = stats(r["recorded"]["step" + clock])
            n, n95 = stats(r["naive"]["step" + clock])
            ours, low, high = paired(r["recorded"]["step" + clock], r["unrecorded"]["step" + clock])
            theirs = paired(r["naive"]["step" + clock], r["unrecorded"]["step" + clock])[0]
            allowed = max(1.5 * o, 0.05 * u)
            ok = ours <= allowed and theirs >= 3 * ours
            ok_all &= ok
            ratio = theirs / ours if ours > 0 else math.inf
            print(f"{r['name']:<12}{r['params']:>9}{r['tensors']:>4} {u:>7.2f} ({u95:>5.2f}) {o:>7.2f} ({o95:>5.2f}) "
                  f"{c:>7.2f} ({c95:>5.2f}) {n:>7.2f} ({n95:>5.2f}) {ours:>6.2f} ({low:>5.2f}…{high:>5.2f}) "
                  f"{ours / o:>8.2f} {ours / u:>9.3f} {ratio:>10.1f} {'ok' if ok else 'OVER':>7}")
    print("\n[all threads: process CPU per step, and what the recording costs in total]")
    print(f"{'model':<12} {'unrecorded':>11} {'recorded':>9} {'naive':>9} {'statistics CPU':>17} "
          f"{'total ovh/opt':>14} {'B/step rows':>12} {'+keyframes':>11}")
    for r in results:
        u = stats(r["unrecorded"]["step_all"])[0]
        c = stats(r["recorded"]["step_all"])[0]
        n = stats(r["naive"]["step_all"])[0]
        o = stats(r["unrecorded"]["optimizer_cpu"])[0]
        print(f"{r['name']:<12} {u:>11.2f} {c:>9.2f} {n:>9.2f} {r['background'] * 1e3:>17.2f} "
              f"{(c - u) / o:>14.2f} {r['row_bytes']:>12.0f} {r['keyframe_bytes']:>11.0f}")
    print("ovh = median over steps of recorded − unrecorded, step by step (the same batch and state), with its "
          "95 % interval; budget: ovh ≤ max(1.5 × opt step, 5 % × unrecorded step) "
          "and naive ovh ≥ 3 × ours. By default the statistics of step s run on a background thread during step "
          "s + 1 (--in-hook: inside the hook); 'statistics CPU' is their CPU time per step, wherever they ran, "
          "included in the process CPU columns.")
    return ok_all


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--steps", type=int, default=120, help="timed steps per variant (default 120)")
    parser.add_argument("--block", type=int, default=10, help="steps per interleaved block (default 10)")
    parser.add_argument("--threads", type=int, default=1, help="torch threads (default 1: the machine is shared)")
    parser.add_argument("--models", default="mlp,conv,transformer")
    parser.add_argument("--in-hook", action="store_true",
                        help="compute the statistics inside the step hook instead of on the background thread")
    args = parser.parse_args(argv)
    torch.set_num_threads(args.threads)
    workdir = tempfile.mkdtemp(prefix="nbkit-bench-")
    try:
        results = [measure(name, args.steps, args.block, workdir, args.in_hook) for name in args.models.split(",")]
    finally:
        shutil.rmtree(workdir, ignore_errors=True)
    return 0 if report(results, args.threads) else 1


if __name__ == "__main__":
    sys.exit(main())

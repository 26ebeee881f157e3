"""Cost of nbkit.step_quality per step, as a ratio to a plain training step: ratios, never bare times.

    .venv/bin/python benchmarks/step_quality_cost.py [--model mlp] [--steps 20] [--rounds 5]

Records a short Adam run of a model from benchmarks/models.py (keep_batches on), then per round times,
back to back, a plain training loop over the same batches and the step-quality pass over the same steps,
with and without its Hessian-vector product, at torch's default thread count. The pass's time includes its
set-up (opening the recording, reading the keyframe, copying the model); the window starts at a keyframe.
Prints the median ratio over the rounds with its distribution-free 95 % interval, and the bytes the
sidecar stores per step.
"""
from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import torch

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
import models  # noqa: E402
import nbkit  # noqa: E402
from nbkit.store.quality import QUALITY_FILE  # noqa: E402
from paired import median_interval  # noqa: E402


def train(model, optimizer, data, criterion):
    for x, y in data:
        optimizer.zero_grad()
        criterion(model(x), y).backward()
        optimizer.step()


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--model", default="mlp", choices=["mlp", "conv", "transformer"])
    parser.add_argument("--steps", type=int, default=20)
    parser.add_argument("--rounds", type=int, default=5)
    args = parser.parse_args()
    torch.manual_seed(0)
    model, shape, classes = getattr(models, args.model)()
    data = models.batches(shape, classes, args.steps)
    criterion = torch.nn.CrossEntropyLoss()
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "run"
        blueprint = {k: v.clone() for k, v in model.state_dict().items()}
        optimizer = torch.optim.Adam(model.parameters(), lr=1e-3)
        with nbkit.record(model, optimizer, path, criterion=criterion, keyframe_every=10_000):
            train(model, optimizer, data, criterion)
        fresh, _, _ = getattr(models, args.model)()
        fresh.load_state_dict(blueprint)
        ratios = {"first and second order": [], "first order only": []}
        for _ in range(args.rounds):
            plain, _, _ = getattr(models, args.model)()
            plain.load_state_dict(blueprint)
            start = time.perf_counter()
            train(plain, torch.optim.Adam(plain.parameters(), lr=1e-3), data, criterion)
            step = (time.perf_counter() - start) / args.steps
            for name, second in (("first and second order", True), ("first order only", False)):
                start = time.perf_counter()
                nbkit.step_quality(path, fresh, start=0, steps=args.steps, second_order=second)
                ratios[name].append((time.perf_counter() - start) / args.steps / step)
        stored = (path / QUALITY_FILE).stat().st_size
        tensors = len(nbkit.load(path).tensors)
    print(f"model {args.model} ({tensors} tensors), {args.steps} steps, {args.rounds} rounds, "
          f"{torch.get_num_threads()} torch threads")
    for name, values in ratios.items():
        median, low, high = median_interval(values)
        print(f"step-quality pass, {name}: {median:.2f} x a training step (95 % interval {low:.2f}-{high:.2f})")
    print(f"stored: {stored / args.steps:.0f} bytes per step in {QUALITY_FILE} "
          f"(4 + 2 x {tensors} float64 values and the step number, plus the npz headers)")


if __name__ == "__main__":
    main()

"""What recording costs at every="auto" (the default) and at every=1, as recorded ÷ unrecorded step time.

For each model three copies train side by side from the same initial weights on the same batches:

  unrecorded   plain zero_grad + forward + backward + optimizer.step()
  auto         the same under nbkit.record(..., every="auto", keyframe_every=50)
  every=1      the same under nbkit.record(..., every=1, keyframe_every=50)

They run in interleaved blocks (--block steps each, the variant that goes first rotating from block
to block) so that machine noise hits them alike. Step k of every variant trains on the same batch
with the same global seed (dropout masks match). The first 100 steps are a warm-up, not timed:
every="auto" records its first 50 steps in full and chooses its stride at keyframes (50, 100, ...),
so the measured steps 100 .. 100 + --steps run at a chosen stride. The ratio is the median over the
measured steps k of recorded_step_k ÷ unrecorded_step_k (wall clock), with its distribution-free
95 % interval (paired.median_interval).

Models: mlp, conv and transformer of record_overhead.py; resnet18, a ResNet-18 (torchvision's
layout: 7×7 stem, BasicBlocks 64-128-256-512, two per stage, BatchNorm; 11.18M parameters in 62
tensors, written here with torch.nn) on 3×32×32 batches of 32; gpt2-tiny, transformers'
GPT2LMHeadModel (2 layers, width 128, 2 heads, vocabulary 256, 64 positions; AdamW), recorded
without a criterion (its returned loss is the step's loss), skipped when transformers is missing.
Every other model uses default Adam. Torch runs at its default thread count unless --threads.

Also printed, for the auto variant: the stride and floor it chose (rec.recorded_meta("budget") and
("strides")), the budget's own measurements and the share they imply, and CPU shares of the
unrecorded step: the training thread's (median over steps of the auto − unrecorded CPU time of the
training thread ÷ the unrecorded step), the background threads' (the same with the CPU time of all
other threads of the process during the step: the recorder's writer and statistics threads, with
torch's intra-op threads cancelling out), and the statistics thread's alone (this recorder's
rec.pacer.cpu_seconds over the measured steps, per step, ÷ the median unrecorded step).

Caveat: background work left over at the end of a block (the writer's commits, the last step's
statistics) runs during the next variant's block; the every=1 copy has the most of it, so it also
slows the other two a little. The median over steps keeps most of that out, not all of it.

Budget: the auto ratio ≤ 1.05 on every model (the verdict column says OVER otherwise; exit status 1).

    .venv/bin/python benchmarks/auto_overhead.py [--steps 100] [--block 10] [--models mlp,resnet18]
                                                 [--threads N] [--quick]
"""
from __future__ import annotations

import argparse
import copy
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import torch
from torch import nn

sys.path.insert(0, str(Path(__file__).resolve().parent))
import nbkit  # noqa: E402  (record_overhead puts the repository on sys.path)
from paired import median_interval  # noqa: E402
from record_overhead import KEYS, batches, conv, mlp, train_step, transformer  # noqa: E402

WARM_UP = 100           # untimed steps: every="auto" leaves its 50-step warm-up and chooses at keyframe 100
KEYFRAME_EVERY = 50
BUDGET = 1.05           # auto ratio allowed
VARIANTS = ("unrecorded", "auto", "every=1")


# --- the two models written here ------------------------------------------------------------------
class BasicBlock(nn.Module):
    """ResNet's basic block: two 3×3 convolutions with batch norm, a 1×1 projection when the shape changes."""

    def __init__(self, inputs, outputs, stride):
        super().__init__()
        self.conv1 = nn.Conv2d(inputs, outputs, 3, stride, 1, bias=False)
        self.bn1 = nn.BatchNorm2d(outputs)
        self.conv2 = nn.Conv2d(outputs, outputs, 3, 1, 1, bias=False)
        self.bn2 = nn.BatchNorm2d(outputs)
        self.shortcut = nn.Sequential()
        if stride != 1 or inputs != outputs:
            self.shortcut = nn.Sequential(nn.Conv2d(inputs, outputs, 1, stride, bias=False), nn.BatchNorm2d(outputs))

    def forward(self, x):
        out = torch.relu(self.bn1(self.conv1(x)))
        return torch.relu(self.bn2(self.conv2(out)) + self.shortcut(x))


def resnet18():
    """ResNet-18 as torchvision lays it out (7×7 stride-2 stem and max pool: one step ~0.1–0.3 s on 2
    cores at 32×32; a CIFAR 3×3 stem would be ~10× slower), with 10 classes."""
    layers = [nn.Conv2d(3, 64, 7, 2, 3, bias=False), nn.BatchNorm2d(64), nn.ReLU(), nn.MaxPool2d(3, 2, 1)]
    channels = 64
    for width, stride in ((64, 1), (128, 2), (256, 2), (512, 2)):
        layers += [BasicBlock(channels, width, stride), BasicBlock(width, width, 1)]
        channels = width
    model = nn.Sequential(*layers, nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(512, 10))
    return model, (32, 3, 32, 32), 10


def gpt2_tiny():
    from transformers import GPT2Config, GPT2LMHeadModel
    config = GPT2Config(n_layer=2, n_embd=128, n_head=2, vocab_size=256, n_positions=64,
                        bos_token_id=None, eos_token_id=None)     # GPT-2's 50256 is outside this vocabulary
    return GPT2LMHeadModel(config), (16, 64), 256


def transformers_missing() -> str | None:
    try:
        import transformers  # noqa: F401
    except Exception as exc:      # noqa: BLE001 - any import failure means: skip it
        return f"{type(exc).__name__}: {exc}"
    return None


# name -> (builder, optimizer class, trained through a criterion)
MODELS = {
    "mlp": (mlp, torch.optim.Adam, True),
    "conv": (conv, torch.optim.Adam, True),
    "transformer": (transformer, torch.optim.Adam, True),
    "resnet18": (resnet18, torch.optim.Adam, True),
    "gpt2-tiny": (gpt2_tiny, torch.optim.AdamW, False),
}


class ReturnedLoss:
    """The model's own loss (GPT-2 with labels) in record_overhead.train_step's shape:
    forward(x) = model(input_ids=x, labels=x), criterion(output, y) = output.loss."""

    def __init__(self, model):
        self.model = model

    def __call__(self, x):
        return self.model(input_ids=x, labels=x)

    @staticmethod
    def criterion(output, targets):
        return output.loss


# --- measuring ------------------------------------------------------------------------------------
def measure(name, steps, block, workdir):
    builder, optimizer_class, with_criterion = MODELS[name]
    torch.manual_seed(0)
    base, shape, classes = builder()
    total = WARM_UP + steps
    data = batches(shape, classes, total)
    variants = {}
    for variant in VARIANTS:
        model = copy.deepcopy(base)
        model.train()
        optimizer = optimizer_class(model.parameters())
        criterion = nn.CrossEntropyLoss() if with_criterion else None
        forward, loss_of = (model, criterion) if with_criterion else (ReturnedLoss(model), ReturnedLoss.criterion)
        rec = None
        if variant != "unrecorded":
            options = {"every": "auto" if variant == "auto" else 1, "keyframe_every": KEYFRAME_EVERY}
            if criterion is not None:
                options["criterion"] = criterion
            rec = nbkit.record(model, optimizer, Path(workdir) / f"{name}-{variant}", **options)
        variants[variant] = {"forward": forward, "optimizer": optimizer, "loss": loss_of, "rec": rec,
                             "t": {k: [] for k in KEYS}, "i": 0}
    auto = variants["auto"]["rec"]
    statistics_cpu = None
    for number in range(-(-total // block)):
        order = VARIANTS[number % 3:] + VARIANTS[:number % 3]
        for variant in order:
            v = variants[variant]
            for _ in range(min(block, total - v["i"])):
                k = v["i"]
                timed = k >= WARM_UP
                if variant == "auto" and k == WARM_UP:
                    statistics_cpu = auto.pacer.cpu_seconds
                torch.manual_seed(1000 + k)             # the same dropout masks in every variant
                train_step(v["forward"], v["optimizer"], v["loss"], data[k],
                           v["t"] if timed else {key: [] for key in KEYS})
                v["i"] += 1
    for variant in ("auto", "every=1"):
        variants[variant]["rec"].flush(wait=True)       # the last steps' statistics finish (untimed)
    statistics_cpu = (auto.pacer.cpu_seconds - statistics_cpu) / steps
    budget = auto.recorded_meta("budget") or {}
    strides = auto.recorded_meta("strides") or []
    for variant in ("auto", "every=1"):
        variants[variant]["rec"].close()
        shutil.rmtree(variants[variant]["rec"].recording_path, ignore_errors=True)
    return {"name": name, "measured": (WARM_UP, total - 1), "params": sum(p.numel() for p in base.parameters()),
            "tensors": sum(1 for _ in base.parameters()), "budget": budget, "strides": strides,
            "statistics_cpu": statistics_cpu, **{k: v["t"] for k, v in variants.items()}}


def ratio(recorded, unrecorded):
    """(median, low, high) over steps of recorded[k] ÷ unrecorded[k]."""
    return median_interval(a / b for a, b in zip(recorded, unrecorded))


def strides_during(strides, first, last) -> str:
    """The strides in force over steps first .. last, from the metadata's [[from_step, stride], ...]."""
    during = [stride for i, (step, stride) in enumerate(strides)
              if step <= last and (i + 1 == len(strides) or strides[i + 1][0] > first)]
    return ",".join(str(s) for s in during) or "?"


def budget_share(budget) -> float | None:
    """The share the budget's own measurements imply at its stride: (light + extras · 2 / s) ÷ interval
    (every step heavy at stride 1)."""
    try:
        stride, interval = budget["stride"], budget["step_ms"]
        light, extras = budget["light_ms"], budget["heavy_extra_ms"]
    except KeyError:
        return None
    return (light + extras * (1 if stride == 1 else min(1.0, 2 / stride))) / interval


def report(results, skipped, threads, steps, block):
    print(f"\nnbkit recording overhead at every=\"auto\" and every=1, torch {torch.__version__}, "
          f"{threads} torch thread(s), keyframe_every={KEYFRAME_EVERY}, {WARM_UP} warm-up steps, "
          f"{steps} measured steps in blocks of {block}")
    print(f"{'model':<12}{'params':>10}{'tensors':>8}{'thr':>4}{'unrec ms':>10}   {'auto ratio [95% CI]':<24}"
          f"{'every=1 ratio [95% CI]':<24}{'stride':>7}{'floor':>8}  budget")
    ok_all = True
    for r in results:
        u = float(np.median(r["unrecorded"]["step"])) * 1e3
        a, a_low, a_high = ratio(r["auto"]["step"], r["unrecorded"]["step"])
        e, e_low, e_high = ratio(r["every=1"]["step"], r["unrecorded"]["step"])
        ok = a <= BUDGET
        ok_all &= ok
        floor = r["budget"].get("floor")
        print(f"{r['name']:<12}{r['params']:>10}{r['tensors']:>8}{threads:>4}{u:>10.2f}   "
              f"{f'{a:.3f} [{a_low:.3f}, {a_high:.3f}]':<24}{f'{e:.3f} [{e_low:.3f}, {e_high:.3f}]':<24}"
              f"{strides_during(r['strides'], *r['measured']):>7}{'-' if floor is None else f'{floor:.3f}':>8}  "
              f"{'ok' if ok else 'OVER'}")
    for name, why in skipped:
        print(f"{name:<12}skipped: {why}")
    print(f"ratio = median over the measured steps k of recorded step k ÷ unrecorded step k (wall clock; the same "
          f"batch, seed and starting weights), [95 % interval of that median]; budget: auto ratio ≤ {BUDGET}; "
          f"stride: in force over the measured steps; floor (the last decision's): the every-step work ÷ the "
          f"interval, when alone over the share (else -).")
    print("\n[every=\"auto\": CPU shares of the unrecorded step, and the budget's own view]")
    print(f"{'model':<12}{'train-thread CPU [95% CI]':<28}{'background CPU [95% CI]':<28}{'stats CPU':>10}   "
          f"{'step':>9}{'light':>8}"
          f"{'heavy+':>9}{'at':>5}{'stride':>7}{'est. share':>11}   strides")
    for r in results:
        u = float(np.median(r["unrecorded"]["step"]))
        share, low, high = median_interval((a - b) / w for a, b, w in zip(
            r["auto"]["step_cpu"], r["unrecorded"]["step_cpu"], r["unrecorded"]["step"]))
        other = median_interval(((aa - a) - (bb - b)) / w for a, b, aa, bb, w in zip(
            r["auto"]["step_cpu"], r["unrecorded"]["step_cpu"], r["auto"]["step_all"],
            r["unrecorded"]["step_all"], r["unrecorded"]["step"]))
        b = r["budget"]
        estimate = budget_share(b)
        print(f"{r['name']:<12}{f'{share:+.3f} [{low:+.3f}, {high:+.3f}]':<28}"
              f"{f'{other[0]:+.3f} [{other[1]:+.3f}, {other[2]:+.3f}]':<28}{r['statistics_cpu'] / u:>10.3f}   "
              f"{b.get('step_ms', float('nan')):>9.2f}{b.get('light_ms', float('nan')):>8.2f}"
              f"{b.get('heavy_extra_ms', float('nan')):>9.2f}{b.get('at_step', '?'):>5}{b.get('stride', '?'):>7}"
              f"{'?' if estimate is None else f'{estimate:.3f}':>11}   {r['strides']}")
    print("train-thread CPU: median over steps of (auto − unrecorded) CPU time of the training thread ÷ the "
          "unrecorded step; background CPU: the same for all other threads of the process (writer, statistics; "
          "torch's own threads cancel); stats CPU: this recorder's statistics-thread CPU per measured step ÷ the "
          "median unrecorded step. Budget columns (ms, from rec.recorded_meta(\"budget\") after the run: the last "
          "decision, at step 'at'): the step without the recorder (median interval between optimizer steps less "
          "the recorder's own cost), light work per step, extras per heavy step; est. share = (light + extras · min(1, 2 / stride)) ÷ interval.")
    return ok_all


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--steps", type=int, default=100, help="measured steps per variant after the warm-up (100)")
    parser.add_argument("--block", type=int, default=10, help="steps per interleaved block (10)")
    parser.add_argument("--threads", type=int, default=None, help="torch threads (default: torch's own default)")
    parser.add_argument("--models", default=",".join(MODELS), help=f"comma-separated subset of {','.join(MODELS)}")
    parser.add_argument("--quick", action="store_true", help="smoke run: 20 measured steps, mlp only")
    args = parser.parse_args(argv)
    if args.quick:
        args.steps, args.models = 20, "mlp"
    names = [n for n in args.models.split(",") if n]
    unknown = [n for n in names if n not in MODELS]
    if unknown:
        parser.error(f"unknown model(s) {unknown}; choose from {list(MODELS)}")
    if args.threads is not None:
        torch.set_num_threads(args.threads)
    threads = torch.get_num_threads()
    print(f"torch.get_num_threads() = {threads}" + ("" if args.threads is not None else " (torch's default)"))
    skipped = []
    missing = transformers_missing() if "gpt2-tiny" in names else None
    if missing:
        print(f"gpt2-tiny skipped: transformers does not import ({missing})")
        skipped.append(("gpt2-tiny", "transformers does not import"))
        names.remove("gpt2-tiny")
    started = time.perf_counter()
    workdir = tempfile.mkdtemp(prefix="nbkit-auto-")
    results = []
    try:
        for name in names:
            begun = time.perf_counter()
            results.append(measure(name, args.steps, args.block, workdir))
            print(f"  {name}: {time.perf_counter() - begun:.0f} s", flush=True)
    finally:
        shutil.rmtree(workdir, ignore_errors=True)
    ok = report(results, skipped, threads, args.steps, args.block)
    print(f"\ntotal {time.perf_counter() - started:.0f} s")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())

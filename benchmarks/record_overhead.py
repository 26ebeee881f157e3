"""What recording costs, measured side by side in one run: recorded ÷ unrecorded training step at
every="auto" (the default) and at every=1, the every=1 overhead ÷ the optimizer step beside the
memory-traffic floor, and the CPU the recording takes on the training thread and on the others.

For each model (benchmarks/models.py: mlp, conv, transformer, resnet18, gpt2-tiny) copies train from
the same initial weights on the same batches, with the same global seed at step k:

  unrecorded   plain zero_grad + forward + backward + optimizer.step()
  auto         the same under nbkit.record(..., every="auto", keyframe_every=50)
  every=1      the same under nbkit.record(..., every=1, keyframe_every=50)
  naive        (mlp, conv, transformer; --naive all, --no-naive none) a hand-written recorder: per-tensor
               NumPy copies of θ, g and state, np.histogram, NumPy gain shares

They run in interleaved blocks (--block steps each, the variant that goes first rotating from block to
block) so that machine noise hits them alike. The first 100 steps are a warm-up, not timed: every="auto"
records its first 50 steps in full and chooses its stride at keyframes (50, 100, ...), so the measured
steps 100 .. 100 + --steps run at a chosen stride.

Printed per model:
  ratio        median over the measured steps k of recorded step k ÷ unrecorded step k (wall clock),
               with its distribution-free 95 % interval (paired.median_interval)
  ovh/opt      every=1: median over k of (recorded − unrecorded) step k, ÷ the median optimizer step of
               the unrecorded copy, with the interval of that median
  floor/opt    the memory traffic no recorder of these quantities avoids, timed on the unrecorded copy
               right after each of its steps (where the recorder's post-step hook runs): one copy of θ
               into a buffer and one read (a norm) each of θ, g and the optimizer's moment tensors, ÷
               the optimizer step
  CPU shares   (auto and every=1) median over k of the recorded − unrecorded CPU time of the training
               thread ÷ the unrecorded step, and the same for all other threads of the process (the
               recorder's writer and statistics threads; torch's intra-op threads cancel out)
  stride       every="auto": the strides in force over the measured steps and the floor it reported
               (rec.recorded_meta("budget")): the every-step work ÷ the step, when alone over the share
  naive/ours   the naive recorder's every-step overhead ÷ ours at every=1

Budgets (issue 13): auto ratio ≤ 1.05 on every model; every=1 overhead ≤ 0.5 × the optimizer step on
mlp, conv and transformer. The verdict column says OVER where one is missed; exit status 1 then.
Torch runs at its default thread count (how users train) unless --threads.

Caveat: background work left over at the end of a block (the writer's commits, the last step's
statistics) runs during the next variant's block; the every=1 copy has the most of it, so it slows the
others a little too. The median over steps keeps most of that out, not all of it.

    .venv/bin/python benchmarks/record_overhead.py [--steps 100] [--block 10] [--models mlp,resnet18]
                                                   [--threads N] [--naive | --no-naive] [--quick]
"""
from __future__ import annotations

import argparse
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import torch

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
import nbkit  # noqa: E402
from models import MODELS, batches, training_copy, transformers_missing  # noqa: E402
from paired import median_interval  # noqa: E402

WARM_UP = 100           # untimed steps: every="auto" leaves its 50-step warm-up and chooses at keyframe 100
KEYFRAME_EVERY = 50
AUTO_BUDGET = 1.05      # auto ratio allowed, every model
EVERY_STEP_BUDGET = 0.5  # every=1 overhead ÷ optimizer step allowed on the three original models
EVERY_STEP_MODELS = ("mlp", "conv", "transformer")
NAIVE_MODELS = ("mlp", "conv", "transformer")


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
KEYS = ("step", "optimizer", "step_cpu", "step_all", "floor")


def train_step(forward, optimizer, criterion, batch, timings):
    """One step; wall time, CPU time of this thread and of the whole process (all threads)."""
    x, y = batch
    start, start_cpu, start_all = time.perf_counter(), time.thread_time(), time.process_time()
    optimizer.zero_grad(set_to_none=False)
    loss = criterion(forward(x), y)
    loss.backward()
    before_step = time.perf_counter()
    optimizer.step()
    end, end_cpu, end_all = time.perf_counter(), time.thread_time(), time.process_time()
    timings["step"].append(end - start)
    timings["optimizer"].append(end - before_step)
    timings["step_cpu"].append(end_cpu - start_cpu)
    timings["step_all"].append(end_all - start_all)


class Floor:
    """The memory traffic of recording a step, timed alone: one copy of θ into a buffer and one read
    each of θ, g and the optimizer's tensors shaped like θ (Adam's two moments)."""

    def __init__(self, optimizer):
        self.optimizer = optimizer
        self.params = [p for g in optimizer.param_groups for p in g["params"]]
        self.buffers = [torch.empty_like(p) for p in self.params]

    @torch.no_grad()
    def __call__(self, timings):
        started = time.perf_counter()
        torch._foreach_copy_(self.buffers, [p.detach() for p in self.params])
        torch._foreach_norm([p.detach() for p in self.params])
        torch._foreach_norm([p.grad for p in self.params if p.grad is not None])
        moments = [v for p in self.params for v in self.optimizer.state.get(p, {}).values()
                   if torch.is_tensor(v) and v.shape == p.shape]
        if moments:
            torch._foreach_norm(moments)
        timings["floor"].append(time.perf_counter() - started)


def measure(name, steps, block, workdir, with_naive):
    builder, optimizer_class, with_criterion = MODELS[name]
    torch.manual_seed(0)
    base, shape, classes = builder()
    total = WARM_UP + steps
    data = batches(shape, classes, total)
    names = ("unrecorded", "auto", "every=1") + (("naive",) if with_naive else ())
    variants = {}
    for variant in names:
        model, optimizer, criterion, forward, loss_of = training_copy(base, optimizer_class, with_criterion)
        rec = None
        if variant in ("auto", "every=1"):
            options = {"every": "auto" if variant == "auto" else 1, "keyframe_every": KEYFRAME_EVERY}
            if criterion is not None:
                options["criterion"] = criterion
            rec = nbkit.record(model, optimizer, Path(workdir) / f"{name}-{variant}", **options)
        elif variant == "naive":
            NaiveRecorder(model, optimizer)
        variants[variant] = {"forward": forward, "optimizer": optimizer, "loss": loss_of, "rec": rec,
                             "floor": Floor(optimizer) if variant == "unrecorded" else None,
                             "t": {k: [] for k in KEYS}, "i": 0}
    for number in range(-(-total // block)):
        order = names[number % len(names):] + names[:number % len(names)]
        for variant in order:
            v = variants[variant]
            for _ in range(min(block, total - v["i"])):
                k = v["i"]
                timings = v["t"] if k >= WARM_UP else {key: [] for key in KEYS}
                torch.manual_seed(1000 + k)             # the same dropout masks in every variant
                train_step(v["forward"], v["optimizer"], v["loss"], data[k], timings)
                if v["floor"] is not None:
                    v["floor"](timings)
                v["i"] += 1
    auto = variants["auto"]["rec"]
    for variant in ("auto", "every=1"):
        variants[variant]["rec"].flush(wait=True)       # the last steps' statistics finish (untimed)
    budget = auto.recorded_meta("budget") or {}
    strides = auto.recorded_meta("strides") or []
    for variant in ("auto", "every=1"):
        variants[variant]["rec"].close()
        shutil.rmtree(variants[variant]["rec"].recording_path, ignore_errors=True)
    return {"name": name, "measured": (WARM_UP, total - 1), "params": sum(p.numel() for p in base.parameters()),
            "tensors": sum(1 for _ in base.parameters()), "budget": budget, "strides": strides,
            **{k: v["t"] for k, v in variants.items()}}


# --- the report -----------------------------------------------------------------------------------
def ratio(recorded, unrecorded):
    """(median, low, high) over steps of recorded[k] ÷ unrecorded[k]."""
    return median_interval(a / b for a, b in zip(recorded, unrecorded))


def overhead(recorded, unrecorded):
    """(median, low, high) over steps of recorded[k] − unrecorded[k], in seconds."""
    return median_interval(a - b for a, b in zip(recorded, unrecorded))


def cpu_shares(recorded, unrecorded):
    """(training thread, other threads) extra CPU ÷ the unrecorded step, each (median, low, high)."""
    thread = median_interval((a - b) / w for a, b, w in zip(recorded["step_cpu"], unrecorded["step_cpu"],
                                                            unrecorded["step"]))
    others = median_interval(((aa - a) - (bb - b)) / w for a, b, aa, bb, w in zip(
        recorded["step_cpu"], unrecorded["step_cpu"], recorded["step_all"], unrecorded["step_all"], unrecorded["step"]))
    return thread, others


def strides_during(strides, first, last) -> str:
    """The strides in force over steps first .. last, from the metadata's [[from_step, stride], ...]."""
    during = [stride for i, (step, stride) in enumerate(strides)
              if step <= last and (i + 1 == len(strides) or strides[i + 1][0] > first)]
    return ",".join(str(s) for s in during) or "?"


def interval(values, digits=3, sign=""):
    median, low, high = values
    return f"{median:{sign}.{digits}f} [{low:{sign}.{digits}f}, {high:{sign}.{digits}f}]"


def report(results, skipped, threads, steps, block):
    print(f"\nnbkit recording overhead, torch {torch.__version__}, {threads} torch thread(s), keyframe_every="
          f"{KEYFRAME_EVERY}, {WARM_UP} warm-up steps, {steps} measured steps in blocks of {block}")
    print(f"\n{'model':<12}{'params':>10}{'T':>4}{'step ms':>9}{'opt ms':>8}   {'auto ratio':<23}{'stride':>9}"
          f"{'floor':>7}   {'every=1 ratio':<23}{'every=1 ovh/opt':<23}{'floor/opt':>9}{'naive/ours':>11}  budget")
    ok_all = True
    for r in results:
        u = r["unrecorded"]
        step, opt = float(np.median(u["step"])), float(np.median(u["optimizer"]))
        auto = ratio(r["auto"]["step"], u["step"])
        full = ratio(r["every=1"]["step"], u["step"])
        ours = overhead(r["every=1"]["step"], u["step"])
        per_opt = tuple(x / opt for x in ours)
        floor = float(np.median(u["floor"])) / opt
        naive = "-"
        if "naive" in r:
            naive = f"{overhead(r['naive']['step'], u['step'])[0] / ours[0]:.1f}" if ours[0] > 0 else "inf"
        verdicts = ["auto ok" if auto[0] <= AUTO_BUDGET else "auto OVER"]
        if r["name"] in EVERY_STEP_MODELS:
            verdicts.append("every=1 ok" if per_opt[0] <= EVERY_STEP_BUDGET else "every=1 OVER")
        ok_all &= not any("OVER" in v for v in verdicts)
        reported_floor = r["budget"].get("floor")
        print(f"{r['name']:<12}{r['params']:>10}{r['tensors']:>4}{step * 1e3:>9.2f}{opt * 1e3:>8.2f}   "
              f"{interval(auto):<23}{strides_during(r['strides'], *r['measured']):>9}"
              f"{'-' if reported_floor is None else f'{reported_floor:.3f}':>7}   {interval(full):<23}"
              f"{interval(per_opt, 2):<23}{floor:>9.2f}{naive:>11}  {', '.join(verdicts)}")
    for name, why in skipped:
        print(f"{name:<12}skipped: {why}")
    print(f"\n[CPU taken by the recording ÷ the unrecorded step: the training thread | the other threads]")
    print(f"{'model':<12}{'auto: training thread':<27}{'auto: others':<27}{'every=1: training thread':<27}"
          f"{'every=1: others':<27}")
    for r in results:
        u = r["unrecorded"]
        auto_thread, auto_others = cpu_shares(r["auto"], u)
        full_thread, full_others = cpu_shares(r["every=1"], u)
        print(f"{r['name']:<12}{interval(auto_thread, sign='+'):<27}{interval(auto_others, sign='+'):<27}"
              f"{interval(full_thread, sign='+'):<27}{interval(full_others, sign='+'):<27}")
    print(f"\n[every=\"auto\": the budget's last decision (rec.recorded_meta(\"budget\")), ms]")
    print(f"{'model':<12}{'at step':>8}{'stride':>8}{'step':>9}{'light':>8}{'heavy+':>9}   strides")
    for r in results:
        b = r["budget"]
        print(f"{r['name']:<12}{b.get('at_step', '?'):>8}{b.get('stride', '?'):>8}"
              f"{b.get('step_ms', float('nan')):>9.2f}{b.get('light_ms', float('nan')):>8.2f}"
              f"{b.get('heavy_extra_ms', float('nan')):>9.2f}   {r['strides']}")
    print(f"\nratio: median over the measured steps k of recorded ÷ unrecorded step k [its 95 % interval]; "
          f"budgets: auto ratio ≤ {AUTO_BUDGET} on every model, every=1 ovh/opt ≤ {EVERY_STEP_BUDGET} on "
          f"{', '.join(EVERY_STEP_MODELS)}. floor/opt: one copy of θ and one read each of θ, g and the moments "
          "÷ the optimizer step, timed right after the unrecorded step. Budget table: the step without the "
          "recorder, the work every step does whatever the stride (light), and what a heavy step adds.")
    return ok_all


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--steps", type=int, default=100, help="measured steps per variant after the warm-up (100)")
    parser.add_argument("--block", type=int, default=10, help="steps per interleaved block (10)")
    parser.add_argument("--threads", type=int, default=None, help="torch threads (default: torch's own default)")
    parser.add_argument("--models", default=",".join(MODELS), help=f"comma-separated subset of {','.join(MODELS)}")
    naive = parser.add_mutually_exclusive_group()
    naive.add_argument("--naive", action="store_true", help="run the naive recorder on every model")
    naive.add_argument("--no-naive", action="store_true", help="run no naive recorder")
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
    workdir = tempfile.mkdtemp(prefix="nbkit-overhead-")
    results = []
    try:
        for name in names:
            begun = time.perf_counter()
            with_naive = not args.no_naive and (args.naive or name in NAIVE_MODELS)
            results.append(measure(name, args.steps, args.block, workdir, with_naive))
            print(f"  {name}: {time.perf_counter() - begun:.0f} s", flush=True)
    finally:
        shutil.rmtree(workdir, ignore_errors=True)
    ok = report(results, skipped, threads, args.steps, args.block)
    print(f"\ntotal {time.perf_counter() - started:.0f} s")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())

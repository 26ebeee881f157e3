"""What per-unit profiles add to a recording at every=1, side by side in one run.

For each model (benchmarks/models.py; default: mlp, conv, transformer) three copies train from the same
weights on the same batches, in interleaved blocks (the first variant rotating from block to block):

  unrecorded     plain zero_grad + forward + backward + optimizer.step()  (the optimizer step is timed)
  profiles off   nbkit.record(..., every=1, profiles=False)
  profiles on    nbkit.record(..., every=1)   (profiles=True, the default)

Printed per model: the median over steps of (profiles on − profiles off) step time, with its 95 %
interval, ÷ the median optimizer step; the same for the statistics thread's CPU per step (where the
profiles run: rec.pacer.cpu_seconds); and a measured floor: eight passes over every profiled weight
(a norm each: what reading Δθ and g along two axes, and the second moment for the ε mask, costs at the
least), timed right after each unrecorded step, ÷ the optimizer step. Also the stored profile bytes per
heavy step (int16 codes, before compression). Budget (issue 14): profiles on − off ≤ 0.5 × the
optimizer step on the MLP. Torch at its default thread count unless --threads.

    .venv/bin/python benchmarks/profile_cost.py [--steps 100] [--block 10] [--models mlp] [--threads N]
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
from models import MODELS, batches, training_copy  # noqa: E402
from paired import median_interval  # noqa: E402
from record_overhead import KEYS, train_step  # noqa: E402

WARM_UP = 20
BUDGET = 0.5
VARIANTS = ("unrecorded", "profiles off", "profiles on")


def floor_passes(weights, timings):
    """Eight reads of every profiled weight, timed: the least a profile of two axes and an ε mask reads."""
    started = time.perf_counter()
    for _ in range(8):
        torch._foreach_norm(weights)
    timings["floor"].append(time.perf_counter() - started)


def measure(name, steps, block, workdir):
    builder, optimizer_class, with_criterion = MODELS[name]
    torch.manual_seed(0)
    base, shape, classes = builder()
    total = WARM_UP + steps
    data = batches(shape, classes, total)
    variants = {}
    for variant in VARIANTS:
        model, optimizer, criterion, forward, loss_of = training_copy(base, optimizer_class, with_criterion)
        rec = None
        if variant != "unrecorded":
            options = {"every": 1, "profiles": variant == "profiles on"}
            if criterion is not None:
                options["criterion"] = criterion
            rec = nbkit.record(model, optimizer, Path(workdir) / f"{name}-{variant.replace(' ', '-')}", **options)
        variants[variant] = {"forward": forward, "optimizer": optimizer, "loss": loss_of, "rec": rec,
                             "weights": [p.detach() for p in model.parameters() if p.dim() >= 2],
                             "t": {k: [] for k in KEYS}, "stats": [], "i": 0}
    for number in range(-(-total // block)):
        order = VARIANTS[number % 3:] + VARIANTS[:number % 3]
        for variant in order:
            v = variants[variant]
            for _ in range(min(block, total - v["i"])):
                k = v["i"]
                timed = k >= WARM_UP
                timings = v["t"] if timed else {key: [] for key in KEYS}
                torch.manual_seed(1000 + k)
                before = v["rec"].pacer.cpu_seconds if v["rec"] else 0.0
                train_step(v["forward"], v["optimizer"], v["loss"], data[k], timings)
                if v["rec"] is None:
                    floor_passes(v["weights"], timings)
                elif timed:
                    v["stats"].append(before)
                v["i"] += 1
    result = {"name": name, "tensors": len(variants["unrecorded"]["weights"])}
    for variant in ("profiles off", "profiles on"):
        rec = variants[variant]["rec"]
        start = variants[variant]["stats"][0]
        rec.flush(wait=True)
        result[variant + " stats"] = (rec.pacer.cpu_seconds - start) / steps
        table = rec.recorded_meta("profiles") or {}
        result[variant + " bytes"] = 2 * len(table.get("quantities") or ()) * sum((table.get("units") or {}).values())
        rec.close()
        shutil.rmtree(rec.recording_path, ignore_errors=True)
    result.update({k: v["t"] for k, v in variants.items()})
    return result


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--steps", type=int, default=100)
    parser.add_argument("--block", type=int, default=10)
    parser.add_argument("--threads", type=int, default=None, help="torch threads (default: torch's own default)")
    parser.add_argument("--models", default="mlp,conv,transformer")
    args = parser.parse_args(argv)
    if args.threads is not None:
        torch.set_num_threads(args.threads)
    print(f"torch.get_num_threads() = {torch.get_num_threads()}" + ("" if args.threads else " (torch's default)"))
    workdir = tempfile.mkdtemp(prefix="nbkit-profiles-")
    try:
        results = [measure(n, args.steps, args.block, workdir) for n in args.models.split(",") if n]
    finally:
        shutil.rmtree(workdir, ignore_errors=True)
    print(f"\nper-unit profiles at every=1, {args.steps} steps after {WARM_UP} warm-up, blocks of {args.block}")
    print(f"{'model':<12}{'weights':>8}{'opt ms':>8}   {'(on − off) ÷ opt step [95% CI]':<32}{'stats CPU on−off ÷ opt':>23}"
          f"{'floor ÷ opt':>12}{'bytes/heavy step':>18}  budget")
    ok = True
    for r in results:
        opt = float(np.median(r["unrecorded"]["optimizer"]))
        added = median_interval((a - b) / opt for a, b in zip(r["profiles on"]["step"], r["profiles off"]["step"]))
        stats = (r["profiles on stats"] - r["profiles off stats"]) / opt
        floor = float(np.median(r["unrecorded"]["floor"])) / opt
        verdict = "-"
        if r["name"] == "mlp":
            verdict = "ok" if added[0] <= BUDGET else "OVER"
            ok &= verdict == "ok"
        print(f"{r['name']:<12}{r['tensors']:>8}{opt * 1e3:>8.2f}   "
              f"{f'{added[0]:.2f} [{added[1]:.2f}, {added[2]:.2f}]':<32}{stats:>23.2f}{floor:>12.2f}"
              f"{r['profiles on bytes']:>18}  {verdict}")
    print(f"budget: profiles on − off ≤ {BUDGET} × the optimizer step on the mlp (wall clock, paired by step); "
          "stats CPU: the statistics thread's extra CPU per step, where the profiles are computed; floor: eight "
          "norms over every profiled weight right after the unrecorded step.")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())

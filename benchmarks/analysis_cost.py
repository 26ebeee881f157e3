"""Cost of curvature and gradient-noise estimates, as multiples of one forward+backward pass.

    .venv/bin/python benchmarks/analysis_cost.py            # MLP, conv net, transformer encoder
    .venv/bin/python benchmarks/analysis_cost.py --quick    # smaller models, fewer repeats

All timings of one model are taken in the same process, interleaved round by round, and reported
as ratios of medians to the forward+backward median of that round set (never bare times):
  hvp        one Hessian-vector product from scratch: forward, backward with create_graph, and the
             double backward (what one power-iteration step would cost without graph reuse)
  hvp/math   the same, divided by a forward+backward with attention on the math kernel (second-order
             passes must use it: the fused CPU attention kernels have no double backward)
  hvp_reuse  one more product through an already built graph (what each Lanczos step costs)
  sharpness  one nbkit.sharpness estimate at the recording tolerance (1e-3), with the Adam optimizer;
             HVPs: how many Hessian-vector products Lanczos used for it
  noise      one nbkit noise-scale estimate ("auto": per-example gradients by vmap for small models,
             micro-batches for large ones or with BatchNorm)
Budget (issue 5): hvp <= 3 x forward+backward.
"""
from __future__ import annotations

import argparse
import statistics
import time

import numpy as np
import torch

from nbkit.analyze.curvature import hessian_vector_product, second_order, sharpness
from nbkit.record.estimates import RECORDING_TOL
from nbkit.analyze.noise import noise_parts

HVP_BUDGET = 3.0


def models(quick: bool):
    torch.manual_seed(0)
    scale = 4 if quick else 1
    mlp = torch.nn.Sequential(torch.nn.Linear(784, 1024 // scale), torch.nn.ReLU(),
                              torch.nn.Linear(1024 // scale, 512 // scale), torch.nn.ReLU(),
                              torch.nn.Linear(512 // scale, 10))
    conv = torch.nn.Sequential(
        torch.nn.Conv2d(3, 32 // scale, 3, padding=1), torch.nn.ReLU(), torch.nn.MaxPool2d(2),
        torch.nn.Conv2d(32 // scale, 64 // scale, 3, padding=1), torch.nn.ReLU(), torch.nn.MaxPool2d(2),
        torch.nn.Conv2d(64 // scale, 128 // scale, 3, padding=1), torch.nn.ReLU(), torch.nn.AdaptiveAvgPool2d(4),
        torch.nn.Flatten(), torch.nn.Linear(16 * (128 // scale), 10))
    encoder = torch.nn.Sequential(
        torch.nn.TransformerEncoder(torch.nn.TransformerEncoderLayer(128, 4, 256, dropout=0.0, batch_first=True),
                                    num_layers=2 if quick else 4, enable_nested_tensor=False),
        torch.nn.Flatten(), torch.nn.Linear(128 * (16 if quick else 64), 10))
    seq = 16 if quick else 64
    return {
        "MLP 784-1024-512-10, batch 64": (mlp, (torch.randn(64, 784), torch.randint(0, 10, (64,)))),
        "conv net 3x32x32, batch 64": (conv, (torch.randn(64, 3, 32, 32), torch.randint(0, 10, (64,)))),
        f"transformer encoder seq {seq}, batch 16": (encoder, (torch.randn(16, seq, 128), torch.randint(0, 10, (16,)))),
    }


def step_fn(model, batch):
    x, y = batch
    return torch.nn.functional.cross_entropy(model(x), y)


def timed(fn):
    start = time.perf_counter()
    fn()
    return time.perf_counter() - start


def measure(model, batch, rounds: int) -> dict:
    params = [p for p in model.parameters() if p.requires_grad]
    n = sum(p.numel() for p in params)
    optimizer = torch.optim.Adam(params, lr=1e-3)
    for _ in range(2):                                           # warm-up and a second moment for Adam
        optimizer.zero_grad()
        step_fn(model, batch).backward()
        optimizer.step()
    vector = np.random.default_rng(0).standard_normal(n)

    def forward_backward():
        torch.autograd.grad(step_fn(model, batch), params)

    def hvp_from_scratch():
        with second_order():
            hessian_vector_product(step_fn(model, batch), params)(vector)

    with second_order():
        product = hessian_vector_product(step_fn(model, batch), params)

    def hvp_reuse():
        product(vector)

    def one_sharpness():
        sharpness(model, step_fn, batch, optimizer=optimizer, tol=RECORDING_TOL)

    method = noise_parts(model, step_fn, batch).method

    def one_noise():
        noise_parts(model, step_fn, batch)

    def forward_backward_math():
        with second_order():
            torch.autograd.grad(step_fn(model, batch), params)

    times = {name: [] for name in ("fwd_bwd", "fwd_bwd_math", "hvp", "hvp_reuse", "sharpness", "noise")}
    for r in range(rounds):                                      # interleaved: drift hits all alike
        times["fwd_bwd"].append(timed(forward_backward))
        times["hvp"].append(timed(hvp_from_scratch))
        times["hvp_reuse"].append(timed(hvp_reuse))
        times["fwd_bwd_math"].append(timed(forward_backward_math))
        times["noise"].append(timed(one_noise))
        if r < max(1, rounds // 3):                             # the Lanczos estimate is the long one
            times["sharpness"].append(timed(one_sharpness))
    # on a shared machine other processes only ever add time: the fastest of the interleaved repeats
    # is the best estimate of each cost; medians are printed beside them as a check
    base, base_median = min(times["fwd_bwd"]), statistics.median(times["fwd_bwd"])
    ratios = {k: min(v) / base for k, v in times.items() if k != "fwd_bwd"}
    ratios["hvp_median"] = statistics.median(times["hvp"]) / base_median
    # each HVP is timed right after a forward+backward of the same round: the median of these paired
    # ratios is the steadiest estimate (a busy neighbour slows both of a pair alike)
    ratios["hvp_paired"] = statistics.median(h / f for h, f in zip(times["hvp"], times["fwd_bwd"]))
    ratios["hvp_vs_math"] = min(times["hvp"]) / min(times["fwd_bwd_math"])
    ratios["params"] = n
    ratios["noise_method"] = method
    ratios["lanczos_hvps"] = count_products(one_sharpness)
    return ratios


def count_products(estimate) -> int:
    """Hessian-vector products one sharpness estimate used (Lanczos iterations and restarts)."""
    import nbkit.analyze.curvature as curvature

    original, calls = curvature.hessian_vector_product, [0]

    def counting(loss, params):
        product = original(loss, params)

        def counted(vector):
            calls[0] += 1
            return product(vector)
        return counted

    curvature.hessian_vector_product = counting
    try:
        estimate()
    finally:
        curvature.hessian_vector_product = original
    return calls[0]


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smaller models and fewer rounds")
    parser.add_argument("--rounds", type=int, default=None)
    parser.add_argument("--threads", type=int, default=None, help="torch threads (default: torch's choice)")
    args = parser.parse_args(argv)
    if args.threads:
        torch.set_num_threads(args.threads)
    rounds = args.rounds or (6 if args.quick else 15)
    print(f"torch {torch.__version__}, {torch.get_num_threads()} threads; ratios to one forward+backward "
          f"(fastest of {rounds} interleaved repeats; hvp_med: ratio of medians; hvp_pair: median of the "
          "per-round ratios, which the budget is judged on)")
    header = f"{'model':42s} {'params':>9s} {'hvp':>6s} {'hvp_med':>7s} {'hvp_pair':>8s} {'hvp/math':>8s} " \
             f"{'hvp_reuse':>9s} {'sharpness':>9s} {'HVPs':>5s} {'noise':>6s}  noise method"
    print(header)
    over = []
    for name, (model, batch) in models(args.quick).items():
        r = measure(model, batch, rounds)
        print(f"{name:42s} {r['params']:9,d} {r['hvp']:6.2f} {r['hvp_median']:7.2f} {r['hvp_paired']:8.2f} "
              f"{r['hvp_vs_math']:8.2f} {r['hvp_reuse']:9.2f} {r['sharpness']:9.1f} {r['lanczos_hvps']:5d} "
              f"{r['noise']:6.2f}  {r['noise_method']}")
        if r["hvp_paired"] > HVP_BUDGET:
            over.append(name)
    print(f"budget: one Hessian-vector product <= {HVP_BUDGET} x forward+backward: "
          + ("met" if not over else "over on " + ", ".join(over)))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

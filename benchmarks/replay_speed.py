"""Replay speed, measured side by side in one run: ratios, never bare times.

    .venv/bin/python benchmarks/replay_speed.py [--steps 200] [--rounds 3]

Prints steps per second of a plain training loop, of a replay with recording off and of a replay
with recording at the defaults (all on the same model, optimizer and batches, one torch thread, the
three interleaved in alternating order over several rounds; ratios are taken within each round and
their median printed, so a busy neighbour hurts all alike),
and the cost of reaching a keyframe at step K per skipped step, against fetching one batch.
Budget (issue 4): replay without recording <= 1.05 x the plain loop; reaching the keyframe's step
costs no more than fetching the skipped batches (nothing with a callable batches(step)).
"""
from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
import time
from pathlib import Path

import torch

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
import nbkit  # noqa: E402
from nbkit.replay.replay import _fetcher, replay  # noqa: E402

_generator = torch.Generator().manual_seed(0)
INPUTS = torch.randn(4096, 784, generator=_generator)
TARGETS = torch.randint(0, 10, (4096,), generator=_generator)
CRITERION = torch.nn.CrossEntropyLoss()


def make_model():
    torch.manual_seed(0)
    return torch.nn.Sequential(torch.nn.Linear(784, 256), torch.nn.ReLU(), torch.nn.Dropout(0.1),
                               torch.nn.Linear(256, 128), torch.nn.ReLU(), torch.nn.Linear(128, 10))


def batches(step):
    rows = torch.randint(0, len(INPUTS), (64,), generator=torch.Generator().manual_seed(step))
    return INPUTS[rows], TARGETS[rows]


def step_fn(model, batch):
    x, y = batch
    return CRITERION(model(x), y)


def plain_loop(steps):
    model = make_model()
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-3)
    started = time.perf_counter()
    for step in range(steps):
        batch = batches(step)
        optimizer.zero_grad()
        step_fn(model, batch).backward()
        optimizer.step()
    return steps / (time.perf_counter() - started)


def record(path, steps):
    model = make_model()
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-3)
    with nbkit.record(model, optimizer, path, criterion=CRITERION):
        for step in range(steps):
            batch = batches(step)
            optimizer.zero_grad()
            step_fn(model, batch).backward()
            optimizer.step()
    return nbkit.load(path)


def timed_replay(run, steps, record_it, to, start=0):
    started = time.perf_counter()
    replay(run, make_model(), step_fn, batches, start=start, steps=steps, to=to, progress=False, _record=record_it)
    return steps / (time.perf_counter() - started)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--steps", type=int, default=200)
    parser.add_argument("--rounds", type=int, default=5)
    args = parser.parse_args(argv)
    torch.set_num_threads(1)
    with tempfile.TemporaryDirectory() as folder:
        run = record(Path(folder) / "run", args.steps + 1)
        plain, off, on, off_ratio, on_ratio = [], [], [], [], []
        for k in range(args.rounds):
            # alternate the order each round; ratios are taken within a round, where the machine's load
            # is most alike, and their median is reported
            order = ["plain", "off", "on"] if k % 2 == 0 else ["on", "off", "plain"]
            rates = {}
            for what in order:
                rates[what] = plain_loop(args.steps) if what == "plain" else \
                    timed_replay(run, args.steps, what == "on", Path(folder) / f"{what}{k}")
            plain.append(rates["plain"]), off.append(rates["off"]), on.append(rates["on"])
            off_ratio.append(rates["plain"] / rates["off"])
            on_ratio.append(rates["plain"] / rates["on"])
        plain_rate, off_rate, on_rate = (statistics.median(v) for v in (plain, off, on))
        # reaching a keyframe at step K with an iterable: K batches fetched and dropped
        skip = max(k for k in run.keyframes if k < args.steps) or args.steps
        fetch_times, skip_times = [], []
        for _ in range(args.rounds):
            started = time.perf_counter()
            for step in range(skip):
                batches(step)
            fetch_times.append((time.perf_counter() - started) / skip)
            iterable = (batches(step) for step in range(skip + 1))
            started = time.perf_counter()
            _fetcher(iterable, skip)
            skip_times.append((time.perf_counter() - started) / skip)
        started = time.perf_counter()
        _fetcher(batches, skip)
        callable_cost = time.perf_counter() - started
        fetch, skipped = statistics.median(fetch_times), statistics.median(skip_times)
    print(f"replay speed: MLP 784-256-128-10 with dropout, Adam, batch 64, {args.steps} steps, "
          f"1 torch thread, median of {args.rounds} interleaved rounds")
    print(f"{'':34}{'steps/s':>10}{'time per step vs plain loop':>30}")
    print(f"{'plain training loop':34}{plain_rate:10.1f}{1.0:30.3f}")
    print(f"{'replay, recording off':34}{off_rate:10.1f}{statistics.median(off_ratio):30.3f}   (budget 1.05)")
    print(f"{'replay, recording at defaults':34}{on_rate:10.1f}{statistics.median(on_ratio):30.3f}")
    print(f"per-round ratios, recording off: {', '.join(f'{r:.3f}' for r in off_ratio)}; best round of each "
          f"(least disturbed, common practice for timing on a shared machine): {max(plain) / max(off):.3f}")
    print(f"reaching keyframe step {skip} with an iterable: {skipped / fetch:.3f} x the cost of fetching one batch "
          f"per skipped step (budget 1.0); with batches(step): {callable_cost * 1e6:.0f} microseconds in all, "
          "no batch fetched")


if __name__ == "__main__":
    main()

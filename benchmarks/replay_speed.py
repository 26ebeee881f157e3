"""Replay speed, measured side by side in one run: ratios, never bare times.

    .venv/bin/python benchmarks/replay_speed.py [--steps 200] [--rounds 3]

Prints steps per second of a plain training loop, of a replay with recording off and of a replay
with recording at the defaults (all on the same model, optimizer and batches, one torch thread, the
three interleaved in alternating order over several rounds; ratios are taken within each round and
the best round and the medians printed, so a busy neighbour shows as a gap between the two),
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
    started, cpu = time.perf_counter(), time.process_time()
    for step in range(steps):
        batch = batches(step)
        optimizer.zero_grad()
        step_fn(model, batch).backward()
        optimizer.step()
    return steps / (time.perf_counter() - started), steps / (time.process_time() - cpu)


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
    started, cpu = time.perf_counter(), time.process_time()
    replay(run, make_model(), step_fn, batches, start=start, steps=steps, to=to, progress=False, _record=record_it)
    return steps / (time.perf_counter() - started), steps / (time.process_time() - cpu)


def check_cost(rounds):
    """(per-step batch checks: fingerprint of inputs and targets and their comparison) / (plain step),
    each the best of `rounds` runs of 100 (the least disturbed)."""
    from nbkit.replay.fingerprint import fingerprint, matches

    model = make_model()
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-3)
    x, y = batches(0)
    recorded = fingerprint(((x,), {}))

    def plain():
        optimizer.zero_grad()
        step_fn(model, (x, y)).backward()
        optimizer.step()

    def checks():
        matches(recorded, [fingerprint(((x,), {}))])
        matches(recorded, [fingerprint((y,))])

    best = {}
    for f in (plain, checks):
        f()
        times = []
        for _ in range(rounds):
            started = time.process_time()
            for _ in range(100):
                f()
            times.append(time.process_time() - started)
        best[f.__name__] = min(times)
    return best["checks"] / best["plain"]


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--steps", type=int, default=200)
    parser.add_argument("--rounds", type=int, default=5)
    args = parser.parse_args(argv)
    torch.set_num_threads(1)
    with tempfile.TemporaryDirectory() as folder:
        run = record(Path(folder) / "run", args.steps + 1)
        wall = {"plain": [], "off": [], "on": []}     # steps/s per round
        cpu = {"plain": [], "off": [], "on": []}
        for k in range(args.rounds):
            # alternate the order each round, so drifting load hurts all three alike
            for what in (["plain", "off", "on"] if k % 2 == 0 else ["on", "off", "plain"]):
                rates = plain_loop(args.steps) if what == "plain" else \
                    timed_replay(run, args.steps, what == "on", Path(folder) / f"{what}{k}")
                wall[what].append(rates[0])
                cpu[what].append(rates[1])
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
        # a replay's fixed cost (open the recording, read a keyframe, copy the model) in plain steps
        setup = []
        for k in range(args.rounds):
            one_plain = 1.0 / plain_loop(20)[1]
            one_replay = 1.0 / timed_replay(run, 1, False, Path(folder) / f"one{k}")[1]
            setup.append((one_replay - one_plain) / one_plain)
    print(f"replay speed: MLP 784-256-128-10 with dropout, Adam, batch 64, {args.steps} steps, "
          f"1 torch thread, median of {args.rounds} interleaved rounds")
    # best round of each (the least disturbed: common practice for timing on a shared machine) and medians
    best = {what: (max(wall[what]), max(cpu[what])) for what in wall}
    median = {what: (statistics.median(wall[what]), statistics.median(cpu[what])) for what in wall}
    print(f"{'':32}{'steps/s':>9}{'time per step vs plain loop':>30}{'medians of rounds':>22}")
    print(f"{'':32}{'(best)':>9}{'wall':>15}{'CPU':>15}{'wall':>11}{'CPU':>11}")
    for what, label in (("plain", "plain training loop"), ("off", "replay, recording off"),
                        ("on", "replay, recording at defaults")):
        ratios = [best["plain"][i] / best[what][i] for i in (0, 1)] + \
                 [median["plain"][i] / median[what][i] for i in (0, 1)]
        note = "   (budget 1.05)" if what == "off" else ""
        print(f"{label:32}{best[what][0]:9.1f}{ratios[0]:15.3f}{ratios[1]:15.3f}{ratios[2]:11.3f}{ratios[3]:11.3f}{note}")
    print("CPU: time.process_time over all threads of this process (with recording on it includes the writer "
          "thread); steadier than wall time when other processes share the cores")
    print(f"reaching keyframe step {skip} with an iterable: {skipped / fetch:.3f} x the cost of fetching one batch "
          f"per skipped step (budget 1.0); with batches(step): {callable_cost * 1e6:.0f} microseconds in all, "
          "no batch fetched")
    print(f"per-step batch checks (fingerprints of inputs and targets, compared): {check_cost(args.rounds):.3f} "
          "of a plain step (CPU time, best of rounds)")
    print(f"a replay's set-up (CPU time, beyond its first step) costs {statistics.median(setup):.1f} plain steps; "
          f"over {args.steps} steps that is {statistics.median(setup) / args.steps:.3f} of the ratio above")


if __name__ == "__main__":
    main()

"""Replay speed, measured side by side in one run: ratios, never bare times.

    .venv/bin/python benchmarks/replay_speed.py [--steps 200] [--rounds 9] [--wide]

Prints the time per step of a replay with recording off and of a replay with recording at the
defaults, relative to a plain training loop on the same model, optimizer and batches (one torch
thread). Each round runs the three back to back, in alternating order; the ratio is taken within
each round (a busy neighbour slows a round's three runs alike) and the median of the rounds is
printed with its distribution-free 95 % interval. A replay's time includes its set-up (opening the
recording, reading the keyframe, copying the model), which is also printed on its own, in plain
steps. Then the cost of reaching a keyframe at step K per skipped step, against fetching one batch.
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
from nbkit.replay.loop import fetcher, run_plan  # noqa: E402
from nbkit.replay.plan import make_plan  # noqa: E402
from paired import median_interval  # noqa: E402

_generator = torch.Generator().manual_seed(0)
INPUTS = torch.randn(4096, 784, generator=_generator)
TARGETS = torch.randint(0, 10, (4096,), generator=_generator)
CRITERION = torch.nn.CrossEntropyLoss()


HIDDEN = [256, 128]      # --wide: [1024, 512], the MLP of record_overhead.py (about 5 x the step time)


def make_model():
    torch.manual_seed(0)
    return torch.nn.Sequential(torch.nn.Linear(784, HIDDEN[0]), torch.nn.ReLU(), torch.nn.Dropout(0.1),
                               torch.nn.Linear(HIDDEN[0], HIDDEN[1]), torch.nn.ReLU(),
                               torch.nn.Linear(HIDDEN[1], 10))


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


def replay_here(run, *, start, steps, to=None, before_step=None, record=True):
    """nbkit.replay of the recorded optimizer in this process; record=False runs the same plan with its
    recording switched off (the plan's own switch, which replay() always sets on)."""
    model = make_model()
    plan = make_plan(run, model, step_fn, batches, None, start, steps, to, before_step, 1, True, record=record)
    run_plan(plan, model, step_fn, batches, list(plan.factories), progress=False)


def timed_replay(run, steps, record_it, to, start=0):
    started, cpu = time.perf_counter(), time.process_time()
    replay_here(run, start=start, steps=steps, to=to, record=record_it)
    return steps / (time.perf_counter() - started), steps / (time.process_time() - cpu)


def interleaved(run, steps):
    """Per-step paired times (replay step, plain step), recording off: the replay's before_step runs one
    plain training step of a second model on the same batch, timed on its own, so each replayed step
    is measured next to a plain one within milliseconds (on a shared machine the speed of whole runs
    drifts by tens of percent from one second to the next). A replayed step is the time between two
    before_step calls, less the plain step run inside it."""
    plain_model = make_model()
    plain_optimizer = torch.optim.Adam(plain_model.parameters(), lr=1e-3)
    marks, plain = [], []

    def before_step(model, optimizer, step):
        started = time.perf_counter()
        x, y = batches(step)
        # the plain model's dropout draws from a forked generator: the replay's random stream stays the
        # recorded one (its per-step random-state check would stop it otherwise)
        with torch.random.fork_rng():
            plain_optimizer.zero_grad()
            # the same loss as step_fn through another criterion object: the replay watches CRITERION
            torch.nn.functional.cross_entropy(plain_model(x), y).backward()
            plain_optimizer.step()
        ended = time.perf_counter()
        plain.append(ended - started)
        marks.append((started, ended))

    replay_here(run, start=0, steps=steps, before_step=before_step, record=False)
    replayed = [b[0] - a[1] for a, b in zip(marks, marks[1:])]    # one plain step's end to the next's start
    return replayed, plain[1:]


def check_cost(rounds):
    """(per-step batch checks: fingerprint of inputs and targets and their comparison) / (plain step),
    each the best of `rounds` runs of 100 (the least disturbed)."""
    from nbkit.measure.fingerprint import fingerprint, matches

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
    parser.add_argument("--rounds", type=int, default=9)
    parser.add_argument("--wide", action="store_true", help="hidden layers 1024 and 512 instead of 256 and 128")
    args = parser.parse_args(argv)
    if args.wide:
        HIDDEN[:] = [1024, 512]
    torch.set_num_threads(1)
    with tempfile.TemporaryDirectory() as folder:
        run = record(Path(folder) / "run", args.steps + 1)
        seconds = {what: {"wall": [], "cpu": []} for what in ("plain", "off", "on")}   # per step, per round
        for k in range(args.rounds):
            # alternate the order each round, so drifting load hurts all three alike
            for what in (["plain", "off", "on"] if k % 2 == 0 else ["on", "off", "plain"]):
                rates = plain_loop(args.steps) if what == "plain" else \
                    timed_replay(run, args.steps, what == "on", Path(folder) / f"{what}{k}")
                seconds[what]["wall"].append(1.0 / rates[0])
                seconds[what]["cpu"].append(1.0 / rates[1])
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
            fetcher(iterable, skip)
            skip_times.append((time.perf_counter() - started) / skip)
        started = time.perf_counter()
        fetcher(batches, skip)
        callable_cost = time.perf_counter() - started
        fetch, skipped = statistics.median(fetch_times), statistics.median(skip_times)
        # a replay's fixed cost (open the recording, read a keyframe, copy the model) in plain steps
        setup = []
        for k in range(args.rounds):
            one_plain = 1.0 / plain_loop(20)[1]
            one_replay = 1.0 / timed_replay(run, 1, False, Path(folder) / f"one{k}")[1]
            setup.append((one_replay - one_plain) / one_plain)
        replayed, plain_steps = [], []
        for _ in range(max(1, args.rounds // 3)):
            r, p = interleaved(run, args.steps)
            replayed += r
            plain_steps += p
    plain_rate = 1.0 / statistics.median(seconds["plain"]["wall"])
    print(f"replay speed: MLP 784-{HIDDEN[0]}-{HIDDEN[1]}-10 with dropout, Adam, batch 64, {args.steps} steps, 1 torch thread, "
          f"{args.rounds} rounds; plain loop {plain_rate:.0f} steps/s (median)")
    print(f"{'time per step vs plain loop':32}{'wall: median [95% interval]':>30}{'CPU: median [95% interval]':>30}")
    for what, label in (("off", "replay, recording off"), ("on", "replay, recording at defaults")):
        cells = []
        for clock in ("wall", "cpu"):
            m, low, high = median_interval([a / b for a, b in zip(seconds[what][clock], seconds["plain"][clock])])
            cells.append(f"{m:.3f} [{low:.3f}–{high:.3f}]")
        print(f"{label:32}{cells[0]:>30}{cells[1]:>30}")
    step_ratio, low, high = median_interval([r / p for r, p in zip(replayed, plain_steps)])
    setup_share = statistics.median(setup) / args.steps
    combined = step_ratio + setup_share
    ok = combined <= 1.05
    print(f"replay step vs plain step, interleaved step by step (recording off): {step_ratio:.3f} "
          f"[{low:.3f}–{high:.3f}] over {len(replayed)} pairs; with the set-up spread over {args.steps} steps "
          f"({setup_share:.3f}): {combined:.3f}   (budget 1.05: {'ok' if ok else 'OVER'}; the steadiest figure here)")
    print("CPU: time.process_time over all threads of this process (with recording on it includes the writer "
          "and statistics threads); steadier than wall time when other processes share the cores")
    print(f"reaching keyframe step {skip} with an iterable: {skipped / fetch:.3f} x the cost of fetching one batch "
          f"per skipped step (budget 1.0); with batches(step): {callable_cost * 1e6:.0f} microseconds in all, "
          "no batch fetched")
    print(f"per-step batch checks (fingerprints of inputs and targets, compared): {check_cost(args.rounds):.3f} "
          "of a plain step (CPU time, best of rounds, warm: the same batch every time)")
    print(f"a replay's set-up (CPU time, beyond its first step) costs {statistics.median(setup):.1f} plain steps; "
          f"over {args.steps} steps that is {statistics.median(setup) / args.steps:.3f} of the ratio above")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())

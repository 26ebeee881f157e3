"""`nbkit demo --out DIR`: the main job end to end on the greenhouse scenario.

Records the first run (with its planted faults and curvature estimates), computes its findings,
replays it from the last keyframe before the loss spike with three other optimizers on the same
mini-batches, slices the loss landscape through the runs, and writes a static HTML report.
"""
from __future__ import annotations

import sys
import time
from pathlib import Path

import nbkit
from nbkit.demo import scenario
from nbkit.errors import NbkitError
from nbkit.views.report import write_report


def add_arguments(parser):
    parser.add_argument("--out", default="demo-out", help="output folder (default: demo-out)")
    parser.add_argument("--steps", type=int, default=None, help="steps of the first run (default: the scenario's)")


def _say(message: str) -> None:
    print(message, flush=True)


REMEDIED = ("over-stability-limit", "orphan", "eps-dominated")     # the planted faults' findings


def spike_start(findings, run) -> int:
    """The step where the run's trouble begins: the earliest stability-limit or spike finding."""
    kinds = ("over-stability-limit", "grad-spike")
    steps = [f.first_step for f in findings if f.kind in kinds]
    return min(steps) if steps else int(run.steps[len(run.steps) * 2 // 3])


def run_demo(out: Path, steps: int | None = None) -> Path:
    out.mkdir(parents=True, exist_ok=True)
    steps = steps or scenario.STEPS
    began = time.perf_counter()
    _say(f"1/5 recording the first run: {steps} Adam steps with curvature estimates -> {out / 'first-run'}")
    run, batches = scenario.train_first_run(out / "first-run", steps=steps)
    findings = run.findings()
    for f in findings:
        _say(f"    finding [{f.severity}] {f.kind} at steps {f.first_step}-{f.last_step} "
             f"in {', '.join(f.tensors[:3]) or 'the whole run'}")
    trouble = spike_start(findings, run)
    keyframes = [k for k in run.keyframes if k < trouble] or run.keyframes[:1]
    start = keyframes[-1]
    _say(f"2/5 replaying from keyframe {start} (last before step {trouble}) with "
         f"{', '.join(scenario.REPLAY_OPTIMIZERS)} on the same mini-batches")
    replays = nbkit.replay(run, scenario.make_model(), scenario.step_fn, batches,
                           optimizers=dict(scenario.REPLAY_OPTIMIZERS), start=start,
                           steps=int(run.steps[-1]) + 1 - start, to=out / "replays", progress=True)
    _say("3/5 slicing the loss landscape through the start point and two runs' end points")
    landscape_runs = [run, replays["sgd-momentum"]]
    landscape = nbkit.landscape(scenario.make_model(), scenario.step_fn, batches(start), landscape_runs,
                                resolution=21)
    _say("4/5 trying the remedies of the findings: each replayed beside the unchanged control from the keyframe "
         "before it, on the kept batches")
    tried = []
    for finding in findings:
        if finding.kind in REMEDIED:
            outcome = nbkit.try_remedies(run, finding, scenario.make_model(), to=out / "remedies" /
                                         f"{finding.kind}-{finding.first_step}", progress=False)
            tried.append(outcome)
            for line in outcome.table().splitlines():
                _say("    " + line)
    _say("5/5 writing the report")
    commands = ["make demo                       # or: nbkit demo --out demo-out",
                f"nbkit findings {out / 'first-run'}",
                f"nbkit report {out / 'first-run'} " + " ".join(str(r.path) for r in replays.values())
                + f" -o {out / 'report.html'}",
                "jupyter lab notebooks/01-tour.ipynb"]
    report = write_report(
        [run, *replays.values()], out / "report.html", title="nbkit demo: greenhouse leaf temperature",
        findings={str(run.path): findings}, landscape=landscape, commands=commands, remedies=tried,
        intro=("A small network predicts a greenhouse's leaf temperature one hour ahead from twelve sensor "
               "readings (data generated in code). Its first run has planted faults: a calibration offset "
               "left out of the optimizer, light sensors in the wrong unit, and a learning-rate warm-up "
               "that climbs past the stability limit. Replays start from the last keyframe before the "
               "spike on the very same mini-batches."))
    elapsed = time.perf_counter() - began
    _say(f"\ndone in {elapsed:.0f} s")
    _say(f"  report:     {report.resolve()}")
    _say(f"  recordings: {(out / 'first-run').resolve()}  and  {(out / 'replays').resolve()}/*")
    _say("  notebook:   .venv/bin/jupyter lab notebooks/01-tour.ipynb")
    return report


def run(args) -> int:
    try:
        run_demo(Path(args.out), args.steps)
    except NbkitError as exc:
        print(f"nbkit demo: {exc}", file=sys.stderr)
        return 1
    return 0

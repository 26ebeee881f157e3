"""`nbkit info RUN`: what a recording holds, in a few lines."""
from __future__ import annotations

import numpy as np

from nbkit.errors import RecordingError
from nbkit.recording import load


def add_arguments(parser):
    parser.add_argument("run", nargs="+", help="recording folder(s)")


def run(args) -> int:
    status = 0
    for path in args.run:
        try:
            recording = load(path)
        except RecordingError as exc:
            print(f"{path}: {exc}")
            status = 1
            continue
        steps = recording.steps
        meta = recording.meta
        span = f"steps {steps[0]}..{steps[-1]}" if len(steps) else "no steps yet"
        size = recording.size_report()
        per_step = size["row_bytes_per_step"]
        replay = meta.get("replay") or {}
        print(f"{path}: {len(steps)} recorded steps ({span}), {len(recording.tensors)} tensors, "
              f"optimizer {meta['optimizer']['class']}, keyframes {recording.keyframes}")
        print(f"  size {size['total'] / 1e6:.1f} MB (rows {size['rows'] / 1e6:.1f} MB"
              + (f", {per_step:,.0f} bytes per step" if per_step == per_step else "")
              + f"; keyframes {size['keyframes'] / 1e6:.1f} MB; kept batches {size['batches'] / 1e6:.1f} MB)")
        print("  " + ("closed cleanly" if recording.closed_cleanly else
                      "not closed cleanly: still being written, or the process stopped before close()"))
        heavy = int(recording.heavy.sum())
        strides = ", ".join(f"{stride} from step {first}" for first, stride in meta.get("strides") or [])
        budget = meta.get("budget") or {}
        print(f"  every={meta.get('every', 1)!r}: {heavy} of {len(steps)} steps heavy"
              + (f" (stride {strides})" if strides else "")
              + (f"; the every-step work alone is {100 * budget['floor']:.1f} % of the step (the floor)"
                 if budget.get("floor") else ""))
        table = meta.get("profiles") or {}
        if table.get("enabled"):
            units = table.get("units") or {}
            print(f"  profiles of {len(table.get('tensors') or {})} weights at each heavy step: {units.get('rows', 0)} "
                  f"output units, {units.get('columns', 0)} input features (run.profile)")
        elif table:
            print("  no profiles (profiles=False)")
        without_loss = int(np.isnan(recording.loss).sum())
        if without_loss:
            print(f"  {without_loss} of {len(steps)} steps without a loss (NaN: no criterion, returned loss, "
                  "closure or rec.loss() gave one)")
        if replay:
            print(f"  replay of {replay.get('parent')} from step {replay.get('start')}")
        elif meta.get("keep_batches") is False:
            print("  batches not kept (keep_batches=False): replays need batches= and step_fn=")
        else:
            kept = recording.kept_steps
            windows = ", ".join(f"{a}..{b}" for a, b in recording.replayable_windows) or "none"
            stopped = (meta.get("kept_batches") or {}).get("stopped")
            print(f"  kept batches: {len(kept)} steps, replayable without a loader over {windows}"
                  + (f" (keeping stopped: {stopped})" if stopped else ""))
        checked = meta.get("trained_loss")
        if checked and not replay:
            last = checked["checks"][-1]
            print("  trained loss: " + (f"rebuilt from {last['how']}, {last['verdict']} at step {last['step']}"
                                        if checked["rebuildable"] else
                                        f"not rebuildable ({last.get('error') or last.get('why') or last['how']}): "
                                        "replays need step_fn="))
    return status

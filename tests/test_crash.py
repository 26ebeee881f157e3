"""SIGKILL at random steps: the recording opens, holds every step up to the last flush, no torn keyframe."""
import json
import subprocess
import sys
import warnings
from pathlib import Path

import numpy as np
import pytest

import nbkit

TRIALS = 20
# Besides commit_seconds, a step waits for the next forward pass to be queued (one step) and for the
# flush to be written; the writer publishes its longest flush in committed.json (max_write_seconds).
SLACK_SECONDS = 1.0      # scheduling on a shared, loaded 2-core machine


@pytest.mark.slow
def test_sigkill_at_random_steps_leaves_a_readable_recording(tmp_path):
    worker = Path(__file__).with_name("_crash_worker.py")
    subprocess.run([sys.executable, str(worker), str(tmp_path), str(TRIALS), "6"], check=True, timeout=600)
    trials = json.loads((tmp_path / "trials.json").read_text())
    assert len(trials) == TRIALS
    lost, lost_seconds, writes = [], [], []
    # A trial killed during its first flush (the one that also creates the arrays, the longest) has
    # published no flush time yet: the longest flush any trial published stands in for it.
    longest_write = max(json.loads((Path(t["folder"]) / "committed.json").read_text()).get("max_write_seconds", 0.0)
                        for t in trials)
    for trial in trials:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            run = nbkit.load(trial["folder"])
        assert not run.closed_cleanly
        assert any(f"holds {len(run)} committed steps" in str(w.message) for w in caught), \
            [str(w.message) for w in caught]
        reported = [step for step, _ in trial["reports"]]
        steps = run.steps
        assert steps.tolist() == list(range(len(steps)))                # whole steps, in order, no holes
        assert len(steps) <= reported[-1] + 2                            # nothing invented past the kill
        committed = json.loads((Path(trial["folder"]) / "committed.json").read_text())
        write = committed.get("max_write_seconds", 0.0) or longest_write
        deadline = trial["killed"] - trial["commit_seconds"] - 2 * write - SLACK_SECONDS
        must_have = [step for step, at in trial["reports"] if at < deadline]
        if must_have:
            assert len(steps) >= must_have[-1] + 1, (trial["commit_seconds"], must_have[-1], len(steps))
        if len(steps):
            assert np.isfinite(run.series("grad_norm")).all()            # committed rows hold real values
            assert np.isfinite(run.loss).all()
        for step in run.keyframes:                                       # every listed keyframe is whole
            model_state, optimizer_state = run.state_at(step)
            assert "0.weight" in model_state and "state" in optimizer_state
        lost.append(reported[-1] + 1 - len(steps))
        lost_seconds.append(trial["killed"] - dict(trial["reports"]).get(len(steps) - 1, trial["killed"]))
        writes.append(write)
    print(f"steps lost per kill: max {max(lost)}, median {int(np.median(lost))}; seconds of training lost: "
          f"max {max(lost_seconds):.2f}; longest flush {max(writes):.2f} s; "
          f"commit_seconds {sorted({t['commit_seconds'] for t in trials})}")

"""resume=True continues a recording after a restart from a checkpoint; a gap or overlap is stated."""
import subprocess
import sys
import textwrap

import numpy as np
import pytest
import torch

import nbkit
from conftest import train


def _setup(tiny_classifier):
    model, inputs, targets = tiny_classifier
    return model, torch.optim.Adam(model.parameters(), lr=1e-2), inputs, targets


@pytest.mark.slow
def test_resume_after_a_clean_close_continues_the_steps(tmp_path, tiny_classifier):
    model, optimizer, inputs, targets = _setup(tiny_classifier)
    criterion = torch.nn.CrossEntropyLoss()
    with nbkit.record(model, optimizer, tmp_path / "r", keyframe_every=10, criterion=criterion):
        first = train(model, optimizer, inputs, targets, 25, criterion=criterion)
    with nbkit.record(model, optimizer, tmp_path / "r", keyframe_every=10, resume=True, criterion=criterion) as rec:
        assert rec.step == 25                        # Adam's own step count
        second = train(model, optimizer, inputs, targets, 15, seed=1, criterion=criterion)
    run = nbkit.load(tmp_path / "r")
    assert run.steps.tolist() == list(range(40)) and run.closed_cleanly
    np.testing.assert_allclose(run.loss, first + second, rtol=1e-6)
    note = run.meta["resumes"][-1]
    assert note["at_step"] == 25 and "gap" not in note and "overlap" not in note
    assert 0 in run.keyframes and 40 in run.keyframes and 30 in run.keyframes


def test_restart_from_an_older_checkpoint_drops_the_overlap_and_says_so(tmp_path, tiny_classifier):
    model, optimizer, inputs, targets = _setup(tiny_classifier)
    with nbkit.record(model, optimizer, tmp_path / "r", keyframe_every=10):
        train(model, optimizer, inputs, targets, 35)
    model_state, optimizer_state = nbkit.load(tmp_path / "r").state_at(20)   # the checkpoint
    model.load_state_dict(model_state)
    optimizer.load_state_dict(optimizer_state)
    with nbkit.record(model, optimizer, tmp_path / "r", keyframe_every=10, resume=True):
        train(model, optimizer, inputs, targets, 5, seed=2)
    run = nbkit.load(tmp_path / "r")
    assert run.steps.tolist() == list(range(25))
    note = run.meta["resumes"][-1]
    assert note["overlap"] == [20, 34] and note["dropped_rows"] == 15 and note["dropped_keyframes"] == [30, 35]
    assert run.keyframes == [0, 10, 20, 25]


def test_explicit_restart_step_after_missing_steps_leaves_a_stated_gap(tmp_path, tiny_classifier):
    model, inputs, targets = tiny_classifier
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)       # keeps no step count of its own
    with nbkit.record(model, optimizer, tmp_path / "r"):
        train(model, optimizer, inputs, targets, 10)
    with nbkit.record(model, optimizer, tmp_path / "r", resume=15):
        train(model, optimizer, inputs, targets, 3)
    run = nbkit.load(tmp_path / "r")
    assert run.steps.tolist() == list(range(10)) + [15, 16, 17]
    assert run.meta["resumes"][-1]["gap"] == [10, 14]


def test_resume_with_a_different_model_is_refused(tmp_path, tiny_classifier):
    model, optimizer, inputs, targets = _setup(tiny_classifier)
    with nbkit.record(model, optimizer, tmp_path / "r"):
        train(model, optimizer, inputs, targets, 3)
    other = torch.nn.Linear(8, 3)
    with pytest.raises(nbkit.RecorderError, match="Cannot resume .*tensors differ"):
        nbkit.record(other, torch.optim.Adam(other.parameters()), tmp_path / "r", resume=True)
    assert len(nbkit.load(tmp_path / "r")) == 3


def test_resume_on_a_new_path_starts_a_recording(tmp_path, tiny_classifier):
    model, optimizer, inputs, targets = _setup(tiny_classifier)
    with nbkit.record(model, optimizer, tmp_path / "new", resume=True):
        train(model, optimizer, inputs, targets, 4)
    assert nbkit.load(tmp_path / "new").steps.tolist() == [0, 1, 2, 3]


CRASHING = textwrap.dedent("""
    import os, signal, sys, torch, nbkit
    torch.manual_seed(0)
    model = torch.nn.Linear(6, 2)
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-2)
    rec = nbkit.record(model, optimizer, sys.argv[1], keyframe_every=10, commit_seconds=0.1)
    for step in range(int(sys.argv[2])):
        optimizer.zero_grad()
        model(torch.randn(4, 6)).square().mean().backward()
        optimizer.step()
    rec.flush()
    os.kill(os.getpid(), signal.SIGKILL)
""")


@pytest.mark.slow
def test_resume_after_a_kill_from_the_last_keyframe(tmp_path):
    subprocess.run([sys.executable, "-c", CRASHING, str(tmp_path / "r"), "47"], timeout=120)
    with pytest.warns(nbkit.RecordingWarning, match="not closed cleanly"):
        crashed = nbkit.load(tmp_path / "r")
    assert len(crashed) == 47
    restart = crashed.keyframes[-1]                           # the user's checkpoint: a keyframe
    model = torch.nn.Linear(6, 2)
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-2)
    model_state, optimizer_state = crashed.state_at(restart)
    model.load_state_dict(model_state)
    optimizer.load_state_dict(optimizer_state)
    with nbkit.record(model, optimizer, tmp_path / "r", keyframe_every=10, resume=True):
        for _ in range(10):
            optimizer.zero_grad()
            model(torch.randn(4, 6)).square().mean().backward()
            optimizer.step()
    run = nbkit.load(tmp_path / "r")
    assert restart == 40 and run.steps.tolist() == list(range(50)) and run.closed_cleanly
    assert run.meta["resumes"][-1]["overlap"] == [40, 46] and not run.meta["resumes"][-1]["was_closed"]

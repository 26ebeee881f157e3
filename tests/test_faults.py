"""Injected faults: the recorder warns once with the cause, training finishes, what was recorded stays readable."""
import errno
import os
import queue
import types
import warnings

import numpy as np
import pytest
import torch

import nbkit
from conftest import train


def _failing_store_after(monkeypatch, calls, error):
    """Make zarr's local store raise `error` from the `calls`-th chunk write on (a full disk, say)."""
    from zarr.storage import LocalStore

    original, count = LocalStore.set, {"n": 0}

    async def set_(self, key, value):
        count["n"] += 1
        if count["n"] > calls:
            raise error
        return await original(self, key, value)

    monkeypatch.setattr(LocalStore, "set", set_)
    return count


@pytest.mark.parametrize("error", [OSError(errno.ENOSPC, "No space left on device"),
                                   PermissionError(errno.EACCES, "Permission denied")])
def test_disk_full_or_read_only_midway_warns_once_and_training_finishes(tmp_path, tiny_classifier, monkeypatch, error):
    model, inputs, targets = tiny_classifier
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-2)
    rec = nbkit.record(model, optimizer, tmp_path / "r", commit_seconds=60)
    train(model, optimizer, inputs, targets, 30)
    rec.flush()                                     # 30 steps are safely on disk
    _failing_store_after(monkeypatch, 0, error)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        losses = train(model, optimizer, inputs, targets, 40, seed=1)
        rec.close()
    assert len(losses) == 40 and np.isfinite(losses).all()           # training finished
    ours = [w for w in caught if issubclass(w.category, nbkit.RecorderWarning)]
    assert len(ours) == 1 and type(error).__name__ in str(ours[0].message)
    monkeypatch.undo()
    with pytest.warns(nbkit.RecordingWarning, match="not closed cleanly"):
        run = nbkit.load(tmp_path / "r")
    assert run.steps.tolist() == list(range(30))
    assert np.isfinite(run.series("grad_norm")).all()
    assert type(error).__name__ in run.meta["writer_error"]
    assert 0 in run.keyframes


def test_strict_mode_raises_the_writer_error(tmp_path, tiny_classifier, monkeypatch):
    model, inputs, targets = tiny_classifier
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    rec = nbkit.record(model, optimizer, tmp_path / "r", strict=True)
    _failing_store_after(monkeypatch, 0, OSError(errno.ENOSPC, "No space left on device"))
    train(model, optimizer, inputs, targets, 3)
    with pytest.raises(nbkit.RecorderError, match="writing the recording failed"):
        rec.flush()
        train(model, optimizer, inputs, targets, 1)


@pytest.mark.skipif(os.geteuid() == 0, reason="root writes into read-only folders")
def test_read_only_folder_is_refused_at_record_time(tmp_path, tiny_classifier):
    model, _, _ = tiny_classifier
    tmp_path.chmod(0o500)
    try:
        with pytest.raises(nbkit.RecorderError, match="writable"):
            nbkit.record(model, torch.optim.SGD(model.parameters(), lr=0.1), tmp_path / "r")
    finally:
        tmp_path.chmod(0o700)


class OddStateSGD(torch.optim.SGD):
    """An optimizer whose state holds an object a keyframe cannot store, and later a non-numeric step."""

    def __init__(self, *args, bad_step_after=None, **kwargs):
        super().__init__(*args, **kwargs)
        self.bad_step_after, self.calls = bad_step_after, 0

    @torch.no_grad()
    def step(self, closure=None):
        loss = super().step(closure)
        self.calls += 1
        for p in self.param_groups[0]["params"]:
            self.state[p]["odd"] = object()
            if self.bad_step_after is not None and self.calls > self.bad_step_after:
                self.state[p]["step"] = "not a number"
        return loss


def _record_warnings(model, optimizer, path, inputs, targets, steps):
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        rec = nbkit.record(model, optimizer, path, keyframe_every=5)
        losses = train(model, optimizer, inputs, targets, steps)
        rec.close()
    assert len(losses) == steps and np.isfinite(losses).all()            # training finished
    messages = [str(w.message) for w in caught if issubclass(w.category, nbkit.RecorderWarning)
                and "has no loss" not in str(w.message)]            # these loops give the recorder no loss
    assert len(messages) == len(set(messages))                          # each problem reported once
    return messages


def test_state_a_keyframe_cannot_hold_degrades_to_rows_only(tmp_path, tiny_classifier):
    model, inputs, targets = tiny_classifier
    messages = _record_warnings(model, OddStateSGD(model.parameters(), lr=0.1, momentum=0.9), tmp_path / "r",
                                inputs, targets, 12)
    assert len(messages) == 1 and "keyframe" in messages[0] and "object" in messages[0], messages
    run = nbkit.load(tmp_path / "r")
    assert run.steps.tolist() == list(range(12))                         # every row still recorded
    assert run.keyframes == [0]                                          # taken before the odd state existed


def test_a_recorder_bug_midway_stops_recording_and_keeps_earlier_rows(tmp_path, tiny_classifier):
    model, inputs, targets = tiny_classifier
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-2)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        rec = nbkit.record(model, optimizer, tmp_path / "r")
        calls = []

        def buggy(row):
            calls.append(1)
            if len(calls) > 6:
                raise ZeroDivisionError("an injected bug")

        rec.add_step_hook(buggy)          # runs inside the recorder's step hook, as its own code does
        losses = train(model, optimizer, inputs, targets, 12)
        rec.close()
    assert len(losses) == 12 and np.isfinite(losses).all()
    messages = [str(w.message) for w in caught if issubclass(w.category, nbkit.RecorderWarning)
                and "has no loss" not in str(w.message)]            # these loops give the recorder no loss
    assert len(messages) == 1 and "recording stopped" in messages[0] and "injected bug" in messages[0], messages
    run = nbkit.load(tmp_path / "r")
    assert run.steps.tolist() == list(range(6)) and np.isfinite(run.series("grad_norm")).all()
    assert run.keyframes == [0]              # no final keyframe from a recorder in doubt


def test_strict_mode_raises_on_unexpected_state(tmp_path, tiny_classifier):
    model, inputs, targets = tiny_classifier
    optimizer = OddStateSGD(model.parameters(), lr=0.1)
    rec = nbkit.record(model, optimizer, tmp_path / "r", keyframe_every=2, strict=True)
    with pytest.raises(nbkit.RecorderError, match="could not be stored in a keyframe") as raised:
        train(model, optimizer, inputs, targets, 4)
    assert isinstance(raised.value.__cause__, TypeError)      # the state's own error, kept as the cause
    rec.strict = False
    rec.close()


def test_a_writer_slower_than_training_drops_rows_with_one_warning(tmp_path, tiny_classifier, monkeypatch):
    import nbkit.store.writer as writer

    monkeypatch.setattr(writer, "QUEUE_ROWS", 5)
    model, inputs, targets = tiny_classifier
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    gate = __import__("threading").Event()

    class SlowDisk(queue.Queue):
        """The writer thread takes nothing off its queue until the gate opens: a disk slower than training."""

        def get(self, *args, **kwargs):
            gate.wait(10)
            return super().get(*args, **kwargs)

    monkeypatch.setattr(writer, "queue", types.SimpleNamespace(Queue=SlowDisk, Empty=queue.Empty))
    rec = nbkit.record(model, optimizer, tmp_path / "r")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        train(model, optimizer, inputs, targets, 30)
        gate.set()
        rec.close()
    messages = [str(w.message) for w in caught if issubclass(w.category, nbkit.RecorderWarning)
                and "has no loss" not in str(w.message)]            # these loops give the recorder no loss
    assert len(messages) == 1 and "fell behind" in messages[0] and "rows were dropped" in messages[0]
    run = nbkit.load(tmp_path / "r")
    assert 5 <= len(run) < 30 and run.steps.tolist() == sorted(run.steps.tolist())

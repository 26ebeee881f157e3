"""Bad input: clear errors that name the file and the fix, no code run, record()-time refusals."""
import json
import os
import pickle
import warnings
from pathlib import Path

import numpy as np
import pytest
import torch

import nbkit
from conftest import train


@pytest.fixture
def recording(tmp_path, tiny_classifier):
    model, inputs, targets = tiny_classifier
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-2)
    with nbkit.record(model, optimizer, tmp_path / "run", keyframe_every=10):
        train(model, optimizer, inputs, targets, 20)
    return tmp_path / "run"


def test_random_and_empty_directories(tmp_path):
    (tmp_path / "random").mkdir()
    (tmp_path / "random" / "notes.txt").write_text("hello")
    (tmp_path / "empty").mkdir()
    for name in ("random", "empty", "missing"):
        with pytest.raises(nbkit.RecordingError, match="No recording found at") as raised:
            nbkit.load(tmp_path / name)
        assert name in str(raised.value)


@pytest.mark.parametrize("damage", ["truncated", "garbage", "not-an-object", "no-tensors", "bad-tensor", "future"])
def test_tampered_or_truncated_metadata(recording, damage):
    path = recording / "nbkit.json"
    text = path.read_text()
    meta = json.loads(text)
    if damage == "truncated":
        path.write_text(text[: len(text) // 2])
    elif damage == "garbage":
        path.write_bytes(os.urandom(200))
    elif damage == "not-an-object":
        path.write_text("[1, 2, 3]")
    elif damage == "no-tensors":
        del meta["tensors"]
        path.write_text(json.dumps(meta))
    elif damage == "bad-tensor":
        meta["tensors"][1] = 7
        path.write_text(json.dumps(meta))
    else:
        meta["format_version"] = 99
        path.write_text(json.dumps(meta))
    with pytest.raises(nbkit.RecordingError, match="nbkit.json|format version 99") as raised:
        nbkit.load(recording)
    assert str(recording) in str(raised.value)


def test_flipped_bytes_in_a_chunk_are_detected_not_read_as_numbers(recording):
    chunk = next(c for c in sorted((recording / "q" / "grad_norm" / "c").rglob("*")) if c.is_file())
    data = bytearray(chunk.read_bytes())
    for i in range(len(data) // 3, len(data) // 3 + 4):
        data[i] ^= 0xFF
    chunk.write_bytes(bytes(data))
    run = nbkit.load(recording)
    with pytest.raises(nbkit.RecordingError, match="grad_norm.*CRC32C"):
        run.series("grad_norm")
    assert len(run.series("grad_rms")) == 20                          # the other arrays are intact


def test_keyframe_replaced_by_garbage_names_the_file(recording):
    target = recording / "keyframes" / "0000000010.safetensors"
    target.write_bytes(os.urandom(1000))
    run = nbkit.load(recording)
    with pytest.raises(nbkit.RecordingError, match="0000000010.safetensors.*not a valid safetensors"):
        run.state_at(10)
    model_state, _ = run.state_at(0)                                  # other keyframes still load
    assert "0.weight" in model_state


class _RunsCode:
    def __reduce__(self):
        return (Path.write_text, (Path(os.environ["NBKIT_PICKLE_MARKER"]), "code ran"))


def test_keyframe_replaced_by_a_pickle_runs_no_code(recording, tmp_path, monkeypatch):
    marker = tmp_path / "marker.txt"
    monkeypatch.setenv("NBKIT_PICKLE_MARKER", str(marker))
    payload = pickle.dumps({"model": _RunsCode()})
    pickle.loads(payload)                     # proof the payload does run code when unpickled
    assert marker.exists()
    marker.unlink()
    for name in ("0000000010.safetensors", "0000000010.json"):
        (recording / "keyframes" / name).write_bytes(payload)
        with pytest.raises(nbkit.RecordingError, match="0000000010"):
            nbkit.load(recording).state_at(10)
        assert not marker.exists()


# --- record()-time refusals ---------------------------------------------------------------------
def test_model_without_parameters(tmp_path):
    with pytest.raises(nbkit.RecorderError, match="has no parameters"):
        nbkit.record(torch.nn.ReLU(), torch.optim.SGD([torch.zeros(2, requires_grad=True)], lr=0.1), tmp_path / "r")


def test_optimizer_without_parameters(tmp_path, tiny_classifier):
    model, _, _ = tiny_classifier
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    optimizer.param_groups[0]["params"] = []
    with pytest.raises(nbkit.RecorderError, match="optimizer holds no parameters"):
        nbkit.record(model, optimizer, tmp_path / "r")


def test_second_recorder_on_the_same_optimizer(tmp_path, tiny_classifier):
    model, _, _ = tiny_classifier
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    first = nbkit.record(model, optimizer, tmp_path / "a")
    with pytest.raises(nbkit.RecorderError, match="already recorded into .*close that recorder"):
        nbkit.record(model, optimizer, tmp_path / "b")
    first.close()
    nbkit.record(model, optimizer, tmp_path / "b").close()        # fine once the first is closed


def test_path_inside_an_existing_recording(recording, tiny_classifier):
    model, _, _ = tiny_classifier
    with pytest.raises(nbkit.RecorderError, match="inside the recording"):
        nbkit.record(model, torch.optim.SGD(model.parameters(), lr=0.1), recording / "keyframes" / "x")


def test_existing_recording_is_not_replaced_without_overwrite(recording, tiny_classifier):
    model, _, _ = tiny_classifier
    with pytest.raises(nbkit.RecorderError, match="overwrite=True.*resume=True"):
        nbkit.record(model, torch.optim.SGD(model.parameters(), lr=0.1), recording)
    assert len(nbkit.load(recording)) == 20


def test_expected_steps_beyond_free_disk_is_refused(tmp_path, tiny_classifier, monkeypatch):
    import shutil

    model, _, _ = tiny_classifier
    usage = shutil.disk_usage(tmp_path)
    monkeypatch.setattr(shutil, "disk_usage", lambda path: usage._replace(free=10 * 2**20))
    with pytest.raises(nbkit.RecorderError, match=r"needs about \d+ MiB .* only 10 MiB are free"):
        nbkit.record(model, torch.optim.Adam(model.parameters()), tmp_path / "r", expected_steps=10_000_000)
    assert not (tmp_path / "r").exists()
    nbkit.record(model, torch.optim.Adam(model.parameters()), tmp_path / "r", expected_steps=100).close()


def test_optimizer_only_tensors_are_legitimate(tmp_path, tiny_classifier):
    model, inputs, targets = tiny_classifier
    extra = torch.nn.Parameter(torch.ones(5))
    optimizer = torch.optim.SGD([{"params": list(model.parameters())}, {"params": [extra]}], lr=0.1)
    with nbkit.record(model, optimizer, tmp_path / "r"):
        for _ in range(3):
            optimizer.zero_grad()
            (torch.nn.functional.cross_entropy(model(inputs[:8]), targets[:8]) + extra.square().sum()).backward()
            optimizer.step()
    run = nbkit.load(tmp_path / "r")
    assert "group1.0" in run.tensors and run.layers["(optimizer only)"] == ["group1.0"]
    assert np.isfinite(run.series("grad_norm", "group1.0")).all()


def test_parameter_whose_shape_changes_is_reported_and_its_recording_stops(tmp_path):
    torch.manual_seed(0)
    model = torch.nn.Linear(4, 3)
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    x = torch.randn(8, 4)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        with nbkit.record(model, optimizer, tmp_path / "r", keyframe_every=100):
            for step in range(10):
                if step == 5:                                   # e.g. a pruning or growing step
                    with torch.no_grad():
                        model.weight.data = torch.zeros(2, 4)
                        model.bias.data = torch.zeros(2)
                optimizer.zero_grad()
                model(x).sum().backward()
                optimizer.step()
    messages = [str(w.message) for w in caught if issubclass(w.category, nbkit.RecorderWarning)]
    assert any("'weight'" in m and "shape changed from (3, 4) to (2, 4)" in m for m in messages), messages
    run = nbkit.load(tmp_path / "r")
    assert run.steps.tolist() == list(range(10))                        # the run goes on being recorded
    weight = run.series("grad_norm", "weight")
    assert np.isfinite(weight[:5]).all() and np.isnan(weight[5:]).all()   # stopped cleanly from step 5


def test_flush_seconds_still_works_for_one_release_with_a_deprecation_warning(tmp_path, tiny_classifier):
    model, inputs, targets = tiny_classifier
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    with pytest.warns(DeprecationWarning, match="renamed commit_seconds"):
        rec = nbkit.record(model, optimizer, tmp_path / "r", flush_seconds=0.5)
    train(model, optimizer, inputs, targets, 3)
    rec.close()
    run = nbkit.load(tmp_path / "r")
    assert run.meta["commit_seconds"] == 0.5 and "flush_seconds" not in run.meta and len(run) == 3
    with pytest.raises(nbkit.RecorderError, match="commit_seconds= only"):
        nbkit.record(model, optimizer, tmp_path / "s", flush_seconds=1.0, commit_seconds=1.0)


def test_an_unknown_recording_option_names_the_valid_ones(tmp_path, tiny_classifier):
    model, _, _ = tiny_classifier
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    with pytest.raises(nbkit.RecorderError, match=r"Unknown recording option\(s\) \['keyframes'\].*keyframe_every"):
        nbkit.record(model, optimizer, tmp_path / "r", keyframes=10)
    assert not (tmp_path / "r").exists()

"""Curvature and noise estimates during recording leave training bit-identical; run.curvature fills in
sharpness at keyframes; bad settings are refused clearly."""
from __future__ import annotations

import numpy as np
import pytest
import torch

import nbkit
from nbkit.analyze.curvature import sharpness


def make_model():
    torch.manual_seed(0)
    return torch.nn.Sequential(torch.nn.Linear(8, 16), torch.nn.BatchNorm1d(16), torch.nn.ReLU(),
                               torch.nn.Dropout(0.2), torch.nn.Linear(16, 3))


def data():
    generator = torch.Generator().manual_seed(0)
    x = torch.randn(256, 8, generator=generator)
    return x, (x[:, 0] > 0).long() + (x[:, 1] > 0).long()


def run_training(path, steps=24, **record):
    """Dropout draws from the global RNG and BatchNorm updates running statistics: both would show any
    change the extra passes made."""
    model = make_model()
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-2)
    criterion = torch.nn.CrossEntropyLoss()
    x, y = data()
    generator = torch.Generator().manual_seed(1)
    losses = []
    with nbkit.record(model, optimizer, path, criterion=criterion, keyframe_every=8, strict=True, **record):
        for _ in range(steps):
            rows = torch.randint(0, len(x), (32,), generator=generator)
            optimizer.zero_grad()
            loss = criterion(model(x[rows]), y[rows])
            loss.backward()
            optimizer.step()
            losses.append(loss.item())
    return model, optimizer, losses


@pytest.mark.slow
def test_a_run_recorded_with_curvature_and_noise_ends_bit_identical(tmp_path):
    plain_model, plain_optimizer, plain_losses = run_training(tmp_path / "plain")
    model, optimizer, losses = run_training(tmp_path / "analysed", curvature_every=4, noise_every=3)
    assert losses == plain_losses
    for a, b in zip(plain_model.state_dict().values(), model.state_dict().values()):
        assert torch.equal(a, b)                       # parameters and BatchNorm running statistics
    for a, b in zip(plain_optimizer.state.values(), optimizer.state.values()):
        assert all(torch.equal(a[k], b[k]) for k in a)
    plain, analysed = nbkit.load(tmp_path / "plain"), nbkit.load(tmp_path / "analysed")
    np.testing.assert_array_equal(plain.fingerprints, analysed.fingerprints)   # no extra forward recorded
    np.testing.assert_array_equal(plain.loss, analysed.loss)
    np.testing.assert_array_equal(plain.series("grad_norm"), analysed.series("grad_norm"))
    sharp = analysed.series("sharpness")[:, 0]
    assert np.isfinite(sharp[::4]).all() and np.isnan(np.delete(sharp, np.arange(0, 24, 4))).all()
    every_tensor = analysed.series("sharpness")[np.isfinite(sharp)]
    assert (every_tensor == every_tensor[:, :1]).all()          # one number per step, in every column
    noise = analysed.series("noise_scale")[:, 0]
    assert np.isfinite(noise[::3]).any() and np.isnan(noise[1::3]).all()
    assert analysed.meta["noise_method"] == "micro-batch"         # BatchNorm: no per-example gradients
    assert np.isnan(plain.series("sharpness")).all()


def test_recorded_sharpness_equals_a_direct_estimate_after_the_step(tmp_path):
    torch.manual_seed(3)
    model = torch.nn.Sequential(torch.nn.Linear(5, 8), torch.nn.Tanh(), torch.nn.Linear(8, 1))
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1, momentum=0.5)
    criterion = torch.nn.MSELoss()
    x, y = torch.randn(32, 5), torch.randn(32, 1)
    with nbkit.record(model, optimizer, tmp_path / "r", criterion=criterion, curvature_every=1, strict=True):
        for _ in range(3):
            optimizer.zero_grad()
            criterion(model(x), y).backward()
            optimizer.step()
    direct = sharpness(model, lambda m, b: criterion(m(b[0]), b[1]), (x, y), optimizer=optimizer)
    recorded = nbkit.load(tmp_path / "r").series("sharpness")[-1, 0]
    assert recorded == pytest.approx(direct, rel=1e-3)      # RECORDING_TOL is 1e-3


def test_step_fn_given_to_record_is_used_with_inputs_and_targets(tmp_path):
    torch.manual_seed(3)
    model = torch.nn.Linear(4, 1)
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    criterion = torch.nn.MSELoss()
    x, y = torch.randn(16, 4), torch.randn(16, 1)
    calls = []

    def step_fn(m, micro_batch):                   # one kept micro-batch: what the model and criterion got
        calls.append(sorted(micro_batch))
        (inputs,), (targets,) = micro_batch["args"], micro_batch["targets"]
        return criterion(m(inputs), targets)

    with nbkit.record(model, optimizer, tmp_path / "s", criterion=criterion, step_fn=step_fn, curvature_every=2,
                      noise_every=2, strict=True):
        for _ in range(4):
            optimizer.zero_grad()
            criterion(model(x), y).backward()
            optimizer.step()
    run = nbkit.load(tmp_path / "s")
    design = np.hstack([x.numpy(), np.ones((16, 1))]).astype(np.float64)
    # MSE Hessian of a linear model: 2·[X 1]ᵀ[X 1]/N (numpy.linalg.eigvalsh)
    expected = np.linalg.eigvalsh(2 * design.T @ design / 16)[-1]
    assert run.series("sharpness")[0, 0] == pytest.approx(expected, rel=1e-3)
    assert calls and all(keys == ["args", "kwargs", "targets"] for keys in calls)
    assert run.meta["trained_loss"]["checks"][0]["verdict"] == "bit-exact"
    assert run.meta["noise_method"] == "per-example"


def test_curvature_fills_keyframes_after_the_fact(tmp_path):
    model, _, _ = run_training(tmp_path / "k", steps=20)
    run = nbkit.load(tmp_path / "k")
    x, y = data()
    criterion = torch.nn.CrossEntropyLoss()
    batch = (x[:64], y[:64])
    before = [p.detach().clone() for p in model.parameters()]
    values = run.curvature(model, lambda m, b: criterion(m(b[0]), b[1]), batch)
    assert sorted(values) == [8, 16]                 # keyframes 0 (no second moment yet) and 20 (no row) skipped
    assert all(torch.equal(a, p) for a, p in zip(before, model.parameters()))   # the user's model is untouched
    sharp = run.series("sharpness")[:, 0]
    assert sharp[8] == pytest.approx(values[8], rel=1e-6) and sharp[16] == pytest.approx(values[16], rel=1e-6)
    assert np.isnan(np.delete(sharp, [8, 16])).all()
    _, overview = run.overview("sharpness")
    assert overview[0, 0, 0] == pytest.approx(min(values.values()), rel=1e-6)
    assert overview[0, 0, 1] == pytest.approx(max(values.values()), rel=1e-6)
    # the estimate at keyframe 8 is the preconditioned sharpness of the state stored there
    work = make_model()
    model_state, optimizer_state = run.state_at(8)
    work.load_state_dict(model_state)
    optimizer = torch.optim.Adam(work.parameters(), lr=1e-2)
    optimizer.load_state_dict(optimizer_state)
    direct = sharpness(work, lambda m, b: criterion(m(b[0]), b[1]), batch, optimizer=optimizer)
    assert values[8] == pytest.approx(direct, rel=1e-4)


def test_curvature_without_a_rebuildable_loss_warns_and_stores_nan(tmp_path):
    """A loss function (not a criterion module) and no step_fn: the recorder cannot rebuild the trained
    loss, says so once and leaves the estimates NaN; training and the rest of the recording go on."""
    torch.manual_seed(0)
    model = torch.nn.Linear(2, 1)
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    x, y = torch.randn(8, 2), torch.randn(8, 1)
    with pytest.warns(nbkit.RecorderWarning, match="cannot be rebuilt.*step_fn="):
        with nbkit.record(model, optimizer, tmp_path / "x", curvature_every=2) as rec:
            for _ in range(4):
                optimizer.zero_grad()
                loss = torch.nn.functional.mse_loss(model(x), y)
                loss.backward()
                rec.loss(loss)
                optimizer.step()
    run = nbkit.load(tmp_path / "x")
    assert len(run) == 4 and np.isnan(run.series("sharpness")).all() and np.isfinite(run.loss).all()
    assert run.meta["trained_loss"]["rebuildable"] is False
    with pytest.raises(nbkit.RecorderError, match="curvature_every"):
        nbkit.record(model, torch.optim.SGD(model.parameters(), lr=0.1), tmp_path / "y", curvature_every=-1)


def test_annotating_an_open_recording_is_refused(tmp_path):
    from nbkit.errors import RecordingError
    from nbkit.store.annotate import write_series

    model = torch.nn.Linear(2, 1)
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    rec = nbkit.record(model, optimizer, tmp_path / "open")
    model(torch.randn(4, 2)).sum().backward()
    optimizer.step()
    rec.flush()
    with pytest.raises(RecordingError, match="still open"):
        write_series(tmp_path / "open", "sharpness", [0], [1.0])
    rec.close()
    with pytest.raises(RecordingError, match="Unknown series"):
        write_series(tmp_path / "open", "sharpnes", [0], [1.0])
    with pytest.raises(RecordingError, match="outside"):
        write_series(tmp_path / "open", "sharpness", [5], [1.0])
    write_series(tmp_path / "open", "sharpness", [0], [2.5])
    assert nbkit.load(tmp_path / "open").series("sharpness")[0].tolist() == [2.5, 2.5]

"""Per-unit profiles (nbkit.measure.profiles) against plain NumPy computations from the full Δθ and g.

Reference data: sklearn.datasets.load_digits (8×8 images, 64 input features). The ε check follows
Adam's update rule (Kingma & Ba 2015, Algorithm 1): where √v̂ ≪ ε the step is lr·m̂/ε, so columns whose
inputs (and so gradients) are scaled by 1e-6 get a far larger gain than the others and an ε-share near 1.
"""
from __future__ import annotations

import warnings

import numpy as np
import pytest
import torch
from sklearn.datasets import load_digits

import nbkit
from nbkit.errors import RecorderError, RecordingError
from nbkit.measure import profiles

CODE_TOLERANCE = 2 ** (1 / profiles.LOG2_SCALE) - 1 + 1e-9     # half a code step either way, and rounding


def digits(n=256, scale_columns=None, busiest=None):
    """The first n digits as (x in [0, 1], labels); busiest=k keeps the k pixels that are most often
    non-zero (no border pixel that is almost always 0)."""
    data = load_digits()
    x = torch.tensor(data.data[:n] / 16.0, dtype=torch.float32)
    if busiest is not None:
        x = x[:, torch.argsort((x > 0).sum(0), descending=True, stable=True)[:busiest]]
    if scale_columns is not None:
        x[:, scale_columns] *= 1e-6
    return x, torch.tensor(data.target[:n])


class Watch:
    """θ before and after each step, and the gradient, as float64 NumPy copies (the reference's inputs)."""

    def __init__(self, optimizer):
        self.params = [p for g in optimizer.param_groups for p in g["params"]]
        self.steps = []
        self.optimizer = optimizer
        optimizer.register_step_pre_hook(self.pre)
        optimizer.register_step_post_hook(self.post)

    def pre(self, optimizer, args, kwargs):
        self.before = [p.detach().double().numpy().copy() for p in self.params]

    def post(self, optimizer, args, kwargs):
        self.steps.append([{"update": p.detach().double().numpy() - b, "grad": p.grad.double().numpy().copy(),
                            "state": {k: v.double().numpy().copy() for k, v in optimizer.state[p].items()
                                      if torch.is_tensor(v) and v.shape == p.shape},
                            "step": float(optimizer.state[p].get("step", np.nan))}
                           for p, b in zip(self.params, self.before)])


def train(model, optimizer, x, y, path, steps=6, **options):
    watch = Watch(optimizer)           # registered first: its post-hook sees what the recorder sees
    criterion = torch.nn.CrossEntropyLoss()
    rec = nbkit.record(model, optimizer, path, every=1, criterion=criterion, **options)
    for k in range(steps):
        batch = slice(32 * k, 32 * (k + 1))
        optimizer.zero_grad()
        criterion(model(x[batch]), y[batch]).backward()
        optimizer.step()
    rec.close()
    return nbkit.load(path), watch


def rms(values, axis):
    """RMS over every axis but `axis` (NumPy)."""
    others = tuple(d for d in range(values.ndim) if d != axis)
    return np.sqrt(np.mean(values ** 2, axis=others))


def assert_close_coded(actual, expected):
    np.testing.assert_allclose(actual, expected, rtol=CODE_TOLERANCE, atol=0)


@pytest.mark.parametrize("make_optimizer", [
    lambda ps: torch.optim.Adam(ps, lr=1e-2),
    lambda ps: torch.optim.SGD(ps, lr=0.1, momentum=0.9),
], ids=["adam", "sgd-momentum"])
def test_profiles_equal_numpy_from_the_full_update_and_gradient(tmp_path, make_optimizer):
    torch.manual_seed(0)
    model = torch.nn.Sequential(torch.nn.Linear(64, 32), torch.nn.Tanh(), torch.nn.Linear(32, 10))
    optimizer = make_optimizer(model.parameters())
    run, watch = train(model, optimizer, *digits(), tmp_path / "run")
    assert run.profile_tensors == ["0.weight", "2.weight"]
    lr = optimizer.param_groups[0]["lr"]
    for name, position in (("0.weight", 0), ("2.weight", 2)):
        for axis, dim in (("rows", 0), ("columns", 1)):
            update = run.profile(name, "update_rms", axis)
            plain = run.profile(name, "plain_rms", axis)
            gain = run.profile(name, "gain", axis)
            for step, seen in enumerate(watch.steps):
                expected_update = rms(seen[position]["update"], dim)
                expected_plain = lr * rms(seen[position]["grad"], dim)
                assert_close_coded(update[step], expected_update)
                assert_close_coded(plain[step], expected_plain)
                defined = expected_plain > 0
                np.testing.assert_allclose(gain[step][defined], expected_update[defined] / expected_plain[defined],
                                           rtol=2.5 * CODE_TOLERANCE)
    assert run.profile("0.weight", "update_rms", "columns").shape == (6, 64)
    # digits' border pixels are often 0 in a whole batch: those columns' gradients are exactly zero,
    # counted exactly, and their gain is undefined
    x = digits()[0]
    grad = run.profile("0.weight", "grad_rms", "columns")
    gain = run.profile("0.weight", "gain", "columns")
    for step in range(6):
        zero = (x[32 * step:32 * (step + 1)].abs().sum(0) == 0).numpy()
        assert zero.sum() >= 3
        assert (grad[step, zero] == 0).all() and (grad[step, ~zero] > 0).all()
        assert np.isnan(gain[step, zero]).all() and np.isfinite(gain[step, ~zero]).all()


def test_eps_share_per_unit_equals_adam_bias_corrected_second_moment(tmp_path):
    torch.manual_seed(1)
    model = torch.nn.Sequential(torch.nn.Linear(64, 10))
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-2, eps=1e-3)     # a large ε: shares in (0, 1)
    run, watch = train(model, optimizer, *digits(), tmp_path / "run")
    beta2, eps = optimizer.param_groups[0]["betas"][1], 1e-3
    share = run.profile("0.weight", "eps_share", "columns")
    for step, seen in enumerate(watch.steps):
        v_hat = seen[0]["state"]["exp_avg_sq"] / (1 - beta2 ** seen[0]["step"])
        expected = np.mean(eps > np.sqrt(v_hat), axis=0)       # Kingma & Ba 2015, Algorithm 1: √v̂ against ε
        measured = share[step]
        assert_close_coded(measured[expected > 0], expected[expected > 0])
        assert (measured[expected == 0] == 0).all()
    assert 0 < np.nanmean(share) < 1


def test_sgd_has_no_eps_share(tmp_path):
    model = torch.nn.Sequential(torch.nn.Linear(64, 10))
    run, _ = train(model, torch.optim.SGD(model.parameters(), lr=0.1), *digits(), tmp_path / "run", steps=2)
    assert np.isnan(run.profile("0.weight", "eps_share", "rows")).all()


def test_scaled_input_columns_have_the_largest_adam_gain_and_an_eps_share_near_one(tmp_path):
    scaled = [20, 21, 22]
    torch.manual_seed(2)
    model = torch.nn.Sequential(torch.nn.Linear(32, 10))
    # ε = 1e-6: the scaled columns' gradients (about 1e-8) are far below it, the others' (about 1e-2)
    # far above; with the default 1e-8 the scaled ones sit right at ε
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-3, eps=1e-6)
    x, y = digits(scale_columns=scaled, busiest=32)
    run, _ = train(model, optimizer, x, y, tmp_path / "run", steps=8)
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)          # columns that are always 0: all NaN
        gain = np.nanmedian(run.profile("0.weight", "gain", "columns")[2:], axis=0)      # (64,)
    eps_share = np.nanmedian(run.profile("0.weight", "eps_share", "columns")[2:], axis=0)
    others = [c for c in range(32) if c not in scaled]
    assert gain[scaled].min() > 100 * np.max(gain[others])        # lr·m̂/ε against lr·m̂/√v̂
    assert (eps_share[scaled] > 0.99).all()
    assert (eps_share[others] < 0.5).all()


def test_conv_columns_are_input_channels_with_the_kernel_inside(tmp_path):
    torch.manual_seed(3)
    model = torch.nn.Sequential(torch.nn.Conv2d(1, 4, 3), torch.nn.Flatten(), torch.nn.Linear(4 * 6 * 6, 10))
    optimizer = torch.optim.SGD(model.parameters(), lr=0.05)
    x, y = digits()
    watch = Watch(optimizer)
    criterion = torch.nn.CrossEntropyLoss()
    rec = nbkit.record(model, optimizer, tmp_path / "run", every=1, criterion=criterion)
    optimizer.zero_grad()
    criterion(model(x[:32].view(-1, 1, 8, 8)), y[:32]).backward()
    optimizer.step()
    rec.close()
    run = nbkit.load(tmp_path / "run")
    grad = watch.steps[0][0]["grad"]                                     # (4, 1, 3, 3)
    assert run.profile("0.weight", "grad_rms", "rows").shape == (1, 4)
    assert_close_coded(run.profile("0.weight", "grad_rms", "columns")[0], rms(grad, 1))
    assert_close_coded(run.profile("0.weight", "grad_rms", "rows")[0], rms(grad, 0))


def test_unit_axes_follow_the_module_type():
    assert profiles.unit_axes(torch.nn.Linear(3, 5), (5, 3)).rows == 0
    transposed = profiles.unit_axes(torch.nn.ConvTranspose2d(3, 5, 2), (3, 5, 2, 2))
    assert (transposed.rows, transposed.columns) == (1, 0)
    embedding = profiles.unit_axes(torch.nn.Embedding(7, 4), (7, 4))
    assert (embedding.rows, embedding.columns) == (0, None)
    assert profiles.unit_axes(torch.nn.LayerNorm(4), (4,)) is None
    assert "not a known layer type" in profiles.unit_axes(torch.nn.Module(), (4, 4)).how
    pytorch_utils = pytest.importorskip("transformers.pytorch_utils")
    gpt2_conv = pytorch_utils.Conv1D(nf=6, nx=4)                          # weight [in=4, out=6]
    axes = profiles.unit_axes(gpt2_conv, tuple(gpt2_conv.weight.shape))
    assert gpt2_conv.weight.shape == (4, 6) and (axes.rows, axes.columns) == (1, 0)


def test_embedding_rows_without_a_gradient_are_exact_zeros(tmp_path):
    model = torch.nn.Sequential(torch.nn.Embedding(20, 4), torch.nn.Flatten(), torch.nn.Linear(12, 2))
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-2)
    criterion = torch.nn.CrossEntropyLoss()
    rec = nbkit.record(model, optimizer, tmp_path / "run", every=1, criterion=criterion)
    tokens = torch.tensor([[1, 2, 3], [3, 4, 5]])
    optimizer.zero_grad()
    criterion(model(tokens), torch.tensor([0, 1])).backward()
    optimizer.step()
    rec.close()
    run = nbkit.load(tmp_path / "run")
    grad = run.profile("0.weight", "grad_rms", "rows")[0]
    assert set(np.flatnonzero(grad > 0)) == {1, 2, 3, 4, 5}
    assert (np.delete(grad, [1, 2, 3, 4, 5]) == 0).all()
    with pytest.raises(RecordingError, match="no columns"):
        run.profile("0.weight", "gain", "columns")


def test_codes_keep_zero_nan_infinity_and_the_float32_range_apart():
    values = np.array([0.0, np.nan, np.inf, 1.4e-45, 3.0e38, 1e-20, 1.0, 12345.678])
    decoded = profiles.decode(profiles.encode(values))
    assert decoded[0] == 0 and np.isnan(decoded[1]) and decoded[2] == np.inf
    np.testing.assert_allclose(decoded[3:], values[3:], rtol=CODE_TOLERANCE)
    codes = profiles.encode(values)
    assert codes[1] == profiles.NAN and profiles.measured(codes).all()
    assert not profiles.measured(np.array([profiles.MISSING]))[0]


def test_light_steps_have_no_profile(tmp_path):
    model = torch.nn.Sequential(torch.nn.Linear(64, 10))
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    x, y = digits()
    criterion = torch.nn.CrossEntropyLoss()
    rec = nbkit.record(model, optimizer, tmp_path / "run", every=3, criterion=criterion)
    for k in range(6):
        optimizer.zero_grad()
        criterion(model(x[32 * k:32 * (k + 1)]), y[32 * k:32 * (k + 1)]).backward()
        optimizer.step()
    rec.close()
    run = nbkit.load(tmp_path / "run")
    measured = np.isfinite(run.profile("0.weight", "update_rms", "rows")).all(axis=1)
    assert list(measured) == list(run.heavy) == [True, False, False, True, False, False]


def test_profiles_off(tmp_path):
    model = torch.nn.Sequential(torch.nn.Linear(64, 10))
    run, _ = train(model, torch.optim.SGD(model.parameters(), lr=0.1), *digits(), tmp_path / "run", steps=1,
                   profiles=False)
    assert run.profile_tensors == []
    with pytest.raises(RecordingError, match="profiles=False"):
        run.profile("0.weight")


def test_unit_names_label_units_and_bad_names_are_errors_at_record(tmp_path):
    model = torch.nn.Sequential(torch.nn.Linear(3, 2))
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    names = {"0.weight": {"columns": ["red", "green", "blue"]}}
    rec = nbkit.record(model, optimizer, tmp_path / "named", unit_names=names)
    rec.close()
    run = nbkit.load(tmp_path / "named")
    assert run.unit_names("0.weight", "columns") == ["red", "green", "blue"]
    assert run.unit_names("0.weight", "rows") == ["0", "1"]
    with pytest.raises(RecorderError, match=r"'0\.weight'.*2 names.*3 columns"):
        nbkit.record(model, optimizer, tmp_path / "short", unit_names={"0.weight": {"columns": ["a", "b"]}})
    with pytest.raises(RecorderError, match="'encoder.weight', which is not recorded"):
        nbkit.record(model, optimizer, tmp_path / "unknown", unit_names={"encoder.weight": {"rows": ["a"]}})
    with pytest.raises(RecorderError, match="1-D"):
        nbkit.record(model, optimizer, tmp_path / "bias", unit_names={"0.bias": {"rows": ["a", "b"]}})
    assert not (tmp_path / "short").exists() and not (tmp_path / "unknown").exists()
    with pytest.raises(RecordingError, match="1-D: no units"):
        run.profile("0.bias")

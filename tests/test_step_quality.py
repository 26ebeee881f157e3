"""Step quality (nbkit.step_quality): first- and second-order predicted loss change and the actual change of each
step on its own batch, and the trust-region ratio ρ = actual / predicted (Nocedal & Wright, Numerical
Optimization, 2nd ed., ch. 4). Oracles: analytic quadratics, numpy.linalg.eigh, scipy.optimize's Rosenbrock
function with its gradient and Hessian, and a re-computation of the batch loss from the training loop itself."""
import copy

import numpy as np
import pytest
import torch
from scipy.optimize import rosen, rosen_der, rosen_hess

import nbkit
from nbkit.analyze.step_quality import RHO_HIGH, RHO_LOW, select_window, step_terms, trust_region_ratio
from nbkit.replay.step_quality import NOT_KEPT


def test_second_order_model_of_a_quadratic_is_exact_for_any_step():
    # f(x) = ½xᵀAx: f(x + Δ) − f(x) = (Ax)ᵀΔ + ½ΔᵀAΔ exactly, so ρ₂ = 1 to rounding (analytic)
    rng = np.random.default_rng(0)
    M = rng.standard_normal((6, 6))
    A = torch.tensor(M @ M.T + np.diag(rng.uniform(0.1, 3, 6)))
    for scale in (1e-3, 1.0, 30.0):
        x = torch.tensor(rng.standard_normal(6), requires_grad=True)
        delta = torch.tensor(scale * rng.standard_normal(6))

        def f(v):
            return 0.5 * v @ A @ v

        first, second = step_terms(f(x), [x], [delta])
        actual = float(f(x.detach() + delta) - f(x.detach()))
        np.testing.assert_allclose(first[0], float((A @ x.detach()) @ delta), rtol=1e-12)
        np.testing.assert_allclose(second[0], float(0.5 * delta @ A @ delta), rtol=1e-12)
        rho = trust_region_ratio(actual, first[0] + second[0])
        assert abs(rho - 1) < 1e-9, (scale, rho)


@pytest.mark.parametrize("point", [[-1.2, 1.0, 0.5], [0.3, -0.7, 2.0, 1.1], [1.5, 2.2, 4.9, 0.0, -0.4]])
def test_rosenbrock_predictions_match_scipy(point):
    x0 = np.array(point)
    delta = 1e-2 * np.random.default_rng(len(point)).standard_normal(len(point))
    x = torch.tensor(x0, requires_grad=True)
    loss = (100.0 * (x[1:] - x[:-1] ** 2) ** 2 + (1 - x[:-1]) ** 2).sum()
    np.testing.assert_allclose(float(loss.detach()), rosen(x0), rtol=1e-12)
    first, second = step_terms(loss, [x], [torch.tensor(delta)])
    np.testing.assert_allclose(first[0], rosen_der(x0) @ delta, rtol=1e-10)
    np.testing.assert_allclose(second[0], 0.5 * delta @ rosen_hess(x0) @ delta, rtol=1e-10)


def _least_squares_run(path, c, steps=5, dtype=torch.float64, lr=None):
    """Full-batch gradient descent on mean squared error from w* + 0.5·v (v: the top eigenvector of the
    Hessian H = 2/n XᵀX), lr = c × 2/λmax; returns (recording, model factory, λmax, lr)."""
    rng = np.random.default_rng(1)
    X = rng.standard_normal((64, 5)) * np.array([3.0, 1.0, 1.0, 0.5, 0.2])
    w_star = rng.standard_normal(5)
    y = X @ w_star
    eigenvalues, vectors = np.linalg.eigh(2 / len(X) * X.T @ X)
    lam = eigenvalues[-1]
    lr = c * 2 / lam if lr is None else lr

    def make():
        model = torch.nn.Linear(5, 1, bias=False).to(dtype)
        with torch.no_grad():
            model.weight.copy_(torch.tensor(w_star + 0.5 * vectors[:, -1]).reshape(1, 5))
        return model

    model = make()
    optimizer = torch.optim.SGD(model.parameters(), lr=lr)
    inputs, targets = torch.tensor(X, dtype=dtype), torch.tensor(y, dtype=dtype).reshape(-1, 1)
    criterion = torch.nn.MSELoss()
    with nbkit.record(model, optimizer, path, criterion=criterion, every=1, keyframe_every=100):
        for _ in range(steps):
            optimizer.zero_grad()
            criterion(model(inputs), targets).backward()
            optimizer.step()
    return nbkit.load(path), make, lam, lr


@pytest.mark.parametrize("c", [0.25, 0.75, 1.0, 1.25])     # (0.5 would land on the minimum in one step)
def test_gradient_descent_on_least_squares_has_rho_one_minus_lr_lambda_over_two(tmp_path, c):
    # along the top eigenvector, f(x + Δ) − f(x) = gᵀΔ (1 − lr·λ/2) with Δ = −lr·g (analytic; λ from eigh)
    run, make, lam, lr = _least_squares_run(tmp_path / "r", c)
    quality = nbkit.step_quality(run, make(), start=0, steps=5)
    np.testing.assert_allclose(quality.rho_first, 1 - lr * lam / 2, atol=1e-7)
    if c != 1.0:                   # (at lr = 2/λmax the quadratic model predicts 0 change: ρ₂ is 0 / 0)
        np.testing.assert_allclose(quality.rho_second, 1.0, atol=1e-7)     # least squares is a quadratic
    assert (quality.predicted_first < 0).all()
    # the recorded per-tensor series holds the same first-order prediction, from the training step itself
    np.testing.assert_allclose(run.series("predicted_change")[:, 0], quality.predicted_first, rtol=1e-6)  # float32
    stored = nbkit.load(tmp_path / "r")
    assert stored.meta["step_quality"]["computed"] == [[0, 4]]
    np.testing.assert_array_equal(stored.step_quality().rho_first, quality.rho_first)
    kinds = {f.kind for f in stored.findings()}
    assert ("step-overran" in kinds) == (c >= 1), kinds              # ρ ≤ 0 from lr = 2/λmax on


def test_step_overran_fires_on_a_sustained_poor_model_and_names_the_tensor(tmp_path):
    run, make, lam, lr = _least_squares_run(tmp_path / "r", 0.95, steps=8)
    nbkit.step_quality(run, make(), start=0, steps=4)           # two windows, merged in the sidecar
    quality = nbkit.step_quality(run, make(), start=4, steps=4)
    run = nbkit.load(tmp_path / "r")
    assert run.meta["step_quality"]["computed"] == [[0, 7]]
    assert len(quality.step) == 4 and len(run.step_quality().step) == 8
    rho = run.step_quality().rho_first
    assert ((rho > 0) & (rho < 0.1)).all()                       # 1 − 0.95: poor, never negative
    found = [f for f in run.findings() if f.kind == "step-overran"]
    assert len(found) == 1 and found[0].tensors == ["weight"]
    assert (found[0].first_step, found[0].last_step) == (0, 7)
    assert found[0].evidence["named_by"].startswith("second-order")
    assert "replay" in found[0].suggestion
    assert not [f for f in run.findings(overran_rho=0.01) if f.kind == "step-overran"]
    view = select_window(run.step_quality(), 2, 5, at=3)
    assert list(view["step"]) == [2, 3, 4, 5] and view["thresholds"] == (RHO_LOW, RHO_HIGH)
    assert list(view["class_first"]) == ["poor"] * 4 and list(view["class_second"]) == ["good"] * 4
    np.testing.assert_allclose(view["shares"]["first_order"], [1.0])


def test_a_non_finite_loss_after_the_step_is_kept_as_evidence(tmp_path):
    run, make, _, _ = _least_squares_run(tmp_path / "r", None, steps=2, dtype=torch.float32, lr=1e25)
    quality = nbkit.step_quality(run, make(), start=0, steps=1)
    assert np.isfinite(quality.loss_before[0]) and not np.isfinite(quality.loss_after[0])
    assert quality.actual[0] == np.inf and quality.rho_first[0] == -np.inf
    found = [f for f in nbkit.load(tmp_path / "r").findings() if f.kind == "step-overran"]
    assert found and found[0].evidence["nonfinite_loss_after"] == 1


def test_steps_without_kept_batches_hold_nan_and_say_why(tmp_path):
    model = torch.nn.Linear(3, 1)
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    x, y = torch.randn(16, 3, generator=torch.Generator().manual_seed(0)), torch.randn(16, 1)
    criterion = torch.nn.MSELoss()
    with nbkit.record(model, optimizer, tmp_path / "r", criterion=criterion, keep_batches=False):
        for _ in range(4):
            optimizer.zero_grad()
            criterion(model(x), y).backward()
            optimizer.step()
    with pytest.warns(UserWarning, match="hold NaN"):
        quality = nbkit.step_quality(tmp_path / "r", torch.nn.Linear(3, 1), start=1, steps=3)
    assert np.isnan(quality.loss_before).all() and np.isnan(quality.rho_first).all()
    meta = nbkit.load(tmp_path / "r").meta["step_quality"]
    assert meta["computed"] == [] and meta["missing"] == [{"first": 1, "last": 3, "why": NOT_KEPT}]


def test_actual_change_on_digits_equals_the_loss_recomputed_from_the_training_loop(tmp_path):
    from sklearn.datasets import load_digits

    digits = load_digits()
    X = torch.tensor(digits.data / 16.0, dtype=torch.float32)
    y = torch.tensor(digits.target)
    torch.manual_seed(0)
    model = torch.nn.Sequential(torch.nn.Linear(64, 32), torch.nn.BatchNorm1d(32), torch.nn.ReLU(),
                                torch.nn.Dropout(0.2), torch.nn.Linear(32, 10))
    blueprint = copy.deepcopy(model)
    optimizer = torch.optim.Adam(model.parameters(), lr=3e-3)
    criterion = torch.nn.CrossEntropyLoss()
    order = torch.randperm(len(X), generator=torch.Generator().manual_seed(1))
    seen = {}
    with nbkit.record(model, optimizer, tmp_path / "d", criterion=criterion, keyframe_every=10):
        for step in range(30):
            rows = order[(step * 64) % 1728:(step * 64) % 1728 + 64]
            optimizer.zero_grad()
            rng = torch.get_rng_state()
            loss = criterion(model(X[rows]), y[rows])
            loss.backward()
            buffers = {k: v.clone() for k, v in model.state_dict().items() if "running" in k or "num_batches" in k}
            optimizer.step()
            resume = torch.get_rng_state()
            if 12 <= step < 18:                     # the loss of the same batch at the new parameters
                after = copy.deepcopy(blueprint)    # (buffers as before the step: they are not trained)
                after.load_state_dict({**model.state_dict(), **buffers})
                torch.set_rng_state(rng)
                with torch.no_grad():
                    seen[step] = (float(loss), float(criterion(after(X[rows]), y[rows])))
                torch.set_rng_state(resume)        # training goes on as if nothing had been recomputed
    run = nbkit.load(tmp_path / "d")
    quality = nbkit.step_quality(run, blueprint, start=12, steps=6)
    before = np.array([seen[s][0] for s in range(12, 18)])
    after = np.array([seen[s][1] for s in range(12, 18)])
    np.testing.assert_allclose(quality.loss_before, before, rtol=1e-6)
    np.testing.assert_allclose(quality.loss_after, after, rtol=1e-6)
    np.testing.assert_allclose(quality.actual, after - before, atol=1e-6)
    assert (np.abs(quality.rho_second - 1) < np.abs(quality.rho_first - 1) + 0.05).all()
    shares = quality.as_arrays()["first_order_share"]
    np.testing.assert_allclose(np.nansum(shares, axis=1), 1.0, rtol=1e-9)
    assert "step-overran" not in {f.kind for f in run.findings()}    # a healthy Adam run stays quiet

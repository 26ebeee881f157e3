"""Sharpness and stability limits against outside references: numpy.linalg.eigvalsh on analytic Hessians,
scipy.optimize.rosen_hess / rosen_hess_prod, simulations of torch.optim, and spectral radii (NumPy)."""
from __future__ import annotations

import numpy as np
import pytest
import torch
from scipy.optimize import rosen_hess, rosen_hess_prod

import nbkit
from nbkit.analyze.curvature import AnalysisError, hessian_vector_product, preconditioner, sharpness
from nbkit.analyze.stability import iteration_matrix, stability_limit


class Quadratic(torch.nn.Module):
    def __init__(self, theta):
        super().__init__()
        self.theta = torch.nn.Parameter(torch.as_tensor(theta, dtype=torch.float64).clone())

    def forward(self, A):
        return 0.5 * self.theta @ A @ self.theta


def quadratic_step(model, batch):
    return model(batch)


def random_symmetric(n, seed, spread=10.0):
    rng = np.random.default_rng(seed)
    q, _ = np.linalg.qr(rng.standard_normal((n, n)))
    values = np.linspace(-1.0, spread, n) * rng.uniform(0.5, 2.0)
    return (q * values) @ q.T


@pytest.mark.parametrize("n, seed", [(5, 0), (40, 1), (120, 2)])
def test_sharpness_of_quadratics_equals_eigvalsh(n, seed):
    A = random_symmetric(n, seed)
    model = Quadratic(np.random.default_rng(seed).standard_normal(n))
    expected = np.linalg.eigvalsh(A)[-1]                                # numpy.linalg.eigvalsh
    got = sharpness(model, quadratic_step, torch.tensor(A))
    assert abs(got - expected) / abs(expected) < 1e-4


def test_sharpness_of_linear_least_squares_equals_eigvalsh_of_xtx():
    # loss = mean (Xw + b − y)² / 2 over a float32 nn.Linear: Hessian = [X 1]ᵀ[X 1] / N (analytic)
    generator = torch.Generator().manual_seed(0)
    X = torch.randn(200, 30, generator=generator) * torch.linspace(0.1, 3.0, 30)
    y = torch.randn(200, generator=generator)
    torch.manual_seed(0)
    model = torch.nn.Linear(30, 1)

    def step_fn(m, batch):
        x, target = batch
        return 0.5 * ((m(x).squeeze(-1) - target) ** 2).mean()

    design = np.hstack([X.double().numpy(), np.ones((200, 1))])
    expected = np.linalg.eigvalsh(design.T @ design / 200)[-1]            # numpy.linalg.eigvalsh
    got = sharpness(model, step_fn, (X, y))
    assert abs(got - expected) / expected < 1e-4


class Rosenbrock(torch.nn.Module):
    def __init__(self, x):
        super().__init__()
        self.x = torch.nn.Parameter(torch.tensor(x, dtype=torch.float64))

    def forward(self, _=None):
        x = self.x
        return (100.0 * (x[1:] - x[:-1] ** 2) ** 2 + (1 - x[:-1]) ** 2).sum()


@pytest.mark.parametrize("point", [[1.0, 1.0], [-1.2, 1.0], [0.3, -0.7, 1.5, 2.0, 0.1], list(np.linspace(-1, 2, 12))])
def test_hessian_vector_products_equal_scipy_rosen_hess_prod(point):
    model = Rosenbrock(point)
    product = hessian_vector_product(model(), [model.x])
    rng = np.random.default_rng(len(point))
    for _ in range(3):
        v = rng.standard_normal(len(point))
        np.testing.assert_allclose(product(v), rosen_hess_prod(np.array(point), v), rtol=1e-10, atol=1e-9)
    expected = np.linalg.eigvalsh(rosen_hess(np.array(point)))[-1]      # scipy.optimize.rosen_hess
    got = sharpness(model, lambda m, _: m(), None)
    assert abs(got - expected) / abs(expected) < 1e-4


def test_rosenbrock_top_eigenvalue_at_the_minimum():
    # from SciPy: eigvalsh(rosen_hess([1, 1]))[-1] is about 1001.6006
    got = sharpness(Rosenbrock([1.0, 1.0]), lambda m, _: m(), None)
    assert got == pytest.approx(np.linalg.eigvalsh(rosen_hess(np.array([1.0, 1.0])))[-1], rel=1e-6)
    assert got == pytest.approx(1001.6006, abs=1e-3)


def test_preconditioned_sharpness_equals_eigvalsh_of_explicit_p_h_p():
    generator = torch.Generator().manual_seed(1)
    X = torch.randn(64, 12, generator=generator, dtype=torch.float64) * torch.linspace(0.2, 2.0, 12,
                                                                                          dtype=torch.float64)
    y = torch.randn(64, generator=generator, dtype=torch.float64)
    torch.manual_seed(1)
    model = torch.nn.Linear(12, 1, bias=False).double()

    def step_fn(m, batch):
        x, target = batch
        return 0.5 * ((m(x).squeeze(-1) - target) ** 2).mean()

    optimizer = torch.optim.Adam(model.parameters(), lr=1e-2, betas=(0.9, 0.99), eps=1e-8, weight_decay=0.05)
    for _ in range(7):
        optimizer.zero_grad()
        step_fn(model, (X, y)).backward()
        optimizer.step()
    state = optimizer.state[model.weight]
    t = float(state["step"])
    # Cohen et al. 2022: P = (1 − β1^t)·(√(v/(1 − β2^t)) + ε); coupled L2 decay adds wd·I to H
    P = (1 - 0.9 ** t) * (np.sqrt(state["exp_avg_sq"].numpy().reshape(-1) / (1 - 0.99 ** t)) + 1e-8)
    H = X.numpy().T @ X.numpy() / 64 + 0.05 * np.eye(12)
    explicit = np.diag(P ** -0.5) @ H @ np.diag(P ** -0.5)
    expected = np.linalg.eigvalsh(explicit)[-1]                          # numpy.linalg.eigvalsh
    got = sharpness(model, step_fn, (X, y), optimizer=optimizer)
    assert abs(got - expected) / expected < 1e-4
    np.testing.assert_allclose(preconditioner("Adam", state, optimizer.param_groups[0]).numpy().reshape(-1), P)


def test_sharpness_leaves_rng_buffers_and_grads_untouched():
    torch.manual_seed(0)
    model = torch.nn.Sequential(torch.nn.Linear(4, 8), torch.nn.BatchNorm1d(8), torch.nn.Dropout(0.3),
                                torch.nn.Linear(8, 1))
    x = torch.randn(16, 4)
    model(x).sum().backward()
    grads = [p.grad.clone() for p in model.parameters()]
    buffers = [b.clone() for b in model.buffers()]
    rng = torch.get_rng_state()
    value = sharpness(model, lambda m, b: m(b).pow(2).mean(), x, tol=1e-4)
    assert np.isfinite(value)
    assert torch.equal(torch.get_rng_state(), rng)
    assert all(torch.equal(a, b) for a, b in zip(buffers, model.buffers()))
    assert all(torch.equal(a, p.grad) for a, p in zip(grads, model.parameters()))


def test_bad_input_gets_clear_errors():
    model = torch.nn.Linear(2, 1)
    with pytest.raises(AnalysisError, match="scalar loss"):
        sharpness(model, lambda m, b: m(b), torch.randn(3, 2))
    with pytest.raises(AnalysisError, match="does not depend"):
        sharpness(model, lambda m, b: torch.tensor(1.0), None)
    with pytest.raises(AnalysisError, match="Invalid tol"):
        sharpness(model, lambda m, b: m(b).sum(), torch.randn(3, 2), tol=0)
    with pytest.raises(AnalysisError, match="second moment"):
        sharpness(model, lambda m, b: m(b).sum(), torch.randn(3, 2), optimizer=torch.optim.Adam(model.parameters()))
    assert nbkit.sharpness is sharpness


# --- stability limits: simulation and spectral radius ------------------------------------------------
def spectral_radius(matrix):
    return max(abs(np.linalg.eigvals(matrix)))


def simulate(factory, curvature, steps=400):
    """Run a torch.optim optimizer on f(θ) = λθ²/2 from θ = 1; True when it diverged."""
    theta = torch.nn.Parameter(torch.tensor([1.0], dtype=torch.float64))
    optimizer = factory([theta])
    for _ in range(steps):
        optimizer.zero_grad()
        (0.5 * curvature * theta ** 2).sum().backward()
        optimizer.step()
    return not bool(abs(theta.item()) < 1.0)


@pytest.mark.parametrize("name, group, rule, factory", [
    ("SGD", {"lr": 0.1}, ("gd", {}), lambda lr: lambda p: torch.optim.SGD(p, lr=lr)),
    ("SGD", {"lr": 0.1, "momentum": 0.9}, ("heavy-ball", {"beta": 0.9}),
     lambda lr: lambda p: torch.optim.SGD(p, lr=lr, momentum=0.9)),
    ("SGD", {"lr": 0.1, "momentum": 0.8, "dampening": 0.5}, ("heavy-ball", {"beta": 0.8, "dampening": 0.5}),
     lambda lr: lambda p: torch.optim.SGD(p, lr=lr, momentum=0.8, dampening=0.5)),
    ("SGD", {"lr": 0.1, "momentum": 0.9, "nesterov": True}, ("nesterov", {"beta": 0.9}),
     lambda lr: lambda p: torch.optim.SGD(p, lr=lr, momentum=0.9, nesterov=True)),
])
def test_limits_match_simulation_and_spectral_radius(name, group, rule, factory):
    # Polyak 1964 (heavy ball), Cohen et al. 2021 (GD, Nesterov): divergence iff λ > limit
    lr = group["lr"]
    limit = stability_limit(name, group).limit
    for ratio in (0.9, 0.99, 1.01, 1.1):
        lam = ratio * limit
        radius = spectral_radius(iteration_matrix(rule[0], lr, lam, **rule[1]))
        assert (radius > 1) == (ratio > 1), (ratio, radius)
        assert simulate(factory(lr), lam, steps=3000 if abs(ratio - 1) < 0.05 else 400) == (ratio > 1)


def test_adam_limit_is_38_over_lr_and_matches_the_frozen_preconditioner_recurrence():
    # Cohen et al. 2022: (2 + 2β1)/((1 − β1)·lr) = 38/lr at β1 = 0.9
    limit = stability_limit("Adam", {"lr": 1e-3, "betas": (0.9, 0.999)})
    assert limit.preconditioned and limit.limit == pytest.approx(38 / 1e-3)
    for ratio in (0.95, 1.05):
        lam = ratio * limit.limit
        assert (spectral_radius(iteration_matrix("adam", 1e-3, lam, beta=0.9)) > 1) == (ratio > 1)
        # direct simulation of m ← β1·m + (1−β1)·λθ; θ ← θ − lr·m (P folded into λ)
        theta, m = 1.0, 0.0
        for _ in range(3000):
            m = 0.9 * m + 0.1 * lam * theta
            theta -= 1e-3 * m
        assert (not abs(theta) < 1) == (ratio > 1)


def test_no_limit_for_unknown_optimizers():
    assert stability_limit("LBFGS", {"lr": 1.0}) is None
    assert stability_limit("SGD", {"lr": 0.0}) is None

"""Replays checked against outside references: NumPy's least-squares solution and the classical
stability limits of gradient descent and heavy-ball momentum on a quadratic."""
import functools

import numpy as np
import pytest
import torch

import nbkit


class LeastSquares(torch.nn.Module):
    """Residuals A x - b of a linear least-squares problem; the batch is (A, b). float32: the recorder
    does not take float64 parameters yet."""

    def __init__(self, features):
        super().__init__()
        self.x = torch.nn.Parameter(torch.zeros(features))

    def forward(self, design, observed):
        return design @ self.x - observed


def least_squares_loss(model, batch):
    return model(*batch).pow(2).mean()


class Quadratic(torch.nn.Module):
    """f(θ) = ½ θᵀ H θ; the batch is H."""

    def __init__(self):
        super().__init__()
        self.theta = torch.nn.Parameter(torch.tensor([1.0, 1.0]))

    def forward(self, hessian):
        return 0.5 * self.theta @ hessian @ self.theta


def quadratic_loss(model, hessian):
    return model(hessian)


def _record(path, model, optimizer, step_fn, batch, steps, closure=False):
    with nbkit.record(model, optimizer, path, keyframe_every=steps, probes=4):
        for _ in range(steps):
            if closure:
                def evaluate():
                    optimizer.zero_grad()
                    loss = step_fn(model, batch)
                    loss.backward()
                    return loss
                optimizer.step(evaluate)
            else:
                optimizer.zero_grad()
                step_fn(model, batch).backward()
                optimizer.step()
    return nbkit.load(path)


@pytest.fixture
def least_squares():
    generator = torch.Generator().manual_seed(1)
    design = torch.randn(40, 5, generator=generator)
    observed = torch.randn(40, generator=generator)
    return design, observed


def lbfgs(groups):
    return torch.optim.LBFGS(groups, lr=1.0, max_iter=50, tolerance_grad=1e-12, tolerance_change=1e-15,
                             line_search_fn="strong_wolfe")


@pytest.mark.slow
def test_full_batch_lbfgs_replay_reaches_the_numpy_least_squares_solution(tmp_path, least_squares):
    """Reference: numpy.linalg.lstsq. nbkit builds LBFGS's closure from step_fn."""
    design, observed = least_squares
    model = LeastSquares(5)
    run = _record(tmp_path / "sgd", model, torch.optim.SGD(model.parameters(), lr=0.01), least_squares_loss,
                  least_squares, steps=4)
    replayed = nbkit.replay(run, LeastSquares(5), least_squares_loss, lambda step: least_squares,
                            optimizers={"lbfgs": lbfgs}, start=0, steps=4, progress=False)["lbfgs"]
    solution = np.linalg.lstsq(design.double().numpy(), observed.double().numpy(), rcond=None)[0]
    final = replayed.keyframe(replayed.keyframes[-1])["model"]["x"].double().numpy()
    np.testing.assert_allclose(final, solution, rtol=0, atol=1e-5)       # float32 parameters
    sgd_final = run.keyframe(run.keyframes[-1])["model"]["x"].numpy()
    assert np.abs(sgd_final - solution).max() > 1e-2          # the recorded SGD run was far from it


def test_a_recorded_lbfgs_run_replays_bit_exact(tmp_path, least_squares):
    model = LeastSquares(5)
    optimizer = torch.optim.LBFGS(model.parameters(), lr=0.5, max_iter=5)
    run = _record(tmp_path / "lbfgs", model, optimizer, least_squares_loss, least_squares, steps=6, closure=True)
    replayed = nbkit.replay(run, LeastSquares(5), least_squares_loss, lambda step: least_squares, start=0,
                            progress=False)["recorded"]
    assert replayed.meta["replay"]["fidelity"]["identical"]
    np.testing.assert_array_equal(replayed.loss, run.loss)


# Quadratic with eigenvalues 10 and 1, rotated off the axes.
ROTATION = np.array([[np.cos(0.4), -np.sin(0.4)], [np.sin(0.4), np.cos(0.4)]])
HESSIAN = ROTATION @ np.diag([10.0, 1.0]) @ ROTATION.T
STEPS = 150


def spectral_radius(lr, beta=0.0):
    """Largest |eigenvalue| of the iteration matrix (NumPy): I - lr·H for gradient descent; for heavy
    ball, the 2×2 matrix [[1 + β - lr·λ, -β], [1, 0]] on (θ_t, θ_t-1) of each eigen-direction λ of H."""
    if beta == 0.0:
        return np.abs(np.linalg.eigvals(np.eye(2) - lr * HESSIAN)).max()
    return max(np.abs(np.linalg.eigvals(np.array([[1 + beta - lr * lam, -beta], [1.0, 0.0]]))).max()
               for lam in np.linalg.eigvalsh(HESSIAN))


@pytest.fixture(scope="module")
def quadratic_run(tmp_path_factory):
    torch.set_num_threads(1)
    model = Quadratic()
    return _record(tmp_path_factory.mktemp("quadratic") / "run", model, torch.optim.SGD(model.parameters(), lr=0.01),
                   quadratic_loss, torch.from_numpy(HESSIAN).float(), steps=STEPS)


@pytest.mark.slow
@pytest.mark.parametrize("beta, source", [
    (0.0, "gradient descent: diverges iff lr > 2/λmax (classical; restated by Cohen et al. 2021)"),
    (0.9, "heavy-ball momentum: diverges iff lr·λmax > 2(1+β) (Polyak 1964)"),
])
def test_replays_diverge_exactly_past_the_stability_limit(quadratic_run, beta, source):
    lam_max = np.linalg.eigvalsh(HESSIAN).max()
    limit = 2 * (1 + beta) / lam_max
    factors = (0.95, 0.99, 1.01, 1.05)
    optimizers = {f"lr x{f}": functools.partial(torch.optim.SGD, lr=f * limit, momentum=beta) for f in factors}
    hessian = torch.from_numpy(HESSIAN).float()
    runs = nbkit.replay(quadratic_run, Quadratic(), quadratic_loss, lambda step: hessian, optimizers=optimizers,
                        start=0, progress=False)
    for f in factors:
        loss = runs[f"lr x{f}"].loss
        diverged = loss[-1] > 10 * loss[0]
        converged = loss[-1] < 0.5 * loss[0]
        assert diverged == (f > 1) and converged == (f < 1), (source, f, loss[0], loss[-1])
        assert (spectral_radius(f * limit, beta) > 1) == (f > 1), (source, f)

"""The stability finding on full-batch gradient descent over least squares, swept over lr = 0.5 … 1.5 ×
2/λmax. Gradient descent on a quadratic diverges iff lr > 2/λmax (the classical condition, restated by
Cohen et al. 2021, "Gradient Descent on Neural Networks Typically Occurs at the Edge of Stability");
here that is checked twice, by simulation (the recorded loss) and by the spectral radius of the iteration
matrix I − lr·H computed with NumPy. ±3 % around 1.0 is left out: a finite run cannot tell there.
The finding must fire on exactly the runs that diverge."""
from __future__ import annotations

import numpy as np
import pytest
import torch

import nbkit

pytestmark = pytest.mark.slow

STEPS = 60
FACTORS = [0.5, 0.7, 0.9, 0.95, 1.05, 1.1, 1.3, 1.5]


def problem(seed=0, n=64, d=8):
    generator = torch.Generator().manual_seed(seed)
    x = torch.randn(n, d, generator=generator, dtype=torch.float64) * torch.linspace(0.5, 3.0, d, dtype=torch.float64)
    y = x @ torch.randn(d, 1, generator=generator, dtype=torch.float64) + 0.1 * torch.randn(n, 1, generator=generator,
                                                                                             dtype=torch.float64)
    hessian = 2 * (x.T @ x).numpy() / n          # of mean((x w − y)²)
    return x, y, hessian


def run_at(factor, tmp_path):
    x, y, hessian = problem()
    limit = 2 / np.linalg.eigvalsh(hessian)[-1]
    lr = factor * limit
    torch.manual_seed(1)
    model = torch.nn.Linear(x.shape[1], 1, bias=False).double()
    optimizer = torch.optim.SGD(model.parameters(), lr=lr)
    criterion = torch.nn.MSELoss()
    rec = nbkit.record(model, optimizer, tmp_path / f"gd-{factor}", every=1, curvature_every=5, criterion=criterion)
    for _ in range(STEPS):
        optimizer.zero_grad()
        criterion(model(x), y).backward()
        optimizer.step()
    rec.close()
    iteration = np.eye(len(hessian)) - lr * hessian
    radius = np.max(np.abs(np.linalg.eigvals(iteration)))
    return nbkit.load(tmp_path / f"gd-{factor}"), radius


@pytest.mark.parametrize("factor", FACTORS)
def test_the_stability_finding_fires_exactly_on_diverging_runs(tmp_path, factor):
    run, radius = run_at(factor, tmp_path)
    loss = run.loss
    diverged_by_simulation = loss[-1] > 10 * loss[0]
    assert diverged_by_simulation == (radius > 1) == (factor > 1), (factor, radius, loss[[0, -1]])
    fired = [f for f in run.findings() if f.kind == "over-stability-limit"]
    assert bool(fired) == diverged_by_simulation, (factor, [(f.first_step, f.evidence) for f in fired])
    if fired:
        evidence = fired[0].evidence
        assert evidence["sharpness"] > evidence["limit"]
        assert fired[0].first_step < STEPS // 2

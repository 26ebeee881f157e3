"""Recorded moments, bias corrections and updates against update rules implemented here in NumPy.

Sources, implemented independently of torch below:
- Adam: Kingma & Ba 2015, "Adam: A Method for Stochastic Optimization", Algorithm 1.
- SGD (momentum, dampening, Nesterov, weight decay) and RMSprop (centered, momentum): the
  "Algorithm" pseudo-code of the torch.optim.SGD and torch.optim.RMSprop documentation pages.
The test feeds each rule the gradients the training loop saw (captured by the test itself) and
compares with what the recording holds at the probe coordinates, to float32 tolerance.
"""
import numpy as np
import pytest
import torch

import nbkit

F32 = np.finfo(np.float32).eps


def _train(tmp_path, make_optimizer, steps=8):
    torch.manual_seed(0)
    model = torch.nn.Sequential(torch.nn.Linear(5, 7), torch.nn.Tanh(), torch.nn.Linear(7, 2))
    optimizer = make_optimizer(model.parameters())
    generator = torch.Generator().manual_seed(3)
    x, y = torch.randn(64, 5, generator=generator), torch.randn(64, 2, generator=generator)
    theta0 = {n: p.detach().double().numpy().copy() for n, p in model.named_parameters()}
    grads = []
    rec = nbkit.record(model, optimizer, tmp_path / "r", strict=True)
    for s in range(steps):
        optimizer.zero_grad()
        torch.nn.functional.mse_loss(model(x[8 * s:8 * s + 8]), y[8 * s:8 * s + 8]).backward()
        grads.append({n: p.grad.double().numpy().copy() for n, p in model.named_parameters()})
        optimizer.step()
    rec.close()
    return nbkit.load(tmp_path / "r"), theta0, grads


def _close(recorded, expected, theta=None, rtol=2e-5):
    """float32 tolerance: relative, plus float32 rounding at the scale of the whole vector (an entry
    that cancels to nearly 0 keeps the absolute error of its larger terms); an update may also
    differ by the rounding of θ in float32."""
    atol = 8 * F32 * np.max(np.abs(expected)) + 1e-12
    if theta is not None:
        atol = atol + 4 * F32 * np.abs(theta)
    assert np.all(np.abs(recorded - expected) <= atol + rtol * np.abs(expected)), np.max(np.abs(recorded - expected))


def _probe(run, tensor):
    p = run.probes(tensor)
    return p, p["index"][0]


@pytest.mark.parametrize("lr,betas,eps", [(0.01, (0.9, 0.999), 1e-8), (0.003, (0.8, 0.99), 1e-3)])
def test_adam_equals_kingma_ba_algorithm_1(tmp_path, lr, betas, eps):
    run, theta0, grads = _train(tmp_path, lambda p: torch.optim.Adam(p, lr=lr, betas=betas, eps=eps))
    beta1, beta2 = betas
    for tensor in run.tensors:
        probes, index = _probe(run, tensor)
        theta = theta0[tensor].reshape(-1)
        m = np.zeros_like(theta)
        v = np.zeros_like(theta)
        for t, g_full in enumerate(grads, start=1):
            # Kingma & Ba 2015, Algorithm 1, line by line
            g = g_full[tensor].reshape(-1)
            m = beta1 * m + (1 - beta1) * g                 # biased first moment estimate
            v = beta2 * v + (1 - beta2) * g * g             # biased second raw moment estimate
            m_hat = m / (1 - beta1 ** t)                    # bias-corrected first moment
            v_hat = v / (1 - beta2 ** t)                    # bias-corrected second raw moment
            step = -lr * m_hat / (np.sqrt(v_hat) + eps)
            s = t - 1
            _close(probes["grad"][s], g[index])
            _close(probes["first_moment"][s], m[index])
            _close(probes["second_moment"][s], v[index])
            _close(probes["update"][s], step[index], theta=theta[index])
            # the factors carry the bias corrections: momentum factor·g = m̂, scale factor = 1/(√v̂+ε)
            defined = g[index] != 0
            _close(probes["momentum_factor"][s][defined] * g[index][defined], m_hat[index][defined], rtol=1e-4)
            _close(probes["scale_factor"][s], 1 / (np.sqrt(v_hat[index]) + eps), rtol=1e-4)
            assert np.all(probes["residual"][s] == 1.0)
            theta = theta + step                            # follow the trajectory in float64


@pytest.mark.parametrize("momentum,dampening,nesterov,weight_decay", [
    (0.9, 0.0, False, 0.0), (0.9, 0.5, False, 0.0), (0.8, 0.0, True, 0.0), (0.9, 0.1, False, 0.05),
    (0.7, 0.0, True, 0.02)])
def test_sgd_equals_torch_optim_sgd_documentation(tmp_path, momentum, dampening, nesterov, weight_decay):
    lr = 0.05
    run, theta0, grads = _train(tmp_path, lambda p: torch.optim.SGD(
        p, lr=lr, momentum=momentum, dampening=dampening, nesterov=nesterov, weight_decay=weight_decay))
    for tensor in run.tensors:
        probes, index = _probe(run, tensor)
        theta = theta0[tensor].reshape(-1).copy()
        b = None
        for t, g_full in enumerate(grads, start=1):
            # torch.optim.SGD documentation, "Algorithm"
            g = g_full[tensor].reshape(-1) + weight_decay * theta
            b = g.copy() if t == 1 else momentum * b + (1 - dampening) * g
            direction = g + momentum * b if nesterov else b
            step = -lr * direction
            s = t - 1
            _close(probes["first_moment"][s], b[index], rtol=1e-4)
            _close(probes["update"][s], step[index], theta=theta[index], rtol=1e-4)
            theta = theta + step


@pytest.mark.parametrize("centered,momentum,weight_decay", [(False, 0.0, 0.0), (True, 0.0, 0.0), (False, 0.9, 0.0),
                                                            (True, 0.5, 0.01)])
def test_rmsprop_equals_torch_optim_rmsprop_documentation(tmp_path, centered, momentum, weight_decay):
    lr, alpha, eps = 0.01, 0.9, 1e-8
    run, theta0, grads = _train(tmp_path, lambda p: torch.optim.RMSprop(
        p, lr=lr, alpha=alpha, eps=eps, centered=centered, momentum=momentum, weight_decay=weight_decay))
    for tensor in run.tensors:
        probes, index = _probe(run, tensor)
        theta = theta0[tensor].reshape(-1).copy()
        v = np.zeros_like(theta)
        g_ave = np.zeros_like(theta)
        b = np.zeros_like(theta)
        for t, g_full in enumerate(grads, start=1):
            # torch.optim.RMSprop documentation, "Algorithm"
            g = g_full[tensor].reshape(-1) + weight_decay * theta
            v = alpha * v + (1 - alpha) * g * g
            v_tilde = v
            if centered:
                g_ave = alpha * g_ave + (1 - alpha) * g
                v_tilde = v - g_ave * g_ave
            if momentum > 0:
                b = momentum * b + g / (np.sqrt(v_tilde) + eps)
                step = -lr * b
            else:
                step = -lr * g / (np.sqrt(v_tilde) + eps)
            s = t - 1
            _close(probes["second_moment"][s], v[index], rtol=1e-4)
            if centered:
                _close(probes["grad_avg"][s], g_ave[index], rtol=1e-4)
            if momentum > 0:
                _close(probes["momentum_buffer"][s], b[index], rtol=1e-3)
            _close(probes["update"][s], step[index], theta=theta[index], rtol=1e-3)
            theta = theta + step

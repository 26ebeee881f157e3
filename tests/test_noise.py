"""Gradient noise scale (McCandlish et al. 2018) on linear regression with Gaussian noise, where it is known
in closed form.

Model: per-example loss (x·w − y)²/2 with x ~ N(0, I_d), y = x·w* + σε. With δ = w − w*, the per-example
gradient is g = x(x·δ − σε), so G = E[g] = δ and, by Isserlis' theorem, E[ggᵀ] = (|δ|² + σ²)I + 2δδᵀ:
    |G|² = |δ|²,   tr(Σ) = d(|δ|² + σ²) + |δ|²,   B_simple = tr(Σ)/|G|²  (eq. 2.9 of the paper).
"""
from __future__ import annotations

import numpy as np
import pytest
import torch

import nbkit
from nbkit.analyze.curvature import AnalysisError
from nbkit.analyze.noise import RunningNoise, noise_parts, noise_scale, two_batch_estimates

D, SIGMA = 6, 0.7


def regression(seed=0):
    torch.manual_seed(seed)
    model = torch.nn.Linear(D, 1, bias=False)
    w_star = torch.linspace(-1.0, 1.0, D)
    delta = model.weight.detach()[0] - w_star
    grad_sq = float(delta @ delta)
    trace = D * (grad_sq + SIGMA ** 2) + grad_sq
    return model, w_star, grad_sq, trace


def batch(w_star, size, generator):
    x = torch.randn(size, D, generator=generator)
    return x, x @ w_star + SIGMA * torch.randn(size, generator=generator)


def step_fn(model, data):
    x, y = data
    return 0.5 * ((model(x).squeeze(-1) - y) ** 2).mean()


@pytest.mark.parametrize("method", ["per-example", "micro-batch"])
def test_parts_are_unbiased_over_repeated_trials(method):
    model, w_star, grad_sq, trace = regression()
    generator = torch.Generator().manual_seed(1)
    parts = [noise_parts(model, step_fn, batch(w_star, 16, generator), method=method) for _ in range(400)]
    assert {p.method for p in parts} == {method}
    for values, truth in (([p.grad_sq for p in parts], grad_sq), ([p.trace_cov for p in parts], trace)):
        values = np.array(values)
        standard_error = values.std(ddof=1) / np.sqrt(len(values))
        assert abs(values.mean() - truth) < 4 * standard_error, (values.mean(), truth, standard_error)
        # not trivially so: a single estimate is far from the truth
        assert values.std() > 0.05 * truth


def test_noise_scale_matches_the_closed_form_within_sampling_error():
    model, w_star, grad_sq, trace = regression(2)
    generator = torch.Generator().manual_seed(3)
    estimates = [noise_scale(model, step_fn, batch(w_star, 512, generator)) for _ in range(30)]
    truth = trace / grad_sq
    spread = np.std(estimates, ddof=1) / np.sqrt(len(estimates))
    assert abs(np.mean(estimates) - truth) < 4 * spread + 0.01 * truth, (np.mean(estimates), truth)
    assert nbkit.noise_scale is noise_scale


def test_averaging_the_parts_before_dividing():
    running = RunningNoise(weight=0.5)
    from nbkit.analyze.noise import NoiseParts

    assert running.add(NoiseParts(2.0, 10.0, 8, "per-example")) == pytest.approx(5.0)
    # the ratio of averages, not the average of ratios (2/… would be 0.5·5 + 0.5·(−10) otherwise)
    assert running.add(NoiseParts(-1.0, 10.0, 8, "per-example")) == pytest.approx(10.0 / 0.5)


def test_two_batch_estimator_formulas():
    # McCandlish et al. 2018, Appendix A.1: E|G_B|² = |G|² + tr(Σ)/B
    g2, tr = 3.0, 12.0
    small, big = 4, 32
    est_g2, est_tr = two_batch_estimates(g2 + tr / small, g2 + tr / big, small, big)
    assert est_g2 == pytest.approx(g2) and est_tr == pytest.approx(tr)
    with pytest.raises(AnalysisError, match="0 < small < big"):
        two_batch_estimates(1.0, 1.0, 8, 8)


def test_batchnorm_falls_back_to_micro_batches_and_leaves_training_untouched():
    torch.manual_seed(0)
    model = torch.nn.Sequential(torch.nn.Linear(4, 8), torch.nn.BatchNorm1d(8), torch.nn.Dropout(0.2),
                                torch.nn.Linear(8, 1))
    x, y = torch.randn(64, 4), torch.randn(64)
    buffers = [b.clone() for b in model.buffers()]
    rng = torch.get_rng_state()
    parts = noise_parts(model, step_fn, (x, y))
    assert parts.method == "micro-batch" and parts.batch_size == 64
    assert torch.equal(torch.get_rng_state(), rng)
    assert all(torch.equal(a, b) for a, b in zip(buffers, model.buffers()))
    assert all(p.grad is None for p in model.parameters())


def test_bad_batches_are_refused_clearly():
    model, *_ = regression()
    with pytest.raises(AnalysisError, match="at least 2 examples"):
        noise_parts(model, step_fn, (torch.randn(1, D), torch.randn(1)))
    with pytest.raises(AnalysisError, match="no tensor with a batch dimension"):
        noise_parts(model, lambda m, b: m.weight.sum(), 3.0)
    with pytest.raises(AnalysisError, match="Invalid method"):
        noise_parts(model, step_fn, (torch.randn(4, D), torch.randn(4)), method="fast")

"""The fast statistics against their plain references.

- nbkit.measure.step_stats.sampled_statistics (few passes, NaN-folded masks, one bincount) equals
  reference_sampled_statistics (one masked pass per quantity) on random data with padding, zeros
  and non-finite values;
- a recording's per-tensor series equal the definitions of DESIGN.md section 3 computed here with
  NumPy from θ before/after and g captured by the test (exact series over all coordinates, sampled
  series over the recorder's sample of coordinates);
- statistics computed on the background thread equal those computed in the hook.
"""
import numpy as np
import pytest
import torch
from torch import nn

import nbkit
from nbkit.record import setup
from nbkit.measure.step_stats import reference_sampled_statistics, sampled_statistics
from nbkit.measure.update_rules import ADAPTERS


def _inputs(seed, T=5, S=300, nonfinite=False):
    generator = torch.Generator().manual_seed(seed)
    sizes = [S, S // 2, 7, S, 1][:T]
    valid = torch.zeros(T, S, dtype=torch.bool)
    for r, n in enumerate(sizes):
        valid[r, :n] = True
    grad = torch.randn(T, S, generator=generator)
    grad[torch.rand(T, S, generator=generator) < 0.1] = 0.0
    update = -1e-3 * grad * torch.rand(T, S, generator=generator) * 3
    update[torch.rand(T, S, generator=generator) < 0.05] *= -1           # some reversed
    update[torch.rand(T, S, generator=generator) < 0.05] = 0.0           # some lost
    if nonfinite:
        grad[0, 3], grad[1, 4], update[3, 5] = float("nan"), float("inf"), float("inf")
    grad = grad.masked_fill(~valid, 0.5)                                 # padding holds garbage
    after = {"exp_avg": torch.randn(T, S, generator=generator), "exp_avg_sq": torch.rand(T, S, generator=generator),
             "momentum_buffer": torch.randn(T, S, generator=generator),
             "square_avg": torch.rand(T, S, generator=generator)}
    previous = torch.randn(T, S, generator=generator)
    previous[torch.rand(T, S, generator=generator) < 0.1] = 0.0
    return dict(grad=grad, theta_before=torch.randn(T, S, generator=generator), update=update, valid=valid,
                before={}, after=after, step=torch.full((T, 1), 3.0, dtype=torch.float64),
                previous_grad=previous, probes=4)


GROUPS = {
    "Adam": {"betas": (0.9, 0.999), "eps": 1e-8, "weight_decay": 0.0, "amsgrad": False},
    "SGD": {"momentum": 0.9, "nesterov": False, "weight_decay": 0.0},
    "RMSprop": {"eps": 1e-8, "centered": False, "momentum": 0.0, "weight_decay": 0.0},
    "LBFGS": {},
}


@pytest.mark.parametrize("optimizer", list(GROUPS))
@pytest.mark.parametrize("seed,nonfinite", [(0, False), (1, False), (2, True)])
def test_fast_sampled_statistics_equal_the_reference(optimizer, seed, nonfinite):
    kwargs = _inputs(seed, nonfinite=nonfinite)
    common = dict(group={**GROUPS[optimizer], "lr": 0.01}, lr=0.01, adapter=ADAPTERS[optimizer], **kwargs)
    reference = reference_sampled_statistics(**common)
    fast = sampled_statistics(**common, finite=not nonfinite)
    assert set(fast[0]) == set(reference[0])
    for name in reference[0]:
        np.testing.assert_allclose(fast[0][name].double().numpy(), reference[0][name].double().numpy(),
                                   rtol=1e-6, equal_nan=True, err_msg=name)
    np.testing.assert_array_equal(fast[1].numpy(), reference[1].numpy())
    assert set(fast[2]) == set(reference[2])
    for name in reference[2]:
        np.testing.assert_allclose(fast[2][name].double().numpy(), reference[2][name].double().numpy(),
                                   rtol=1e-6, equal_nan=True, err_msg=name)


def _record(tmp_path, background, steps=4):
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(100, 60), nn.ReLU(), nn.Linear(60, 3))      # 6000 > 4096: sampled
    optimizer = torch.optim.Adam(model.parameters(), lr=0.01)
    x = torch.randn(32, 100, generator=torch.Generator().manual_seed(1))
    y = torch.randint(0, 3, (32,), generator=torch.Generator().manual_seed(2))
    rec = nbkit.record(model, optimizer, tmp_path / f"r{int(background)}", strict=True)
    rec.background = background
    seen = []
    for _ in range(steps):
        optimizer.zero_grad()
        nn.functional.cross_entropy(model(x), y).backward()
        before = {n: p.detach().double().numpy().copy() for n, p in model.named_parameters()}
        grads = {n: p.grad.double().numpy().copy() for n, p in model.named_parameters()}
        optimizer.step()
        after = {n: p.detach().double().numpy().copy() for n, p in model.named_parameters()}
        seen.append((before, grads, after))
    # the recorder's coordinate sample comes from its seeded generator: drawn again here, the same way
    table, _, _ = setup.tensor_table(model, optimizer, rec.probes, torch.Generator().manual_seed(setup.SAMPLE_SEED))
    samples = {t.name: t.index.numpy() for t in table}
    rec.close()
    return nbkit.load(tmp_path / f"r{int(background)}"), seen, samples


def test_series_equal_their_definitions_in_numpy(tmp_path):
    run, seen, samples = _record(tmp_path, background=True)
    assert run.meta["statistics"]["sampled_tensors"] == ["0.weight"]
    for tensor in run.tensors:
        for s, (before, grads, after) in enumerate(seen):
            g, theta, delta = grads[tensor].ravel(), before[tensor].ravel(), (after[tensor] - before[tensor]).ravel()

            def series(q):
                return run.series(q, tensor)[s]

            # exact, over all coordinates
            np.testing.assert_allclose(series("grad_norm"), np.linalg.norm(g), rtol=1e-5)
            np.testing.assert_allclose(series("grad_rms"), np.sqrt(np.mean(g ** 2)), rtol=1e-5)
            np.testing.assert_allclose(series("grad_max"), np.abs(g).max(), rtol=1e-6)
            np.testing.assert_allclose(series("weight_norm"), np.linalg.norm(theta), rtol=1e-5)
            np.testing.assert_allclose(series("update_norm"), np.linalg.norm(delta), rtol=1e-5)
            np.testing.assert_allclose(series("update_ratio"), np.linalg.norm(delta) / np.linalg.norm(theta), rtol=1e-5)
            cos = -(delta @ g) / (np.linalg.norm(delta) * np.linalg.norm(g))
            np.testing.assert_allclose(series("update_grad_cosine"), cos, rtol=1e-4, atol=1e-6)
            # first-order predicted change of the loss from this tensor: g·Δθ (negative: a descent step)
            np.testing.assert_allclose(series("predicted_change"), g @ delta, rtol=1e-4,
                                       atol=1e-6 * np.linalg.norm(g) * np.linalg.norm(delta))
            assert series("predicted_change") < 0 or not np.any(delta)
            if s:
                g0 = seen[s - 1][1][tensor].ravel()
                np.testing.assert_allclose(series("grad_cosine"), g0 @ g / (np.linalg.norm(g0) * np.linalg.norm(g)),
                                           rtol=1e-4, atol=1e-6)
            if grads[tensor].ndim == 2:
                assert series("dead_rows") == (np.abs(grads[tensor]).sum(axis=1) == 0).sum()
            # sampled, over the recorder's sample of coordinates
            index = samples[tensor]
            gs, ds = g[index], delta[index]
            nonzero = gs != 0
            np.testing.assert_allclose(series("zero_grad_share"), np.mean(gs == 0), atol=1e-6)
            np.testing.assert_allclose(series("lost_update_share"), np.mean(ds[nonzero] == 0), atol=1e-6)
            gain = ds[nonzero] / (-0.01 * gs[nonzero])
            positive = np.sort(gain[gain > 0])
            median = positive[(len(positive) - 1) // 2]
            np.testing.assert_allclose(series("gain_median"), median, rtol=1e-5)
            relative = gain / median
            np.testing.assert_allclose(series("reversed"), np.mean(gain < 0), atol=1e-6)
            np.testing.assert_allclose(series("accelerated"), np.mean((gain >= 0) & (relative > 2)), atol=1e-6)
            np.testing.assert_allclose(series("damped"), np.mean((gain >= 0) & (relative < 0.5)), atol=1e-6)
            if s:
                g0 = seen[s - 1][1][tensor].ravel()[index]
                both = (gs != 0) & (g0 != 0)
                np.testing.assert_allclose(series("sign_flip"), np.mean(np.sign(gs[both]) != np.sign(g0[both])),
                                           atol=1e-6)
            edges, counts = run.histogram("grad", tensor)
            magnitude = np.floor(np.log2(np.abs(gs[nonzero]).astype(np.float32)))
            expected = np.bincount(np.clip(magnitude - edges[0], 0, len(edges) - 2).astype(int),
                                   minlength=len(edges) - 1)
            np.testing.assert_array_equal(counts[s], expected)


def test_background_and_in_hook_statistics_agree(tmp_path):
    a, _, _ = _record(tmp_path, background=True)
    b, _, _ = _record(tmp_path, background=False)
    for q in a.quantities:
        np.testing.assert_array_equal(a.series(q), b.series(q), err_msg=q)
    for tensor in a.tensors:
        pa, pb = a.probes(tensor), b.probes(tensor)
        assert set(pa) == set(pb)
        for name in pa:
            np.testing.assert_array_equal(pa[name], pb[name], err_msg=name)
        for h in ("grad", "update", "gain"):
            np.testing.assert_array_equal(a.histogram(h, tensor)[1], b.histogram(h, tensor)[1])

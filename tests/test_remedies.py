"""Remedies: a finding's proposed fixes replayed from the keyframe before it beside the unchanged control.

Outside references: gradient descent on a quadratic diverges iff lr > 2/λmax (the classical condition,
restated by Cohen et al. 2021), heavy-ball momentum iff lr·λmax > 2(1 + β) (Polyak 1964); λmax from
numpy.linalg.eigvalsh. So at 1.1 × the limit, halving the learning rate must converge and the verdict must
say the finding is gone."""
from __future__ import annotations

import numpy as np
import pytest
import torch

import nbkit
from nbkit.analyze.remedies import Remedy, paired_difference

STEPS = 60


def least_squares(seed=0, n=64, d=8):
    generator = torch.Generator().manual_seed(seed)
    x = torch.randn(n, d, generator=generator, dtype=torch.float64) * torch.linspace(0.5, 3.0, d, dtype=torch.float64)
    y = x @ torch.randn(d, 1, generator=generator, dtype=torch.float64)
    hessian = 2 * (x.T @ x).numpy() / n
    return x, y, float(np.linalg.eigvalsh(hessian)[-1])


class WithOffset(torch.nn.Module):
    """A linear map plus a learned offset (the demo's kind of orphan: a calibration term)."""

    def __init__(self, d):
        super().__init__()
        self.linear = torch.nn.Linear(d, 1, bias=False).double()
        self.offset = torch.nn.Parameter(torch.zeros(1, dtype=torch.float64))

    def forward(self, x):
        return self.linear(x) + self.offset


def diverging_run(tmp_path, momentum=0.0, factor=1.1, orphan=False):
    x, y, top = least_squares()
    limit = 2 * (1 + momentum) / top               # Polyak 1964 (momentum 0: the classical 2/λmax)
    torch.manual_seed(1)
    model = WithOffset(x.shape[1]) if orphan else torch.nn.Sequential(torch.nn.Linear(x.shape[1], 1, bias=False).double())
    held = [model.linear.weight] if orphan else [model[0].weight]
    optimizer = torch.optim.SGD(held, lr=factor * limit, momentum=momentum)
    criterion = torch.nn.MSELoss()
    rec = nbkit.record(model, optimizer, tmp_path / "run", every=1, curvature_every=5, criterion=criterion,
                       keyframe_every=20)
    for _ in range(STEPS):
        optimizer.zero_grad()
        criterion(model(x), y + 3.0 if orphan else y).backward()
        optimizer.step()
    rec.close()
    return nbkit.load(tmp_path / "run"), model


@pytest.mark.parametrize("momentum", [0.0, 0.9], ids=["gradient-descent", "heavy-ball"])
def test_halving_the_learning_rate_past_the_stability_limit_converges_and_the_finding_is_gone(tmp_path, momentum):
    run, model = diverging_run(tmp_path, momentum)
    stability = [f for f in run.findings() if f.kind == "over-stability-limit"]
    assert stability and run.loss[-1] > 10 * run.loss[0]
    tried = nbkit.try_remedies(run, stability[0], model, progress=False)
    assert tried.control_still_fires
    halved = next(v for v in tried.verdicts if v.remedy.change == {"lr_scale": 0.5})
    assert halved.outcome == "better" and halved.still_fires is False, tried.table()
    assert halved.replay.loss[-1] < halved.replay.loss[0]        # 0.55 × the limit: it converges
    assert "gone" in tried.table()


def test_the_control_replays_the_recorded_run_bit_for_bit(tmp_path):
    run, model = diverging_run(tmp_path, factor=0.8)
    from nbkit.analyze.finding import Finding
    finding = Finding("oversized-updates", ["0.weight"], 20, 30, "warning")
    tried = nbkit.try_remedies(run, finding, model, progress=False)
    control = tried.control
    rows = np.isin(run.steps, control.steps)
    np.testing.assert_array_equal(control.loss, run.loss[rows])
    assert control.meta["replay"]["fidelity"]["identical"]


def test_a_remedy_that_makes_things_worse_is_reported_worse(tmp_path):
    run, model = diverging_run(tmp_path, factor=0.5)              # healthy: a larger step overshoots
    from nbkit.analyze.finding import Finding
    finding = Finding("stalled-updates", ["0.weight"], 20, 30, "info")
    worse = Remedy("raise-lr", "learning rate × 4.5 (past the limit)", {"lr_scale": 4.5})
    tried = nbkit.try_remedies(run, finding, model, remedies=[worse], progress=False)
    assert tried.verdicts[0].outcome == "worse", tried.table()


def test_adding_an_orphan_to_the_optimizer_makes_it_change(tmp_path):
    run, model = diverging_run(tmp_path, factor=0.5, orphan=True)
    orphan = [f for f in run.findings() if f.kind == "orphan"]
    assert orphan and orphan[0].tensors == ["offset"]
    tried = nbkit.try_remedies(run, orphan[0], model, progress=False)
    verdict = tried.verdicts[0]
    assert verdict.remedy.kind == "add-to-optimizer" and verdict.still_fires is False, tried.table()
    start = tried.control.state_at(tried.start)[0]["offset"]
    end = verdict.replay.state_at(verdict.replay.keyframes[-1])[0]["offset"]
    control_end = tried.control.state_at(tried.control.keyframes[-1])[0]["offset"]
    assert torch.equal(start, control_end) and not torch.equal(start, end)
    assert verdict.outcome == "better"                   # the offset fits the shifted targets


def test_a_remedy_that_does_not_apply_is_skipped_with_its_reason(tmp_path):
    run, model = diverging_run(tmp_path, factor=0.5)
    from nbkit.analyze.finding import Finding
    finding = Finding("eps-dominated", ["0.weight"], 20, 30, "warning")
    tried = nbkit.try_remedies(run, finding, model, progress=False)
    assert tried.verdicts[0].outcome == "skipped" and "SGD has no ε" in tried.verdicts[0].why


def test_a_finding_before_every_keyframe_names_the_nearest(tmp_path):
    run, model = diverging_run(tmp_path, factor=0.5)
    from nbkit.analyze.finding import Finding
    finding = Finding("oversized-updates", ["0.weight"], -5, 3, "warning")
    with pytest.raises(nbkit.ReplayError, match="nearest is 0: pass start=0"):
        nbkit.try_remedies(run, finding, model, progress=False)


def test_the_paired_difference_interval_covers_zero_for_noise_and_not_for_a_shift():
    rng = np.random.default_rng(0)
    control = rng.normal(size=200)
    assert paired_difference(control + rng.normal(scale=0.01, size=200) , control)[1] < 0 < \
        paired_difference(control + rng.normal(scale=0.01, size=200), control)[2]
    mean, low, high = paired_difference(control - 0.5, control)
    assert high < 0 and abs(mean + 0.5) < 1e-12

"""Findings: every kind fires on a small run built to show it, at the right step and tensor, and healthy
runs of different shapes stay quiet (no warning or error). Real data: sklearn.datasets.load_digits."""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
import torch

import nbkit
from nbkit.analyze.findings import Thresholds, find


# --- data and models ------------------------------------------------------------------------------
def digits():
    from sklearn.datasets import load_digits

    data = load_digits()
    x = torch.tensor(data.data, dtype=torch.float32) / 16.0
    y = torch.tensor(data.target, dtype=torch.long)
    return x, y


def mlp(width=64, seed=0, inputs=64, classes=10):
    torch.manual_seed(seed)
    return torch.nn.Sequential(torch.nn.Linear(inputs, width), torch.nn.ReLU(), torch.nn.Linear(width, classes))


class SmallConv(torch.nn.Module):
    def __init__(self):
        super().__init__()
        torch.manual_seed(1)
        self.features = torch.nn.Sequential(torch.nn.Conv2d(1, 8, 3, padding=1), torch.nn.BatchNorm2d(8),
                                            torch.nn.ReLU(), torch.nn.Conv2d(8, 16, 3, padding=1), torch.nn.ReLU(),
                                            torch.nn.AdaptiveAvgPool2d(2))
        self.head = torch.nn.Linear(64, 10)

    def forward(self, x):
        return self.head(self.features(x.view(-1, 1, 8, 8)).flatten(1))


class TinySequence(torch.nn.Module):
    """Embedding + one transformer encoder layer: predicts (sum of tokens) mod 7."""

    def __init__(self, vocab=50, dim=32):
        super().__init__()
        torch.manual_seed(2)
        self.embed = torch.nn.Embedding(vocab, dim)
        self.encoder = torch.nn.TransformerEncoderLayer(dim, 4, 64, dropout=0.1, batch_first=True)
        self.head = torch.nn.Linear(dim, 7)

    def forward(self, tokens):
        return self.head(self.encoder(self.embed(tokens)).mean(1))


def train(model, optimizer, x, y, steps, path, *, batch=32, criterion=None, seed=0, before=None, scheduler=None,
          **record):
    """A plain loop, recorded; `before(step, x_batch, model)` may plant a fault and return the batch.
    batch=None: full-batch (every step sees all of x)."""
    criterion = criterion or torch.nn.CrossEntropyLoss()
    generator = torch.Generator().manual_seed(seed)
    with nbkit.record(model, optimizer, path, criterion=criterion, keyframe_every=1000, **record):
        for step in range(steps):
            rows = torch.arange(len(x)) if batch is None else torch.randint(0, len(x), (batch,), generator=generator)
            xb, yb = x[rows], y[rows]
            if before is not None:
                xb = before(step, xb, model)
            optimizer.zero_grad()
            criterion(model(xb), yb).backward()
            optimizer.step()
            if scheduler is not None:
                scheduler.step()
    return nbkit.load(path)


def loud(findings):
    return [f for f in findings if f.severity in ("warning", "error")]


def kinds(findings):
    return {f.kind for f in findings}


# --- healthy runs stay quiet ------------------------------------------------------------------------
@pytest.mark.slow
def test_healthy_adam_on_digits_is_quiet(tmp_path):
    x, y = digits()
    model = mlp()
    run = train(model, torch.optim.Adam(model.parameters(), lr=1e-3), x, y, 600, tmp_path / "adam")
    assert run.loss[-50:].mean() < 0.5 * run.loss[:10].mean()          # it did learn
    assert loud(run.findings()) == [], run.findings()


@pytest.mark.slow
def test_healthy_sgd_momentum_conv_with_batchnorm_is_quiet(tmp_path):
    x, y = digits()
    model = SmallConv()
    optimizer = torch.optim.SGD(model.parameters(), lr=0.05, momentum=0.9)
    run = train(model, optimizer, x, y, 300, tmp_path / "conv", batch=64)
    assert run.loss[-30:].mean() < 0.5 * run.loss[:10].mean()
    assert loud(run.findings()) == [], run.findings()


@pytest.mark.slow
def test_healthy_adamw_transformer_with_cosine_schedule_is_quiet(tmp_path):
    generator = torch.Generator().manual_seed(3)
    tokens = torch.randint(0, 50, (2048, 6), generator=generator)
    labels = tokens.sum(1) % 7
    model = TinySequence()
    optimizer = torch.optim.AdamW(model.parameters(), lr=3e-3, weight_decay=0.01)
    scheduler = torch.optim.lr_scheduler.CosineAnnealingLR(optimizer, T_max=300)
    run = train(model, optimizer, tokens, labels, 300, tmp_path / "seq", scheduler=scheduler)
    assert loud(run.findings()) == [], run.findings()


@pytest.mark.slow
def test_healthy_full_batch_regression_with_plain_sgd_is_quiet(tmp_path):
    generator = torch.Generator().manual_seed(4)
    x = torch.randn(256, 5, generator=generator)
    y = x @ torch.tensor([1.0, -2.0, 0.5, 0.0, 3.0]) + 0.1 * torch.randn(256, generator=generator)
    torch.manual_seed(4)
    model = torch.nn.Sequential(torch.nn.Linear(5, 16), torch.nn.Tanh(), torch.nn.Linear(16, 1))
    criterion = torch.nn.MSELoss()

    class Squeeze(torch.nn.Module):
        def forward(self, prediction, target):
            return criterion(prediction.squeeze(-1), target)

    run = train(model, torch.optim.SGD(model.parameters(), lr=0.05), x, y, 300, tmp_path / "reg", batch=None,
                criterion=Squeeze())
    assert loud(run.findings()) == [], run.findings()


# --- each kind fires where it was planted -----------------------------------------------------------
def test_orphan_names_the_tensor_left_out_of_the_optimizer(tmp_path):
    x, y = digits()
    model = mlp()
    run = train(model, torch.optim.Adam(model[0].parameters(), lr=1e-3), x, y, 30, tmp_path / "orphan")
    found = [f for f in run.findings() if f.kind == "orphan"]
    assert len(found) == 1 and sorted(found[0].tensors) == ["2.bias", "2.weight"]
    assert found[0].severity == "warning"


def test_no_gradient_names_the_unused_tensor(tmp_path):
    x, y = digits()

    class WithUnused(torch.nn.Module):
        def __init__(self):
            super().__init__()
            self.net, self.unused = mlp(), torch.nn.Linear(3, 3)   # unused: in the optimizer, not the forward

        def forward(self, xb):
            return self.net(xb)

    model = WithUnused()
    run = train(model, torch.optim.SGD(model.parameters(), lr=0.05), x, y, 30, tmp_path / "unused")
    found = [f for f in run.findings() if f.kind == "no-gradient"]
    assert sorted(t for f in found for t in f.tensors) == ["unused.bias", "unused.weight"]


def _poison_parameter_at(step_to_poison):
    def before(step, xb, model):
        if step == step_to_poison:
            with torch.no_grad():
                model[2].weight[0, 0] = float("nan")
        return xb
    return before


def _poison_batch_at(step_to_poison):
    def before(step, xb, model):
        if step == step_to_poison:
            xb = xb.clone()
            xb[3, 5] = float("nan")
        return xb
    return before


@pytest.mark.parametrize("plant, origin, tensors", [
    (_poison_parameter_at(17), "a parameter before the forward pass", ["2.weight"]),
    (_poison_batch_at(17), "the input batch", []),
])
def test_nonfinite_names_the_origin_not_the_victims(tmp_path, plant, origin, tensors):
    x, y = digits()
    model = mlp()
    run = train(model, torch.optim.Adam(model.parameters(), lr=1e-3), x, y, 25, tmp_path / "nan", before=plant)
    found = [f for f in run.findings() if f.kind == "nonfinite"]
    assert len(found) == 1
    f = found[0]
    assert f.first_step == 17 and f.severity == "error"
    assert origin in f.suggestion and f.tensors == tensors


def test_nonfinite_in_the_backward_pass_names_the_gradients(tmp_path):
    generator = torch.Generator().manual_seed(0)
    x = torch.rand(64, 4, generator=generator) + 0.5
    y = torch.randn(64, generator=generator)
    torch.manual_seed(0)
    model = torch.nn.Sequential(torch.nn.Linear(4, 1))

    class SqrtLoss(torch.nn.Module):            # sqrt(0) has an infinite derivative
        def forward(self, prediction, target):
            return (prediction.squeeze(-1) - prediction.squeeze(-1).detach()).abs().sqrt().mean() + 0 * target.sum()

    run = train(model, torch.optim.SGD(model.parameters(), lr=0.01), x, y, 5, tmp_path / "bwd", criterion=SqrtLoss())
    f = [f for f in run.findings() if f.kind == "nonfinite"][0]
    assert f.first_step == 0 and "the gradients" in f.suggestion
    assert set(f.tensors) == {"0.weight", "0.bias"}


def test_grad_spike_at_the_planted_outlier_batch(tmp_path):
    x, y = digits()
    model = mlp()

    def outlier(step, xb, model):
        return xb * 300.0 if step == 120 else xb

    run = train(model, torch.optim.SGD(model.parameters(), lr=0.01), x, y, 150, tmp_path / "spike", before=outlier)
    found = [f for f in run.findings() if f.kind == "grad-spike"]
    assert [f.first_step for f in found] == [120]
    assert "0.weight" in found[0].tensors


def test_oversized_updates_and_divergence_with_a_far_too_high_learning_rate(tmp_path):
    x, y = digits()
    model = mlp()
    run = train(model, torch.optim.Adam(model.parameters(), lr=0.5), x, y, 80, tmp_path / "high")
    found = [f for f in run.findings() if f.kind == "oversized-updates" and f.severity == "warning"]
    assert found and {"0.weight", "2.weight"} & set(found[0].tensors)
    assert found[0].first_step < 20


def test_eps_dominated_when_eps_is_far_above_the_gradient_scale(tmp_path):
    x, y = digits()
    model = mlp()
    run = train(model, torch.optim.Adam(model.parameters(), lr=1e-2, eps=1.0), x, y, 60, tmp_path / "eps")
    found = [f for f in run.findings() if f.kind == "eps-dominated"]
    assert {t for f in found for t in f.tensors} >= {"0.weight", "2.weight"}
    healthy = train(mlp(), torch.optim.Adam(mlp().parameters(), lr=1e-2), x, y, 1, tmp_path / "x")
    del healthy


class TwoBranch(torch.nn.Module):
    """Digits pixels through one branch, three extra features through their own small layer."""

    def __init__(self):
        super().__init__()
        torch.manual_seed(3)
        self.pixels = torch.nn.Sequential(torch.nn.Linear(64, 32), torch.nn.Tanh())
        self.extra = torch.nn.Sequential(torch.nn.Linear(3, 8), torch.nn.Tanh())
        self.head = torch.nn.Linear(40, 10)

    def forward(self, x):
        return self.head(torch.cat([self.pixels(x[:, :64]), self.extra(x[:, 64:])], dim=1))


@pytest.mark.parametrize("unit", [1e-7, 1.0])
def test_eps_dominated_traces_inputs_in_the_wrong_unit(tmp_path, unit):
    """Three features scaled by 1e-7 feed their own layer: its weight gradient falls under Adam's ε
    while the layer's bias gradient stays normal. The finding fires on that weight with the input scale
    as evidence (weight-gradient RMS / bias-gradient RMS ≈ the inputs' scale); with correct units it
    stays silent."""
    x, y = digits()
    extra = torch.stack([x[:, :32].mean(1), x[:, 32:].mean(1), x.std(1)], dim=1)
    extra = (extra - extra.mean(0)) / extra.std(0) * unit
    model = TwoBranch()
    run = train(model, torch.optim.Adam(model.parameters(), lr=1e-3), torch.cat([x, extra], 1), y,
                150, tmp_path / f"units-{unit}")
    found = [f for f in run.findings() if f.kind == "eps-dominated"]
    if unit == 1.0:
        assert found == []
        return
    assert [f.tensors for f in found] == [["extra.0.weight"]]
    assert found[0].evidence["input_scale"] == pytest.approx(unit, rel=1.0)   # within a factor of 2


def quadratic_run(tmp_path, name, optimizer_factory, steps, *, curvature_every=0, scale=(4.0, 1.0, 0.25),
                  scheduler=None):
    """Linear least squares with a known Hessian diag(scale) (the data are its square roots)."""
    dims = len(scale)
    x = torch.diag(torch.tensor(scale, dtype=torch.float32).sqrt()) * math.sqrt(dims)       # mean of x xᵀ = diag(scale)
    y = torch.zeros(dims)
    torch.manual_seed(0)
    model = torch.nn.Linear(dims, 1, bias=False)
    with torch.no_grad():
        model.weight.fill_(1.0)

    class HalfSquare(torch.nn.Module):
        def forward(self, prediction, target):
            return 0.5 * ((prediction.squeeze(-1) - target) ** 2).mean()

    optimizer = optimizer_factory(model.parameters())
    return train(model, optimizer, x, y, steps, tmp_path / name, batch=None, criterion=HalfSquare(),
                 curvature_every=curvature_every, scheduler=scheduler and scheduler(optimizer)), model


def test_oscillation_on_a_quadratic_just_past_the_limit(tmp_path):
    # top curvature 4: gradient descent diverges above lr = 2/4 = 0.5 (Cohen et al. 2021)
    run, _ = quadratic_run(tmp_path, "osc", lambda p: torch.optim.SGD(p, lr=0.51), 60)
    found = [f for f in run.findings() if f.kind == "oscillation"]
    assert found and found[0].tensors == ["weight"] and found[0].first_step <= 5


def test_overshoot_with_heavy_momentum(tmp_path):
    # β = 0.99: an underdamped spiral; the iterate keeps running past the minimum (updates against the
    # gradient) while the gradient's sign changes only twice per turn
    scale = tuple(np.linspace(0.5, 4.0, 64))
    run, _ = quadratic_run(tmp_path, "over", lambda p: torch.optim.SGD(p, lr=0.1, momentum=0.99), 150, scale=scale)
    found = [f for f in run.findings() if f.kind == "overshoot"]
    assert found and found[0].tensors == ["weight"] and found[0].first_step < 30
    damped, _ = quadratic_run(tmp_path, "damped", lambda p: torch.optim.SGD(p, lr=0.1, momentum=0.5), 150,
                              scale=scale)
    assert "overshoot" not in kinds(damped.findings())


def test_dead_units_from_the_step_they_died(tmp_path):
    x, y = digits()
    model = mlp()

    def kill(step, xb, model):
        if step == 40:
            with torch.no_grad():
                model[0].bias[:40] = -1000.0        # 40 of 64 ReLUs can never fire again
        return xb

    run = train(model, torch.optim.SGD(model.parameters(), lr=0.01), x, y, 120, tmp_path / "dead", before=kill)
    found = [f for f in run.findings() if f.kind == "dead-units"]
    assert len(found) == 1 and found[0].tensors == ["0.weight"] and found[0].severity == "warning"
    assert found[0].first_step == 40 and found[0].evidence["min_dead_share"] >= 40 / 64


def test_lost_updates_in_bfloat16(tmp_path):
    x, y = digits()
    model = mlp().to(torch.bfloat16)
    run = train(model, torch.optim.SGD(model.parameters(), lr=1e-4), x.to(torch.bfloat16), y, 40, tmp_path / "bf16")
    found = [f for f in run.findings() if f.kind == "lost-updates"]
    assert {"0.weight", "2.weight"} <= {t for f in found for t in f.tensors}


def test_plateau_of_a_deep_linear_network_from_small_initialisation(tmp_path):
    generator = torch.Generator().manual_seed(5)
    x = torch.randn(512, 8, generator=generator)
    y = x @ torch.randn(8, 8, generator=generator)
    torch.manual_seed(5)
    model = torch.nn.Sequential(*[torch.nn.Linear(8, 8, bias=False) for _ in range(3)])
    with torch.no_grad():
        for layer in model:
            layer.weight.mul_(0.3)                  # near the saddle at 0: a flat start, then an escape
    run = train(model, torch.optim.SGD(model.parameters(), lr=0.02), x, y, 600, tmp_path / "plateau", batch=64,
                criterion=torch.nn.MSELoss())
    assert run.loss[-20:].mean() < 0.3 * run.loss[:20].mean()          # it escaped
    found = [f for f in run.findings() if f.kind == "plateau"]
    assert found and found[0].first_step < 50


@pytest.mark.parametrize("lr, diverges", [(0.45, False), (0.7, True)])
def test_over_stability_limit_fires_where_gradient_descent_diverges(tmp_path, lr, diverges):
    # Hessian diag(4, 1, 0.25): the limit 2/lr passes 4 at lr = 0.5 (Cohen et al. 2021)
    run, model = quadratic_run(tmp_path, f"gd{lr}", lambda p: torch.optim.SGD(p, lr=lr), 30, curvature_every=5)
    sharp = run.series("sharpness")[:, 0]
    np.testing.assert_allclose(sharp[::5], 4.0, rtol=1e-3)            # constant on a quadratic
    grew = abs(model.weight[0, 0].item()) > 1.0                          # observed: started at 1
    assert grew == diverges
    found = [f for f in run.findings() if f.kind == "over-stability-limit"]
    assert bool(found) == diverges
    if diverges:
        assert found[0].first_step == 0 and found[0].evidence["limit"] == pytest.approx(2 / lr)


class MomentumDrop:
    """A scheduler that sets the momentum to 0 before step `at`."""

    def __init__(self, optimizer, at):
        self.optimizer, self.at, self.steps = optimizer, at, 0

    def step(self):
        self.steps += 1
        if self.steps == self.at:
            self.optimizer.param_groups[0]["momentum"] = 0.0


def test_over_stability_limit_reads_the_momentum_of_each_step(tmp_path):
    # λ = 4, lr = 0.9: with β = 0.9 the heavy-ball limit 2(1+β)/lr = 4.22 holds (Polyak 1964); once a
    # schedule drops β to 0 the gradient-descent limit 2/lr = 2.22 is passed (Cohen et al. 2021)
    run, model = quadratic_run(tmp_path, "drop", lambda p: torch.optim.SGD(p, lr=0.9, momentum=0.9), 30,
                               curvature_every=5, scheduler=lambda o: MomentumDrop(o, 10))
    assert run.meta["param_groups"][0]["momentum"] == 0.9                  # the start value alone says stable
    np.testing.assert_array_equal(run.settings["momentum"][:, 0], [0.9] * 10 + [0.0] * 20)
    assert abs(model.weight[0, 0].item()) > 1.0                            # observed: it diverged
    found = [f for f in run.findings() if f.kind == "over-stability-limit"]
    assert found and found[0].first_step == 10 and found[0].evidence["limit"] == pytest.approx(2 / 0.9)


def test_coupled_decay_cites_loshchilov_and_hutter(tmp_path):
    x, y = digits()
    model = mlp()
    run = train(model, torch.optim.Adam(model.parameters(), lr=1e-3, weight_decay=1e-2), x, y, 10, tmp_path / "l2")
    found = [f for f in run.findings() if f.kind == "coupled-decay"]
    assert len(found) == 1 and "Loshchilov & Hutter 2019" in found[0].source
    assert sorted(found[0].tensors) == sorted(run.tensors)
    decoupled = train(mlp(), torch.optim.AdamW(mlp().parameters(), lr=1e-3, weight_decay=1e-2), x, y, 10,
                      tmp_path / "adamw")
    assert "coupled-decay" not in kinds(decoupled.findings())


# --- the API around findings ------------------------------------------------------------------------
def test_every_finding_has_a_suggestion_a_source_and_a_replay_hint(tmp_path):
    x, y = digits()
    model = mlp()
    run = train(model, torch.optim.Adam(model[0].parameters(), lr=0.5), x, y, 40, tmp_path / "bad",
                before=_poison_batch_at(35))
    findings = run.findings()
    assert len(kinds(findings)) >= 3
    for f in findings:
        assert f.suggestion and f.source and f.first_step <= f.last_step
        assert all(isinstance(v, (int, float)) for v in f.evidence.values())
        if f.kind not in ("orphan", "no-gradient"):
            assert "replay" in f.suggestion


def test_thresholds_are_overridable_and_unknown_names_are_refused(tmp_path):
    x, y = digits()
    model = mlp()
    run = train(model, torch.optim.Adam(model.parameters(), lr=0.5), x, y, 40, tmp_path / "t")
    assert "oversized-updates" in kinds(run.findings())
    assert not {"oversized-updates", "stalled-updates"} & kinds(run.findings(oversized_ratio=1e9,
                                                                              oversized_single_step=1e9,
                                                                              stalled_ratio=0))
    with pytest.raises(nbkit.NbkitError, match="Unknown finding threshold"):
        run.findings(spike_factr=3)
    assert Thresholds().window == find.__globals__["Thresholds"]().window


def test_oversized_and_stalled_updates_each_fire_on_their_own_side_only(tmp_path):
    x, y = digits()
    model = mlp()
    high = train(model, torch.optim.Adam(model.parameters(), lr=0.5), x, y, 40, tmp_path / "high")
    model = mlp()
    low = train(model, torch.optim.SGD(model.parameters(), lr=1e-7), x, y, 40, tmp_path / "low")
    assert "oversized-updates" in kinds(high.findings()) and "stalled-updates" not in kinds(high.findings())
    assert "stalled-updates" in kinds(low.findings()) and "oversized-updates" not in kinds(low.findings())
    stalled = [f for f in low.findings() if f.kind == "stalled-updates"]
    assert {f.severity for f in stalled} == {"info"} and {"0.weight", "2.weight"} <= {t for f in stalled
                                                                                       for t in f.tensors}
    assert all(f.evidence["median_update_ratio"] < Thresholds().stalled_ratio for f in stalled)
    assert all("too low" in f.suggestion for f in stalled)
    oversized = [f for f in high.findings() if f.kind == "oversized-updates"]
    assert {f.severity for f in oversized} == {"warning"} and all("too high" in f.suggestion for f in oversized)
    # each kind answers to its own thresholds only
    assert [repr(f) for f in high.findings(stalled_ratio=0)] == [repr(f) for f in high.findings()]
    assert [repr(f) for f in low.findings(oversized_ratio=1e9, oversized_single_step=1e9)] == \
        [repr(f) for f in low.findings()]
    assert "stalled-updates" not in kinds(low.findings(stalled_ratio=0))


def test_the_old_update_ratio_thresholds_warn_and_still_apply(tmp_path, capsys):
    from nbkit.cli import main

    x, y = digits()
    model = mlp()
    run = train(model, torch.optim.Adam(model.parameters(), lr=0.5), x, y, 40, tmp_path / "old")
    for old, new, value in (("update_ratio_high", "oversized_ratio", 1e-3),
                            ("update_ratio_extreme", "oversized_single_step", 1e9),
                            ("update_ratio_low", "stalled_ratio", 1.0)):
        with pytest.warns(DeprecationWarning, match=f"{old!r} is deprecated.*use {new!r}") as caught:
            with_old = run.findings(**{old: value})
        assert caught[0].filename == __file__                  # it names the caller's line, not nbkit's
        assert [repr(f) for f in with_old] == [repr(f) for f in run.findings(**{new: value})]
        assert [repr(f) for f in with_old] != [repr(f) for f in run.findings()]       # the value applied
    with pytest.warns(DeprecationWarning) as caught:
        assert "oversized-updates" not in kinds(run.findings(update_ratio_high=1e9, update_ratio_extreme=1e9))
    assert sorted(str(w.message).split("use ")[1].split()[0] for w in caught) == ["'oversized_ratio'",
                                                                                 "'oversized_single_step'"]
    with pytest.raises(nbkit.NbkitError, match="'update_ratio_high' and 'oversized_ratio' are the same threshold"):
        run.findings(update_ratio_high=1.0, oversized_ratio=2.0)
    capsys.readouterr()
    assert main(["findings", "--json", "--set", "oversized_single_step=1e-3", str(run.path)]) == 0
    with_new = capsys.readouterr().out
    with pytest.warns(DeprecationWarning, match="oversized_single_step"):
        assert main(["findings", "--json", "--set", "update_ratio_extreme=1e-3", str(run.path)]) == 0
    printed = capsys.readouterr()
    assert printed.out == with_new and "use --set oversized_single_step" in printed.err


def test_rules_name_every_kind_of_the_readme_table_once():
    from nbkit.analyze.findings import RULES

    readme = (Path(__file__).parents[1] / "README.md").read_text(encoding="utf-8")
    table = readme.split("| kind | severity |", 1)[1].split("\n\n", 1)[0]
    documented = [line.split("`")[1] for line in table.splitlines() if line.startswith("| `")]
    named = [kind for rule in RULES for kind in rule.kinds]
    assert sorted(named) == sorted(documented) and len(set(named)) == len(named)
    assert {"oversized-updates", "stalled-updates"} <= set(named) and "update-ratio" not in named


def test_findings_command_gates_on_errors_and_on_warnings_with_strict(tmp_path, capsys):
    from nbkit.cli import main

    x, y = digits()
    model = mlp()
    quiet = train(model, torch.optim.Adam(model.parameters(), lr=1e-3), x, y, 30, tmp_path / "quiet")
    assert main(["findings", str(quiet.path)]) == 0
    model = mlp()
    orphan = train(model, torch.optim.Adam(model[0].parameters(), lr=1e-3), x, y, 30, tmp_path / "orphan")
    assert main(["findings", str(orphan.path)]) == 0            # a warning only
    assert main(["findings", "--strict", str(orphan.path)]) == 1
    model = mlp()
    nan = train(model, torch.optim.Adam(model.parameters(), lr=1e-3), x, y, 30, tmp_path / "nan",
                before=_poison_batch_at(12))
    capsys.readouterr()
    assert main(["findings", str(nan.path)]) == 1
    out = capsys.readouterr().out
    assert "nonfinite" in out and " 12-" in out
    assert main(["findings", str(tmp_path / "missing")]) == 2


@pytest.mark.slow
def test_done_when_orphan_nan_and_high_learning_rate_are_all_named(tmp_path, capsys):
    """The issue's acceptance run: a planted orphan, a planted NaN and a too high learning rate."""
    from nbkit.cli import main

    x, y = digits()

    class WithExtra(torch.nn.Module):
        def __init__(self):
            super().__init__()
            self.inner, self.extra = mlp(), torch.nn.Linear(64, 10)   # extra: used, never optimized

        def forward(self, xb):
            return self.inner(xb) + 0.1 * self.extra(xb)

    wrapped = WithExtra()
    optimizer = torch.optim.SGD(wrapped.inner.parameters(), lr=3.0)

    def plant(step, xb, _):
        if step == 150:
            xb = xb.clone()
            xb[0, 0] = float("nan")
        return xb

    run = train(wrapped, optimizer, x, y, 200, tmp_path / "acceptance", before=plant)
    findings = run.findings()
    capsys.readouterr()
    assert main(["findings", str(run.path)]) == 1
    out = capsys.readouterr().out
    assert "orphan" in out and "extra.weight" in out
    nonfinite = [f for f in findings if f.kind == "nonfinite"]
    assert nonfinite and nonfinite[0].first_step <= 150
    assert kinds(loud(findings)) & {"oversized-updates", "grad-spike", "oscillation", "overshoot"}


def test_findings_on_sparse_tiny_and_lossless_recordings(tmp_path):
    x, y = digits()
    model = mlp()
    sparse = train(model, torch.optim.Adam(model.parameters(), lr=1e-3), x, y, 40, tmp_path / "sparse", every=7,
                   before=_poison_batch_at(30))
    found = [f for f in sparse.findings() if f.kind == "nonfinite"]
    assert [f.first_step for f in found] == [30] and "the input batch" in found[0].suggestion
    model = mlp()
    tiny = train(model, torch.optim.SGD(model.parameters(), lr=0.01), x, y, 2, tmp_path / "tiny")
    assert loud(tiny.findings()) == []
    model = mlp()
    optimizer = torch.optim.SGD(model.parameters(), lr=0.01)
    with nbkit.record(model, optimizer, tmp_path / "no-loss"):             # no criterion: the loss is unknown
        for _ in range(30):
            optimizer.zero_grad()
            torch.nn.functional.cross_entropy(model(x[:32]), y[:32]).backward()
            optimizer.step()
    assert loud(nbkit.load(tmp_path / "no-loss").findings()) == []

"""Findings over per-unit profiles: eps-dominated per set of units, damped-units, dead-units counted exactly.

Real data: sklearn.datasets.load_digits. The ε check follows Adam's update rule (Kingma & Ba 2015,
Algorithm 1): where √v̂ ≪ ε the step is lr·m̂/ε, so columns whose inputs are scaled by 1e-6 are
ε-dominated while the other columns are not.
"""
from __future__ import annotations

import pytest
import torch

import nbkit
from nbkit.analyze.findings import Thresholds
from tests.test_profiles import digits as profile_digits

SCALED = [4, 5, 6]


def digits(n=1024, scale_columns=None, busiest=None):
    """The first n digits, as tests/test_profiles.py makes them (busiest=k: the k pixels most often non-zero)."""
    return profile_digits(n, scale_columns, busiest)


def train(model, optimizer, x, y, path, steps, *, lr_at=None, after_step=None, forward=None, **options):
    """A plain recorded loop over batches of 32. lr_at(step) sets the learning rate; after_step(step) runs
    in an optimizer post-hook registered before the recorder's, so the recorder sees what it did."""
    criterion = torch.nn.CrossEntropyLoss()
    generator = torch.Generator().manual_seed(0)
    if after_step is not None:
        optimizer.register_step_pre_hook(after_step.before)
        optimizer.register_step_post_hook(after_step.after)
    with nbkit.record(model, optimizer, path, criterion=criterion, keyframe_every=1000, **options):
        for step in range(steps):
            if lr_at is not None:
                for group in optimizer.param_groups:
                    group["lr"] = lr_at(step)
            rows = torch.randint(0, len(x), (32,), generator=generator)
            optimizer.zero_grad()
            criterion((forward or model)(x[rows]), y[rows]).backward()
            optimizer.step()
    return nbkit.load(path)


def of_kind(findings, kind):
    return [f for f in findings if f.kind == kind]


# --- eps-dominated per set of units -----------------------------------------------------------------
@pytest.mark.parametrize("names", [False, True], ids=["indices", "unit-names"])
def test_eps_dominated_names_exactly_the_three_scaled_columns(tmp_path, names):
    x, y = digits(scale_columns=SCALED, busiest=32)
    torch.manual_seed(0)
    model = torch.nn.Sequential(torch.nn.Linear(32, 10))
    given = [f"pixel {i}" for i in range(32)]
    run = train(model, torch.optim.Adam(model.parameters(), lr=1e-2, eps=1e-6), x, y, tmp_path / "run", 120,
                every=1, unit_names={"0.weight": {"columns": given}} if names else None)
    found = of_kind(run.findings(), "eps-dominated")
    assert len(found) == 1, found
    f = found[0]
    expected = [given[u] for u in SCALED] if names else [str(u) for u in SCALED]
    assert f.tensors == ["0.weight"] and f.units == {"0.weight": {"columns": expected}}
    assert f.suggestion.lower().startswith("columns 4, 5, 6") and " of 0.weight:" in f.suggestion
    assert "replay" in f.suggestion
    assert all(name in f.suggestion for name in expected)
    # the tensor as a whole is not dominated (3 of 32 columns), the three columns are
    assert f.evidence["tensor_eps_share"] < Thresholds().eps_share < f.evidence["median_eps_share"]
    assert f.evidence["units"] == 3 and f.evidence["unit_grad_ratio"] < 1e-4
    # the same run without profiles keeps the tensor-level rule only, which stays quiet here
    torch.manual_seed(0)
    model = torch.nn.Sequential(torch.nn.Linear(32, 10))
    plain = train(model, torch.optim.Adam(model.parameters(), lr=1e-2, eps=1e-6), x, y, tmp_path / "plain", 120,
                  every=1, profiles=False)
    assert of_kind(plain.findings(), "eps-dominated") == []


def test_eps_dominated_stays_quiet_with_the_columns_in_their_unit(tmp_path):
    x, y = digits(busiest=32)
    torch.manual_seed(0)
    model = torch.nn.Sequential(torch.nn.Linear(32, 10))
    run = train(model, torch.optim.Adam(model.parameters(), lr=1e-2, eps=1e-6), x, y, tmp_path / "run", 120, every=1)
    assert of_kind(run.findings(), "eps-dominated") == []


# --- damped-units -------------------------------------------------------------------------------------
class CutUpdates:
    """A planted per-unit learning-rate mask: after each step, rows `rows` of `weight` keep only `keep` of
    their update (as a mask applied after the optimizer would)."""

    def __init__(self, weight, rows, keep=1e-3):
        self.weight, self.rows, self.keep = weight, rows, keep

    def before(self, optimizer, args, kwargs):
        self.saved = self.weight.detach()[self.rows].clone()

    def after(self, optimizer, args, kwargs):
        with torch.no_grad():
            w = self.weight[self.rows]
            self.weight[self.rows] = self.saved + self.keep * (w - self.saved)


def mlp(seed=0):
    """Tanh hidden units: none dies on its own (a ReLU may), so only planted faults are found."""
    torch.manual_seed(seed)
    return torch.nn.Sequential(torch.nn.Linear(64, 64), torch.nn.Tanh(), torch.nn.Linear(64, 10))


OPTIMIZERS = {"adam": lambda ps: torch.optim.Adam(ps, lr=1e-3),
              "sgd-momentum": lambda ps: torch.optim.SGD(ps, lr=0.05, momentum=0.9),
              "sgd": lambda ps: torch.optim.SGD(ps, lr=0.1)}


@pytest.mark.parametrize("optimizer", OPTIMIZERS)
def test_damped_units_names_the_rows_whose_updates_are_cut(tmp_path, optimizer):
    x, y = digits()
    model = mlp()
    cut = CutUpdates(model[0].weight, slice(0, 8))
    run = train(model, OPTIMIZERS[optimizer](model.parameters()), x, y, tmp_path / "cut", 80, every=1, after_step=cut)
    found = of_kind(run.findings(), "damped-units")
    assert len(found) == 1, found
    f = found[0]
    assert f.units == {"0.weight": {"rows": [str(u) for u in range(8)]}} and f.severity == "warning"
    assert f.first_step < 20 and f.last_step > 60
    assert f.evidence["median_update_ratio"] < Thresholds().damped_update
    assert f.evidence["median_gain_ratio"] < Thresholds().damped_gain
    assert f.suggestion.lower().startswith("rows 0, 1, 2") and "replay" in f.suggestion
    # the same run without the cut: quiet (Adam's equal update RMS across units, SGD's small updates for
    # small gradients are normal)
    model = mlp()
    healthy = train(model, OPTIMIZERS[optimizer](model.parameters()), x, y, tmp_path / "healthy", 80, every=1)
    assert of_kind(healthy.findings(), "damped-units") == []
    # a milder cut (a third of the update) is not "far below"
    model = mlp()
    mild = train(model, OPTIMIZERS[optimizer](model.parameters()), x, y, tmp_path / "mild", 80, every=1,
                 after_step=CutUpdates(model[0].weight, slice(0, 8), keep=0.3))
    assert of_kind(mild.findings(), "damped-units") == []


# --- dead-units from exact zero gradients ------------------------------------------------------------------
def silenced(model, zero=20, tiny=10):
    """model's forward with hidden units 0..zero-1 multiplied by exactly 0 (their input rows get an exactly
    zero gradient) and the next `tiny` by 1e-20 (a tiny gradient that is not zero)."""
    scale = torch.ones(64)
    scale[:zero] = 0.0
    scale[zero:zero + tiny] = 1e-20
    return lambda xb: model[2](model[1](model[0](xb)) * scale)


def test_dead_units_counts_exact_zero_gradients_and_names_those_rows(tmp_path):
    x, y = digits()
    model = mlp()
    run = train(model, torch.optim.SGD(model.parameters(), lr=0.05), x, y, tmp_path / "dead", 80, every=1,
                forward=silenced(model))
    found = of_kind(run.findings(), "dead-units")
    assert [f.tensors for f in found] == [["0.weight"]], found
    assert found[0].units == {"0.weight": {"rows": [str(u) for u in range(20)]}}      # not the tiny ones
    assert found[0].evidence["min_dead_share"] == 20 / 64 and found[0].severity == "info"
    assert found[0].first_step == 0 and "replay" in found[0].suggestion


def test_dead_units_is_quiet_while_the_learning_rate_is_zero(tmp_path):
    x, y = digits()
    model = mlp()
    frozen = train(model, torch.optim.SGD(model.parameters(), lr=0.05), x, y, tmp_path / "frozen", 80, every=1,
                   forward=silenced(model), lr_at=lambda step: 0.0)
    assert of_kind(frozen.findings(), "dead-units") == []
    model = mlp()
    later = train(model, torch.optim.SGD(model.parameters(), lr=0.05), x, y, tmp_path / "later", 120, every=1,
                  forward=silenced(model), lr_at=lambda step: 0.0 if step < 50 else 0.05)
    found = of_kind(later.findings(), "dead-units")
    assert len(found) == 1 and found[0].first_step == 50, found
    # without profiles the old series path still judges the weight (it does not read the learning rate)
    model = mlp()
    old = train(model, torch.optim.SGD(model.parameters(), lr=0.05), x, y, tmp_path / "old", 80, every=1,
                forward=silenced(model), profiles=False)
    found = of_kind(old.findings(), "dead-units")
    assert [f.tensors for f in found] == [["0.weight"]] and found[0].units == {}


# --- the demo ----------------------------------------------------------------------------------------------
@pytest.mark.slow
def test_demo_eps_dominated_names_the_three_light_columns_of_the_first_layer(tmp_path):
    from nbkit.demo import scenario

    run, _ = scenario.train_first_run(tmp_path / "first-run")
    findings = run.findings()
    assert {"orphan", "eps-dominated", "over-stability-limit", "grad-spike", "oversized-updates"} <= \
        {f.kind for f in findings}
    eps = of_kind(findings, "eps-dominated")
    assert len(eps) == 1 and eps[0].units == {"sensors.0.weight": {"columns": list(scenario.SENSORS[scenario.LIGHT])}}
    assert of_kind(findings, "damped-units") == [] and of_kind(findings, "dead-units") == []

"""Findings over per-unit profiles: eps-dominated per set of units, damped-units, dead-units counted exactly.

Real data: sklearn.datasets.load_digits. The ε check follows Adam's update rule (Kingma & Ba 2015,
Algorithm 1): where √v̂ ≪ ε the step is lr·m̂/ε, so columns whose inputs are scaled by 1e-6 are
ε-dominated while the other columns are not.
"""
from __future__ import annotations

import pytest
import torch
from sklearn.datasets import load_digits

import nbkit
from nbkit.analyze.findings import Thresholds

SCALED = [4, 5, 6]


def digits(n=1024, scale_columns=None, busiest=None):
    """The first n digits as (x in [0, 1], labels); busiest=k keeps the k pixels most often non-zero."""
    data = load_digits()
    x = torch.tensor(data.data[:n] / 16.0, dtype=torch.float32)
    if busiest is not None:
        x = x[:, torch.argsort((x > 0).sum(0), descending=True, stable=True)[:busiest]]
    if scale_columns is not None:
        x[:, scale_columns] *= 1e-6
    return x, torch.tensor(data.target[:n])


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
    assert f.suggestion.lower().startswith("columns 4, 5, 6") and " of 0.weight:" in f.suggestion and "replay" in f.suggestion
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

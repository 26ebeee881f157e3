"""A step_fn that fails: reported once with its traceback, training goes on; one that returns something
other than a scalar loss tensor with a gradient: the warning names what it returned. The recorder meets a
step_fn first at its trained-loss check (step 0), which then keeps the estimates from using it."""
from __future__ import annotations

import warnings

import numpy as np
import pytest
import torch

import nbkit


X, Y = torch.randn(16, 4, generator=torch.Generator().manual_seed(3)), torch.randn(16, 1, generator=torch.Generator().manual_seed(4))


def train(tmp_path, step_fn, steps=12):
    torch.manual_seed(0)
    model = torch.nn.Sequential(torch.nn.Linear(4, 8), torch.nn.Tanh(), torch.nn.Linear(8, 1))
    optimizer = torch.optim.SGD(model.parameters(), lr=0.05)
    x, y = X, Y
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        rec = nbkit.record(model, optimizer, tmp_path / "run", every=1, curvature_every=4, step_fn=step_fn)
        for _ in range(steps):
            optimizer.zero_grad()
            loss = torch.nn.functional.mse_loss(model(x), y)
            loss.backward()
            rec.loss(loss)
            optimizer.step()
        rec.close()
    said = [str(w.message) for w in caught if issubclass(w.category, nbkit.RecorderWarning)]
    return nbkit.load(tmp_path / "run"), said


def loss_of(model, batch):
    """The loop's loss for a kept micro-batch: the model's input is kept, the targets are Y."""
    return torch.nn.functional.mse_loss(model(*batch["args"]), Y)


def broken_step_fn(model, batch):
    raise ValueError("the user's loss code broke")


def test_a_step_fn_that_raises_is_reported_once_with_its_traceback(tmp_path):
    run, said = train(tmp_path, broken_step_fn)
    failures = [s for s in said if "broken_step_fn" in s]
    assert len(failures) == 1, said
    assert "Traceback" in failures[0] and "broken_step_fn" in failures[0] and "the user's loss code broke" in failures[0]
    assert len(run.steps) == 12 and np.isnan(run.series("sharpness")).all()


@pytest.mark.parametrize("returned, named", [
    (lambda model, batch: model(batch["args"][0]).sum(1), "shape (16,)"),
    (lambda model, batch: torch.tensor(1.0), "without grad"),
    (lambda model, batch: 1.0, "a float"),
], ids=["non-scalar", "no-grad", "a-float"])
def test_a_step_fn_returning_no_scalar_loss_tensor_is_named(tmp_path, returned, named):
    run, said = train(tmp_path, returned)
    failures = [s for s in said if "must be a scalar tensor that requires grad" in s]
    assert len(failures) == 1, said
    assert named in failures[0], failures[0]
    assert len(run.steps) == 12


def test_a_step_fn_that_raises_later_during_an_estimate_is_reported_once_with_its_traceback(tmp_path):
    calls = []

    def flaky_step_fn(model, batch):
        calls.append(1)
        if len(calls) > 1:                     # the trained-loss check at step 0 passes; estimates then fail
            raise RuntimeError("data-dependent failure in the loss code")
        return loss_of(model, batch)

    run, said = train(tmp_path, flaky_step_fn)
    failures = [s for s in said if "sharpness estimate failed" in s]
    assert len(failures) == 1, said
    assert "Traceback" in failures[0] and "flaky_step_fn" in failures[0]
    assert len(calls) > 2                      # every estimate tried it again; training went on
    assert len(run.steps) == 12 and np.isnan(run.series("sharpness")).all()

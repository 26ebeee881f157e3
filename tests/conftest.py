"""Shared fixtures: tiny models and recordings made in a temporary folder."""

import pytest
import torch


@pytest.fixture(autouse=True)
def _deterministic_threads():
    torch.set_num_threads(1)
    yield


@pytest.fixture
def tiny_classifier():
    torch.manual_seed(0)
    model = torch.nn.Sequential(torch.nn.Linear(8, 16), torch.nn.ReLU(), torch.nn.Linear(16, 3))
    generator = torch.Generator().manual_seed(0)
    inputs = torch.randn(256, 8, generator=generator)
    targets = (inputs[:, 0] > 0).long() + (inputs[:, 1] > 0).long()
    return model, inputs, targets


def train(model, optimizer, inputs, targets, steps, *, batch=32, criterion=None, seed=0, rec=None):
    """A plain training loop written without nbkit in mind; returns the losses."""
    criterion = criterion or torch.nn.CrossEntropyLoss()
    generator = torch.Generator().manual_seed(seed)
    losses = []
    for _ in range(steps):
        rows = torch.randint(0, len(inputs), (batch,), generator=generator)
        optimizer.zero_grad()
        loss = criterion(model(inputs[rows]), targets[rows])
        loss.backward()
        optimizer.step()
        losses.append(loss.item())
    return losses

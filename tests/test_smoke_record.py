"""The two-line promise: a loop written without nbkit is recorded by record() + close()."""
import numpy as np
import torch

import nbkit
from conftest import train


def test_two_lines_record_a_plain_loop(tmp_path, tiny_classifier):
    model, inputs, targets = tiny_classifier
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-2)
    criterion = torch.nn.CrossEntropyLoss()
    rec = nbkit.record(model, optimizer, tmp_path / "x", criterion=criterion, keyframe_every=10)
    losses = train(model, optimizer, inputs, targets, 25, criterion=criterion)
    rec.close()
    run = nbkit.load(tmp_path / "x")
    assert run.steps.tolist() == list(range(25))
    np.testing.assert_allclose(run.loss, losses, rtol=1e-6)
    assert run.tensors == ["0.weight", "0.bias", "2.weight", "2.bias"]
    assert run.layers == {"0": ["0.weight", "0.bias"], "2": ["2.weight", "2.bias"]}
    assert run.keyframes == [0, 10, 20, 25]
    assert run.series("grad_norm").shape == (25, 4)
    # a 3-coordinate bias can have no positive gain at a step (median undefined); weights always do
    assert np.isfinite(run.series("gain_median")[:, [0, 2]]).all()
    assert run.closed_cleanly

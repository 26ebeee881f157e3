"""Parameters in float64 and bfloat16 are recorded (strict mode: any recorder error fails the test)."""
import numpy as np
import pytest
import torch

import nbkit


@pytest.mark.parametrize("dtype", [torch.float64, torch.bfloat16])
def test_probe_updates_match_the_parameter_change_in_any_float_dtype(tmp_path, dtype):
    torch.manual_seed(0)
    model = torch.nn.Sequential(torch.nn.Linear(6, 5), torch.nn.Tanh(), torch.nn.Linear(5, 2)).to(dtype)
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-2)
    rec = nbkit.record(model, optimizer, tmp_path / "run", strict=True)
    changes = []
    for _ in range(4):
        before = model[0].weight.detach().clone()
        optimizer.zero_grad()
        model(torch.randn(16, 6, dtype=dtype)).square().mean().backward()
        optimizer.step()
        changes.append((model[0].weight.detach() - before).float().flatten())
    rec.close()
    run = nbkit.load(tmp_path / "run")
    index = run.probe_index("0.weight")
    measured = np.stack([c[index].numpy() for c in changes])
    np.testing.assert_allclose(run.probes("0.weight")["update"], measured, rtol=1e-6, atol=0)
    assert np.isfinite(run.series("grad_norm")).all()
    assert run.meta["tensors"][0]["dtype"] == str(dtype).replace("torch.", "")

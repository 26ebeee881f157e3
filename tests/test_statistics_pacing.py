"""When the per-step statistics run (nbkit.record.pacing.Pacer): held until the next forward pass
ends, or started at once. Holding changes when the numbers are computed, never what they are."""
import threading

import numpy as np
import torch
from torch import nn

import nbkit
from nbkit.measure.quantities import QUANTITIES


def _model(seed):
    torch.manual_seed(seed)
    return nn.Sequential(nn.Linear(6, 32), nn.Tanh(), nn.Linear(32, 1))


def _batches(n, seed=1):
    generator = torch.Generator().manual_seed(seed)
    return [(torch.randn(16, 6, generator=generator), torch.randn(16, 1, generator=generator)) for _ in range(n)]


def _record(path, batches, *, background, hold_always):
    model = _model(0)
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-2)
    rec = nbkit.record(model, optimizer, path, criterion=nn.MSELoss())
    rec.background = background
    if hold_always:
        rec.pacer.HOLD_BELOW = float("inf")        # hold whenever both durations are known
    held = []
    for x, y in batches:
        optimizer.zero_grad()
        loss = rec.criterion(model(x), y)
        loss.backward()
        optimizer.step()
        held.append(rec.pacer.held is not None and rec.pacer.held.future is None)
    rec.close()
    return nbkit.load(path), held


def test_held_statistics_equal_those_computed_in_the_hook(tmp_path):
    batches = _batches(12)
    held_run, held = _record(tmp_path / "held", batches, background=True, hold_always=True)
    here_run, _ = _record(tmp_path / "here", batches, background=False, hold_always=False)
    assert sum(held) >= 9                 # from the second or third step on, each step's task was held
    assert held[-1]                       # the last one too: close() had to start it
    for q in QUANTITIES:
        np.testing.assert_array_equal(held_run.series(q), here_run.series(q), err_msg=q)
    assert np.isfinite(held_run.series("update_norm")).all()          # the rows hold values, not gaps


def test_a_held_task_starts_when_the_forward_pass_ends(tmp_path):
    model = _model(0)
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-2)
    rec = nbkit.record(model, optimizer, tmp_path / "r")
    rec.pacer.HOLD_BELOW = float("inf")
    x, y = _batches(1)[0]
    try:
        for _ in range(3):
            optimizer.zero_grad()
            nn.functional.mse_loss(model(x), y).backward()
            optimizer.step()
        task = rec.pacer.held
        assert task is not None and task.future is None
        with torch.no_grad():
            model(x)                       # any forward pass ends the hold
        assert rec.pacer.held is None and task.future is not None
        task.result()
    finally:
        rec.close()


def test_two_recorders_stepping_in_turn_never_wait_on_each_other(tmp_path):
    """Two models trained alternately in one loop (as in adversarial training), both holding their
    statistics: each optimizer step waits only for its own recorder's task."""
    models = [_model(0), _model(1)]
    optimizers = [torch.optim.Adam(m.parameters(), lr=1e-2) for m in models]
    recs = [nbkit.record(m, o, tmp_path / f"r{k}") for k, (m, o) in enumerate(zip(models, optimizers))]
    for rec in recs:
        rec.pacer.HOLD_BELOW = float("inf")
    batches = _batches(15)

    def loop():
        for x, y in batches:
            for model, optimizer in zip(models, optimizers):
                optimizer.zero_grad()
                nn.functional.mse_loss(model(x), y).backward()
                optimizer.step()

    worker = threading.Thread(target=loop, daemon=True)
    worker.start()
    worker.join(timeout=120)
    assert not worker.is_alive(), "the loop is stuck: one recorder waits for the other's statistics"
    for rec in recs:
        rec.close()
    for k in range(2):
        run = nbkit.load(tmp_path / f"r{k}")
        assert len(run.steps) == 15 and np.isfinite(run.series("grad_norm")).all()

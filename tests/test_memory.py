"""Bounded resources: resident memory does not grow with the number of recorded steps."""
import gc

import psutil
import pytest
import torch

import nbkit

STEPS = 20_000
WARMUP = 5_000
# The bound: after a 5,000-step warm-up (caches, the first chunks, allocator pools, zarr's thread
# pools: measured here, resident memory rises about 29 MB in the first 4,000 steps, then 4 MB over
# the next 36,000 with the Python heap flat at 0.7-0.9 MB), 15,000 more steps may add at most this
# much. A recorder that kept one small row per step would add well over this (each row holds
# ~5 KB of summaries and histograms for this model: 15,000 rows = 75 MB). A 2,000-step warm-up was
# too short on a loaded machine (25.7 MB seen in one CI-like run).
GROWTH_BOUND_MB = 16


@pytest.mark.slow
def test_resident_memory_growth_over_20000_steps_is_bounded(tmp_path):
    torch.manual_seed(0)
    model = torch.nn.Sequential(torch.nn.Linear(4, 8), torch.nn.Tanh(), torch.nn.Linear(8, 2))
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-2)
    criterion = torch.nn.MSELoss()
    x, y = torch.randn(8, 4), torch.randn(8, 2)
    process = psutil.Process()
    rec = nbkit.record(model, optimizer, tmp_path / "r", criterion=criterion, every=10, probes=8,
                       keyframe_every=1000, commit_seconds=1.0)
    for step in range(STEPS):
        if step == WARMUP:
            rec.flush()
            gc.collect()
            start = process.memory_info().rss
        optimizer.zero_grad()
        criterion(model(x), y).backward()
        optimizer.step()
    rec.flush()
    gc.collect()
    growth_mb = (process.memory_info().rss - start) / 2**20
    rec.close()
    run = nbkit.load(tmp_path / "r")
    assert len(run) == STEPS and run.closed_cleanly
    report = run.size_report()
    print(f"resident memory growth over steps {WARMUP}..{STEPS}: {growth_mb:.1f} MB; "
          f"recording {report['total'] / 2**20:.1f} MiB, {report['row_bytes_per_step']:.0f} bytes of rows per step")
    assert growth_mb < GROWTH_BOUND_MB

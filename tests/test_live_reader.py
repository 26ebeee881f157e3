"""A second process reads a recording while the first records 2,000+ steps: it grows, and no step is torn."""
import subprocess
import sys
import textwrap
import time
import warnings

import numpy as np
import pytest

import nbkit

STEPS = 2400
WRITER = textwrap.dedent("""
    import sys, torch, nbkit
    torch.set_num_threads(1)
    torch.manual_seed(0)
    model = torch.nn.Sequential(torch.nn.Linear(6, 12), torch.nn.Tanh(), torch.nn.Linear(12, 3))
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-2)
    criterion = torch.nn.CrossEntropyLoss()
    with nbkit.record(model, optimizer, sys.argv[1], criterion=criterion, probes=8, keyframe_every=500, every=1,
                      commit_seconds=0.1):
        for step in range(int(sys.argv[2])):
            optimizer.zero_grad()
            criterion(model(torch.randn(16, 6)), torch.randint(0, 3, (16,))).backward()
            optimizer.step()
""")


@pytest.mark.slow
def test_reader_in_another_process_never_sees_a_torn_step(tmp_path):
    path = tmp_path / "live"
    writer = subprocess.Popen([sys.executable, "-c", WRITER, str(path), str(STEPS)])
    seen, reads = [], 0
    try:
        deadline = time.monotonic() + 300
        while time.monotonic() < deadline:
            finished = writer.poll() is not None
            if (path / "committed.json").exists():
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    run = nbkit.load(path)
                n = len(run)
                if n:
                    steps = run.steps
                    assert steps.tolist() == list(range(n))                     # whole steps only
                    assert np.isfinite(run.loss).all() and len(run.loss) == n
                    grad_norm = run.series("grad_norm")
                    assert grad_norm.shape == (n, 4) and np.isfinite(grad_norm).all()
                    probes = run.probes("0.weight")["grad"]
                    assert probes.shape == (n, 8) and np.isfinite(probes).all()
                    _, overview = run.overview("grad_norm")
                    assert np.isfinite(overview).all()
                    reads += 1
                seen.append(n)
            if finished:
                break
            time.sleep(0.02)
    finally:
        if writer.poll() is None:
            writer.kill()
    assert writer.wait() == 0
    assert seen == sorted(seen)                                  # the recording only grows
    assert len(set(seen)) >= 5 and reads >= 10, (len(set(seen)), reads)   # it was read while growing
    run = nbkit.load(path)
    assert run.closed_cleanly and len(run) == STEPS

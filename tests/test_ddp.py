"""DDP on gloo with two CPU processes started by torchrun: one recording, local gradients opt-in."""
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import nbkit

TORCHRUN = Path(sys.executable).with_name("torchrun")


@pytest.mark.slow
def test_two_ranks_record_once_and_local_gradients_average_to_the_recorded_one(tmp_path):
    env = {**os.environ, "OMP_NUM_THREADS": "1"}
    result = subprocess.run([str(TORCHRUN), "--nproc_per_node=2", "--standalone",
                             str(Path(__file__).with_name("_ddp_worker.py")), str(tmp_path), "local"],
                            capture_output=True, text=True, timeout=240, env=env)
    assert result.returncode == 0, result.stdout[-3000:] + result.stderr[-3000:]
    ranks = [json.loads((tmp_path / f"rank{r}.json").read_text()) for r in (0, 1)]
    assert [r["recorder"] for r in ranks] == ["Recorder", "InactiveRecorder"]
    assert ranks[0]["active"] and not ranks[1]["active"]
    assert ranks[0]["weight"] == ranks[1]["weight"]          # DDP kept the replicas identical

    run = nbkit.load(tmp_path / "run")
    assert run.closed_cleanly and run.steps.tolist() == list(range(12))
    assert run.tensors == ["0.weight", "0.bias", "2.weight", "2.bias"]   # no "module." prefix
    assert run.meta["distributed"]["world_size"] == 2 and run.meta["distributed"]["rank"] == 0
    assert run.meta["distributed"]["local_gradients"]
    for tensor in run.tensors:
        local = run.local_gradients(tensor)
        assert local["step"].tolist() == run.steps.tolist()
        assert local["grad"].shape[1] == 2
        # different data on each rank: the local gradients differ ...
        assert np.abs(local["grad"][:, 0] - local["grad"][:, 1]).max() > 1e-3
        assert not np.allclose(local["grad_norm"][:, 0], local["grad_norm"][:, 1])
        # ... and their mean is the averaged gradient the recorder saw after the all-reduce
        np.testing.assert_allclose(local["grad"].mean(axis=1), run.probes(tensor)["grad"], rtol=1e-5, atol=1e-7)
        # the norm of the average is at most the mean of the norms (triangle inequality)
        assert (run.series("grad_norm", tensor) <= local["grad_norm"].mean(axis=1) * (1 + 1e-5)).all()


def test_outside_distributed_record_returns_a_recorder_and_no_rank_meta(tmp_path, tiny_classifier):
    import torch

    model, _, _ = tiny_classifier
    rec = nbkit.record(model, torch.optim.SGD(model.parameters(), lr=0.1), tmp_path / "r")
    rec.close()
    assert isinstance(rec, nbkit.Recorder) and "distributed" not in nbkit.load(tmp_path / "r").meta

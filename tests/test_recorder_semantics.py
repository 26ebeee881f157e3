"""What the recorder attributes to which step, and how it survives awkward training loops.

Loss attribution, step numbering and keyframe timing follow DESIGN.md section 3; the other checks
measure the expected value in the test itself (NumPy or plain torch) and compare.
"""
import warnings

import numpy as np
import pytest
import torch
from torch import nn

import nbkit
from conftest import train


def _data(n=64, d=8, seed=0):
    generator = torch.Generator().manual_seed(seed)
    x = torch.randn(n, d, generator=generator)
    return x, (x[:, 0] > 0).long()


def _mlp(seed=0):
    torch.manual_seed(seed)
    return nn.Sequential(nn.Linear(8, 16), nn.ReLU(), nn.Linear(16, 2))


# --- loss attribution (DESIGN.md section 3) -------------------------------------------------------
def test_rec_loss_before_and_after_step_and_criterion_mean_over_micro_batches(tmp_path):
    model, (x, y) = _mlp(), _data()
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    criterion = nn.CrossEntropyLoss()
    rec = nbkit.record(model, optimizer, tmp_path / "r", criterion=criterion)
    expected = []
    # step 0: reported before the step -> belongs to step 0 (wins over the criterion)
    optimizer.zero_grad()
    criterion(model(x[:16]), y[:16]).backward()
    rec.loss(123.0)
    optimizer.step()
    expected.append(123.0)
    # step 1: reported after the step, before the next forward -> belongs to step 1
    optimizer.zero_grad()
    criterion(model(x[16:32]), y[16:32]).backward()
    optimizer.step()
    rec.loss(torch.tensor(7.5))
    expected.append(7.5)
    # step 2: gradient accumulation over three micro-batches -> mean of the criterion outputs
    optimizer.zero_grad()
    micro = []
    for k in range(3):
        loss = criterion(model(x[8 * k:8 * k + 8]), y[8 * k:8 * k + 8])
        micro.append(loss.item())
        loss.backward()
    with torch.no_grad():                                  # an evaluation pass is not training
        criterion(model(x), y)
    optimizer.step()
    expected.append(np.mean(micro))
    # step 3: nothing reported, criterion in eval mode only -> NaN
    model.eval()
    optimizer.zero_grad()
    model(x).sum().backward()
    optimizer.step()
    expected.append(np.nan)
    rec.close()
    np.testing.assert_allclose(nbkit.load(tmp_path / "r").loss, expected, rtol=1e-6)


def test_closure_loss_is_the_first_evaluation(tmp_path):
    model, (x, y) = _mlp(), _data()
    optimizer = torch.optim.LBFGS(model.parameters(), lr=0.5, max_iter=5)
    criterion = nn.CrossEntropyLoss()
    first = []
    rec = nbkit.record(model, optimizer, tmp_path / "r")
    for _ in range(3):
        evaluations = []

        def closure():
            optimizer.zero_grad()
            loss = criterion(model(x), y)
            loss.backward()
            evaluations.append(loss.item())
            return loss

        optimizer.step(closure)
        assert len(evaluations) > 1                   # LBFGS evaluates several times per step
        first.append(evaluations[0])
    rec.close()
    np.testing.assert_allclose(nbkit.load(tmp_path / "r").loss, first, rtol=1e-6)


# --- parameter groups, schedulers, frozen, tied, missing gradients ----------------------------------
def test_parameter_groups_and_scheduler_learning_rates(tmp_path):
    model, (x, y) = _mlp(), _data()
    optimizer = torch.optim.Adam([{"params": model[0].parameters(), "lr": 0.01},
                                  {"params": model[2].parameters(), "lr": 0.002}])
    scheduler = torch.optim.lr_scheduler.StepLR(optimizer, step_size=2, gamma=0.5)
    used = []
    rec = nbkit.record(model, optimizer, tmp_path / "r")
    for s in range(5):
        optimizer.zero_grad()
        nn.functional.cross_entropy(model(x), y).backward()
        used.append([g["lr"] for g in optimizer.param_groups])      # the lr this step uses
        optimizer.step()
        scheduler.step()
    rec.close()
    run = nbkit.load(tmp_path / "r")
    assert run.lr.dtype == np.float64
    np.testing.assert_array_equal(run.lr, np.array(used))
    assert used[0] != used[-1]                                      # the scheduler did change it
    assert [g["params"] for g in run.meta["param_groups"]] == [["0.weight", "0.bias"], ["2.weight", "2.bias"]]


def test_frozen_tied_and_missing_gradients(tmp_path):
    class Tied(nn.Module):
        def __init__(self):
            super().__init__()
            self.embed = nn.Embedding(10, 4)
            self.frozen = nn.Linear(4, 4)
            self.unused = nn.Linear(4, 4)
            self.out = nn.Linear(4, 10, bias=False)
            self.out.weight = self.embed.weight                     # tied: one tensor, two modules
            self.frozen.requires_grad_(False)

        def forward(self, tokens):
            return self.out(self.frozen(self.embed(tokens)))

    torch.manual_seed(0)
    model = Tied()
    optimizer = torch.optim.Adam([p for p in model.parameters() if p.requires_grad], lr=0.01)
    rec = nbkit.record(model, optimizer, tmp_path / "r")
    for s in range(3):
        optimizer.zero_grad()
        tokens = torch.tensor([1, 2, 3, s])
        nn.functional.cross_entropy(model(tokens), tokens).backward()
        optimizer.step()
    rec.close()
    run = nbkit.load(tmp_path / "r")
    assert run.tensors == ["embed.weight", "unused.weight", "unused.bias"]     # tied counted once
    assert sorted(run.meta["frozen"]) == ["frozen.bias", "frozen.weight"]
    missing = run.series("grad_missing")
    assert missing[:, 0].tolist() == [0, 0, 0] and missing[:, 1:].tolist() == [[1, 1]] * 3
    assert np.isnan(run.series("grad_norm")[:, 1:]).all()
    weight = model.embed.weight
    assert np.isfinite(run.series("grad_norm")[:, 0]).all()
    assert run.meta["tensors"][0]["numel"] == weight.numel()


def test_sparse_gradient_is_skipped_with_a_warning(tmp_path):
    torch.manual_seed(0)
    model = nn.ModuleDict({"embed": nn.Embedding(10, 4, sparse=True), "head": nn.Linear(4, 2)})
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    rec = nbkit.record(model, optimizer, tmp_path / "r")
    with pytest.warns(nbkit.RecorderWarning, match="sparse gradient"):
        for s in range(2):
            optimizer.zero_grad()
            model["head"](model["embed"](torch.tensor([1, s]))).sum().backward()
            optimizer.step()
    rec.close()
    run = nbkit.load(tmp_path / "r")
    grad_norm = run.series("grad_norm")
    assert np.isnan(grad_norm[:, run.tensors.index("embed.weight")]).all()
    assert np.isfinite(grad_norm[:, run.tensors.index("head.weight")]).all()


def test_gradient_clipping_is_seen(tmp_path):
    model, (x, y) = _mlp(), _data()
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    rec = nbkit.record(model, optimizer, tmp_path / "r")
    clipped = []
    for _ in range(3):
        optimizer.zero_grad()
        (100 * nn.functional.cross_entropy(model(x), y)).backward()
        nn.utils.clip_grad_norm_(model.parameters(), max_norm=0.5)
        clipped.append([p.grad.norm().item() for p in model.parameters()])
        optimizer.step()
    rec.close()
    run = nbkit.load(tmp_path / "r")
    np.testing.assert_allclose(run.series("grad_norm"), clipped, rtol=1e-5)
    np.testing.assert_allclose(np.sqrt((run.series("grad_norm") ** 2).sum(axis=1)), 0.5, rtol=1e-4)


def test_subclass_calling_super_step_records_once(tmp_path):
    class Wrapped(torch.optim.SGD):
        def step(self, closure=None):
            return super().step(closure)

    model, (x, y) = _mlp(), _data()
    optimizer = Wrapped(model.parameters(), lr=0.1, momentum=0.9)
    rec = nbkit.record(model, optimizer, tmp_path / "r", strict=True)
    before, after = [], []
    for _ in range(4):
        optimizer.zero_grad()
        nn.functional.cross_entropy(model(x), y).backward()
        before.append(model[0].weight.detach().clone())
        optimizer.step()
        after.append(model[0].weight.detach().clone())
    rec.close()
    run = nbkit.load(tmp_path / "r")
    assert run.steps.tolist() == [0, 1, 2, 3]
    measured = [torch.linalg.vector_norm(a - b).item() for a, b in zip(after, before)]
    np.testing.assert_allclose(run.series("update_norm", "0.weight"), measured, rtol=1e-5)
    assert run.meta["optimizer"]["adapter"] == "SGD"


def test_nonfinite_gradients_are_recorded_not_raised(tmp_path):
    model, (x, y) = _mlp(), _data()
    optimizer = torch.optim.Adam(model.parameters(), lr=0.01)
    rec = nbkit.record(model, optimizer, tmp_path / "r")
    with warnings.catch_warnings():
        warnings.simplefilter("error")                  # no recorder warning either: it is data
        warnings.filterwarnings("ignore", ".*has no loss", nbkit.RecorderWarning)   # this loop gives no loss
        for s in range(3):
            optimizer.zero_grad()
            nn.functional.cross_entropy(model(x), y).backward()
            if s == 1:
                model[0].weight.grad[0, :3] = torch.tensor([float("nan"), float("inf"), -float("inf")])
            optimizer.step()
    rec.close()
    run = nbkit.load(tmp_path / "r")
    assert run.steps.tolist() == [0, 1, 2]
    nonfinite = run.series("nonfinite", "0.weight")
    assert nonfinite[:2].tolist() == [0, 3]
    assert run.series("update_nonfinite", "0.weight")[1] > 0             # Adam spread the NaN into θ
    assert nonfinite[2] > 3                                              # and the next forward into g
    _, counts = run.histogram("grad", "0.weight")
    assert counts.shape[0] == 3


# --- keyframes and RNG ---------------------------------------------------------------------------
def test_keyframe_holds_state_before_the_step_and_rng_before_the_batch(tmp_path):
    model, (x, y) = _mlp(), _data()
    model[1] = nn.Sequential(nn.Dropout(0.3), nn.ReLU())
    optimizer = torch.optim.Adam(model.parameters(), lr=0.01)
    rec = nbkit.record(model, optimizer, tmp_path / "r", keyframe_every=3)
    rng_before_batch, weights_before_step = {}, {}
    for s in range(7):
        rng_before_batch[s] = torch.get_rng_state().clone()
        rows = torch.randint(0, len(x), (16,))                 # the batch draws from the global RNG
        optimizer.zero_grad()
        nn.functional.cross_entropy(model(x[rows]), y[rows]).backward()
        weights_before_step[s] = model[0].weight.detach().clone()
        optimizer.step()
    rec.close()
    run = nbkit.load(tmp_path / "r")
    assert run.keyframes == [0, 3, 6, 7]
    for s in (0, 3, 6):
        state, optimizer_state = run.state_at(s)
        torch.testing.assert_close(state["0.weight"], weights_before_step[s], rtol=0, atol=0)
        assert torch.equal(run.keyframe(s)["rng"]["torch"], rng_before_batch[s])
    torch.testing.assert_close(run.state_at(7)[0]["0.weight"], model[0].weight.detach(), rtol=0, atol=0)


def test_recorded_run_with_dropout_is_bit_identical_to_unrecorded(tmp_path):
    def run_once(record):
        torch.manual_seed(1)
        model = nn.Sequential(nn.Linear(8, 32), nn.Dropout(0.5), nn.ReLU(), nn.Linear(32, 2))
        optimizer = torch.optim.Adam(model.parameters(), lr=0.01)
        x, y = _data()
        rec = nbkit.record(model, optimizer, tmp_path / "r", keyframe_every=2) if record else None
        for _ in range(6):
            rows = torch.randint(0, len(x), (16,))
            optimizer.zero_grad()
            nn.functional.cross_entropy(model(x[rows]), y[rows]).backward()
            optimizer.step()
        if rec:
            rec.close()
        return [p.detach().clone() for p in model.parameters()], torch.get_rng_state()

    plain, plain_rng = run_once(False)
    recorded, recorded_rng = run_once(True)
    assert all(torch.equal(a, b) for a, b in zip(plain, recorded))
    assert torch.equal(plain_rng, recorded_rng)


# --- precision and dead units --------------------------------------------------------------------
@pytest.mark.parametrize("dtype", [torch.float16, torch.bfloat16])
def test_lost_update_share_on_half_precision(tmp_path, dtype):
    torch.manual_seed(0)
    model = nn.Linear(16, 4).to(dtype)
    with torch.no_grad():                          # large weights: an update of ~1e-4 rounds away
        model.weight.copy_(torch.linspace(-64, 64, 64).view(4, 16).to(dtype))
    optimizer = torch.optim.SGD(model.parameters(), lr=1e-3)
    x = torch.randn(8, 16).to(dtype)
    rec = nbkit.record(model, optimizer, tmp_path / "r")
    expected = []
    for _ in range(3):
        optimizer.zero_grad()
        model(x).float().pow(2).mean().backward()
        before = model.weight.detach().clone()
        grad = model.weight.grad.detach().clone()
        optimizer.step()
        lost = (model.weight.detach() == before) & (grad != 0)      # measured here, in the dtype
        expected.append((lost.sum() / (grad != 0).sum()).item())
    rec.close()
    run = nbkit.load(tmp_path / "r")
    recorded = run.series("lost_update_share", "weight")
    np.testing.assert_allclose(recorded, expected, atol=1e-6)
    assert 0 < expected[0] < 1                        # some updates survive, some round away


def test_dead_rows_count_units_whose_relu_never_fires(tmp_path):
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(8, 16), nn.ReLU(), nn.Linear(16, 2))
    dead = [1, 4, 5, 11]
    with torch.no_grad():                             # these units' pre-activation is always < 0
        model[0].weight[dead] = 0.0
        model[0].bias[dead] = -1.0
    optimizer = torch.optim.SGD(model.parameters(), lr=0.01)
    rec = nbkit.record(model, optimizer, tmp_path / "r")
    x, y = _data()
    for _ in range(3):
        optimizer.zero_grad()
        nn.functional.cross_entropy(model(x), y).backward()
        measured = (model[0].weight.grad.abs().sum(dim=1) == 0).sum().item()
        optimizer.step()
    rec.close()
    run = nbkit.load(tmp_path / "r")
    assert measured == len(dead)
    assert run.series("dead_rows", "0.weight").tolist() == [len(dead)] * 3
    assert np.isnan(run.series("dead_rows", "0.bias")).all()          # rows are a weight's notion


def test_global_random_generators_untouched(tmp_path, tiny_classifier):
    model, inputs, targets = tiny_classifier
    optimizer = torch.optim.Adam(model.parameters(), lr=0.01)
    import random
    state = (torch.get_rng_state(), np.random.get_state()[1].copy(), random.getstate())
    rec = nbkit.record(model, optimizer, tmp_path / "r", keyframe_every=2)
    train(model, optimizer, inputs, targets, 5)      # its batches come from a private generator
    rec.close()
    assert torch.equal(torch.get_rng_state(), state[0])
    assert np.array_equal(np.random.get_state()[1], state[1])
    assert random.getstate() == state[2]


def test_recording_left_open_is_flushed_at_interpreter_exit(tmp_path):
    """DESIGN.md section 3: a Recorder also flushes at interpreter exit (no rec.close() here)."""
    import subprocess
    import sys
    from pathlib import Path

    script = (f"import sys; sys.path.insert(0, {str(Path(__file__).resolve().parents[1])!r})\n"
              "import torch, nbkit\n"
              "model = torch.nn.Linear(4, 2); optimizer = torch.optim.Adam(model.parameters())\n"
              f"rec = nbkit.record(model, optimizer, {str(tmp_path / 'r')!r})\n"
              "for _ in range(3):\n"
              "    optimizer.zero_grad(); model(torch.randn(5, 4)).sum().backward(); optimizer.step()\n")
    subprocess.run([sys.executable, "-c", script], check=True, timeout=120)
    run = nbkit.load(tmp_path / "r")
    assert run.steps.tolist() == [0, 1, 2]
    assert run.keyframes == [0, 3]
    assert run.closed_cleanly

"""Replays from kept batches (record(keep_batches=...)): accumulation, clipping and dropout replayed without
`batches` or step_fn; the trained-loss check; the random-state check; bad input; the byte budget.

Oracles: the recording itself (a self-replay on the same CPU and thread count must give it back bit for bit),
the values torch.nn.utils.clip_grad_norm_ returns and the formula its documentation gives, and
numpy.linalg.eigvalsh on an analytic Hessian.
"""
import os
import warnings

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from torch import nn

import nbkit
from nbkit.errors import RecorderWarning, ReplayError
from nbkit.store import batches as kept

MAX_NORM = 0.5
STEPS = 30

_data = torch.Generator().manual_seed(0)
INPUTS = torch.randn(512, 8, generator=_data)
CLASSES = (INPUTS[:, 0] > 0).long() + (INPUTS[:, 1] > 0).long()          # 3 classes
VALUES = INPUTS[:, 0] - INPUTS[:, 1]                                       # a regression target
CROSS_ENTROPY = nn.CrossEntropyLoss()


def rows(seed, size):
    return torch.randint(0, len(INPUTS), (size,), generator=torch.Generator().manual_seed(seed))


def classifier():
    torch.manual_seed(0)
    return nn.Sequential(nn.Linear(8, 16), nn.ReLU(), nn.Dropout(0.2), nn.Linear(16, 3))


def regressor(dropout=0.0):
    torch.manual_seed(0)
    return nn.Sequential(nn.Linear(8, 16), nn.Tanh(), nn.Dropout(dropout), nn.Linear(16, 1))


def micro_batch(step, i):
    index = rows(1000 * step + i, 8)
    return INPUTS[index], CLASSES[index]


def regression_batch(step):
    index = rows(step, 16)
    return INPUTS[index], VALUES[index]


def classification_batch(step):
    index = rows(step, 16)
    return INPUTS[index], CLASSES[index]


def messages(caught, category=RecorderWarning):
    return [str(w.message) for w in caught if issubclass(w.category, category)]


def record_accumulated(path, clip):
    """4 micro-batches per step (loss / 4, backward each), clip_grad_norm_ to MAX_NORM, dropout; returns
    (Recording, the total norms clip_grad_norm_ returned)."""
    model = classifier()
    optimizer = torch.optim.SGD(model.parameters(), lr=0.2, momentum=0.9)
    totals = []
    torch.manual_seed(1)                       # the dropout stream
    with nbkit.record(model, optimizer, path, criterion=CROSS_ENTROPY, keyframe_every=10, clip=clip, probes=8):
        for step in range(STEPS):
            optimizer.zero_grad()
            for i in range(4):
                x, y = micro_batch(step, i)
                (CROSS_ENTROPY(model(x), y) / 4).backward()
            totals.append(float(torch.nn.utils.clip_grad_norm_(model.parameters(), MAX_NORM)))
            optimizer.step()
    return nbkit.load(path), np.array(totals)


@pytest.fixture(scope="module")
def accumulated(tmp_path_factory):
    torch.set_num_threads(1)
    return record_accumulated(tmp_path_factory.mktemp("kept") / "clipped", clip=MAX_NORM)


# --- 1. accumulation, clipping, dropout ------------------------------------------------------------

def test_accumulated_clipped_dropout_run_replays_bit_exact_without_batches_or_step_fn(accumulated, tmp_path):
    run, totals = accumulated
    assert run.kept_steps == list(range(STEPS)) and run.meta["clip"]["max_norm"] == MAX_NORM
    assert run.meta["trained_loss"]["rebuildable"] and run.meta["trained_loss"]["rebuild"] == "criterion"
    for step in (0, 13, 29):                   # the kept micro-batches are what the loop fed, in order
        kept_step = run.kept_step(step)
        assert len(kept_step.micro_batches) == 4 and "cpu" in kept_step.rng
        for i, mb in enumerate(kept_step.micro_batches):
            x, y = micro_batch(step, i)
            assert torch.equal(mb["args"][0], x) and torch.equal(mb["targets"][0], y)
    # each micro-batch's loss was back-propagated divided by 4
    assert [run.kept_step(s).scales for s in range(STEPS)] == [[0.25] * 4] * STEPS

    runs = nbkit.replay(run, classifier(), start=12, to=tmp_path, progress=False)
    child = runs["recorded"]
    fidelity = child.meta["replay"]["fidelity"]
    assert child.steps.tolist() == list(range(12, STEPS))
    assert fidelity["identical"] and fidelity["steps"] == STEPS - 12, fidelity
    np.testing.assert_array_equal(child.loss, run.loss[12:])
    np.testing.assert_array_equal(child.clip_factor, run.clip_factor[12:])


def test_grad_norm_and_clip_factor_match_clip_grad_norm(accumulated):
    run, totals = accumulated
    # the pre-clip norm is the total norm torch.nn.utils.clip_grad_norm_ returned in the loop
    np.testing.assert_allclose(run.grad_norm, totals, rtol=1e-6)
    clipped, unclipped = totals > MAX_NORM * (1 + 1e-4), totals < MAX_NORM * (1 - 1e-4)
    assert clipped.sum() >= 3 and unclipped.sum() >= 3          # both kinds of steps happen
    factor = run.clip_factor
    assert (factor[clipped] < 1).all()
    assert (factor[unclipped] == 1.0).all()                     # exactly: clip_grad_norm_ multiplied by 1
    # torch.nn.utils.clip_grad_norm_ documentation: gradients scaled by max_norm / (total_norm + 1e-6)
    post = run.grad_norm[clipped] * factor[clipped]
    np.testing.assert_allclose(post, MAX_NORM, rtol=1e-5)
    np.testing.assert_allclose(factor[clipped], MAX_NORM / (totals[clipped] + 1e-6), rtol=1e-5)


def test_a_kept_replay_starts_from_the_latest_keyframe_before_start(accumulated, tmp_path):
    run, _ = accumulated
    assert 10 in run.keyframes
    child = nbkit.replay(run, classifier(), start=12, steps=2, to=tmp_path, progress=False)["recorded"]
    # a replay with batches= starts from max(k <= start) (nbkit/replay/plan.py make_plan): 10 here
    assert child.meta["replay"]["keyframe"] == 10


def test_without_the_clip_rule_the_measured_factor_replays_within_rounding(accumulated, tmp_path):
    clipped_run, _ = accumulated
    run, totals = record_accumulated(tmp_path / "unruled", clip=None)
    assert "clip" not in run.meta
    np.testing.assert_array_equal(run.loss, clipped_run.loss)   # record(clip=) does not change training
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)            # "differs from its parent": rounding, below
        child = nbkit.replay(run, classifier(), start=12, to=tmp_path / "r", progress=False)["recorded"]
    fidelity = child.meta["replay"]["fidelity"]
    assert fidelity["steps"] == STEPS - 12
    # Measured on this CPU: loss 1.2e-7, keyframe parameters 2.4e-7, probe grad 5e-8 and update 1.2e-7, while
    # fidelity["probes"] is 9.4e-3: it is the largest absolute difference over every probe field, and the
    # derived momentum_factor field (values up to ~1e3) dominates it. So grad and update are checked here.
    assert fidelity["loss"] <= 1e-5 * np.abs(run.loss).max()
    scale = max(float(v.abs().max()) for v in run.keyframe(20)["model"].values())
    assert fidelity["keyframes"] <= 1e-5 * scale
    for tensor in run.tensors:
        parent, replayed = run.probes(tensor), child.probes(tensor)
        for field in ("grad", "update"):
            expected = parent[field][12:]
            assert np.abs(replayed[field] - expected).max() <= 1e-5 * np.abs(expected).max(), (tensor, field)
    # the measured factor was re-applied: the replay clipped as the recording did (to float32 rounding)
    np.testing.assert_allclose(child.clip_factor, run.clip_factor[12:], rtol=1e-5)


# --- 2. a loss function (no criterion) and rec.keep -------------------------------------------------

def test_a_functional_loss_replays_bit_exact_with_a_step_fn_on_the_kept_targets(tmp_path):
    model = regressor(dropout=0.2)
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-2)
    torch.manual_seed(1)
    with nbkit.record(model, optimizer, tmp_path / "run", keyframe_every=5, probes=8) as rec:
        for step in range(15):
            x, y = regression_batch(step)
            rec.keep((x, y))
            optimizer.zero_grad()
            loss = F.mse_loss(model(x).squeeze(1) * 10, y)
            loss.backward()
            optimizer.step()
            rec.loss(loss)
    run = nbkit.load(tmp_path / "run")
    assert run.meta["trained_loss"]["rebuildable"] is False
    assert run.meta["trained_loss"]["checks"][0]["verdict"] is None
    for step in (0, 9):                  # "targets": what the loader yielded that the model did not receive
        (mb,), (x, y) = run.batch(step), regression_batch(step)
        assert len(mb["args"]) == 1 and torch.equal(mb["args"][0], x) and mb["kwargs"] == {}
        assert len(mb["targets"]) == 1 and torch.equal(mb["targets"][0], y)

    def step_fn(m, mb):
        return F.mse_loss(m(*mb["args"]).squeeze(1) * 10, mb["targets"][0])

    child = nbkit.replay(run, regressor(dropout=0.2), step_fn=step_fn, start=5, to=tmp_path / "r",
                         progress=False)["recorded"]
    assert child.meta["replay"]["fidelity"]["identical"], child.meta["replay"]["fidelity"]
    np.testing.assert_array_equal(child.loss, run.loss[5:])
    with pytest.raises(ReplayError, match="step_fn"):
        nbkit.replay(run, regressor(dropout=0.2), start=5, to=tmp_path / "r2", progress=False)


# --- 3. the trained-loss check on linear least squares ----------------------------------------------

N, D = 32, 5
_ls = torch.Generator().manual_seed(2)
DESIGN = torch.randn(N, D, generator=_ls)
RESPONSE = torch.randn(N, generator=_ls)
MSE = nn.MSELoss()


def true_loss(m, mb):
    return F.mse_loss(m(*mb["args"]).squeeze(1) * 10, mb["targets"][0])


def record_least_squares(path, **options):
    torch.manual_seed(0)
    model = nn.Linear(D, 1, bias=False)
    optimizer = torch.optim.SGD(model.parameters(), lr=1e-3)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        with nbkit.record(model, optimizer, path, criterion=MSE, curvature_every=1, probes=4, **options):
            for _ in range(3):
                optimizer.zero_grad()
                MSE(model(DESIGN).squeeze(1) * 10, RESPONSE).backward()
                optimizer.step()
    return nbkit.load(path), caught


def test_a_criterion_that_misses_the_loop_s_scaling_is_caught_and_step_fn_fixes_it(tmp_path):
    # the rebuild criterion(model(x), y) broadcasts (N, 1) against (N,): torch warns, and the gradient differs
    run, caught = record_least_squares(tmp_path / "criterion")
    found = messages(caught)
    assert any("does not give the trained gradient" in m and "step_fn" in m for m in found), found
    assert run.meta["trained_loss"]["checks"][0]["verdict"] == "different"
    assert not run.meta["trained_loss"]["rebuildable"]
    assert np.isnan(run.series("sharpness")).all()

    run, caught = record_least_squares(tmp_path / "step_fn", step_fn=true_loss)
    assert messages(caught) == []
    assert run.meta["trained_loss"]["checks"][0]["verdict"] == "bit-exact"
    # L(w) = (1/N)·|10·A w − y|²: Hessian 2/N · Aᵀ A · 100, constant, so the estimate after the update holds;
    # numpy.linalg.eigvalsh on it, within the recording's Lanczos tolerance 1e-3
    design = DESIGN.double().numpy()
    expected = np.linalg.eigvalsh(2 / N * design.T @ design * 100)[-1]
    sharp = run.series("sharpness")[:, 0]
    assert sharp[0] == pytest.approx(expected, rel=1e-3)
    np.testing.assert_allclose(sharp, expected, rtol=1e-3)


def test_with_strict_a_rebuilt_loss_that_misses_the_trained_gradient_raises(tmp_path):
    with pytest.raises(nbkit.RecorderError, match="does not give the trained gradient"):
        record_least_squares(tmp_path / "strict", strict=True)
    wrong = lambda m, mb: MSE(m(*mb["args"]).squeeze(1), *mb["targets"])     # the ×10 forgotten
    with pytest.raises(nbkit.RecorderError, match="fix step_fn"):
        record_least_squares(tmp_path / "wrong-step-fn", strict=True, step_fn=wrong)


# --- 4. the random-state check -----------------------------------------------------------------------

def test_a_step_fn_drawing_random_numbers_at_one_step_is_caught_by_the_random_state_check(tmp_path):
    model = classifier()
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    torch.manual_seed(1)
    with nbkit.record(model, optimizer, tmp_path / "run", criterion=CROSS_ENTROPY, keyframe_every=5, probes=8):
        for step in range(12):
            x, y = classification_batch(step)
            optimizer.zero_grad()
            CROSS_ENTROPY(model(x), y).backward()
            optimizer.step()
    run = nbkit.load(tmp_path / "run")
    drawing_at = run.batch(7)[0]["args"][0]

    def step_fn(m, mb, draw=True):
        if draw and torch.equal(mb["args"][0], drawing_at):
            torch.rand(1)                      # one extra draw from the global generator, at step 7 only
        return CROSS_ENTROPY(m(*mb["args"]), *mb["targets"])

    clean = nbkit.replay(run, classifier(), step_fn=lambda m, mb: step_fn(m, mb, draw=False), start=5,
                         to=tmp_path / "clean", progress=False)["recorded"]
    assert clean.meta["replay"]["fidelity"]["identical"]        # the same step_fn without the draw
    with pytest.raises(ReplayError, match=r"random state at step 7's first training forward differs"):
        nbkit.replay(run, classifier(), step_fn=step_fn, start=5, to=tmp_path / "r", progress=False)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        child = nbkit.replay(run, classifier(), step_fn=step_fn, start=5, to=tmp_path / "r", progress=False,
                             strict=False)["recorded"]
    found = messages(caught, UserWarning)
    assert any("random state at step 7's" in m for m in found), found
    assert any("differs from its parent: first difference at step 7" in m for m in found), found
    assert child.steps.tolist() == list(range(5, 12))
    info = child.meta["replay"]
    assert info["fingerprint_mismatches"] == [7]
    assert not info["fidelity"]["identical"] and info["fidelity"]["first_step"] == 7   # other dropout masks


# --- 5. bad input -------------------------------------------------------------------------------------

def record_regression(path, keep, steps=15, flush=False, after_step=None, **options):
    """A plain loop: rec.keep(keep(step, x, y)) unless keep is None, the loss from F.mse_loss (or from
    options["criterion"]) reported by rec.loss, after_step(step) last; returns (run, warnings)."""
    loss_fn = options.get("criterion") or F.mse_loss
    model = regressor()
    optimizer = torch.optim.SGD(model.parameters(), lr=1e-2)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        with nbkit.record(model, optimizer, path, keyframe_every=5, probes=8, **options) as rec:
            for step in range(steps):
                x, y = regression_batch(step)
                if keep is not None:
                    rec.keep(keep(step, x, y))
                optimizer.zero_grad()
                loss = loss_fn(model(x), y.unsqueeze(1))
                loss.backward()
                optimizer.step()
                rec.loss(loss)
                if flush:
                    rec.flush()                # the writer has handled this step before the next one
                if after_step is not None:
                    after_step(step)
    return nbkit.load(path), caught


def test_a_kept_batch_whose_structure_changes_warns_and_each_step_keeps_its_own(tmp_path):
    def structure(step, x, y):
        if step < 5:
            return x, y
        if step < 10:
            return {"x": x, "y": y}
        return x, y, 2 * y                     # an extra tensor

    run, caught = record_regression(tmp_path / "run", structure)
    changed = [m for m in messages(caught) if "structure changed" in m]
    assert len(changed) == 1 and "at step 5" in changed[0], messages(caught)
    assert run.meta["kept_layout_changes"] == [5, 10]
    assert run.kept_steps == list(range(15))
    _, y = regression_batch(2)
    (targets,) = run.batch(2)[0]["targets"]
    assert torch.equal(targets, y)
    _, y = regression_batch(7)
    targets = run.batch(7)[0]["targets"]
    assert isinstance(targets, dict) and list(targets) == ["y"] and torch.equal(targets["y"], y)
    _, y = regression_batch(12)
    targets = run.batch(12)[0]["targets"]
    assert isinstance(targets, tuple) and len(targets) == 2
    assert torch.equal(targets[0], y) and torch.equal(targets[1], 2 * y)


def test_an_unstorable_leaf_warns_once_naming_it_and_the_step_is_not_kept(tmp_path):
    leaf = object()
    run, caught = record_regression(tmp_path / "run", lambda s, x, y: (x, y, leaf) if s in (3, 6) else (x, y))
    found = [m for m in messages(caught) if "cannot keep" in m]
    assert len(found) == 1 and "[0]['targets'][1]" in found[0], messages(caught)
    assert run.kept_steps == [s for s in range(15) if s not in (3, 6)]
    assert len(run) == 15 and np.isfinite(run.loss).all()


def failing_from(first, real=kept.write_packed_steps):
    """The writer's group write, failing as a full disk does for groups that reach step `first`."""
    def write(root, items):
        if items[-1][0] >= first:
            raise OSError(28, "No space left on device")
        return real(root, items)
    return write


def test_a_full_disk_stops_keeping_batches_and_the_recording_goes_on(tmp_path, monkeypatch):
    monkeypatch.setattr(kept, "write_packed_steps", failing_from(7))
    run, caught = record_regression(tmp_path / "run", None, steps=20, flush=True)
    found = [m for m in messages(caught) if "keeping batches stopped" in m]
    assert len(found) == 1 and "No space left on device" in found[0], messages(caught)
    assert len(run) == 20 and np.isfinite(run.loss).all()
    assert run.kept_steps == list(range(7))
    assert "No space left on device" in run.meta["kept_batches"]["stopped"]


def test_a_full_disk_at_the_last_step_still_warns(tmp_path, monkeypatch):
    monkeypatch.setattr(kept, "write_packed_steps", failing_from(9))
    run, caught = record_regression(tmp_path / "run", None, steps=10, flush=True)
    assert "No space left on device" in run.meta["kept_batches"]["stopped"]   # the writer knew
    assert any("keeping batches stopped" in m for m in messages(caught)), messages(caught)


def test_a_kept_batch_changed_on_disk_fails_the_fingerprint_check(tmp_path):
    run, _ = record_regression(tmp_path / "run", None, steps=12, criterion=MSE)
    tampered = run.kept_step(7)
    (x,) = tampered.micro_batches[0]["args"]
    tampered.micro_batches[0]["args"] = (x + 1e-3,)
    kept.write_kept_step(run.path, 7, tampered)
    assert torch.equal(run.batch(7)[0]["args"][0], x + 1e-3)
    before = nbkit.replay(run, regressor(), start=5, steps=2, to=tmp_path / "before", progress=False)
    assert before["recorded"].meta["replay"]["fidelity"]["identical"]   # steps 5-6 are untouched
    with pytest.raises(ReplayError, match=r"batch at step 7 differs from the recording \(model inputs"):
        nbkit.replay(run, regressor(), start=5, to=tmp_path / "r", progress=False)


# --- 6. the byte budget ---------------------------------------------------------------------------------

def test_a_byte_budget_keeps_the_newest_windows_from_a_keyframe(tmp_path):
    probe, _ = record_regression(tmp_path / "one", None, steps=1, criterion=MSE)
    step_bytes = os.path.getsize(kept.kept_step_path(probe.path, 0))
    budget = int(12.5 * step_bytes)            # more than two keyframe strides, less than the run
    path = tmp_path / "run"
    on_disk = []                               # after each step (flush=True: the writer has handled it)
    run, caught = record_regression(path, None, steps=STEPS, flush=True, criterion=MSE, keep_batches=budget,
                                    after_step=lambda step: on_disk.append(kept.kept_bytes(path)))
    assert messages(caught) == []
    files = [os.path.getsize(kept.kept_step_path(path, s)) for s in run.kept_steps]
    assert kept.kept_bytes(path) == sum(files)
    assert len(on_disk) == STEPS and max(on_disk) <= budget + max(files)
    assert run.meta["kept_batches"]["budget_bytes"] == budget and run.meta["kept_batches"]["dropped"] > 0
    steps = run.kept_steps
    assert 0 < len(steps) < STEPS and steps == list(range(steps[0], STEPS))   # the newest, consecutive
    assert steps[0] in run.keyframes
    windows = run.replayable_windows
    assert windows and all(start in run.keyframes for start, _ in windows)
    start, end = windows[-1]
    child = nbkit.replay(run, regressor(), start=start + 1, steps=end - start, to=tmp_path / "in",
                         progress=False)["recorded"]
    assert child.meta["replay"]["fidelity"]["identical"]
    listed = ", ".join(f"{a}-{b}" for a, b in windows)
    with pytest.raises(ReplayError, match=f"cannot be replayed without `batches`.*{listed}"):
        nbkit.replay(run, regressor(), start=0, steps=3, to=tmp_path / "out", progress=False)


def test_a_budget_smaller_than_a_window_keeps_a_window_from_its_keyframe(tmp_path):
    """3 steps' worth of budget and keyframes every 5 steps: the window being written is never cut, so
    what stays starts at a keyframe; steps after the budget filled are not kept until the next keyframe."""
    probe, _ = record_regression(tmp_path / "one", None, steps=1, criterion=MSE)
    budget = int(3.5 * os.path.getsize(kept.kept_step_path(probe.path, 0)))
    run, caught = record_regression(tmp_path / "run", None, steps=STEPS, flush=True, criterion=MSE,
                                    keep_batches=budget)
    steps, windows = run.kept_steps, run.replayable_windows
    assert windows and steps[0] in run.keyframes and steps == list(range(steps[0], steps[0] + len(steps)))
    assert len(steps) <= 4 and windows[-1][0] == steps[0]

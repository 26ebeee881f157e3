"""Replays: bit-exact with the recorded optimizer, checked batches, swapped optimizers in lockstep.

The oracle is the original recording itself (loss, probe values, keyframe parameters): a replay on a
CPU with the same thread count must reproduce it bit for bit, dropout included.
"""

import numpy as np
import pytest
import torch

import nbkit
import replay_setup as rs
from nbkit.errors import ReplayError


@pytest.fixture(scope="module")
def recorded(tmp_path_factory):
    torch.set_num_threads(1)
    return rs.record_run(tmp_path_factory.mktemp("replay") / "run", steps=230, keyframe_every=50)


def assert_identical(parent, child):
    """Every common step's loss and probes, and every common keyframe, equal bit for bit."""
    common, a, b = np.intersect1d(parent.steps, child.steps, return_indices=True)
    assert len(common) == len(child.steps)
    np.testing.assert_array_equal(parent.loss[a], child.loss[b])
    for tensor in parent.tensors:
        pa, pb = parent.probes(tensor), child.probes(tensor)
        for field in ("grad", "update", "first_moment", "second_moment"):
            np.testing.assert_array_equal(pa[field][a], pb[field][b])
    shared = sorted(set(parent.keyframes) & set(child.keyframes))
    assert len(shared) >= 2
    for step in shared:
        for name, value in parent.keyframe(step)["model"].items():
            assert torch.equal(value, child.keyframe(step)["model"][name]), (step, name)


@pytest.mark.slow
def test_recorded_optimizer_replays_bit_exact_from_a_keyframe(recorded, tmp_path):
    runs = nbkit.replay(recorded, rs.make_model(seed=5), rs.step_fn, rs.Batches(), start=0, steps=230,
                        to=tmp_path, progress=False)
    child = runs["recorded"]
    assert child.steps.tolist() == list(range(230))
    assert_identical(recorded, child)
    info = child.meta["replay"]
    assert info["parent"] == str(recorded.path) and info["start"] == 0 and info["keyframe"] == 0
    assert info["fidelity"]["identical"] and info["fidelity"]["steps"] == 230
    for setting in ("every", "probes", "keyframe_every", "criterion"):
        assert child.meta[setting] == recorded.meta[setting], setting
    np.testing.assert_array_equal(child.fingerprints, recorded.fingerprints)      # targets row included


@pytest.mark.slow
def test_non_keyframe_start_is_reached_with_the_recorded_optimizer(recorded, tmp_path):
    runs = nbkit.replay(recorded, rs.make_model(), rs.step_fn, rs.iterate_batches(230), start=23, steps=207,
                        to=tmp_path, progress=False)
    child = runs["recorded"]
    assert child.steps[0] == 23 and child.keyframes[0] == 23 and child.meta["replay"]["keyframe"] == 0
    assert_identical(recorded, child)


def test_without_restoring_the_random_state_the_replay_differs(recorded, tmp_path, monkeypatch):
    """The same replay with the keyframe's RNG state replaced by another one: the random-state digest
    check stops it at its first step; with strict=False it runs on, and dropout masks differ, so the
    comparison above could fail."""
    from nbkit.replay import restore

    def other_state(rng):
        torch.manual_seed(12345)
        return restore.get_rng()

    monkeypatch.setattr(restore, "rng_from_keyframe", other_state)
    with pytest.raises(ReplayError, match="random state at step 50's first training forward differs"):
        nbkit.replay(recorded, rs.make_model(), rs.step_fn, rs.Batches(), start=50, steps=20, to=tmp_path,
                     progress=False)
    with pytest.warns(UserWarning, match="differs from its parent"):
        runs = nbkit.replay(recorded, rs.make_model(), rs.step_fn, rs.Batches(), start=50, steps=20,
                            to=tmp_path, progress=False, strict=False)
    fidelity = runs["recorded"].meta["replay"]["fidelity"]
    assert not fidelity["identical"] and fidelity["loss"] > 0 and fidelity["probes"] > 0


def test_a_fingerprint_mismatch_stops_at_the_first_differing_step(recorded, tmp_path):
    with pytest.raises(ReplayError, match=r"step 63 differs.*sampled values.*seeded generator"):
        nbkit.replay(recorded, rs.make_model(), rs.step_fn, rs.Batches(corrupt_at=63), start=50, steps=30,
                     to=tmp_path, progress=False)


def test_strict_false_warns_and_lists_the_mismatch(recorded, tmp_path):
    with pytest.warns(UserWarning, match="step 63 differs"):
        runs = nbkit.replay(recorded, rs.make_model(), rs.step_fn, rs.Batches(corrupt_at=63), start=50, steps=30,
                            to=tmp_path, progress=False, strict=False)
    assert runs["recorded"].meta["replay"]["fingerprint_mismatches"] == [63]


def test_a_wrong_data_order_is_caught_at_the_keyframe_step(recorded, tmp_path):
    with pytest.raises(ReplayError, match="step 50 differs"):
        nbkit.replay(recorded, rs.make_model(), rs.step_fn, rs.Batches(seed=1), start=50, steps=5,
                     to=tmp_path, progress=False)


@pytest.mark.slow
def test_scheduler_and_clipping_replay_exactly(tmp_path):
    parent = rs.record_run(tmp_path / "run", steps=120, keyframe_every=50, schedule=True, clipping=True)
    assert len(np.unique(parent.lr)) == 3                 # StepLR halved the rate twice
    runs = nbkit.replay(parent, rs.make_model(), rs.step_fn, rs.Batches(), start=50, steps=70,
                        before_step=rs.clip, progress=False)
    assert_identical(parent, runs["recorded"])
    np.testing.assert_array_equal(runs["recorded"].lr, parent.lr[50:])
    unclipped = nbkit.replay(parent, rs.make_model(), rs.step_fn, rs.Batches(), start=50, steps=10,
                             to=tmp_path / "unclipped", progress=False)
    assert not unclipped["recorded"].meta["replay"]["fidelity"]["identical"]


@pytest.mark.slow
def test_swapped_optimizers_advance_in_lockstep(recorded, tmp_path):
    optimizers = {"recorded": None, "sgd-m": rs.sgd_momentum, "rmsprop": rs.rmsprop}
    runs = nbkit.replay(recorded, rs.make_model(), rs.step_fn, rs.Batches(), optimizers=optimizers, start=100,
                        steps=60, to=tmp_path / "together", progress=False)
    assert set(runs) == set(optimizers)
    assert runs["recorded"].meta["replay"]["fidelity"]["identical"]     # dropout states kept per replay
    assert runs["sgd-m"].meta["optimizer"]["class"] == "SGD" and runs["rmsprop"].steps[0] == 100
    alone = nbkit.replay(recorded, rs.make_model(), rs.step_fn, rs.Batches(), optimizers={"sgd-m": rs.sgd_momentum},
                         start=100, steps=60, to=tmp_path / "alone", progress=False)["sgd-m"]
    np.testing.assert_array_equal(alone.loss, runs["sgd-m"].loss)
    assert not np.array_equal(runs["sgd-m"].loss, runs["recorded"].loss)


def test_the_users_model_and_random_state_are_untouched(recorded, tmp_path):
    model = rs.make_model(seed=3)
    before = {k: v.clone() for k, v in model.state_dict().items()}
    torch.manual_seed(99)
    rng = torch.get_rng_state()
    nbkit.replay(recorded, model, rs.step_fn, rs.Batches(), start=50, steps=5, to=tmp_path, progress=False)
    assert all(torch.equal(before[k], v) for k, v in model.state_dict().items())
    assert torch.equal(rng, torch.get_rng_state())


def test_a_model_with_a_live_recorder_is_copied_without_it(recorded, tmp_path):
    model = rs.make_model()
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    with nbkit.record(model, optimizer, tmp_path / "live"):
        runs = nbkit.replay(recorded, model, rs.step_fn, rs.Batches(), start=50, steps=5, to=tmp_path / "r",
                            progress=False)
    assert runs["recorded"].meta["replay"]["fidelity"]["identical"]


def test_replaying_again_replaces_the_earlier_replay_but_nothing_else(recorded, tmp_path):
    for _ in range(2):
        nbkit.replay(recorded, rs.make_model(), rs.step_fn, rs.Batches(), start=50, steps=3, to=tmp_path,
                     progress=False)
    other = rs.record_run(tmp_path / "other", steps=3)
    with pytest.raises(ReplayError, match="not a replay of"):
        nbkit.replay(recorded, rs.make_model(), rs.step_fn, rs.Batches(), start=50, steps=3, to=tmp_path,
                     optimizers={"other": rs.adam}, progress=False)
    assert len(other) == 3


@pytest.mark.parametrize("kwargs, message", [
    ({"start": 500}, "Invalid start"),
    ({"start": 200, "steps": 100}, "ends at step 229"),
    ({"steps": 0}, "Invalid steps"),
    ({"optimizers": {"a/b": rs.adam}}, "Invalid replay name"),
    ({"optimizers": {"x": 3}}, "must be a factory"),
    ({"workers": 0}, "Invalid workers"),
])
def test_bad_arguments_are_named(recorded, tmp_path, kwargs, message):
    with pytest.raises(ReplayError, match=message):
        nbkit.replay(recorded, rs.make_model(), rs.step_fn, rs.Batches(), to=tmp_path, progress=False, **kwargs)


def test_a_wrong_model_is_named(recorded, tmp_path):
    with pytest.raises(ReplayError, match="has shape"):
        nbkit.replay(recorded, torch.nn.Sequential(torch.nn.Linear(8, 4), torch.nn.ReLU(), torch.nn.Dropout(),
                                                   torch.nn.Linear(4, 3)), rs.step_fn, rs.Batches(), to=tmp_path)


def test_workers_need_picklable_callables(recorded, tmp_path):
    with pytest.raises(ReplayError, match="cannot be pickled.*module level"):
        nbkit.replay(recorded, rs.make_model(), rs.step_fn, rs.Batches(), workers=2, start=50, steps=3,
                     optimizers={"a": lambda groups: torch.optim.SGD(groups, lr=0.1), "b": rs.adam}, to=tmp_path)


@pytest.mark.slow
def test_two_workers_give_the_same_recordings_as_one(recorded, tmp_path):
    optimizers = {"recorded": None, "sgd-m": rs.sgd_momentum}
    kwargs = dict(optimizers=optimizers, start=150, steps=40, progress=False)
    one = nbkit.replay(recorded, rs.make_model(), rs.step_fn, rs.Batches(), to=tmp_path / "one", **kwargs)
    two = nbkit.replay(recorded, rs.make_model(), rs.step_fn, rs.Batches(), to=tmp_path / "two", workers=2, **kwargs)
    for name in optimizers:
        assert_identical(one[name], two[name]) if name == "recorded" else \
            np.testing.assert_array_equal(one[name].loss, two[name].loss)
        for tensor in one[name].tensors:
            np.testing.assert_array_equal(one[name].probes(tensor)["update"], two[name].probes(tensor)["update"])
    pids = {two[name].meta["replay"]["pid"] for name in optimizers}
    assert len(pids) == 2 and one["recorded"].meta["replay"]["pid"] not in pids


@pytest.mark.slow
def test_the_command_line_replays_with_a_setup_function(recorded, tmp_path, capsys):
    from nbkit.cli import main

    code = main(["replay", str(recorded.path), "--setup", "replay_setup:setup", "--optimizer",
                 "sgd-m=replay_setup:sgd_momentum", "--optimizer", "recorded", "--start", "200", "--steps", "30",
                 "--to", str(tmp_path), "--no-progress"])
    assert code == 0
    out = capsys.readouterr().out
    assert "sgd-m" in out and "identical" in out
    assert nbkit.load(tmp_path / "sgd-m").steps.tolist() == list(range(200, 230))
    assert nbkit.load(tmp_path / "recorded").meta["replay"]["fidelity"]["identical"]


def fresh_criterion_step_fn(model, batch):
    x, y = batch
    return torch.nn.CrossEntropyLoss()(model(x), y)      # a new criterion object every step


def test_a_step_fn_that_makes_its_criterion_each_step_still_replays_exactly(recorded, tmp_path):
    child = nbkit.replay(recorded, rs.make_model(), fresh_criterion_step_fn, rs.Batches(), start=50, steps=8,
                         to=tmp_path, progress=False)["recorded"]
    assert child.meta["replay"]["fidelity"]["identical"]
    targets = child.fingerprints[:, 1]
    # targets are seen (and checked) on every step but the one where the new object was first missed
    assert np.isnan(targets).all(axis=1).sum() <= 1
    np.testing.assert_array_equal(child.loss, recorded.loss[50:58])


class ThreadSpy:
    """step_fn that notes the torch thread count it runs under."""

    def __init__(self):
        self.seen = set()

    def __call__(self, model, batch):
        self.seen.add(torch.get_num_threads())
        return rs.step_fn(model, batch)


def test_the_recorded_thread_count_is_set_for_the_replay_and_restored(recorded, tmp_path):
    import shutil

    from nbkit.store.annotate import update_meta

    copy = tmp_path / "two-threads"
    shutil.copytree(recorded.path, copy)
    update_meta(copy, threads=2)                  # as if recorded with 2 threads
    spy = ThreadSpy()
    runs = nbkit.replay(copy, rs.make_model(), spy, rs.Batches(), start=50, steps=2, progress=False)
    assert spy.seen == {2} and torch.get_num_threads() == 1
    assert runs["recorded"].meta["replay"]["threads"] == 2
    assert "set to the recorded 2" in runs["recorded"].meta["replay"]["threads_note"]


def test_the_command_line_names_a_bad_setup(recorded, tmp_path, capsys):
    from nbkit.cli import main

    assert main(["replay", str(recorded.path), "--setup", "replay_setup", "--no-progress"]) == 1
    assert "module:attribute" in capsys.readouterr().err
    assert main(["replay", str(recorded.path), "--setup", "replay_setup:nothing_here", "--no-progress"]) == 1
    assert "has no 'nothing_here'" in capsys.readouterr().err


def test_a_step_fn_that_runs_backward_itself_replays_exactly(tmp_path):
    """Gradient accumulation: step_fn returns a float, so the replay does not call backward."""
    parent = rs.record_run(tmp_path / "run", steps=30, keyframe_every=10, accumulate=True)
    assert (parent.fingerprints[:, 0, 0] == 2).all()          # two forward passes per step
    child = nbkit.replay(parent, rs.make_model(), rs.accumulating_step_fn, rs.Batches(), start=10,
                         progress=False)["recorded"]
    assert child.meta["replay"]["fidelity"]["identical"]
    np.testing.assert_array_equal(child.fingerprints, parent.fingerprints[10:])


def test_an_orphan_stays_an_orphan_in_the_factorys_groups(tmp_path):
    model = rs.make_model()
    optimizer = torch.optim.SGD(model[0].parameters(), lr=0.1)     # the last layer is in no group
    rs.train_recorded(model, optimizer, tmp_path / "run")
    seen = []

    def factory(groups):
        seen.append([tuple(p.shape) for g in groups for p in g["params"]])
        return torch.optim.SGD(groups, lr=0.1)

    runs = nbkit.replay(tmp_path / "run", rs.make_model(), rs.step_fn, rs.Batches(),
                        optimizers={"recorded": None, "same": factory}, start=5, progress=False)
    assert seen == [[(32, 8), (32,)]]
    assert runs["recorded"].meta["replay"]["fidelity"]["identical"]
    np.testing.assert_array_equal(runs["same"].loss, runs["recorded"].loss)     # same rule, same numbers


def test_a_mismatch_before_a_non_keyframe_start_leaves_no_hooks_behind(recorded, tmp_path):
    with pytest.raises(ReplayError, match="from keyframe 50 to start 60.*step 55 differs"):
        nbkit.replay(recorded, rs.make_model(), rs.step_fn, rs.Batches(corrupt_at=55), start=60, steps=5,
                     to=tmp_path, progress=False)
    assert not torch.nn.modules.module._global_forward_hooks

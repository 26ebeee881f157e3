"""Parameter-group settings: stored each step, run.settings, re-applied by self-replays, carried into factories.

Oracles: torch.optim.lr_scheduler.OneCycleLR itself (the values it writes into the groups, read back
during the loop) for what is stored; the recording itself (loss, probes, keyframe parameters, bit for
bit) for a self-replay.
"""

import numpy as np
import pytest
import torch

import nbkit
import replay_setup as rs
from nbkit.replay import restore
from nbkit.store.layout import SettingColumn
from nbkit.store.synthetic import write_synthetic

STEPS = 40


def one_cycle_run(path, make_optimizer, groups=None):
    """STEPS steps of rs.make_model() under OneCycleLR(cycle_momentum=True), its default; returns
    (Recording, each step's group settings as the loop saw them before optimizer.step())."""
    model = rs.make_model()
    optimizer = make_optimizer(model.parameters() if groups is None else groups(model))
    scheduler = torch.optim.lr_scheduler.OneCycleLR(optimizer, max_lr=0.05, total_steps=STEPS)
    seen = []
    with nbkit.record(model, optimizer, path, criterion=rs.CRITERION, keyframe_every=10):
        for step in range(STEPS):
            optimizer.zero_grad()
            rs.step_fn(model, rs.Batches()(step)).backward()
            seen.append([{k: v for k, v in g.items() if k != "params"} for g in optimizer.param_groups])
            optimizer.step()
            scheduler.step()
    return nbkit.load(path), seen


def sgd_momentum(params):
    return torch.optim.SGD(params, lr=0.05, momentum=0.9)


def adam(params):
    return torch.optim.Adam(params, lr=1e-2)


def test_the_momentum_schedule_is_stored_each_step_and_returned_as_changed(tmp_path):
    run, seen = one_cycle_run(tmp_path / "run", sgd_momentum)
    assert {"lr", "momentum", "dampening", "weight_decay", "max_momentum"} <= set(run.meta["settings"])
    assert "nesterov" not in run.meta["settings"] and "maximize" not in run.meta["settings"]   # bools
    assert set(run.settings) == {"lr", "momentum"}            # the keys OneCycleLR moves
    expected = np.array([[g["momentum"] for g in step] for step in seen])            # OneCycleLR's own values
    np.testing.assert_array_equal(run.settings["momentum"], expected)
    np.testing.assert_array_equal(run.settings["lr"], run.lr)
    assert run.settings["momentum"].shape == (STEPS, 1) and run.settings["momentum"].dtype == np.float64


def test_betas_are_split_and_only_the_moving_one_is_returned(tmp_path):
    run, seen = one_cycle_run(tmp_path / "run", adam)
    assert {"betas.0", "betas.1", "eps"} <= set(run.meta["settings"])
    assert set(run.settings) == {"lr", "betas.0"}
    np.testing.assert_array_equal(run.settings["betas.0"][:, 0], [step[0]["betas"][0] for step in seen])
    assert np.all(run.setting_values()[:, 0, run.meta["settings"].index("betas.1")] == 0.999)


@pytest.mark.parametrize("make_optimizer", [sgd_momentum, adam], ids=["sgd-momentum", "adam-betas"])
def test_a_self_replay_of_a_one_cycle_run_is_bit_exact(tmp_path, make_optimizer):
    run, _ = one_cycle_run(tmp_path / "run", make_optimizer)
    child = nbkit.replay(run, rs.make_model(), rs.step_fn, rs.Batches(), start=10, progress=False)["recorded"]
    # the oracle is the recording itself: every loss, probe and keyframe parameter bit for bit
    assert child.meta["replay"]["fidelity"]["identical"], child.meta["replay"]["fidelity"]
    for name, values in run.settings.items():
        np.testing.assert_array_equal(child.settings[name], values[10:])


def test_without_the_settings_the_replay_differs_and_the_warning_names_the_step(tmp_path, monkeypatch):
    run, _ = one_cycle_run(tmp_path / "run", sgd_momentum)
    monkeypatch.setattr(restore, "apply_settings", lambda *args: None)     # lr only, as before
    with pytest.warns(UserWarning, match=r"first difference at step 10: setting 'momentum' of group 0") as caught:
        child = nbkit.replay(run, rs.make_model(), rs.step_fn, rs.Batches(), start=10, progress=False)["recorded"]
    fidelity = child.meta["replay"]["fidelity"]
    assert not fidelity["identical"] and fidelity["first_step"] == 10
    assert len([w for w in caught if "differs from its parent" in str(w.message)]) == 1


def test_a_zero_dim_tensor_setting_is_stored_and_other_values_are_noted(tmp_path):
    model = rs.make_model()
    optimizer = torch.optim.Adam(model.parameters(), lr=torch.tensor(0.01))
    optimizer.param_groups[0]["label"] = "all"                 # not a number: kept in param_groups, noted
    optimizer.param_groups[0]["scales"] = [1.0, 2.0]           # a list, not a tuple: noted
    scheduler = torch.optim.lr_scheduler.ExponentialLR(optimizer, gamma=0.9)
    rs.train_recorded(model, optimizer, tmp_path / "run", after_step=scheduler.step)
    run = nbkit.load(tmp_path / "run")
    assert "lr" in run.meta["settings"] and "label" not in run.meta["settings"]
    assert set(run.meta["settings_not_replayed"]) == {"label", "scales"}
    assert run.meta["param_groups"][0]["label"] == "all"
    np.testing.assert_allclose(run.settings["lr"][:, 0], 0.01 * 0.9 ** np.arange(10), rtol=1e-6)   # float32 tensor
    child = nbkit.replay(run, rs.make_model(), rs.step_fn, rs.Batches(), start=5, progress=False)["recorded"]
    assert child.meta["replay"]["fidelity"]["identical"]


def test_apply_settings_writes_tuples_tensors_and_ints_back_in_their_own_types():
    beta = torch.tensor(0.9)
    groups = [{"betas": (beta, 0.999), "momentum": 0.5, "max_iter": 20, "lr": 0.1}]
    columns = [SettingColumn("betas.0", "betas", 0), SettingColumn("momentum", "momentum"),
               SettingColumn("max_iter", "max_iter"), SettingColumn("missing", "missing")]
    restore.apply_settings(groups, columns, np.array([[0.85, 0.25, 20.0, 1.0]]))
    assert groups[0]["betas"][0] is beta and float(beta) == pytest.approx(0.85) and groups[0]["betas"][1] == 0.999
    assert groups[0]["momentum"] == 0.25 and type(groups[0]["max_iter"]) is int and "missing" not in groups[0]
    restore.apply_settings(groups, columns[1:2], np.array([[np.nan]]))       # NaN: left alone
    assert groups[0]["momentum"] == 0.25


def no_decay_groups(model):
    return [{"params": [model[0].weight, model[3].weight]},
            {"params": [model[0].bias, model[3].bias], "weight_decay": 0.0}]


def test_a_factory_keeps_the_no_decay_group_and_gets_no_betas(tmp_path):
    model = rs.make_model()
    optimizer = torch.optim.AdamW(no_decay_groups(model), lr=1e-2, weight_decay=0.01)
    rs.train_recorded(model, optimizer, tmp_path / "run")
    seen = []

    def sgd(groups):
        seen.append([{k: v for k, v in g.items() if k != "params"} for g in groups])
        return torch.optim.SGD(groups, lr=0.05, momentum=0.9, weight_decay=0.05)

    runs = nbkit.replay(tmp_path / "run", rs.make_model(), rs.step_fn, rs.Batches(), optimizers={"sgd": sgd},
                        start=5, progress=False)
    # weight_decay differs between the groups: carried (0.01 and 0); betas are not SGD's; lr never
    assert seen[-1] == [{"weight_decay": 0.01}, {"weight_decay": 0.0}]
    groups = runs["sgd"].meta["param_groups"]
    assert [g["weight_decay"] for g in groups] == [0.01, 0.0]
    assert all(g["lr"] == 0.05 and g["momentum"] == 0.9 and "betas" not in g for g in groups)


def test_keys_that_are_equal_in_every_group_or_scheduled_are_not_carried(tmp_path):
    run, _ = one_cycle_run(tmp_path / "run", sgd_momentum,
                           groups=lambda m: [{"params": m[0].parameters()}, {"params": m[3].parameters(),
                                                                             "dampening": 0.1}])
    carried = restore.carried_settings(run.meta, set(run.settings))
    # momentum differs nowhere and is scheduled; dampening differs and stays: carried; lr never
    assert carried == [{"dampening": 0.0}, {"dampening": 0.1}]


def test_a_recording_without_stored_settings_gives_its_learning_rate_alone(tmp_path):
    run = nbkit.load(write_synthetic(tmp_path / "old", steps=300, tensors=2, probes=2))
    assert "settings" not in run.meta or not run.meta["settings"]
    assert list(run.settings) == ["lr"]                     # its warm-up: the lr array, as run.lr gives it
    np.testing.assert_array_equal(run.settings["lr"], run.lr)
    assert run.setting_values().shape == (300, 1, 0)


def test_a_decay_schedule_from_zero_still_finds_coupled_decay(tmp_path):
    model = rs.make_model()
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-2, weight_decay=0.0)
    with nbkit.record(model, optimizer, tmp_path / "run", criterion=rs.CRITERION, keyframe_every=5):
        for step in range(10):
            optimizer.param_groups[0]["weight_decay"] = 0.0 if step < 4 else 1e-2      # decay switched on
            optimizer.zero_grad()
            rs.step_fn(model, rs.Batches()(step)).backward()
            optimizer.step()
    found = [f for f in nbkit.load(tmp_path / "run").findings() if f.kind == "coupled-decay"]
    assert len(found) == 1 and found[0].first_step == 4 and found[0].evidence["weight_decay"] == 1e-2


def test_a_resumed_recording_keeps_storing_its_settings(tmp_path):
    model = rs.make_model()
    optimizer = torch.optim.SGD(model.parameters(), lr=0.05, momentum=0.9)
    for part in range(2):
        with nbkit.record(model, optimizer, tmp_path / "run", criterion=rs.CRITERION, resume=part == 1):
            for step in range(5):
                optimizer.param_groups[0]["momentum"] = 0.5 + 0.05 * (5 * part + step)
                optimizer.zero_grad()
                rs.step_fn(model, rs.Batches()(5 * part + step)).backward()
                optimizer.step()
    run = nbkit.load(tmp_path / "run")
    assert run.steps.tolist() == list(range(10))
    np.testing.assert_allclose(run.settings["momentum"][:, 0], 0.5 + 0.05 * np.arange(10))

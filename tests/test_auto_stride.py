"""every="auto": heavy pairs at a stride the recorder's own measured cost allows, and any window of a
thinned recording re-recorded in full by a self-replay (detail on demand)."""
from __future__ import annotations

import numpy as np
import pytest
import torch

import nbkit
from nbkit.record import budget
from nbkit.record.budget import MAX_STRIDE, StrideBudget


def test_the_stride_is_the_smallest_that_keeps_the_average_cost_within_the_share():
    plan = StrideBudget(share=0.05, warm_up=0)
    for step in range(10):
        plan.measured(0.0001, 0.005 if step % 2 == 0 else 0.0, heavy=step % 2 == 0)
    # the recorder's own 0.1 + 5 / 2 = 2.6 ms a step, measured on top of a 10 ms training step
    plan.step_started(0.0)
    plan.step_started(0.0126)
    # light 0.1 ms, heavy extras 5 ms a heavy step: light + 5 · 2 / s <= 5 % of 10 ms  =>  s >= 25
    assert plan.stride_at(100) == 25
    assert plan.report()["step_ms"] == pytest.approx(10.0)
    average = 0.0001 + 0.005 * 2 / 25
    assert average <= 0.05 * 0.010 < 0.0001 + 0.005 * 2 / 24
    assert plan.report()["floor"] is None


def test_light_work_over_the_share_is_the_floor_and_is_reported():
    plan = StrideBudget(share=0.05, warm_up=0)
    plan.step_started(0.0)
    plan.step_started(0.0148)                         # a 10 ms step plus the recorder's 4.8 ms
    plan.measured(0.0008, 0.004, heavy=True)          # 0.8 ms of every-step work on a 10 ms step: 8 %
    assert plan.stride_at(10) == MAX_STRIDE
    assert plan.report()["floor"] == pytest.approx(0.08)
    # the next windows hold no heavy step (stride 1000): they still decide, from the light work
    plan.measured(0.0002, 0.0, heavy=False)
    plan.step_started(0.0250)                         # 10 ms + 0.2 ms
    assert plan.stride_at(60) == 27                   # 0.2 ms light + 4 · 2 / s <= 0.5 ms  =>  s >= 26.7
    assert plan.report()["floor"] is None and plan.report()["at_step"] == 60


def test_warm_up_steps_are_heavy_and_pairs_are_neighbours():
    plan = StrideBudget(warm_up=50)
    plan.step_started(0.0)
    plan.step_started(0.01)
    plan.measured(0.0, 0.01, heavy=True)
    assert plan.stride_at(40) == 1                    # still warming up
    assert [s for s in range(40) if StrideBudget.heavy(s, 10)] == [0, 1, 10, 11, 20, 21, 30, 31]


def mlp():
    torch.manual_seed(0)
    return torch.nn.Sequential(torch.nn.Linear(8, 32), torch.nn.ReLU(), torch.nn.Dropout(0.1), torch.nn.Linear(32, 3))


def train(path, steps=40, **options):
    model = mlp()
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-2)
    criterion = torch.nn.CrossEntropyLoss()
    generator = torch.Generator().manual_seed(1)
    data = [(torch.randn(16, 8, generator=generator), torch.randint(0, 3, (16,), generator=generator))
            for _ in range(steps)]
    torch.manual_seed(5)
    with nbkit.record(model, optimizer, path, criterion=criterion, keyframe_every=10, **options):
        for x, y in data:
            optimizer.zero_grad()
            criterion(model(x), y).backward()
            optimizer.step()
    return nbkit.load(path)


@pytest.fixture
def thinned(tmp_path, monkeypatch):
    """A recording at every="auto" whose budget settles on stride 8 after a 10-step warm-up."""
    monkeypatch.setattr(budget, "WARM_UP", 10)
    monkeypatch.setattr(StrideBudget, "stride_at", lambda self, step: 1 if step < self.warm_up else 8)
    return train(tmp_path / "thin")


def test_auto_thins_from_a_keyframe_on_in_pairs_and_keeps_the_light_series_every_step(thinned):
    run = thinned
    assert run.meta["every"] == "auto" and run.meta["strides"] == [[0, 1], [10, 8]]
    heavy = np.flatnonzero(run.heavy).tolist()
    assert heavy == list(range(10)) + [s for s in range(10, 40) if s % 8 < 2]
    assert np.isfinite(run.loss).all() and np.isfinite(run.tensor_grad_norms).all()
    assert np.isfinite(run.grad_norm).all() and len(run.kept_steps) == 40
    cosine = run.series("grad_cosine")[:, 0]
    # a pair's second step compares with its first; a pair's first step has no neighbour recorded
    assert np.isfinite(cosine[[17, 25, 33]]).all() and np.isnan(cosine[[16, 24, 32]]).all()


def test_a_detail_window_re_records_every_step_as_a_full_recording_would(thinned, tmp_path):
    full = train(tmp_path / "full", every=1)         # the same training, recorded in full from the start
    runs = nbkit.replay(thinned, mlp(), start=20, steps=10, every=1, progress=False)
    assert list(runs) == ["full-20-29"]
    window = runs["full-20-29"]
    assert window.steps.tolist() == list(range(20, 30)) and window.heavy.all()
    rows = slice(20, 30)
    np.testing.assert_array_equal(window.fingerprints, full.fingerprints[rows])
    np.testing.assert_array_equal(window.loss, full.loss[rows])
    for quantity in window.quantities:
        expected, got = full.series(quantity)[rows], window.series(quantity)
        if quantity in ("grad_cosine", "sign_flip"):          # they look back one step: not at row 0
            expected, got = expected[1:], got[1:]
        np.testing.assert_array_equal(got, expected, err_msg=quantity)
    for tensor in full.tensors:
        np.testing.assert_array_equal(window.probes(tensor)["update"], full.probes(tensor)["update"][rows])


def test_every_must_be_auto_or_a_positive_integer(tmp_path):
    model = torch.nn.Linear(2, 1)
    for bad in (0, "fast", 1.5, True):
        with pytest.raises(nbkit.RecorderError, match='"auto".*positive integer'):
            nbkit.record(model, torch.optim.SGD(model.parameters(), lr=0.1), tmp_path / "x", every=bad)


def test_the_explorer_re_records_the_window_around_its_cursor_and_shows_it(thinned, tmp_path, monkeypatch):
    pytest.importorskip("ipywidgets")
    import matplotlib
    matplotlib.use("Agg")
    from nbkit.views import detail as detail_module
    monkeypatch.setattr(detail_module, "DETAIL_STEPS", 10)
    without = nbkit.explore(thinned)
    assert without.detail.button.disabled and "pass model=" in without.detail.note.value
    view = nbkit.explore(thinned, model=mlp())
    view.step = 27
    row = view.data.row_of(27)
    assert view.data.heavy_row(row) == view.data.row_of(25)          # thinned: the pair at 24-25
    before = view.data.values_at("update_ratio", row)
    assert np.isnan(before).all() or view.data.heavy_row(row) != row
    detail = view.detail.request(27)
    assert detail is not None and detail.path.name == "full-22-31" and detail.heavy.all()
    assert view.data.heavy_row(row) == row and "re-recorded in full" in view.step_label.value
    full = train(tmp_path / "full", every=1)
    np.testing.assert_array_equal(view.data.values_at("update_ratio", row), full.series("update_ratio")[27])
    probes = view.data.probes_at(thinned.tensors[0], row, ["grad", "update"])
    np.testing.assert_array_equal(probes["update"], full.probes(thinned.tensors[0])["update"][27])
    steps, values, how = view.data.layer_map("update_ratio")
    assert set(range(22, 32)) <= set(steps.tolist()) and "re-recorded" in how
    assert view.detail.request(3).path.name == "full-0-9"            # clipped to the recording's start


def test_an_auto_estimate_comes_back_after_its_cost_in_steps_at_one_percent():
    from nbkit.record.estimates import EstimateStride

    stride = EstimateStride("auto")
    assert stride.due(0)
    stride.took(0, seconds=0.5, step_seconds=0.01)      # 50 steps' worth: 1 % of the step => every 5000
    assert not stride.due(4999) and stride.due(5000)
    fixed = EstimateStride(10)
    assert fixed.due(20) and not fixed.due(21)
    assert budget.budget_share(2) == pytest.approx(budget.SHARE - 2 * budget.ESTIMATE_SHARE)


def test_curvature_every_auto_estimates_at_the_first_step_and_then_rarely(tmp_path):
    run = train(tmp_path / "auto", steps=30, curvature_every="auto")
    sharpness = run.series("sharpness")[:, 0]
    assert np.isfinite(sharpness[0]) and np.isnan(sharpness[1:20]).all()
    with pytest.raises(nbkit.RecorderError, match='integer >= 0 or "auto"'):
        nbkit.record(mlp(), torch.optim.SGD(mlp().parameters(), lr=0.1), tmp_path / "x", curvature_every="often")


def test_the_layer_map_of_a_thinned_recording_is_blank_where_no_step_is_heavy(thinned):
    from nbkit.views.data import ExplorerData

    data = ExplorerData(thinned)
    starts, values, how = data.layer_map("update_ratio")           # (columns,), (tensors, columns)
    assert starts.tolist() == list(range(40)) and "every=auto" in how   # one evenly spaced column a step
    heavy = set(np.flatnonzero(thinned.heavy).tolist())
    for column, step in enumerate(starts):
        assert np.isfinite(values[:, column]).all() == (step in heavy), step
    np.testing.assert_array_equal(values[:, 17], thinned.series("update_ratio")[17])

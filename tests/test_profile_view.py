"""The profile panel (nbkit.views.profile): its selections on real recordings (load_digits), and the
explorer's wiring. The recording follows tests/test_profiles.py: Adam with ε = 1e-6 on a Linear whose
three scaled input columns (×1e-6) get gradients far below ε, so their gain is lr·m̂/ε against
lr·m̂/√v̂ for the others (Kingma & Ba 2015, Algorithm 1): they must be the most accelerated columns."""
from __future__ import annotations

import numpy as np
import pytest
import torch

import nbkit
from nbkit.views import profile
from tests.test_profiles import digits

SCALED = [20, 21, 22]


def _record(path, every=1, steps=8, unit_names=None):
    torch.manual_seed(2)
    model = torch.nn.Sequential(torch.nn.Linear(32, 10))
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-3, eps=1e-6)
    x, y = digits(scale_columns=SCALED, busiest=32)
    criterion = torch.nn.CrossEntropyLoss()
    with nbkit.record(model, optimizer, path, every=every, criterion=criterion, unit_names=unit_names):
        for k in range(steps):
            optimizer.zero_grad()
            criterion(model(x[32 * k:32 * (k + 1)]), y[32 * k:32 * (k + 1)]).backward()
            optimizer.step()
    return nbkit.load(path)


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    names = {"0.weight": {"columns": [f"pixel {c}" for c in range(32)]}}
    return _record(tmp_path_factory.mktemp("profile") / "run", unit_names=names)


def test_scaled_columns_are_the_most_accelerated_at_the_cursor(run):
    found = profile.extremes_at(run, "0.weight", "columns", 5, count=3)
    assert found.step == 5 and found.why == ""
    assert sorted(name for name, _ in found.accelerated) == [f"pixel {c}" for c in SCALED]
    assert all(ratio > 100 for _, ratio in found.accelerated)
    assert all(ratio < 1 for _, ratio in found.damped)
    ratios = [r for _, r in found.accelerated]
    assert ratios == sorted(ratios, reverse=True)
    # the ratio is the unit gain over the step's median unit gain, as read from the recording
    gain = run.profile("0.weight", "gain", "columns")[5]
    median = np.median(gain[np.isfinite(gain) & (gain > 0)])
    top = int(found.accelerated[0][0].split()[1])
    assert found.accelerated[0][1] == pytest.approx(gain[top] / median)
    text = profile.extremes_text(found, "columns")
    assert "most accelerated (3 above ×2): pixel 2" in text and "step 5" in text
    assert found.above_double == 3 and found.defined == 32


def test_image_is_log2_of_gain_over_median_with_one_row_per_unit(run):
    picked = profile.select_profile(run, "0.weight", "columns")
    assert picked.values.shape == (32, 8) and picked.how == "one row per unit"
    gain = run.profile("0.weight", "gain", "columns")                    # (steps, units)
    usable = np.where(gain > 0, gain, np.nan)
    expected = np.log2(gain / np.nanmedian(usable, axis=1, keepdims=True)).T
    np.testing.assert_allclose(picked.values, expected, rtol=1e-12)
    assert (picked.values[SCALED, 2:] > 6).all()                           # far beyond ×2 (an octave)
    assert picked.names[SCALED[0]] == "pixel 20"


def test_light_steps_stay_blank(tmp_path):
    run = _record(tmp_path / "thin", every=3, steps=7)
    assert list(run.heavy) == [True, False, False, True, False, False, True]
    picked = profile.select_profile(run, "0.weight", "rows")
    assert list(picked.column_steps) == list(range(7))
    blank = np.isnan(picked.values).all(axis=0)
    assert list(blank) == [False, True, True, False, True, True, False]
    # the cursor on a light step lists the units of the heavy step before it (the explorer passes it)
    assert profile.extremes_at(run, "0.weight", "rows", 3).step == 3


def test_many_units_keep_their_outlier_when_downsampled():
    values = np.zeros((2, 1000))
    values[:, 437] = -9.0                 # one far-damped unit among 1000 ordinary ones
    values[0, 10:20] = np.nan
    reduced, starts = profile.block_extremes(values, 100)
    assert reduced.shape == (2, 100) and list(starts[:3]) == [0, 10, 20]
    assert reduced[0, 43] == -9.0 and reduced[1, 43] == -9.0
    assert np.isnan(reduced[0, 1]) and reduced[1, 1] == 0.0
    assert (np.delete(reduced[1], 43) == 0).all()


def test_a_bias_and_a_recording_without_profiles_say_why(run, tmp_path):
    assert "1-D" in profile.why_no_profile(run, "0.bias", "rows")
    assert profile.select_profile(run, "0.bias", "rows").why
    model = torch.nn.Linear(4, 2)
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    with nbkit.record(model, optimizer, tmp_path / "off", profiles=False) as rec:
        model(torch.randn(3, 4)).sum().backward()
        rec.loss(torch.tensor(0.0))
        optimizer.step()
    off = nbkit.load(tmp_path / "off")
    assert "profiles=False" in profile.why_no_profile(off, "weight", "rows")


def test_embedding_has_no_columns_image(tmp_path):
    model = torch.nn.Sequential(torch.nn.Embedding(5000, 4), torch.nn.Flatten(), torch.nn.Linear(12, 2))
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-2)
    criterion = torch.nn.CrossEntropyLoss()
    with nbkit.record(model, optimizer, tmp_path / "emb", every=1, criterion=criterion):
        for _ in range(3):
            optimizer.zero_grad()
            tokens = torch.randint(0, 5000, (16, 3))
            criterion(model(tokens), torch.randint(0, 2, (16,))).backward()
            optimizer.step()
    run = nbkit.load(tmp_path / "emb")
    rows = profile.select_profile(run, "0.weight", "rows", pixel_rows=200)
    assert rows.values.shape == (200, 3) and rows.units == 5000 and "25 units per image row" in rows.how
    assert "no input features" in profile.select_profile(run, "0.weight", "columns").why


def test_explorer_shows_the_profile_of_the_picked_tensor_and_a_line_for_a_bias(run, tmp_path):
    view = nbkit.explore(run)
    try:
        view.tensor = "0.weight"
        view.step = 5
        panel = view.profile
        assert panel.tensor == "0.weight"
        assert panel.images["rows"].get_visible() and panel.images["columns"].get_visible()
        assert panel.images["columns"].get_array().shape == (32, 8)
        assert list(panel.cursors["columns"].get_xdata()) == [5, 5]
        assert "pixel 2" in view.profile_summary.value and "step 5" in view.profile_summary.value
        view.tensor = "0.bias"
        assert not panel.images["rows"].get_visible()
        assert "1-D" in panel.notes["rows"].get_text() and "1-D" in view.profile_summary.value
        view.tensor = "0.weight"
        view.step = 5
        view.to_png(tmp_path / "explorer.png")
        with open("/tmp/profile_view.png", "wb") as handle:
            handle.write(panel.png_bytes())
    finally:
        view.close()


def _finding(kind, tensors, step):
    from nbkit.analyze.finding import Finding
    return Finding(kind=kind, tensors=tensors, first_step=step, last_step=step, severity="warning",
                   evidence={}, suggestion="look")


def test_report_pictures_the_tensor_the_eps_finding_names(run, tmp_path):
    from nbkit.views.report import profile_focus, write_report
    spike = _finding("grad-spike", ["0.bias", "0.weight"], 2)
    eps = _finding("eps-dominated", ["0.weight"], 4)
    assert profile_focus(run, [spike, eps]) == ("0.weight", 4, eps)
    assert profile_focus(run, [spike]) == ("0.weight", 2, spike)             # first finding with a profiled tensor
    assert profile_focus(run, [_finding("grad-spike", ["0.bias"], 1)]) == ("0.weight", 7, None)
    page = write_report([run], tmp_path / "report.html", findings={str(run.path): [eps]}).read_text()
    assert "Unit profile of 0.weight" in page and "eps-dominated finding names (a heuristic), at its first step 4" in page
    assert page.count("data:image/png;base64,") == 2

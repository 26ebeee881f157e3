"""The explorer's layer map as a module tree on a ResNet-18-named recording: collapsed blocks,
distinct labels, expand on click, the text filter; and the comparison's map in the same order."""
from __future__ import annotations

import numpy as np
import pytest
import torch

import nbkit
from tests.test_module_tree import resnet18_names


class Named(torch.nn.Module):
    """A module whose parameters carry the given dotted names (small shapes; no torchvision)."""

    def __init__(self, names):
        super().__init__()
        for name in names:
            *path, leaf = name.split(".")
            module = self
            for part in path:
                if not hasattr(module, part):
                    module.add_module(part, torch.nn.Module())
                module = getattr(module, part)
            module.register_parameter(leaf, torch.nn.Parameter(torch.randn(3, 2) if leaf == "weight" else torch.randn(3)))

    def forward(self, x):
        return sum((p * x).square().mean() * (k + 1) for k, p in enumerate(self.parameters()))


@pytest.fixture(scope="module")
def resnet_path(tmp_path_factory):
    torch.manual_seed(0)
    path = tmp_path_factory.mktemp("tree") / "run"
    model = Named(resnet18_names())
    opt = torch.optim.Adam(model.parameters(), lr=1e-2)
    with nbkit.record(model, opt, path, probes=4, keyframe_every=100, profiles=False) as rec:
        for _ in range(12):
            opt.zero_grad()
            loss = model(torch.tensor(0.5))
            loss.backward()
            rec.loss(loss)
            opt.step()
    return path


@pytest.fixture(scope="module")
def view(resnet_path):
    v = nbkit.explore(resnet_path)
    v.wait_for_findings(60)
    yield v
    v.close()


def _click_row(view, k):
    from matplotlib.backend_bases import MouseEvent

    lm = view.layer_map
    px, py = lm.map_axes.transData.transform((float(view.data.steps[1]), k))
    lm.canvas.callbacks.process("button_press_event", MouseEvent("button_press_event", lm.canvas, px, py, button=1))


def test_blocks_start_collapsed_with_distinct_labels(view):
    labels = [t.get_text() for t in view.layer_map.map_axes.get_yticklabels()]
    assert len(view.layer_map.rows) == 11
    assert "▸ layer3.0 (9)" in labels and "▸ layer4.0 (9)" in labels
    assert len(set(labels)) == len(labels)
    assert view.layer_map.image.get_array().shape[0] == 11


def test_clicking_a_block_expands_it_and_a_tensor_row_picks_it(view):
    rows = [row.label for row in view.layer_map.rows]
    step = view.step
    _click_row(view, rows.index("▸ layer3.0 (9)"))
    labels = [row.label for row in view.layer_map.rows]
    assert "▾ layer3.0" in labels and len(labels) == 11 + 9
    assert view.layer_map.image.get_array().shape[0] == 20
    k = labels.index("· downsample.0.weight")
    _click_row(view, k)
    assert view.tensor == "layer3.0.downsample.0.weight" and view.step == step
    view.collapse("layer3.0")
    assert len(view.layer_map.rows) == 11


def test_filter_narrows_rows_and_keeps_the_cursor(view):
    view.step = 7
    tensor = view.tensor
    view.filter_box.value = "downsample.0"
    labels = [t.get_text() for t in view.layer_map.map_axes.get_yticklabels()]
    assert labels == [f"layer{k}.0 · downsample.0.weight" for k in (2, 3, 4)]
    view.filter_box.value = "no-such-layer"
    assert view.layer_map.note.get_text() == "no tensor matches “no-such-layer”"
    assert view.step == 7 and view.tensor == tensor and not view.errors.value
    view.filter_box.value = ""
    assert len(view.layer_map.rows) == 11


def test_aggregates_and_per_row_scale_change_the_block_rows(view, resnet_path):
    run = nbkit.load(resnet_path)
    view.quantity = "grad_norm"
    block = [r for r, row in enumerate(view.layer_map.rows) if row.label == "▸ layer2.0 (9)"][0]
    members = [run.tensor_index(t) for t in run.tensors if t.startswith("layer2.0.")]
    series = run.series("grad_norm").astype(np.float64)[:, members]        # (steps, 9)
    view.aggregate_menu.value = "max"
    np.testing.assert_allclose(np.ma.filled(view.layer_map.image.get_array(), np.nan)[block], series.max(axis=1), rtol=1e-6)
    view.aggregate_menu.value = "median"
    np.testing.assert_allclose(np.ma.filled(view.layer_map.image.get_array(), np.nan)[block], np.median(series, axis=1),
                               rtol=1e-6)
    view.per_row_toggle.value = True
    assert "each row scaled" in view.layer_map.colourbar.ax.get_ylabel()
    view.per_row_toggle.value = False
    assert "1st–99th percentile" in view.layer_map.colourbar.ax.get_ylabel()
    view.aggregate_menu.value = "max"


def test_png_of_the_tree(view, tmp_path):
    view.expand("layer2.0")
    path = view.to_png(tmp_path / "tree.png")
    assert path.read_bytes()[:4] == b"\x89PNG"
    view.collapse("layer2.0")
    with pytest.raises(ValueError):
        view.layer_map.set_rows(aggregate="mean")


def test_comparison_map_follows_the_tree_and_shows_blocks_when_rows_are_thin(resnet_path):
    run = nbkit.load(resnet_path)
    view = nbkit.compare(run, nbkit.load(resnet_path))
    try:
        labels = [t.get_text() for t in view.map_axes.get_yticklabels()]
        assert view.map_blocks and len(labels) == 11
        assert labels[:3] == ["conv1 · weight", "bn1 (2)", "layer1.0 (6)"] and "layer3.0 (9)" in labels
        assert np.ma.getdata(view.map_image.get_array()).shape[0] == 11
        assert "largest per block" in view.map_axes.get_title(loc="left")
    finally:
        view.close()


def test_opening_state_first_learning_step_then_the_first_finding(tmp_path, monkeypatch):
    from nbkit.analyze.finding import Finding

    torch.manual_seed(0)
    model = torch.nn.Linear(3, 1)
    model.register_parameter("unused", torch.nn.Parameter(torch.ones(4)))   # its gradient is exactly 0
    opt = torch.optim.SGD(model.parameters(), lr=0.0)
    x = torch.randn(8, 3)
    with nbkit.record(model, opt, tmp_path / "warm", probes=4) as rec:
        for step in range(10):
            opt.param_groups[0]["lr"] = 0.0 if step < 3 else 0.01        # warm-up from zero
            opt.zero_grad()
            loss = model(x).square().mean() + 0 * model.unused.sum()
            loss.backward()
            rec.loss(loss)
            opt.step()
    run = nbkit.load(tmp_path / "warm")
    finding = Finding(kind="grad-spike", tensors=["bias"], first_step=6, last_step=7, severity="warning",
                      evidence={}, suggestion="", source="common practice")
    monkeypatch.setattr(type(run), "findings", lambda self, **kw: [])
    v = nbkit.explore(run)
    try:
        assert v.step == 3                                                  # first non-zero learning rate
        v.wait_for_findings(60)
        assert v.step == 3
        assert "nan" not in v.coordinate_summary.value
        v.tensor = "unused"
        assert "median gain undefined: every probe coordinate has a zero gradient" in v.coordinate_summary.value
        assert "nan" not in v.coordinate_summary.value.lower()
    finally:
        v.close()
    monkeypatch.setattr(type(run), "findings", lambda self, **kw: [finding])
    v = nbkit.explore(run)
    try:
        v.wait_for_findings(60)
        assert v.step == 6 and v.tensor == "bias"                           # moved to the first finding
    finally:
        v.close()
    v = nbkit.explore(run)
    try:
        v.step = 8                                                          # the user moved first
        v.wait_for_findings(60)
        assert v.step == 8
    finally:
        v.close()



def test_no_title_or_label_clips_and_pictures_fit_1000_px(view, resnet_path, tmp_path):
    from PIL import Image

    from nbkit.views.common import clipped_texts

    for part in (view.timeline, view.layer_map, view.coordinates, view.profile):
        assert clipped_texts(part.figure) == [], type(part).__name__
    assert Image.open(view.to_png(tmp_path / "e.png")).width <= 1000
    runs = [nbkit.load(resnet_path) for _ in range(5)]
    comparison = nbkit.compare(*runs)
    try:
        assert clipped_texts(comparison.timeline_figure) == [] and clipped_texts(comparison.detail_figure) == []
        assert Image.open(comparison.to_png(tmp_path / "c.png")).width <= 1000
    finally:
        comparison.close()


@pytest.mark.parametrize("steps, tensors", [(1, 1), (1, 5), (30, 1)])
def test_one_tensor_or_one_step_draws_without_errors(tmp_path, steps, tensors):
    from nbkit.store.synthetic import write_synthetic

    path = write_synthetic(tmp_path / "tiny", steps=steps, tensors=tensors, probes=2, heavy_every=1)
    view = nbkit.explore(path)
    try:
        view.wait_for_findings(60)
        view.draw()
        view.filter_box.value = "block"
        view.per_row_toggle.value = True
        view.aggregate_menu.value = "worst"
        view.to_png(tmp_path / "tiny.png")
        assert view.errors.value == ""
        assert "nan" not in view.coordinate_summary.value.lower()
    finally:
        view.close()
    comparison = nbkit.compare(nbkit.load(path), nbkit.load(path))
    try:
        comparison.to_png(tmp_path / "tiny-compare.png")
        assert comparison.errors.value == ""
    finally:
        comparison.close()

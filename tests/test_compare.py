"""The comparison view: one step cursor over several recordings, tested without a browser."""
import numpy as np
import pytest
import torch

import nbkit
import replay_setup as rs


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    torch.set_num_threads(1)
    parent = rs.record_run(tmp_path_factory.mktemp("compare") / "run", steps=60, keyframe_every=20)
    replays = nbkit.replay(parent, rs.make_model(), rs.step_fn, rs.Batches(), start=20, steps=40, progress=False,
                           optimizers={"recorded": None, "sgd-m": rs.sgd_momentum})
    return parent, replays["recorded"], replays["sgd-m"]


@pytest.fixture
def view(runs):
    comparison = nbkit.compare(*runs)
    yield comparison
    comparison.close()


def test_the_cursor_moves_existing_artists_to_the_absolute_step(view, runs):
    parent, recorded, sgd = runs
    assert view.names == ["run", "recorded", "sgd-m"] and view.steps.tolist() == list(range(60))
    lines = [c for c in view.cursors]
    bars = [b for share in ("damped", "accelerated", "reversed") for b in view.bars[share]]
    view.step = 37
    assert [c.get_xdata()[0] for c in view.cursors] == [37] * len(view.cursors)
    assert view.cursors == lines and [b for s in ("damped", "accelerated", "reversed") for b in view.bars[s]] == bars
    assert view.slider.value == 37 and view.errors.value == ""
    # the shares at the cursor are the recorded ones of the chosen tensor, per run, aligned on step 37
    for k, run in enumerate(runs):
        row = int(np.searchsorted(run.steps, 37))
        assert run.steps[row] == 37
        for share in ("damped", "accelerated", "reversed"):
            assert view.bars[share][k].get_height() == pytest.approx(float(run.series(share, view.tensor)[row]))


def test_a_step_outside_a_replay_shows_no_bar_for_it(view):
    view.step = 5                               # before the replays' start at step 20
    assert view.bars["damped"][0].get_height() > 0
    assert view.bars["damped"][1].get_height() == 0 and view.bars["damped"][2].get_height() == 0
    assert np.isnan(view.cursor_dots["sgd-m"].get_ydata()[0])


def test_tensor_and_quantity_change_the_panels(view, runs):
    view.tensor, view.quantity = "3.weight", "grad_norm"
    np.testing.assert_array_equal(view.quantity_lines["sgd-m"].get_ydata(),
                                  runs[2].series("grad_norm", "3.weight").astype(np.float64))
    view.tensor = "no.such"                     # a bad value is reported in the view, which carries on
    assert "No tensor named" in view.errors.value and "no.such" in view.errors.value
    view.tensor = "0.weight"
    view.step = 30
    assert view.cursors[0].get_xdata()[0] == 30 and view.errors.value == ""      # recovered


def test_the_difference_map_is_the_log_ratio_between_the_chosen_pair(view, runs):
    parent, recorded, sgd = runs
    view.quantity = "update_norm"
    view.pair_menus[0].value, view.pair_menus[1].value = "sgd-m", "recorded"
    image = np.ma.getdata(view.map_image.get_array())
    expected = np.log10(sgd.series("update_norm").astype(np.float64) /
                        recorded.series("update_norm").astype(np.float64)).T
    np.testing.assert_allclose(image, expected)
    view.pair_menus[0].value = "run"            # the recorded replay is bit-exact: no difference at all
    assert np.all(np.ma.getdata(view.map_image.get_array()) == 0)


def test_to_png_renders_the_whole_view(view, tmp_path):
    from PIL import Image

    view.step = 44
    path = view.to_png(tmp_path / "comparison.png")
    image = Image.open(path)
    assert image.format == "PNG" and image.size[1] > 700
    pixels = np.asarray(image.convert("RGB"))
    assert len(np.unique(pixels.reshape(-1, 3), axis=0)) > 50      # drawn, not blank


def test_with_model_step_fn_and_batch_it_shows_the_landscape(runs):
    parent, recorded, sgd = runs
    view = nbkit.compare(recorded, sgd, model=rs.make_model(), step_fn=rs.step_fn, batch=rs.Batches()(20))
    assert view.landscape is not None and view.landscape_canvas in view.children
    view.step = 40
    marker = view.landscape_panel.markers["sgd-m"].get_xydata()[0]
    k = list(view.landscape.path_steps["sgd-m"]).index(40)
    np.testing.assert_allclose(marker, view.landscape.paths["sgd-m"][k])
    view.close()


def test_comparison_rejects_an_unknown_quantity(runs):
    from nbkit.views.compare import Comparison

    with pytest.raises(ValueError, match="Unknown quantity"):
        Comparison(*runs, quantity="nope")


def test_the_comparison_opens_with_the_verdict_and_labels_curve_ends(view, runs):
    parent, recorded, sgd = runs
    v = view.verdict
    assert v.window == (20, 59) and [r.name for r in v.rows] == ["run", "recorded", "sgd-m"]
    rows = {r.name: r for r in v.rows}
    assert rows["recorded"].fidelity == "identical to its parent"
    assert rows["run"].final_loss == pytest.approx(float(np.mean(parent.loss[-4:])))
    assert v.best == "run" and v.ties == ("recorded",) and v.margin.runner_up == "sgd-m"
    assert v.best in rows and "★ best" in view.verdict_box.value and "Künsch 1989" in view.verdict_box.value
    assert view.children[0] is view.verdict_box
    assert sorted(t.get_text() for t in view.end_labels) == ["recorded", "run", "sgd-m"]
    assert {t.get_text(): t.get_color() for t in view.end_labels}["sgd-m"] == view.colours["sgd-m"]
    ys = sorted(t.get_position()[1] for t in view.end_labels)
    assert min(np.diff(ys)) >= 0.08                                 # identical ends are spread apart


def test_runs_with_no_shared_step_are_explained_with_their_ranges(runs, tmp_path):
    parent = runs[0]
    early = nbkit.replay(parent, rs.make_model(), rs.step_fn, rs.Batches(), start=0, steps=10, progress=False,
                         to=tmp_path / "early")["recorded"]
    late = nbkit.replay(parent, rs.make_model(), rs.step_fn, rs.Batches(), start=40, steps=10, progress=False,
                        to=tmp_path / "late")["recorded"]
    view = nbkit.compare(early, late)
    try:
        assert view.verdict.window is None
        assert "share no step" in view.verdict_box.value and "0–9" in view.verdict_box.value
        assert [b.description.split(": ")[1] for b in view.range_buttons] == ["steps 0–9", "steps 40–49"]
        view.range_buttons[1].click()
        assert view.step == 40 and view.loss_axes.get_xlim() == (40, 49) and view.errors.value == ""
    finally:
        view.close()


def test_the_report_opens_with_the_verdict_and_its_pictures_fit_1000_px(runs, tmp_path):
    import base64
    import io
    import re

    from PIL import Image

    from nbkit.views.report import write_report

    page = write_report(list(runs), tmp_path / "report.html", findings={str(r.path): [] for r in runs}).read_text()
    assert page.index("<h2>Verdict</h2>") < page.index("<h2>run</h2>")
    assert "identical to its parent" in page and "★ best" in page
    widths = [Image.open(io.BytesIO(base64.b64decode(uri))).width
              for uri in re.findall(r"src='data:image/png;base64,([^']+)'", page)]
    assert widths and max(widths) <= 1000

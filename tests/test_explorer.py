"""Headless tests of the explorer: cursor, tensor and finding picks change the right artists, and the
values drawn equal the recording's values (read back through nbkit.load, the view's own reads aside)."""
from __future__ import annotations

import threading

import numpy as np
import pytest
import torch

import nbkit
from nbkit.analyze.finding import Finding
from nbkit.measure.quantities import classify_gain
from nbkit.views import data as view_data
from nbkit.views.data import minmax_downsample


def _train(model, opt, rec, x, y, steps):
    for _ in range(steps):
        opt.zero_grad()
        loss = torch.nn.functional.mse_loss(model(x), y)
        loss.backward()
        rec.loss(loss)
        opt.step()


def _model():
    torch.manual_seed(0)
    return torch.nn.Sequential(torch.nn.Linear(6, 12), torch.nn.Tanh(), torch.nn.Linear(12, 1))


@pytest.fixture(scope="module")
def run_path(tmp_path_factory):
    path = tmp_path_factory.mktemp("explorer") / "run"
    model = _model()
    opt = torch.optim.Adam(model.parameters(), lr=1e-2)
    x = torch.randn(32, 6)
    y = x[:, :1] * 2
    with nbkit.record(model, opt, path, probes=8, keyframe_every=20) as rec:
        _train(model, opt, rec, x, y, 60)
    return path


@pytest.fixture(scope="module")
def view(run_path):
    """One explorer shared by the tests (opening one costs seconds on a shared 2-core machine);
    each test sets the state it checks."""
    v = nbkit.explore(run_path)
    v.wait_for_findings(60)
    yield v
    v.close()


def _row(run, step):
    return int(np.flatnonzero(run.steps == step)[0])


def _tensor_rows(layer_map):
    """(row positions, tensor positions) of the layer map's rows that show one tensor each."""
    pairs = [(r, row.tensor) for r, row in enumerate(layer_map.rows) if row.tensor is not None]
    return [r for r, _ in pairs], [t for _, t in pairs]


def _click(canvas, axes, x, y, kind="button_press_event"):
    from matplotlib.backend_bases import MouseEvent

    px, py = axes.transData.transform((x, y))
    canvas.callbacks.process(kind, MouseEvent(kind, canvas, px, py, button=1))


def test_cursor_moves_every_part_to_the_recorded_values(view, run_path):
    run = nbkit.load(run_path)
    view.step = 37
    row = _row(run, 37)
    assert view.step == 37 and "step 37" in view.step_label.value
    assert view.slider.value == 37
    assert list(view.timeline.cursors[0].get_xdata()) == [37, 37]
    assert list(view.layer_map.cursor.get_xdata()) == [37, 37]
    # layer map: the values at the cursor are the recording's series at that row
    rows, tensors = _tensor_rows(view.layer_map)
    assert sorted(tensors) == list(range(len(run.tensors)))                 # a small model starts expanded
    shown = np.asarray(view.layer_map.values.get_xdata(), dtype=np.float64)[rows]
    expected = run.series(view.quantity)[row].astype(np.float64)[tensors]
    np.testing.assert_allclose(shown, np.where(expected > 0, expected, np.nan) if view.layer_map.is_log else expected)
    # coordinate view: |lr*g| and |update| of the tensor's probes at that row, classes as classify_gain
    probes = run.probes(view.tensor, rows=slice(row, row + 1))
    lr = run.lr[row, 0]
    plain, update = np.abs(lr * probes["grad"][0].astype(np.float64)), np.abs(probes["update"][0].astype(np.float64))
    keep = (plain > 0) & (update > 0)
    np.testing.assert_allclose(view.coordinates.points.get_offsets(), np.column_stack([plain[keep], update[keep]]),
                               rtol=1e-6)
    gain = probes["update"][0].astype(np.float64) / (-lr * probes["grad"][0].astype(np.float64))
    median = run.series("gain_median", view.tensor)[row]
    np.testing.assert_array_equal(view.coordinates.classes, classify_gain(gain, median))
    assert list(view.coordinates.classes_cursor.get_xdata()) == [37, 37]


def test_step_outside_the_recording_snaps_to_its_end(view):
    view.step = 10_000
    assert view.step == 59 and "step 59" in view.step_label.value
    view.step = -5
    assert view.step == 0


def test_scrubbing_blits_and_never_redraws_or_rebuilds_figures(view):
    for step in range(30, 41):           # the coordinate axes grow to hold what they show, then stay
        view.step = step
    counts = {}
    artists_before = {}
    for part in (view.timeline, view.layer_map, view.coordinates):
        canvas = part.canvas
        counts[part] = [0, 0]
        original_draw, original_blit = canvas.draw, canvas.blit

        def draw(original=original_draw, c=counts[part]):
            c[0] += 1
            original()

        def blit(bbox=None, original=original_blit, c=counts[part]):
            c[1] += 1
            original(bbox)
        canvas.draw, canvas.blit = draw, blit
        artists_before[part] = (len(part.figure.axes), [len(ax.get_children()) for ax in part.figure.axes])
    for step in range(39, 29, -1):
        view.step = step
    for part, (draws, blits) in counts.items():
        assert blits == 10, type(part).__name__
        assert draws == 0, type(part).__name__
        assert artists_before[part] == (len(part.figure.axes), [len(ax.get_children()) for ax in part.figure.axes])


def test_clicking_a_row_picks_its_tensor_and_loads_its_histogram(view, run_path):
    run = nbkit.load(run_path)
    target = run.tensors[2]
    rows, tensors = _tensor_rows(view.layer_map)
    _click(view.layer_map.canvas, view.layer_map.map_axes, 10, rows[tensors.index(2)])
    assert view.tensor == target and view.tensor_menu.value == target
    assert view.coordinates.tensor == target
    # the stacked gain classes are the recorded shares (ordinary the rest) and sum to 1 at each step
    heavy = np.flatnonzero(np.isfinite(run.series("reversed", target)))
    shares = view.coordinates.share_values                                  # (4, columns): reversed at the bottom
    np.testing.assert_array_equal(view.coordinates.share_steps, run.steps[heavy])
    np.testing.assert_allclose(shares[0], run.series("reversed", target)[heavy], rtol=1e-6)
    np.testing.assert_allclose(shares[3], run.series("accelerated", target)[heavy], rtol=1e-6)
    np.testing.assert_allclose(shares.sum(axis=0), 1.0)
    assert len(view.coordinates.shares) == 4
    assert not any(type(a).__name__ in ("QuadMesh", "AxesImage") for a in view.coordinates.figure.axes[2].get_children())
    assert target in view.coordinates.classes_note.get_text()


def test_dragging_on_the_timeline_moves_the_cursor(view):
    axes = view.timeline.loss_axes
    y = float(np.mean(axes.get_ylim()))
    _click(view.timeline.canvas, axes, 12, y)
    assert view.step == 12
    _click(view.timeline.canvas, axes, 25, y, "motion_notify_event")
    assert view.step == 25
    _click(view.timeline.canvas, axes, 25, y, "button_release_event")
    _click(view.timeline.canvas, axes, 40, y, "motion_notify_event")       # not dragging any more
    assert view.step == 25


def test_previous_and_next_buttons_step_by_one_recorded_step(view):
    view.step = 20
    view.next_button.click()
    assert view.step == 21
    view.previous_button.click()
    view.previous_button.click()
    assert view.step == 19


def test_clicking_a_finding_moves_the_cursor_and_picks_its_tensor(view):
    finding = Finding(kind="grad-spike", tensors=[view.run.tensors[3]], first_step=44, last_step=50,
                      severity="warning", evidence={"ratio": 12.0}, suggestion="check the batch")
    view.findings = [finding]
    view.findings_list.options = view.finding_options()
    view.findings_list.value = 0
    assert view.step == 44 and view.tensor == view.run.tensors[3]
    assert "grad-spike" in view.findings_list.options[0][0]


def test_findings_note_says_they_are_heuristics(view):
    assert "heuristic" in view.findings_note.value and "replay" in view.findings_note.value


def test_quantity_pick_redraws_the_heatmap_with_the_recorded_values(view, run_path):
    run = nbkit.load(run_path)
    view.quantity = "grad_norm"
    image = view.layer_map.image.get_array()                               # (rows, columns)
    rows, tensors = _tensor_rows(view.layer_map)
    np.testing.assert_allclose(np.ma.filled(image, np.nan)[rows], run.series("grad_norm").T[tensors], rtol=1e-6)
    assert "gradient" in view.layer_map.title.get_text()
    assert "1st–99th percentile" in view.layer_map.colourbar.ax.get_ylabel()
    assert view.layer_map.image.get_cmap().name == "viridis"
    view.quantity = "grad_cosine"
    assert view.layer_map.image.get_cmap().name == "PuOr_r"                # signed: diverging map


def test_png_output(view, tmp_path):
    path = view.to_png(tmp_path / "explorer.png")
    data = path.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 20_000
    bundle = view._repr_mimebundle_()
    assert "image/png" in bundle and "application/vnd.jupyter.widget-view+json" in bundle


def test_bad_input_names_the_problem(run_path):
    with pytest.raises(TypeError, match="Recording, a recording path or a Recorder"):
        nbkit.explore(42)
    with pytest.raises(nbkit.RecordingError, match="No recording found"):
        nbkit.explore(run_path.parent / "missing")
    with pytest.raises(ValueError, match="run.quantities"):
        nbkit.explore(run_path, quantity="loss_curvature")


def test_a_failing_part_is_reported_in_the_view_not_raised(view, monkeypatch):
    def broken(*args, **kwargs):
        raise RuntimeError("probe read failed on purpose")
    monkeypatch.setattr(view.data, "probes_at", broken)
    view.step = 33                                                         # must not raise
    assert "probe read failed on purpose" in view.errors.value
    view.errors.value = ""


def test_long_recordings_use_the_overview_and_keep_extremes(run_path, monkeypatch):
    monkeypatch.setattr(view_data, "LONG", 10)                              # treat 60 steps as long
    run = nbkit.load(run_path)
    v = nbkit.explore(run)
    try:
        y = np.asarray(v.timeline.loss_line.get_ydata(), dtype=np.float64)
        assert len(y) == 2 * len(run.overview("loss")[0])
        np.testing.assert_allclose([np.nanmin(y), np.nanmax(y)], [np.nanmin(run.loss), np.nanmax(run.loss)], rtol=1e-6)
        assert "maximum per 256 steps" in v.layer_map.title.get_text()
    finally:
        v.close()


def test_minmax_downsample_keeps_spikes():
    x = np.arange(100_000)
    y = np.sin(x / 5000.0)
    y[77_777] = 50.0
    y[12_345] = -50.0
    xs, ys = minmax_downsample(x, y, 500)
    assert len(ys) <= 1000
    assert ys.max() == 50.0 and xs[np.argmax(ys)] == 77_777 and ys.min() == -50.0


@pytest.mark.slow
def test_live_view_follows_a_running_recorder_and_keeps_a_moved_cursor(tmp_path, monkeypatch):
    monkeypatch.setattr("nbkit.views.live.LIVE_MIN_INTERVAL", 0.0)
    monkeypatch.setattr("nbkit.views.live.LIVE_COST_FACTOR", 0.0)
    model = _model()
    opt = torch.optim.Adam(model.parameters(), lr=1e-2)
    x, y = torch.randn(16, 6), torch.randn(16, 1)
    rec = nbkit.record(model, opt, tmp_path / "live", probes=4, commit_seconds=60)
    try:
        _train(model, opt, rec, x, y, 3)
        rec.flush()
        v = nbkit.explore(rec)
        start_rows = v.data.row_count
        assert v.step == int(v.data.steps[-1])                             # a live view starts at the end
        import time

        seen = []
        for _ in range(40):                                                # the hook asks the writer to commit
            _train(model, opt, rec, x, y, 1)
            time.sleep(0.02)
            seen.append(v.data.row_count)
        assert len(set(seen)) >= 3 and seen[-1] > start_rows              # grew, several times, during the loop
        with v.lock:                                                       # the poller may be mid-refresh
            assert v.step == int(v.data.steps[-1])                         # and the cursor followed the end
        v.step = 2
        for _ in range(20):
            _train(model, opt, rec, x, y, 1)
            time.sleep(0.02)
        assert v.step == 2                                                 # a moved cursor stays
        assert v.errors.value == ""
        v.close()
        before = v.data.row_count
        _train(model, opt, rec, x, y, 5)                                   # removed hook: no more refreshes
        assert v.data.row_count == before
    finally:
        rec.close()


@pytest.mark.slow
def test_tour_notebook_runs_with_nbclient_and_keeps_a_static_picture(tmp_path):
    import shutil
    from pathlib import Path

    import nbclient
    import nbformat

    source = Path(__file__).resolve().parents[1] / "notebooks" / "01-tour.ipynb"
    shutil.copy(source, tmp_path / source.name)
    nb = nbformat.read(tmp_path / source.name, as_version=4)
    nbclient.NotebookClient(nb, timeout=600, kernel_name="python3", store_widget_state=True,
                            resources={"metadata": {"path": str(tmp_path)}}).execute()
    outputs = [o for cell in nb.cells if cell.cell_type == "code" for o in cell.outputs]
    assert not [o for o in outputs if o.get("output_type") == "error"]
    explorer = [o for o in outputs if "application/vnd.jupyter.widget-view+json" in o.get("data", {})]
    assert explorer and "image/png" in explorer[0]["data"]                  # the PNG fallback is stored
    assert (tmp_path / "recordings" / "tour-explorer.png").stat().st_size > 20_000
    assert nb.metadata["widgets"]["application/vnd.jupyter.widget-state+json"]["state"]


@pytest.mark.slow
def test_view_of_a_path_follows_a_recording_another_process_writes(tmp_path):
    import json
    import subprocess
    import sys
    import time

    path = tmp_path / "growing"
    writer = subprocess.Popen([sys.executable, "-c", "import sys, time\n"
                               "from nbkit.store.synthetic import write_synthetic\n"
                               f"write_synthetic({str(path)!r}, steps=4000, tensors=4, probes=4)\n"])
    try:
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline:           # wait for the first committed rows
            try:
                if json.loads((path / "committed.json").read_text())["rows"] > 0:
                    break
            except (OSError, ValueError, KeyError):
                pass
            time.sleep(0.05)
        v = nbkit.explore(path)
        first_rows = v.data.row_count
        while time.monotonic() < deadline and v.data.row_count < 4000:
            time.sleep(0.2)
        assert writer.wait(120) == 0
        time.sleep(2.5)                              # one more poll after the writer closed
        assert first_rows < 4000 and v.data.row_count == 4000
        assert v.step == 3999 and v.slider.max == 3999   # it was at the end, so it followed
        v.close()
    finally:
        writer.kill()


def test_log_scale_toggle_sets_the_loss_axis_scale(view):
    assert view.log_toggle.description == "log scale"
    view.log_toggle.value = True
    assert view.timeline.log_scale and view.timeline.loss_axes.get_yscale() == "log"
    view.log_toggle.value = False
    assert view.timeline.loss_axes.get_yscale() == "linear"


# --- the reads the explorer relies on (nbkit.load's public API) ------------------------------------
def test_probe_fields_keyword_decodes_only_the_fields_asked_for(run_path):
    run = nbkit.load(run_path)
    tensor = run.tensors[1]
    everything = run.probes(tensor, rows=slice(5, 9))
    some = run.probes(tensor, rows=slice(5, 9), fields=["update", "not_a_field"])
    assert set(some) == {"index", "update"}
    np.testing.assert_array_equal(some["update"], everything["update"])
    np.testing.assert_array_equal(some["index"], everything["index"])
    assert some["update"].shape == (4, len(run.probe_index(tensor)))


def test_histogram_counts_hold_every_tensor_and_learning_rates_a_row_slice(run_path):
    run = nbkit.load(run_path)
    edges, counts = run.histogram_counts("gain", rows=slice(10, 30))         # (rows, tensors, bins)
    assert counts.shape == (20, len(run.tensors), len(edges) - 1)
    for i, tensor in enumerate(run.tensors):
        tensor_edges, tensor_counts = run.histogram("gain", tensor, rows=slice(10, 30))
        np.testing.assert_array_equal(edges, tensor_edges)
        np.testing.assert_array_equal(counts[:, i, :], tensor_counts)
    np.testing.assert_array_equal(run.learning_rates(rows=slice(10, 30)), run.lr[10:30])
    assert run.learning_rates().shape == run.lr.shape
    with pytest.raises(nbkit.RecordingError, match="histograms exist for"):
        run.histogram_counts("weight")


def _flip_bytes_in_first_chunk(folder):
    chunk = next(c for c in sorted((folder / "c").rglob("*")) if c.is_file())
    data = bytearray(chunk.read_bytes())
    for i in range(len(data) // 3, len(data) // 3 + 4):
        data[i] ^= 0xFF
    chunk.write_bytes(bytes(data))


@pytest.mark.parametrize("array", ["probe/grad", "hist/gain"])
def test_a_damaged_chunk_reaches_the_view_as_the_readers_error(run_path, tmp_path, array):
    import shutil

    copy = tmp_path / "damaged"
    shutil.copytree(run_path, copy)
    _flip_bytes_in_first_chunk(copy / array)
    data = view_data.ExplorerData(nbkit.load(copy))
    name = array.split("/")[0]
    with pytest.raises(nbkit.RecordingError, match=f"{array}.*CRC32C"):
        if name == "probe":
            data.probes_at(data.run.tensors[0], 3, ["grad", "update"])
        else:
            data.histogram_image("gain", data.run.tensors[0])
    if name == "probe":                                                       # other fields still read
        assert data.probes_at(data.run.tensors[0], 3, ["update"])["update"].shape == (8,)


class _StubRecorder:
    """The public surface of a live Recorder the explorer uses, nothing else."""

    def __init__(self, path):
        self.recording_path = path
        self.hooks, self.flushes = {}, []

    def add_step_hook(self, fn):
        stub = self

        class Handle:
            def remove(self):
                stub.hooks.pop(id(self), None)
        handle = Handle()
        self.hooks[id(handle)] = fn
        return handle

    def flush(self, wait=True):
        self.flushes.append(wait)


def test_a_live_view_uses_only_the_recorders_public_surface(run_path, monkeypatch):
    monkeypatch.setattr("nbkit.views.live.LIVE_MIN_INTERVAL", 0.0)
    monkeypatch.setattr("nbkit.views.live.LIVE_COST_FACTOR", 0.0)
    recorder = _StubRecorder(run_path)
    v = nbkit.explore(recorder)
    try:
        assert v.recorder is recorder and len(recorder.hooks) == 1
        assert v.step == int(v.data.steps[-1])                                 # a live view starts at the end
        next(iter(recorder.hooks.values()))(None)                             # one recorded step
        assert recorder.flushes == [False] and v.errors.value == ""           # asked to commit, did not wait
    finally:
        v.close()
    assert recorder.hooks == {}                                               # close removed the step hook
    v.close()                                                                 # and closing twice is safe


def test_to_png_waits_for_the_findings_and_says_when_it_gave_up(run_path, monkeypatch):
    from nbkit.views import explorer as explorer_module
    from nbkit.views.findings_panel import FindingsPanel
    release = threading.Event()
    real = FindingsPanel._read_findings

    def slow(panel):
        release.wait(30)
        return real(panel)

    monkeypatch.setattr(FindingsPanel, "_read_findings", slow)
    lines = []
    monkeypatch.setattr(explorer_module, "compose_png", lambda images, text: lines.append(text) or b"png")
    view = nbkit.explore(run_path)
    try:
        view.png_bytes(findings_timeout=0.2)
        assert "still being computed when this picture was taken (it waited 0.2 s)" in lines[-1]
        view._repr_mimebundle_()                    # the display data never waits
        release.set()
        view.png_bytes()                            # waits for them now: their labels are in the picture
        assert "still being computed" not in lines[-1]
        assert view.wait_for_findings(0)
    finally:
        release.set()
        view.close()

"""One end-to-end test in a real browser: JupyterLab on 127.0.0.1, headless Chromium via Playwright.

It runs notebooks/01-tour.ipynb, moves the explorer's cursor by dragging on the timeline and by the
slider, and checks from the page that the layer map and coordinate view redrew (canvas pixels
changed) and that the step shown matches the slider. Then a live notebook: the explorer of a running
Recorder must change while the training loop in the same kernel is still running. Screenshots go
to test-output/browser/.
"""
from __future__ import annotations

import re
import time
from pathlib import Path

import nbformat
import pytest

from tests.browser_harness import JupyterLab, browser_available

ROOT = Path(__file__).resolve().parents[1]
OUTPUT = ROOT / "test-output" / "browser"
EXPLORER = ".nbkit-explorer"
LAST_STEP = 599          # the tour notebook records scenario.STEPS = 600 steps

pytestmark = [pytest.mark.browser, pytest.mark.slow]

LIVE_SETUP = """import time, torch, nbkit
torch.manual_seed(0)
model = torch.nn.Sequential(torch.nn.Linear(8, 32), torch.nn.Tanh(), torch.nn.Linear(32, 1))
optimizer = torch.optim.Adam(model.parameters(), lr=1e-2)
x = torch.randn(128, 8); y = x[:, :2].sum(dim=1, keepdim=True)
rec = nbkit.record(model, optimizer, "recordings/live", probes=16, overwrite=True)
def train(n):
    for _ in range(n):
        optimizer.zero_grad()
        loss = torch.nn.functional.mse_loss(model(x), y)
        loss.backward(); rec.loss(loss); optimizer.step()
train(5); rec.flush()
view = nbkit.explore(rec)
view"""
LIVE_LOOP = """for _ in range(400):      # about 40 s: the view must change while this runs
    train(1)
    time.sleep(0.1)
rec.close()"""


def _step_shown(page):
    text = page.locator(".nbkit-step-label").first.inner_text()
    match = re.search(r"step (\d+)", text)
    return int(match.group(1)) if match else None


def _readout(page):
    return int(page.locator(".nbkit-step-slider .widget-readout").first.inner_text().strip())


@pytest.fixture(scope="module")
def live_notebook(tmp_path_factory):
    nb = nbformat.v4.new_notebook()
    nb.cells = [nbformat.v4.new_code_cell(LIVE_SETUP), nbformat.v4.new_code_cell(LIVE_LOOP)]
    nb.metadata["kernelspec"] = {"name": "python3", "display_name": "Python 3", "language": "python"}
    path = tmp_path_factory.mktemp("live") / "live-explorer.ipynb"
    nbformat.write(nb, path)
    return path


def test_explorer_scrubs_and_follows_a_live_run_in_jupyterlab(live_notebook):
    why = browser_available()
    if why:
        pytest.skip(why)
    with JupyterLab([ROOT / "notebooks" / "01-tour.ipynb"], OUTPUT, extra_files=[live_notebook]) as lab:
        page = lab.open("01-tour.ipynb")
        lab.run_all(page)
        lab.wait_for(page, f"{EXPLORER} .nbkit-coordinates canvas", timeout=240)
        lab.wait_idle(page, "01-tour.ipynb")
        page.locator(f"{EXPLORER} .nbkit-timeline").first.scroll_into_view_if_needed()
        maps = [lab.stable_digest(page, sel) for sel in (".nbkit-layer-map", ".nbkit-coordinates")]
        assert all(maps), "the explorer's canvases were never drawn"
        first = _step_shown(page)
        lab.screenshot(page, "01-opened")

        # 1. drag on the timeline: the cursor follows the mouse
        lab.drag(page, ".nbkit-timeline canvas", 0.25, 0.7)
        after_drag = [lab.stable_digest(page, sel) for sel in (".nbkit-layer-map", ".nbkit-coordinates")]
        dragged = _step_shown(page)
        lab.screenshot(page, "02-dragged")
        assert dragged is not None and dragged != first
        # the loss axes span 9 %..99 % of the canvas width over steps 0..LAST_STEP
        assert abs(dragged - (0.7 - 0.09) / 0.90 * LAST_STEP) < 0.05 * LAST_STEP, dragged
        assert _readout(page) == dragged
        assert after_drag[0] != maps[0] and after_drag[1] != maps[1], "layer map / coordinate view did not redraw"

        # 2. the slider: drag its handle left
        handle = page.locator(".nbkit-step-slider .noUi-handle").first
        box = handle.bounding_box()
        page.mouse.move(box["x"] + box["width"] / 2, box["y"] + box["height"] / 2)
        page.mouse.down()
        page.mouse.move(box["x"] - 150, box["y"] + box["height"] / 2, steps=6)
        page.mouse.up()
        after_slider = [lab.stable_digest(page, sel) for sel in (".nbkit-layer-map", ".nbkit-coordinates")]
        slid = _step_shown(page)
        lab.screenshot(page, "03-slider")
        assert slid is not None and slid < dragged
        assert _readout(page) == slid
        assert after_slider[0] != after_drag[0] and after_slider[1] != after_drag[1]

        # 3. live: the view of a running Recorder changes while the loop still runs
        page.close()
        live = lab.open("live-explorer.ipynb")
        lab.run_all(live)
        try:
            lab.wait_for(live, f"{EXPLORER} .nbkit-timeline canvas", timeout=240)
        finally:
            lab.screenshot(live, "04-live-opened")
        seen_steps, seen_pixels, busy = set(), set(), 0
        deadline = time.monotonic() + 40
        while time.monotonic() < deadline:
            kernel = lab.kernel_of("live-explorer.ipynb") or {}
            if kernel.get("execution_state") == "busy":
                busy += 1
                step = _step_shown(live)
                if step is not None:
                    seen_steps.add(step)
                seen_pixels.add(lab.canvas_digest(live, ".nbkit-timeline"))
            elif busy:
                break                      # the loop ended
            live.wait_for_timeout(1000)
        lab.screenshot(live, "04-live")
        assert busy >= 3, "the training loop was not observed running"
        assert len(seen_steps) >= 2, f"the step shown did not change while the loop ran: {seen_steps}"
        assert len(seen_pixels - {None}) >= 2, "the timeline did not redraw while the loop ran"


def test_tour_explorer_reacts_in_notebook_7():
    """The same tour in Notebook 7 (the `notebook` package's front end, another widget manager build
    than JupyterLab's): the explorer appears and a drag on its timeline moves the cursor."""
    why = browser_available()
    if why:
        pytest.skip(why)
    with JupyterLab([ROOT / "notebooks" / "01-tour.ipynb"], OUTPUT / "notebook7") as lab:
        page = lab.open("01-tour.ipynb", front_end="notebook")
        assert "/notebooks/" in page.url
        lab.run_all(page)
        lab.wait_for(page, f"{EXPLORER} .nbkit-coordinates canvas", timeout=240)
        lab.wait_idle(page, "01-tour.ipynb")
        page.locator(f"{EXPLORER} .nbkit-timeline").first.scroll_into_view_if_needed()
        before = lab.stable_digest(page, ".nbkit-layer-map")
        first = _step_shown(page)
        lab.screenshot(page, "01-opened")
        lab.drag(page, ".nbkit-timeline canvas", 0.25, 0.7)
        after = lab.stable_digest(page, ".nbkit-layer-map")
        dragged = _step_shown(page)
        lab.screenshot(page, "02-dragged")
        assert before and after and after != before, "the layer map did not redraw after the drag"
        assert dragged is not None and dragged != first and _readout(page) == dragged


LARGE_SETUP = """import json, nbkit
view = nbkit.explore(PATH_A)
view.wait_for_findings(120)
row = next(k for k, r in enumerate(view.layer_map.rows) if r.tensor is None)   # a collapsed block row
x, y = view.layer_map.row_centre(row)
print(json.dumps({"x": x, "y": y, "width": view.layer_map.figure.bbox.width,
                  "height": view.layer_map.figure.bbox.height, "rows": len(view.layer_map.rows)}))
view"""
LARGE_COMPARE = """comparison = nbkit.compare([PATH_A, PATH_B])
comparison"""


def test_a_150_tensor_recording_expands_filters_and_tells_tensors_apart(tmp_path):
    """A synthetic 150-tensor recording (75 blocks of weight + bias, nbkit.store.synthetic): a click on a
    block row expands it, the filter box narrows the rows, two tensors with the same tail name carry
    different labels on the page (the tensor menu's options), and the comparison's verdict is on the page."""
    why = browser_available()
    if why:
        pytest.skip(why)
    import json

    from nbkit.store.synthetic import write_synthetic
    paths = [tmp_path / "large-a", tmp_path / "large-b"]
    write_synthetic(paths[0], steps=400, tensors=150)
    write_synthetic(paths[1], steps=400, tensors=150, seed=1)
    nb = nbformat.v4.new_notebook()
    header = f"PATH_A, PATH_B = {str(paths[0])!r}, {str(paths[1])!r}\n"
    nb.cells = [nbformat.v4.new_code_cell(header + LARGE_SETUP), nbformat.v4.new_code_cell(LARGE_COMPARE)]
    nb.metadata["kernelspec"] = {"name": "python3", "display_name": "Python 3", "language": "python"}
    notebook = tmp_path / "large.ipynb"
    nbformat.write(nb, notebook)
    with JupyterLab([], OUTPUT / "large", extra_files=[notebook]) as lab:
        page = lab.open("large.ipynb")
        lab.run_all(page)
        lab.wait_for(page, f"{EXPLORER} .nbkit-layer-map canvas", timeout=240)
        lab.wait_for(page, ".nbkit-verdict", timeout=240)
        lab.wait_idle(page, "large.ipynb")
        lab.screenshot(page, "01-opened")
        verdict = page.locator(".nbkit-verdict").first.inner_text()
        assert "large-a" in verdict and "large-b" in verdict, verdict

        # labels: two tensors with the same tail name read differently in the tensor menu
        options = page.locator(f"{EXPLORER} .nbkit-tensor select option").all_inner_texts()
        weights = [o for o in options if o.endswith("weight")]
        assert len(options) == 150 and len(set(weights)) == len(weights) == 75, options[:6]

        # expand: click the block row whose centre the kernel printed
        where = json.loads(next(t for t in page.locator(".jp-OutputArea-output pre").all_inner_texts() if '"rows"' in t))
        layer_map = f"{EXPLORER} .nbkit-layer-map canvas"
        page.locator(layer_map).first.scroll_into_view_if_needed()
        before = lab.stable_digest(page, ".nbkit-layer-map")
        box = page.locator(layer_map).first.bounding_box()
        page.mouse.click(box["x"] + where["x"] * box["width"] / where["width"],
                         box["y"] + where["y"] * box["height"] / where["height"])
        expanded = lab.stable_digest(page, ".nbkit-layer-map")
        lab.screenshot(page, "02-expanded")
        assert expanded and expanded != before, "a click on a block row did not redraw the layer map"

        # filter: type a name and press Enter
        box_input = page.locator(f"{EXPLORER} .nbkit-filter input").first
        box_input.fill("block7")
        box_input.press("Enter")
        filtered = lab.stable_digest(page, ".nbkit-layer-map")
        lab.screenshot(page, "03-filtered")
        assert filtered and filtered != expanded, "the filter did not redraw the layer map"

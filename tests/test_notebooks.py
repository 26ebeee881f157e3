"""The template notebook executes top to bottom under nbclient (the tour has its own test in
test_explorer.py and the real-browser test)."""
import shutil
from pathlib import Path

import pytest

NOTEBOOKS = Path(__file__).resolve().parents[1] / "notebooks"


def execute(name, folder):
    """Run a copy of notebooks/<name> in `folder` under nbclient; returns its code cells' outputs."""
    import nbclient
    import nbformat

    shutil.copy(NOTEBOOKS / name, folder)
    nb = nbformat.read(folder / name, as_version=4)
    nbclient.NotebookClient(nb, timeout=600, kernel_name="python3", store_widget_state=True,
                            resources={"metadata": {"path": str(folder)}}).execute()
    outputs = [o for cell in nb.cells if cell.cell_type == "code" for o in cell.outputs]
    assert not [o for o in outputs if o.get("output_type") == "error"]
    return outputs


@pytest.mark.slow
def test_your_model_template_runs_top_to_bottom(tmp_path):
    outputs = execute("02-your-model.ipynb", tmp_path)
    views = [o for o in outputs if o.get("data", {}).get("text/plain", "").startswith(("Explorer(", "Comparison("))]
    assert len(views) == 2                                   # the explorer and the comparison
    assert all("image/png" in v["data"] for v in views)      # static pictures for exported notebooks
    assert all("application/vnd.jupyter.widget-view+json" in v["data"] for v in views)
    recording = tmp_path / "recordings" / "your-model"
    assert (recording / "nbkit.json").is_file()
    replays = list((tmp_path / "recordings" / "your-model.replays").iterdir())
    assert [p.name for p in replays] == ["sgd-momentum"]


@pytest.mark.slow
def test_the_transformers_notebook_records_the_trainers_loss(tmp_path):
    pytest.importorskip("transformers")
    outputs = execute("03-transformers.ipynb", tmp_path)
    printed = "".join(o.get("text", "") for o in outputs if o.get("output_type") == "stream")
    difference = float(printed.split("largest difference from the Trainer's log:")[1].split()[0])
    assert difference <= 5e-5 + 1e-6                       # the log's 4 decimals
    views = [o for o in outputs if o.get("data", {}).get("text/plain", "").startswith("Explorer(")]
    assert len(views) == 1 and "image/png" in views[0]["data"]
    import nbkit

    assert len(nbkit.load(tmp_path / "recordings" / "gpt")) == 100

"""docs/format.md is enough to read a recording: a reader written from that page alone, with zarr,
safetensors and json (no nbkit), gets the numbers nbkit.load gives."""
import inspect
import json
import re
from pathlib import Path

import numpy as np
import pytest
import torch
import zarr
from safetensors import safe_open
from safetensors.numpy import load_file

import nbkit
from conftest import train
from nbkit.store.layout import FORMAT_VERSION

DOC = Path(__file__).resolve().parent.parent / "docs" / "format.md"


# --- a reader that follows docs/format.md only (no nbkit import) ---------------------------------
class DocReader:
    """Reads a recording the way docs/format.md describes it."""

    def __init__(self, path):
        self.path = Path(path)
        self.rows = json.loads((self.path / "committed.json").read_text())["rows"]     # committed rows only
        self.meta = json.loads((self.path / "nbkit.json").read_text())
        self.group = zarr.open_group(str(self.path), mode="r", use_consolidated=False)
        self.tensors = [t["name"] for t in self.meta["tensors"]]

    def array(self, name):
        return self.group[name][:self.rows]

    def profile(self, tensor, quantity, axis):
        table = self.meta["profiles"]
        offset, count = table["tensors"][tensor][axis]
        codes = self.group[f"profile/{axis}"][:self.rows, offset:offset + count,
                                              table["quantities"].index(quantity)]
        special = table["codes"]
        values = np.exp2(codes.astype(np.float64) / table["log2_scale"])
        values[codes == special["zero"]] = 0.0
        values[codes == special["infinite"]] = np.inf
        values[(codes == special["nan"]) | (codes == special["missing"])] = np.nan
        return values

    def gain(self, tensor, axis):
        group = self.meta["tensors"][self.tensors.index(tensor)]["group"]
        plain = self.profile(tensor, "grad_rms", axis) * self.array("lr")[:, group:group + 1]
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(plain > 0, self.profile(tensor, "update_rms", axis) / plain, np.nan)

    def keyframe_steps(self):
        folder = self.path / "keyframes"
        return sorted(int(m.group(1)) for f in folder.iterdir()
                      if (m := re.fullmatch(r"(\d{10})\.json", f.name)) and (folder / f"{m.group(1)}.safetensors").exists())

    def keyframe(self, step):
        """The skeleton with every {"__tensor__": name} replaced by its array."""
        tensors = load_file(str(self.path / "keyframes" / f"{step:010d}.safetensors"))
        skeleton = json.loads((self.path / "keyframes" / f"{step:010d}.json").read_text())["state"]

        def fill(node):
            if isinstance(node, dict):
                if "__tensor__" in node:
                    return tensors[node["__tensor__"]]
                if "__tuple__" in node:
                    return tuple(fill(v) for v in node["__tuple__"])
                if "__items__" in node:
                    return {k: fill(v) for k, v in node["__items__"]}
                return {k: fill(v) for k, v in node.items()}
            if isinstance(node, list):
                return [fill(v) for v in node]
            return node
        return fill(skeleton)

    def kept_step(self, step):
        """The micro-batches of a kept step, tensors as row-major numpy arrays (contiguous tensors)."""
        for f in (self.path / "batches").iterdir():
            m = re.fullmatch(r"(\d{10})-(\d{10})\.safetensors", f.name)
            if m and int(m.group(1)) <= step <= int(m.group(2)):
                with safe_open(str(f), framework="numpy") as handle:
                    side = json.loads(handle.metadata()["nbkit.kept_step"])[str(step)]
                    buffers = {name.split(".", 2)[2]: handle.get_tensor(name) for name in handle.keys()
                               if name.startswith(f"{step}.buffer.")}
                assert side["kept_format"] == 1
                return decode_tree(side["spec"], buffers)
        raise KeyError(step)


def decode_tree(node, buffers):
    kind = node["kind"]
    if kind == "tensor":
        flat = buffers[node["buffer"]][node["offset"]:node["offset"] + node["numel"]]
        return flat.reshape(node["shape"])
    if kind in ("list", "tuple"):
        items = [decode_tree(v, buffers) for v in node["items"]]
        return items if kind == "list" else tuple(items)
    if kind == "dict":
        return {decode_tree(k, buffers): decode_tree(v, buffers) for k, v in zip(node["keys"], node["values"])}
    if kind == "none":
        return None
    return float(node["value"]) if kind == "float" else node["value"]


def _reader_source():
    return inspect.getsource(DocReader) + inspect.getsource(decode_tree)


# --- the recording --------------------------------------------------------------------------------
@pytest.fixture
def recording(tmp_path, tiny_classifier):
    model, inputs, targets = tiny_classifier
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-2)
    criterion = torch.nn.CrossEntropyLoss()
    with nbkit.record(model, optimizer, tmp_path / "run", every=2, probes=8, keyframe_every=5, criterion=criterion):
        train(model, optimizer, inputs, targets, 13, criterion=criterion)
    return tmp_path / "run"


def test_the_doc_reader_uses_no_nbkit():
    source = _reader_source()
    assert "import nbkit" not in source and "from nbkit" not in source
    assert "nbkit." not in source.replace("nbkit.json", "").replace("nbkit.kept_step", "")


def test_reading_by_the_document_gives_nbkit_loads_numbers(recording):
    doc, run = DocReader(recording), nbkit.load(recording)
    assert doc.meta["format_version"] == FORMAT_VERSION
    assert f"version {FORMAT_VERSION}" in DOC.read_text()            # the page names the version it describes
    assert doc.group["loss"].shape[0] > doc.rows == len(run)          # arrays are longer than the committed rows
    np.testing.assert_array_equal(doc.array("step"), run.steps)
    np.testing.assert_array_equal(doc.array("loss"), run.loss)
    assert np.isfinite(run.loss).all()
    np.testing.assert_array_equal(doc.array("q/update_ratio"), run.series("update_ratio"))
    np.testing.assert_array_equal(doc.array("heavy"), run.heavy)
    edges, counts = run.histogram("grad", "0.weight")
    np.testing.assert_array_equal(doc.array("hist/grad")[:, 0, :doc.meta["histogram_bins"]], counts)
    assert edges[0] == doc.meta["histogram_low"]["grad"]
    # a profile decoded from its codes, and the gain derived from two of them
    for tensor in run.profile_tensors:
        for axis in ("rows", "columns"):
            np.testing.assert_array_equal(doc.profile(tensor, "update_rms", axis), run.profile(tensor, "update_rms", axis))
            np.testing.assert_array_equal(doc.gain(tensor, axis), run.profile(tensor, "gain", axis))
    assert np.isfinite(doc.profile("0.weight", "update_rms", "rows")[run.heavy]).all()
    # keyframes: the same steps, the same model and optimizer tensors
    assert doc.keyframe_steps() == run.keyframes
    step = run.keyframes[1]
    ours, theirs = doc.keyframe(step), run.keyframe(step)
    np.testing.assert_array_equal(ours["model"]["0.weight"], theirs["model"]["0.weight"].numpy())
    np.testing.assert_array_equal(ours["optimizer"]["state"][0]["exp_avg_sq"],
                                  theirs["optimizer"]["state"][0]["exp_avg_sq"].numpy())
    # a kept step's micro-batch
    micro = doc.kept_step(3)[0]
    kept = run.batch(3)[0]
    np.testing.assert_array_equal(micro["args"][0], kept["args"][0].numpy())
    np.testing.assert_array_equal(micro["targets"][0], kept["targets"][0].numpy())


def test_a_newer_format_version_is_refused_naming_both_versions(recording):
    meta_path = recording / "nbkit.json"
    meta = json.loads(meta_path.read_text())
    meta["format_version"] = FORMAT_VERSION + 1
    meta_path.write_text(json.dumps(meta))
    with pytest.raises(nbkit.RecordingError) as info:
        nbkit.load(recording)
    message = str(info.value)
    assert f"format version {FORMAT_VERSION + 1}" in message and f"({FORMAT_VERSION})" in message
    assert "upgrade nbkit" in message

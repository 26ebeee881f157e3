"""Property-based fuzzing of the metadata reader: any nbkit.json / committed.json content gives either a
usable Recording or a RecordingError naming the file, never another exception."""
import json
import shutil

import pytest
import torch
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import nbkit
from conftest import train

json_values = st.recursive(
    st.none() | st.booleans() | st.integers(-2**70, 2**70) | st.floats(allow_nan=True) | st.text(max_size=8),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=8), inner, max_size=4),
    max_leaves=12)


@pytest.fixture(scope="module")
def template(tmp_path_factory):
    torch.manual_seed(0)
    model = torch.nn.Linear(3, 2)
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    path = tmp_path_factory.mktemp("fuzz") / "run"
    with nbkit.record(model, optimizer, path):
        train(model, optimizer, torch.randn(16, 3), torch.randint(0, 2, (16,)), 5,
              criterion=torch.nn.CrossEntropyLoss())
    return path, json.loads((path / "nbkit.json").read_text())


def _open_and_touch(path):
    try:
        run = nbkit.load(path)
        repr(run), run.tensors, run.layers, run.quantities, len(run.steps), run.keyframes
    except nbkit.RecordingError as exc:
        assert "nbkit.json" in str(exc) or "committed.json" in str(exc) or str(path) in str(exc)


settings_ = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])


@pytest.mark.slow
@settings_
@given(key=st.sampled_from(["format_version", "tensors", "quantities", "probes", "probe_fields", "optimizer",
                            "param_groups", "pid", "distributed", "histogram_bins"]), value=json_values)
def test_one_entry_replaced_by_anything(template, tmp_path_factory, key, value):
    source, meta = template
    path = tmp_path_factory.mktemp("case") / "run"
    shutil.copytree(source, path)
    (path / "nbkit.json").write_text(json.dumps({**meta, key: value}))
    _open_and_touch(path)


@pytest.mark.slow
@settings_
@given(meta_text=st.one_of(st.text(max_size=200), json_values.map(json.dumps)),
       committed=st.one_of(st.text(max_size=50), json_values.map(json.dumps),
                           st.dictionaries(st.just("rows"), json_values).map(json.dumps)))
def test_whole_files_replaced_by_anything(template, tmp_path_factory, meta_text, committed):
    source, meta = template
    path = tmp_path_factory.mktemp("case") / "run"
    shutil.copytree(source, path)
    (path / "nbkit.json").write_text(meta_text)
    (path / "committed.json").write_text(committed)
    _open_and_touch(path)
    (path / "nbkit.json").write_text(json.dumps(meta))              # the real metadata, a fuzzed commit file
    _open_and_touch(path)

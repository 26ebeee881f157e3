"""run.frame and run.to_xarray (nbkit.store.export) against the reader's own arrays, value for value."""
import sys
import warnings

import numpy as np
import pytest
import torch

import nbkit
from conftest import train

pd = pytest.importorskip("pandas")
xr = pytest.importorskip("xarray")

UNIT_NAMES = {"2.weight": {"rows": ["cat", "dog", "bird"]}}


def make_recording(path, tiny_classifier, *, steps=12, close=True):
    model, inputs, targets = tiny_classifier
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-2)
    criterion = torch.nn.CrossEntropyLoss()
    rec = nbkit.record(model, optimizer, path, every=2, probes=8, keyframe_every=5, unit_names=UNIT_NAMES,
                       criterion=criterion)
    train(model, optimizer, inputs, targets, steps, criterion=criterion)
    if close:
        rec.close()
    return rec


@pytest.fixture
def run(tmp_path, tiny_classifier):
    make_recording(tmp_path / "run", tiny_classifier)
    return nbkit.load(tmp_path / "run")


def same(a, b):
    """Equal value for value, NaN where the other is NaN."""
    np.testing.assert_array_equal(np.asarray(a), np.asarray(b))


def test_frame_of_one_quantity_is_its_series(run):
    for q in run.quantities:
        frame = run.frame(q)
        assert frame.index.name == "step" and frame.columns.name == "tensor"
        assert frame.index.tolist() == run.steps.tolist()
        assert frame.columns.tolist() == run.tensors
        same(frame.to_numpy(), run.series(q))
        for tensor in run.tensors:
            same(frame[tensor].to_numpy(), run.series(q, tensor))
    assert np.isfinite(run.frame("update_ratio").to_numpy()[run.heavy]).all()   # measured at heavy steps


def test_long_frame_pivots_back_to_every_series(run):
    long = run.frame()
    assert list(long.columns) == ["step", "tensor", "quantity", "value"]
    assert not long["value"].isna().any()                         # dropna=True leaves out unmeasured values
    wide = long.pivot_table(index="step", columns=["quantity", "tensor"], values="value", observed=True,
                            dropna=False, aggfunc="first")
    for q in run.quantities:
        expected = run.series(q)
        measured = ~np.isnan(expected)
        got = np.full(expected.shape, np.nan, dtype=np.float32)
        for t, tensor in enumerate(run.tensors):
            if (q, tensor) in wide.columns:
                got[:, t] = wide[(q, tensor)].reindex(run.steps).to_numpy()
        same(got[measured], expected[measured])
        assert np.isnan(got[~measured]).all()
    full = run.frame(dropna=False)
    assert len(full) == len(run) * len(run.tensors) * len(run.quantities)
    assert full["tensor"].cat.categories.tolist() == run.tensors
    assert full["quantity"].cat.categories.tolist() == run.quantities


def test_unknown_quantity_names_the_available_ones(run):
    with pytest.raises(nbkit.RecordingError) as info:
        run.frame("no_such_quantity")
    message = str(info.value)
    assert "no_such_quantity" in message
    assert all(q in message for q in run.quantities)


def test_dataset_holds_the_readers_values(run):
    ds = run.to_xarray()
    assert ds.sizes["step"] == len(run) and ds.sizes["tensor"] == len(run.tensors)
    assert ds.sizes["group"] == run.lr.shape[1]
    same(ds["step"], run.steps)
    for q in run.quantities:
        assert ds[q].dims == ("step", "tensor")
        same(ds[q], run.series(q))
    assert np.isfinite(run.loss).all()
    same(ds["loss"], run.loss)
    same(ds["lr"], run.learning_rates())
    same(ds["settings"], run.setting_values())
    assert ds["setting"].values.tolist() == run.meta["settings"]
    same(ds["pre_clip_grad_norm"], run.grad_norm)
    same(ds["pre_clip_tensor_grad_norm"], run.tensor_grad_norms)
    # layer and group coordinates on the tensor dimension
    for layer, tensors in run.layers.items():
        assert ds["tensor"].where(ds["layer"] == layer, drop=True).values.tolist() == tensors
    assert ds["tensor_group"].values.tolist() == [t["group"] for t in run.meta["tensors"]]
    # probes: their own variables, padded past each tensor's probe count
    for field in run.meta["probe_fields"]:
        for tensor in run.tensors:
            probes = run.probes(tensor)
            n = probes["index"].shape[1]
            same(ds[f"probe.{field}"].sel(tensor=tensor).values[:, :n], probes[field])
            same(ds["probe_index"].sel(tensor=tensor).values[:n], probes["index"][0])
            assert np.isnan(ds[f"probe.{field}"].sel(tensor=tensor).values[:, n:]).all()


def test_profiles_are_one_variable_per_tensor_and_axis(run):
    ds = run.to_xarray()
    assert run.profile_tensors                              # the fixture has profiled weights
    for tensor in run.profile_tensors:
        for axis in ("rows", "columns"):
            units = f"{tensor}.{axis}"
            variable = ds[f"profile.{units}"]
            assert variable.dims == ("step", units, "profile_quantity")
            assert ds[units].values.tolist() == run.unit_names(tensor, axis)
            for q in ds["profile_quantity"].values.tolist():
                same(variable.sel(profile_quantity=q), run.profile(tensor, q, axis))
    assert ds["2.weight.rows"].values.tolist() == UNIT_NAMES["2.weight"]["rows"]
    assert not any(name.startswith("profile.0.bias") for name in ds.data_vars)   # 1-D: no profile


def test_dataset_round_trips_through_zarr(run, tmp_path):
    ds = run.to_xarray()
    store = tmp_path / "export.zarr"
    ds.to_zarr(store, consolidated=False)                   # xarray.Dataset.to_zarr / xarray.open_zarr docs
    back = xr.open_zarr(store, consolidated=False).load()
    xr.testing.assert_identical(back, ds)
    same(back["update_ratio"], run.series("update_ratio"))


def test_growing_recording_gives_its_committed_steps_and_says_so(tmp_path, tiny_classifier):
    rec = make_recording(tmp_path / "live", tiny_classifier, steps=9, close=False)
    try:
        rec.flush()
        with warnings.catch_warnings():
            warnings.simplefilter("error")             # a live writer: no "not closed cleanly" warning
            run = nbkit.load(rec)
        ds = run.to_xarray()
        assert len(run) == 9 and ds.sizes["step"] == 9
        same(ds["step"], run.steps)
        assert ds.attrs["complete"] is False and ds.attrs["committed_steps"] == 9
        assert "9 committed steps" in ds.attrs["note"] and "refresh" in ds.attrs["note"]
    finally:
        rec.close()
    ds = run.refresh().to_xarray()
    assert ds.attrs["complete"] is True and "note" not in ds.attrs


def test_missing_pandas_or_xarray_names_the_extra(run, monkeypatch):
    monkeypatch.setitem(sys.modules, "pandas", None)       # `import pandas` now raises ImportError
    monkeypatch.setitem(sys.modules, "xarray", None)
    with pytest.raises(ImportError, match=r"nbkit\[data\]"):
        run.frame("update_ratio")
    with pytest.raises(ImportError, match=r"xarray.*nbkit\[data\]"):
        run.to_xarray()

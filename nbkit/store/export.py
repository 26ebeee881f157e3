"""A recording as a pandas DataFrame or an xarray Dataset (the extra nbkit[data]), read through the
reader's public methods only: this module opens no file.

    run.frame("update_ratio")   # DataFrame: index step, one column per tensor
    run.frame()                 # long table: step, tensor, quantity, value
    run.to_xarray()             # Dataset: dims step, tensor, group (+ probe, setting, profile_quantity, units)

Names in the Dataset (every one a valid Zarr node name, so `to_zarr` works as is):
    <quantity>                    (step, tensor) float32: run.series(quantity)
    loss, heavy                   (step,)
    lr                            (step, group) float64: run.learning_rates()
    settings                      (step, group, setting) float64: run.setting_values() (when stored)
    pre_clip_grad_norm, clip_factor              (step,): run.grad_norm, run.clip_factor
    pre_clip_tensor_grad_norm     (step, tensor): run.tensor_grad_norms
    probe.<field>                 (step, tensor, probe) float32: run.probes(tensor), NaN past a tensor's probes
    profile.<tensor>.<axis>       (step, <tensor>.<axis>, profile_quantity) float64: run.profile(tensor, q, axis)
coordinates: step, tensor (with layer, tensor_group, numel), group, probe_index (tensor, probe; -1: none),
setting, profile_quantity, and one per profiled tensor and axis, <tensor>.<axis>, holding run.unit_names.
"""
from __future__ import annotations

import importlib

import numpy as np

from nbkit.errors import RecordingError
from nbkit.measure import profiles as unit_profiles

EXTRA = "nbkit[data]"


def optional(module: str):
    """Import pandas or xarray, or say which extra installs it."""
    try:
        return importlib.import_module(module)
    except ImportError as exc:
        raise ImportError(f"This needs {module}, which is not installed: pip install '{EXTRA}' "
                          f"(or pip install {module})") from exc


def frame(run, q: str | None = None, *, dropna: bool = True):
    """Quantity `q` as a pandas DataFrame: index `step`, one float32 column per tensor (columns named
    `tensor`), the values of run.series(q). q=None: every quantity as a long table with the columns
    step, tensor, quantity (both categorical, in recording order) and value; dropna=True leaves out
    the NaN values (not measured at a light step, or undefined), dropna=False keeps every
    step × tensor × quantity."""
    pd = optional("pandas")
    steps = pd.Index(np.asarray(run.steps), name="step")
    if q is not None:
        if not isinstance(q, str) or q not in run.quantities:
            raise RecordingError(f"No quantity {q!r} in this recording; run.frame(q) takes one of "
                                 f"{', '.join(run.quantities)} (run.quantities), or no argument for all of them")
        return pd.DataFrame(run.series(q), index=steps, columns=pd.Index(run.tensors, name="tensor"))
    quantities, tensors = run.quantities, run.tensors
    values = np.stack([run.series(name) for name in quantities], axis=-1)     # (steps, tensors, quantities)
    shape = values.shape
    step_codes, tensor_codes, quantity_codes = (a.ravel() for a in np.indices(shape, dtype=np.int32))
    values = values.ravel()
    keep = ~np.isnan(values) if dropna else slice(None)
    return pd.DataFrame({
        "step": np.asarray(run.steps)[step_codes[keep]],
        "tensor": pd.Categorical.from_codes(tensor_codes[keep], categories=tensors),
        "quantity": pd.Categorical.from_codes(quantity_codes[keep], categories=quantities),
        "value": values[keep],
    })


def to_xarray(run):
    """The recording's committed steps as an xarray Dataset (the module docstring lists its names).

    A recording still being written gives the steps committed when it was last refreshed; the attrs
    say so ("complete": False, "committed_steps", and a "note")."""
    xr = optional("xarray")
    steps, tensors, meta = np.asarray(run.steps), run.tensors, run.meta
    groups = len(meta.get("param_groups", []))
    tensor_meta = meta["tensors"]
    coords = {
        "step": ("step", steps),
        "tensor": ("tensor", np.array(tensors, dtype=object)),
        "layer": ("tensor", np.array([t.get("layer", "") for t in tensor_meta], dtype=object)),
        "tensor_group": ("tensor", np.array([t.get("group", 0) for t in tensor_meta], dtype=np.int64)),
        "numel": ("tensor", np.array([t.get("numel", 0) for t in tensor_meta], dtype=np.int64)),
        "group": ("group", np.arange(groups)),
    }
    data = {q: (("step", "tensor"), run.series(q)) for q in run.quantities}
    _check_free(data, ("loss", "heavy", "lr", "settings", "pre_clip_grad_norm", "clip_factor",
                       "pre_clip_tensor_grad_norm"))
    data["loss"] = ("step", run.loss)
    data["heavy"] = ("step", run.heavy)
    data["lr"] = (("step", "group"), run.learning_rates())
    setting_names = list(meta.get("settings") or [])
    if setting_names:
        coords["setting"] = ("setting", np.array(setting_names, dtype=object))
        data["settings"] = (("step", "group", "setting"), run.setting_values())
    data["pre_clip_grad_norm"] = ("step", run.grad_norm)
    data["clip_factor"] = ("step", run.clip_factor)
    data["pre_clip_tensor_grad_norm"] = (("step", "tensor"), run.tensor_grad_norms)
    _add_probes(run, coords, data)
    _add_profiles(run, coords, data)
    return xr.Dataset(data, coords=coords, attrs=_attrs(run))


def _check_free(data: dict, names) -> None:
    """A quantity named like one of the other variables would be overwritten: refuse instead."""
    taken = sorted(set(data) & set(names))
    if taken:
        raise RecordingError(f"Quantities {taken} clash with the Dataset's own variable names; "
                             "read them with run.series(...) instead of to_xarray()")


def _add_probes(run, coords: dict, data: dict) -> None:
    fields = list(run.meta.get("probe_fields") or [])
    if not fields or len(run) == 0:            # the probe coordinates are written with the first rows
        return
    indices = [run.probe_index(t) for t in run.tensors]
    width = max((len(i) for i in indices), default=0)
    index = np.full((len(indices), width), -1, dtype=np.int64)            # (tensors, probes), -1 padded
    for t, i in enumerate(indices):
        index[t, :len(i)] = i
    coords["probe"] = ("probe", np.arange(width))
    coords["probe_index"] = (("tensor", "probe"), index)
    values = {f: np.full((len(run), len(indices), width), np.nan, dtype=np.float32) for f in fields}
    for t, tensor in enumerate(run.tensors):
        for f, v in run.probes(tensor, fields=fields).items():
            if f != "index":
                values[f][:, t, :v.shape[1]] = v
    for f in fields:
        data[f"probe.{f}"] = (("step", "tensor", "probe"), values[f])


def _add_profiles(run, coords: dict, data: dict) -> None:
    if not run.profile_tensors:
        return
    quantities = list(unit_profiles.READ_QUANTITIES)
    coords["profile_quantity"] = ("profile_quantity", np.array(quantities, dtype=object))
    entries = run.meta["profiles"]["tensors"]
    for tensor in run.profile_tensors:
        if "/" in tensor:
            raise RecordingError(f"Tensor name {tensor!r} holds a '/', which cannot name a Dataset variable "
                                 "that Zarr stores; read its profile with run.profile(...) instead")
        for axis in unit_profiles.AXES:
            if axis not in entries[tensor]:
                continue                       # e.g. an embedding has no input-feature axis
            units = f"{tensor}.{axis}"
            coords[units] = (units, np.array(run.unit_names(tensor, axis), dtype=object))
            values = np.stack([run.profile(tensor, q, axis) for q in quantities], axis=-1)   # (steps, units, Q)
            data[f"profile.{units}"] = (("step", units, "profile_quantity"), values)


def _attrs(run) -> dict:
    """JSON-friendly attributes (Zarr stores attrs as JSON): what the recording is and how much of it."""
    meta, steps = run.meta, np.asarray(run.steps)
    attrs = {"source": str(run.path), "format_version": int(meta["format_version"]),
             "nbkit_version": str(meta.get("nbkit_version", "")), "model_class": str(meta.get("model_class", "")),
             "optimizer": str((meta.get("optimizer") or {}).get("class", "")),
             "committed_steps": int(len(run)), "complete": bool(run.closed_cleanly)}
    if not run.closed_cleanly:
        last = f" (up to optimizer step {int(steps[-1])})" if len(steps) else ""
        attrs["note"] = (f"The recording was not closed when read: this holds its {len(run)} committed steps{last}. "
                         "Steps after the last commit are not included; call run.refresh() and to_xarray() "
                         "again for the newer ones.")
    return attrs

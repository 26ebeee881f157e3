"""Restoring a keyframe onto copies of the user's model: parameter groups, optimizer state, RNG states.

Everything here works on copies: the user's model and optimizer are never touched.
"""
from __future__ import annotations

import copy
import importlib
import inspect
import random

import numpy as np
import torch

from nbkit.errors import ReplayError
from nbkit.store.layout import OPTIMIZER_ONLY_LAYER, SettingColumn, setting_columns


def parameter_groups(meta: dict, model: torch.nn.Module, extra_params: dict) -> list[dict]:
    """The recorded parameter groups as [{"params": [...]}, ...] over `model`'s tensors (and the
    optimizer-only tensors group{g}.{i}, given in `extra_params`), in the recorded order."""
    named = dict(model.named_parameters())
    groups = []
    for g, group in enumerate(meta["param_groups"]):
        params = []
        for name in group["params"]:
            if name in named:
                params.append(named[name])
            elif name in extra_params:
                params.append(extra_params[name])
            else:
                raise ReplayError(f"The recorded parameter group {g} holds the tensor {name!r}, which the model "
                                  f"given to replay() does not have (its tensors: {list(named)[:8]}); pass the "
                                  "model the run was recorded with")
        groups.append({"params": params})
    return groups


def carried_settings(meta: dict, changed: set[str]) -> list[dict]:
    """Per recorded group, the settings a factory's groups carry: {key: value} of the numeric keys that
    stay constant over the run (not in `changed`, names as in run.settings) and differ between groups,
    never lr. Values are the start values in meta["param_groups"] (tuples as tuples). Recordings made
    before settings were stored do not say which keys changed: their numeric keys count as constant."""
    groups = meta.get("param_groups", [])
    columns = setting_columns(meta)
    if columns:
        keys = list(dict.fromkeys(c.key for c in columns))
        moved = {c.key for c in columns if c.name in changed}
    else:
        keys = list(dict.fromkeys(k for g in groups for k, v in g.items() if _numeric_json(v)))
        moved = set()
    carried = [{} for _ in groups]
    for key in keys:
        if key == "lr" or key in moved:
            continue
        values = [_tuples(g[key]) if key in g else None for g in groups]
        if len(groups) < 2 or all(v == values[0] for v in values):
            continue                                    # the same in every group: the factory's keyword wins
        for g, value in enumerate(values):
            if value is not None and _numeric_json(value):
                carried[g][key] = value
    return carried


def _is_json_number(value) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _numeric_json(value) -> bool:
    """A setting as the metadata holds it: a number or a non-empty list (or tuple) of numbers."""
    return _is_json_number(value) or (isinstance(value, (list, tuple)) and len(value) > 0
                                      and all(_is_json_number(v) for v in value))


def factory_optimizer(factory, groups: list[dict], carried: list[dict]) -> torch.optim.Optimizer:
    """factory(groups) with each group holding `params` plus its carried settings (carried_settings)
    that the target optimizer knows.

    Which keys the target knows is its `defaults` (what torch.optim fills into every group), known only
    once the factory has run: so when there is something to carry, the factory is called first with the
    plain `params` groups, and again with the known carried keys added (a factory may be called twice;
    the first optimizer is dropped). inspect.signature of the class's __init__ would miss optimizers
    that take **kwargs; `defaults` is what torch.optim itself uses. Keys the target does not know (betas
    for SGD) are left out; the factory's keywords give every key that is not carried.
    """
    if not any(carried):
        return factory(groups)
    first = factory([{"params": g["params"]} for g in groups])
    known = set(getattr(first, "defaults", None) or {}) - {"lr"}
    if not any(known & set(c) for c in carried):
        return first
    return factory([{**g, **{k: v for k, v in c.items() if k in known}} for g, c in zip(groups, carried)])


def check_model(meta: dict, model: torch.nn.Module) -> None:
    """The model must have the recorded tensors with the recorded shapes."""
    named = dict(model.named_parameters())
    for t in meta["tensors"]:
        if t["layer"] == OPTIMIZER_ONLY_LAYER:
            continue
        if t["name"] not in named:
            raise ReplayError(f"The model given to replay() has no tensor {t['name']!r}, which the recording "
                              "holds; pass the model the run was recorded with")
        if list(named[t["name"]].shape) != t["shape"]:
            raise ReplayError(f"Tensor {t['name']!r} has shape {list(named[t['name']].shape)} in the model given "
                              f"to replay() but {t['shape']} in the recording; pass the recorded architecture")


def fresh_extra_params(extra: dict) -> dict:
    """Optimizer-only tensors as new leaf tensors (one set per replay)."""
    return {name: value.detach().clone().requires_grad_(True) for name, value in extra.items()}


# --- optimizers ---------------------------------------------------------------------------------
def recorded_optimizer(meta: dict, groups: list[dict], optimizer_state: dict) -> torch.optim.Optimizer:
    """The recorded optimizer class over `groups`, with the hyper-parameters and state of
    `optimizer_state` (an optimizer state_dict, e.g. from a keyframe; it is copied)."""
    info = meta["optimizer"]
    try:
        cls = getattr(importlib.import_module(info["module"]), info["class"])
    except (ImportError, AttributeError) as exc:
        raise ReplayError(f"Cannot rebuild the recorded optimizer {info['module']}.{info['class']} ({exc}); "
                          "import the module that defines it, or pass optimizers={...} factories") from exc
    optimizer_state = copy.deepcopy(optimizer_state)
    saved = optimizer_state["param_groups"]
    if len(saved) != len(groups):
        raise ReplayError(f"The keyframe's optimizer has {len(saved)} parameter groups, the recording's metadata "
                          f"{len(groups)}: the recording is inconsistent")
    built = [{**{k: v for k, v in s.items() if k != "params"}, "params": g["params"]} for s, g in zip(saved, groups)]
    try:
        optimizer = cls(built)
    except TypeError:
        optimizer = cls(built, lr=saved[0].get("lr", 1e-3))   # optimizers whose lr has no default
    optimizer.load_state_dict(optimizer_state)
    return optimizer


def apply_settings(param_groups: list[dict], columns: list[SettingColumn], values: np.ndarray) -> None:
    """Write one step's recorded settings, values (groups, settings) in `columns` order, into the groups.

    A tensor setting is filled in place (fill_), a tuple's element is written back into a tuple (betas),
    an int stays an int; NaN (not a number at that step) and keys the group lacks are left alone.
    """
    for group, row in zip(param_groups, values):
        for column, value in zip(columns, row):
            if value != value or column.key not in group:
                continue
            current = group[column.key]
            if column.index is None:
                group[column.key] = _written(current, value)
            elif isinstance(current, (tuple, list)) and column.index < len(current):
                element = _written(current[column.index], value)
                if element is not current[column.index]:
                    parts = list(current)
                    parts[column.index] = element
                    group[column.key] = type(current)(parts)


def _written(current, value: float):
    """`current` holding the recorded `value`: the same object when it already does (or is a tensor,
    filled in place), else a number of its own type."""
    if isinstance(current, torch.Tensor):
        current.fill_(value)
        return current
    if current == value:
        return current
    if isinstance(current, int) and not isinstance(current, bool) and float(value).is_integer():
        return int(value)
    return float(value)


def needs_closure(optimizer: torch.optim.Optimizer) -> bool:
    """True for optimizers whose step() requires a closure (LBFGS)."""
    try:
        parameter = inspect.signature(optimizer.step).parameters.get("closure")
    except (TypeError, ValueError):
        return False
    return parameter is not None and parameter.default is inspect.Parameter.empty


# --- random number generators -------------------------------------------------------------------
def _tuples(value):
    return tuple(_tuples(v) for v in value) if isinstance(value, (list, tuple)) else value


def rng_from_keyframe(rng: dict) -> dict:
    """A keyframe's "rng" entry (numpy/python states come back from JSON as lists) as live states."""
    name, keys, position, has_gauss, cached = rng["numpy"]
    return {"torch": rng["torch"].clone(),
            "numpy": (str(name), np.asarray(keys, dtype=np.uint32), int(position), int(has_gauss), float(cached)),
            "python": _tuples(rng["python"])}


def get_rng() -> dict:
    return {"torch": torch.get_rng_state(), "numpy": np.random.get_state(), "python": random.getstate()}


def set_rng(state: dict) -> None:
    torch.set_rng_state(state["torch"])
    np.random.set_state(state["numpy"])
    random.setstate(state["python"])


def same_rng(a: dict, b: dict) -> bool:
    return (torch.equal(a["torch"], b["torch"]) and a["python"] == b["python"]
            and a["numpy"][2:] == b["numpy"][2:] and np.array_equal(a["numpy"][1], b["numpy"][1]))

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
from nbkit.store.layout import OPTIMIZER_ONLY_LAYER


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

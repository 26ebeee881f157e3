"""Copies of a user's model for extra passes and replays, without the hooks nbkit's own objects attached.

A Recorder hooks the model with its bound methods; a plain copy.deepcopy would copy the Recorder
with them (its writer, its thread). Objects that hook a model this way register themselves with
`register_hook_owner`; `copy_model` then drops their hooks from the copy and keeps every other hook
(the user's own). The registry holds weak references only: registering keeps nothing alive.
This module imports nothing from nbkit; analyze, record and replay use it.
"""
from __future__ import annotations

import copy
import weakref
from collections import OrderedDict

import torch

_hook_owners: weakref.WeakSet = weakref.WeakSet()      # objects whose bound-method hooks copies drop


def register_hook_owner(owner: object) -> None:
    """Mark `owner` so that copy_model drops every hook that is a bound method of it (its `__self__`).
    Held by weak reference; registering twice is harmless."""
    try:
        _hook_owners.add(owner)
    except TypeError as exc:
        raise TypeError(f"register_hook_owner needs an object that supports weak references, got "
                        f"{type(owner).__name__} ({owner!r}); register the object whose methods are the hooks "
                        "(a class instance without __slots__, or with '__weakref__' in them)") from exc


def copy_model(model: torch.nn.Module) -> torch.nn.Module:
    """A deep copy of `model` without the hooks of registered owners (register_hook_owner) in any of its
    modules' `*_hooks` dictionaries (forward, backward, state-dict hooks, …). Every other hook is kept:
    in a dictionary that lost a hook the kept ones are the same objects as in `model` (a fresh dictionary
    holds them), other dictionaries are deep-copied with the model. `model` itself is not changed."""
    owners = {id(owner) for owner in _hook_owners}      # by identity: owners need not be hashable
    memo = {}
    for module in model.modules():
        for attribute, value in vars(module).items():
            if attribute.endswith("_hooks") and isinstance(value, dict):
                kept = OrderedDict((key, hook) for key, hook in value.items()
                                   if id(getattr(hook, "__self__", None)) not in owners)
                if len(kept) != len(value):
                    memo[id(value)] = kept
    return copy.deepcopy(model, memo)

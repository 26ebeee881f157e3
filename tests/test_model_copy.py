"""copy_model: the hooks of registered owners are dropped from the copy, every other hook is kept,
and the original model keeps all of its hooks."""
from __future__ import annotations

import gc
import weakref

import pytest
import torch

from nbkit.analyze.model_copy import copy_model, register_hook_owner


class Watcher:
    """Hooks as bound methods, like the Recorder's. Calls are logged on the class, which deepcopy does not
    copy, so a copied watcher's calls are seen too."""

    calls: list[str] = []

    def __init__(self, name):
        self.name = name

    def after_forward(self, module, inputs, output):
        Watcher.calls.append(self.name)

    def before_forward(self, module, inputs):
        Watcher.calls.append(self.name + " (pre)")


def fired(model, x) -> list[str]:
    Watcher.calls.clear()
    model(x)
    return sorted(Watcher.calls)


def test_a_registered_owners_hooks_are_dropped_and_the_users_and_unregistered_hooks_kept():
    torch.manual_seed(0)
    model = torch.nn.Sequential(torch.nn.Linear(3, 4), torch.nn.ReLU(), torch.nn.Linear(4, 2))
    owner, stranger = Watcher("owner"), Watcher("stranger")
    register_hook_owner(owner)

    def users_hook(module, inputs, output):          # a plain function, as a user writes one
        Watcher.calls.append("user")

    model[0].register_forward_hook(owner.after_forward)
    model[0].register_forward_hook(users_hook)               # same dictionary as the owner's hook
    model[2].register_forward_pre_hook(owner.before_forward)
    model[2].register_forward_pre_hook(stranger.before_forward)
    model[2].register_forward_hook(stranger.after_forward)   # a dictionary the owner has no hook in
    x = torch.randn(5, 3)
    everything = sorted(["owner", "owner (pre)", "user", "stranger (pre)", "stranger"])
    assert fired(model, x) == everything

    copy = copy_model(model)
    assert fired(copy, x) == sorted(["user", "stranger (pre)", "stranger"])
    assert fired(model, x) == everything                     # the original keeps every hook
    assert torch.equal(copy(x), model(x))
    assert all(a is not b and torch.equal(a, b) for a, b in zip(copy.parameters(), model.parameters()))


def test_the_registry_holds_owners_weakly_and_refuses_objects_without_weak_references():
    owner = Watcher("gone")
    register_hook_owner(owner)
    register_hook_owner(owner)                               # twice is harmless
    alive = weakref.ref(owner)
    del owner
    gc.collect()
    assert alive() is None
    model = torch.nn.Linear(2, 2)
    model.register_forward_hook(Watcher("kept").after_forward)   # an unregistered owner, alone
    assert fired(copy_model(model), torch.randn(1, 2)) == ["kept"]
    with pytest.raises(TypeError, match="supports weak references, got int"):
        register_hook_owner(3)

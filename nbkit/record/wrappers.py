"""What training code wraps around a model and an optimizer, unwrapped: DDP's `module`, torch.compile's
`_orig_mod`, and optimizer wrappers that hold the real torch.optim.Optimizer in `.optimizer`.

The recorder names tensors after the plain model (no "module." or "_orig_mod." prefix), so a replay
with the plain model finds them, and it hooks the optimizer that torch.optim's step hooks belong to.
Its forward hooks go on the outermost compiled wrapper when there is one: the wrapper's own hooks run
in eager Python around the compiled call, so the recorder's work (fingerprints, the pacer's clock and
lock) never enters the graph torch._dynamo traces.
"""
from __future__ import annotations

from dataclasses import dataclass

import torch
from torch.nn.parallel import DistributedDataParallel

from nbkit.errors import RecorderError

WRAPPER_DEPTH = 8        # .optimizer / .module / ._orig_mod links followed at most (a cycle ends sooner)
COMPILED_AFTER_RECORD = (
    "the recorded model runs inside torch.compile (it was compiled after nbkit.record()); the recorder's "
    "hooks skip compiled forward passes, so their batch fingerprints and returned losses are not recorded. "
    "Record the compiled module instead: nbkit.record(torch.compile(model), optimizer, path)")


@dataclass(frozen=True)
class ModelParts:
    """A model as the recorder sees it.

    plain: the module whose parameters give the tensor names and whose state_dict the keyframes hold;
    forward_module: the module whose forward hooks see every forward pass (the outermost compiled
    wrapper, else `plain`); compiled: whether a torch.compile wrapper was found on the way.
    """

    plain: torch.nn.Module
    forward_module: torch.nn.Module
    compiled: bool


def is_compiled(module) -> bool:
    """True for torch.compile's wrapper of a module (torch._dynamo's OptimizedModule, which holds the
    compiled module in `_orig_mod`)."""
    return isinstance(module, torch.nn.Module) and isinstance(getattr(module, "_orig_mod", None), torch.nn.Module)


def unwrap_model(model) -> ModelParts:
    """Follow DistributedDataParallel's `module` and torch.compile's `_orig_mod` to the plain model."""
    plain, compiled_wrapper = model, None
    for _ in range(WRAPPER_DEPTH):
        if isinstance(plain, DistributedDataParallel):
            plain = plain.module
        elif is_compiled(plain):
            compiled_wrapper = compiled_wrapper or plain
            plain = plain._orig_mod
        else:
            break
    return ModelParts(plain, compiled_wrapper if compiled_wrapper is not None else plain, compiled_wrapper is not None)


def _hookable(optimizer) -> bool:
    # a torch.optim.Optimizer whose own __init__ ran (it holds the step-hook tables); a wrapper that
    # subclasses Optimizer without calling its __init__ (accelerate's AcceleratedOptimizer) does not
    return isinstance(optimizer, torch.optim.Optimizer) and hasattr(optimizer, "_optimizer_step_pre_hooks")


def unwrap_optimizer(optimizer) -> torch.optim.Optimizer:
    """The torch.optim.Optimizer inside optimizer wrappers (accelerate's AcceleratedOptimizer,
    Lightning's LightningOptimizer, ...), found by following `.optimizer`; `optimizer` itself when it
    is one. Raises RecorderError naming the types found when the chain holds none."""
    seen, found = set(), []
    current = optimizer
    while not _hookable(current):
        found.append(type(current).__name__)
        inner = getattr(current, "optimizer", None)
        if inner is None or id(current) in seen or len(found) > WRAPPER_DEPTH:
            chain = " -> ".join(f"{name}" for name in found)
            if len(found) == 1:
                raise RecorderError(f"optimizer must be a torch.optim.Optimizer (or a wrapper holding one in "
                                    f".optimizer), got {found[0]}; pass the torch.optim.Optimizer that "
                                    "training steps")
            raise RecorderError(f"optimizer must be a torch.optim.Optimizer; following .optimizer from "
                                f"{found[0]} gave {chain} and no torch.optim.Optimizer; pass the "
                                "torch.optim.Optimizer that the wrapper steps")
        seen.add(id(current))
        current = inner
    return current


__all__ = ["ModelParts", "is_compiled", "unwrap_model", "unwrap_optimizer"]

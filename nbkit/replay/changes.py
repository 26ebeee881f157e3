"""A replay of the recorded optimizer with one change: what a remedy alters (nbkit.try_remedies).

`nbkit.replay(run, model, optimizers={"lr x0.5": Change(lr_scale=0.5)})` replays the recorded optimizer
from the keyframe's state, with every recorded setting of every step (the schedule), then the change: so
"the learning rate halved" means half of the recorded schedule from the replay's start, not a constant.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import torch

from nbkit.errors import ReplayError


@dataclass(frozen=True)
class Change:
    """What a replay changes in the recorded optimizer (and, for a data remedy, in the kept batches).

    lr_scale: every group's recorded learning rate × this at every step; group_lr_scale: {group: scale}
    on top of it; eps: the groups' ε set to this (optimizers that have one); clip_norm: the gradients
    clipped to this norm (clip_grad_norm_ over the model's parameters) instead of the recorded clipping;
    add_tensors: parameters the recorded optimizer did not hold, added as one new group with group 0's
    settings and its learning rate at every step; decoupled_decay: Adam's weight decay applied decoupled
    (AdamW's rule, torch.optim.Adam(decoupled_weight_decay=True)); input_scale: ((argument, columns,
    factor), ...): in each kept micro-batch, the model's positional argument `argument` has its last-axis
    `columns` multiplied by `factor` (a data remedy: it changes the batches, so their fingerprints are
    not checked)."""

    lr_scale: float = 1.0
    group_lr_scale: dict = field(default_factory=dict)
    eps: float | None = None
    clip_norm: float | None = None
    add_tensors: tuple = ()
    decoupled_decay: bool = False
    input_scale: tuple = ()

    def __post_init__(self):
        if not (isinstance(self.lr_scale, (int, float)) and self.lr_scale > 0):
            raise ReplayError(f"Change(lr_scale={self.lr_scale!r}): expected a positive number")
        if self.clip_norm is not None and not self.clip_norm > 0:
            raise ReplayError(f"Change(clip_norm={self.clip_norm!r}): expected a positive max norm or None")
        if self.eps is not None and not self.eps > 0:
            raise ReplayError(f"Change(eps={self.eps!r}): expected a positive number or None")

    @property
    def data(self) -> bool:
        """The change alters the batches (a data remedy), not only the optimizer."""
        return bool(self.input_scale)


def build(change: Change, optimizer: torch.optim.Optimizer, model: torch.nn.Module) -> None:
    """Once, on the lane's recorded optimizer: the tensors added and the decay made decoupled."""
    if change.add_tensors:
        named = dict(model.named_parameters())
        held = {id(p) for group in optimizer.param_groups for p in group["params"]}
        missing = [n for n in change.add_tensors if n not in named]
        if missing:
            raise ReplayError(f"Change(add_tensors=...) names {missing}, which the model does not have")
        params = [named[n] for n in change.add_tensors if id(named[n]) not in held]
        if params:
            settings = {k: v for k, v in optimizer.param_groups[0].items() if k != "params"}
            optimizer.add_param_group({**settings, "params": params})
    if change.decoupled_decay:
        for group in optimizer.param_groups:
            if "decoupled_weight_decay" not in group:
                raise ReplayError(f"{type(optimizer).__name__} has no decoupled_weight_decay setting; the decoupled "
                                  "form applies to Adam-family optimizers")
            group["decoupled_weight_decay"] = True


def adjust(change: Change, optimizer: torch.optim.Optimizer, recorded_groups: int) -> None:
    """Every step, after the recorded settings: scale the learning rates, set ε, give added groups the
    learning rate of group 0."""
    groups = optimizer.param_groups
    for g, group in enumerate(groups):
        if g >= recorded_groups:
            group["lr"] = groups[0]["lr"]
            continue
        scale = change.lr_scale * float(change.group_lr_scale.get(g, 1.0))
        if scale != 1.0:
            if isinstance(group["lr"], torch.Tensor):
                group["lr"].mul_(scale)
            else:
                group["lr"] = group["lr"] * scale
        if change.eps is not None and "eps" in group:
            group["eps"] = change.eps


def clip(change: Change, model: torch.nn.Module) -> bool:
    """The change's clipping, if it has one (True: done, the recorded clipping is not applied)."""
    if change.clip_norm is None:
        return False
    torch.nn.utils.clip_grad_norm_(model.parameters(), change.clip_norm)
    return True


def scaled_inputs(change: Change, micro_batch: dict) -> dict:
    """A kept micro-batch with the change's input columns rescaled (a copy; the kept step is not changed)."""
    if not change.input_scale:
        return micro_batch
    args = list(micro_batch["args"])
    for argument, columns, factor in change.input_scale:
        if argument >= len(args) or not isinstance(args[argument], torch.Tensor):
            raise ReplayError(f"Change(input_scale=...) names the model's argument {argument}, which the kept "
                              f"batch does not hold as a tensor ({len(args)} positional arguments)")
        value = args[argument].clone()
        value[..., list(columns)] *= factor
        args[argument] = value
    return {**micro_batch, "args": tuple(args)}

"""The recorder's hot path: copy θ before a step, then measure the step in a few batched passes.

Tensors are grouped into blocks (one parameter group, one dtype). Each block owns two flat buffers
that every step reuses: `before` (θ before the step, turned into −Δθ after it) and `grad` (the
gradient of the last recorded step, kept for grad_cosine and sign_flip). Per-tensor buffers are
views into them, so the copies are one foreach call and the sampled coordinates of all tensors of
a block are one `take` with global indices. Optimizer state is sampled tensor by tensor (it lives
in the optimizer's own tensors).
"""
from __future__ import annotations

import math

import torch

from nbkit.measure.step_stats import sampled_statistics, whole_tensor_statistics
from nbkit.record.adapters import step_count


class Block:
    """Tensors of one parameter group and one dtype, measured together."""

    def __init__(self, group: int, tensors: list, positions: list[int]):
        self.group = group
        self.tensors = tensors                    # the recorder's _Tensor records
        self.positions = positions                # their rows in the recording
        dtype = tensors[0].param.dtype
        sizes = [t.param.numel() for t in tensors]
        offsets = [0]
        for n in sizes:
            offsets.append(offsets[-1] + n)
        self.before_flat = torch.empty(offsets[-1], dtype=dtype)
        self.grad_flat = torch.zeros(offsets[-1], dtype=dtype)
        self.befores = [self.before_flat[a:b].view(t.param.shape) for a, b, t in zip(offsets, offsets[1:], tensors)]
        self.grads = [self.grad_flat[a:b].view(t.param.shape) for a, b, t in zip(offsets, offsets[1:], tensors)]
        S = max(len(t.index) for t in tensors)
        self.local = torch.zeros((len(tensors), S), dtype=torch.int64)     # (T, S) index into each tensor
        self.valid = torch.zeros((len(tensors), S), dtype=torch.bool)      # (T, S) False for padding
        for r, t in enumerate(tensors):
            self.local[r, :len(t.index)] = t.index
            self.valid[r, :len(t.index)] = True
        self.flat_index = self.local + torch.tensor(offsets[:-1]).unsqueeze(1)   # (T, S) into the flat buffers
        # sampled values are worked on in float32 (float64 for float64 tensors): exact for Δθ of
        # float32 values, 1e-7 relative for the ratios, and half the memory traffic of float64
        self.work = torch.float64 if dtype == torch.float64 else torch.float32
        self.pad = torch.where(self.valid, 0.0, math.nan).to(self.work)         # (T, S) NaN in the padding
        self.has_previous = [False] * len(tensors)   # grad buffer holds the previous recorded gradient
        self.previous_norms = [math.nan] * len(tensors)
        self.previous_sample = None                  # (T, S) float64 sampled previous gradient
        self.state_before: dict = {}                 # key -> (T, S) sampled state before the step
        self.copied = False


PADDING_LIMIT = 16384   # padded coordinates a block may carry before its small tensors get their own


def make_blocks(tensors: list) -> list[Block]:
    """Blocks per (parameter group, dtype), split by sample size so that few tensors small enough
    to waste more than PADDING_LIMIT padded coordinates share a (T, S) matrix with large ones."""
    keyed: dict = {}
    for k, t in enumerate(tensors):
        keyed.setdefault((t.group, t.param.dtype), []).append(k)
    blocks = []
    for (group, _), members in keyed.items():
        members = sorted(members, key=lambda k: -len(tensors[k].index))
        start = 0
        for i in range(1, len(members) + 1):
            if i < len(members):
                width, size = len(tensors[members[start]].index), len(tensors[members[i]].index)
                if size * 4 > width or (len(members) - i) * (width - size) <= PADDING_LIMIT:
                    continue
            chosen = sorted(members[start:i])
            blocks.append(Block(group, [tensors[k] for k in chosen], chosen))
            start = i
    return blocks


def state_tensors(optimizer, p) -> tuple[dict, dict]:
    """The optimizer's state of parameter p: (tensors shaped like p, scalar numbers) by key."""
    shaped, scalars = {}, {}
    for k, v in optimizer.state.get(p, {}).items():
        if isinstance(v, torch.Tensor):
            if v.shape == p.shape and not v.is_sparse and k != "step":
                shaped[k] = v
            elif v.numel() == 1:
                scalars[k] = float(v)
        elif isinstance(v, (int, float)) and not isinstance(v, bool):
            scalars[k] = float(v)
    return shaped, scalars


def _sample_state(block: Block, rows: list[int], states: list[dict]) -> dict:
    keys = sorted(set().union(*[s.keys() for s in states])) if states else []
    S = block.local.shape[1]
    out = {}
    for key in keys:
        out[key] = torch.stack([s[key].reshape(-1).index_select(0, block.local[r]) if key in s else
                                torch.full((S,), math.nan) for r, s in zip(rows, states)]).to(block.work)
    return out


@torch.no_grad()
def copy_before(blocks: list[Block], optimizer, before_keys: tuple) -> None:
    """Pre-step: copy θ of every tensor into its block's buffer (one foreach call per block), and
    sample the state keys the adapter needs from before the step (`before_keys`)."""
    for block in blocks:
        live = [r for r, t in enumerate(block.tensors) if not t.stopped]
        if len(live) == len(block.tensors):
            torch._foreach_copy_(block.befores, [t.param.detach() for t in block.tensors])
        elif live:
            torch._foreach_copy_([block.befores[r] for r in live], [block.tensors[r].param.detach() for r in live])
        block.copied = True
        block.state_before = {}
        if before_keys:
            states = [state_tensors(optimizer, t.param)[0] for t in block.tensors]
            states = [{k: v for k, v in s.items() if k in before_keys} for s in states]
            block.state_before = _sample_state(block, list(range(len(block.tensors))), states)


def _gather(flat: torch.Tensor, index: torch.Tensor, dtype) -> torch.Tensor:
    """flat[index] as `dtype`, (T, S); index_select is several times faster than take here."""
    return flat.index_select(0, index.reshape(-1)).view(index.shape).to(dtype)


@torch.no_grad()
def measure_block(block: Block, rows: list[int], optimizer, adapter, probes: int):
    """Post-step: statistics of the tensors `rows` of `block` (those with a dense gradient).

    Returns (whole-tensor dict of (R,) tensors, sampled dict of (R,) tensors, histograms
    (3, R, bins + 2), probe values dict of (R, probes) tensors, state_nonfinite (R,) or None).
    """
    everything = len(rows) == len(block.tensors)
    tensors = [block.tensors[r] for r in rows]
    grads = [t.param.grad for t in tensors]
    params = [t.param.detach() for t in tensors]
    befores = block.befores if everything else [block.befores[r] for r in rows]
    previous = [block.grads[r] if block.has_previous[r] else None for r in rows]
    previous_norms = torch.tensor([block.previous_norms[r] for r in rows], dtype=torch.float64)
    flat_index = block.flat_index if everything else block.flat_index[rows]
    valid = block.valid if everything else block.valid[rows]
    pad = block.pad if everything else block.pad[rows]

    theta_before = _gather(block.before_flat, flat_index, block.work)            # (R, S)
    whole = whole_tensor_statistics(grads, befores, params, previous, previous_norms)   # befores := −Δθ
    update = _gather(block.before_flat, flat_index, block.work).neg_()           # (R, S) Δθ
    torch._foreach_copy_(block.grads if everything else [block.grads[r] for r in rows], grads)
    grad = _gather(block.grad_flat, flat_index, block.work)                       # (R, S)

    states, scalars = zip(*[state_tensors(optimizer, t.param) for t in tensors])
    after = _sample_state(block, rows, list(states))
    before = {k: v if everything else v[rows] for k, v in block.state_before.items()}
    scalar_keys = sorted(set().union(*[s.keys() for s in scalars]))
    scalar_values = {k: torch.tensor([[s.get(k, math.nan)] for s in scalars], dtype=block.work)
                     for k in scalar_keys}
    finite = bool(torch.isfinite(torch.stack([whole["grad_norm"], whole["update_norm"]])).all())
    # float64: the step-dependent coefficients (RAdam's ρ_t) cancel badly in float32
    steps = torch.tensor([[step_count(optimizer.state.get(t.param, {}))] for t in tensors], dtype=torch.float64)
    group = optimizer.param_groups[block.group]
    previous_sample = None
    if block.previous_sample is not None and all(block.has_previous[r] for r in rows):
        previous_sample = block.previous_sample if everything else block.previous_sample[rows]
    sampled, hist, probe_values = sampled_statistics(
        grad=grad, theta_before=theta_before, update=update, valid=valid, before=before, after=after,
        scalars=scalar_values, step=steps, group=group, lr=float(group["lr"]), adapter=adapter,
        previous_grad=previous_sample, probes=probes, finite=finite, pad=pad)
    state_nonfinite = None
    if after:
        state_nonfinite = sum((~torch.isfinite(v)).sum(dim=1) for v in after.values())

    norms = whole["grad_norm"].tolist()
    for i, r in enumerate(rows):
        block.has_previous[r] = True
        block.previous_norms[r] = norms[i]
    if everything:
        block.previous_sample = grad
    else:
        if block.previous_sample is None:
            block.previous_sample = torch.full(block.local.shape, math.nan, dtype=block.work)
        block.previous_sample[rows] = grad
    return whole, sampled, hist, probe_values, state_nonfinite


def forget_gradient(block: Block, r: int) -> None:
    """Tensor r had no gradient this step: the next gradient has no previous one to compare with."""
    block.has_previous[r] = False
    block.previous_norms[r] = math.nan

"""The recorder's hot path: copy θ before a step, measure the step, off the training thread.

Tensors are grouped into blocks (one parameter group, one dtype, similar sample sizes). Each block
owns flat buffers that every step reuses: `before` (θ before the step, turned into −Δθ after it)
and two gradient buffers used in turn (this step's gradient and the previous recorded one, for
grad_cosine and sign_flip). Per-tensor buffers are views into them, so each copy is one foreach
call and the sampled coordinates of all tensors of a block are one gather with global indices.
The training thread does only what must see tensors that change before the next step (the
copies); the statistics read the block's own buffers and the optimizer state, which only the next
optimizer.step() changes, on a background thread (`block_statistics`; when: nbkit.record.pacing).
"""
from __future__ import annotations

import functools
import math
from dataclasses import dataclass
from typing import Callable

import numpy as np
import torch

from nbkit.measure import profiles as unit_profiles
from nbkit.measure.quantities import QUANTITIES
from nbkit.measure.step_stats import norms, sampled_statistics, whole_tensor_statistics
from nbkit.measure.update_rules import Adapter, StepContext
from nbkit.store.layout import Row

QUANTITY_INDEX = {q: i for i, q in enumerate(QUANTITIES)}


class Block:
    """Tensors of one parameter group and one dtype, measured together."""

    def __init__(self, group: int, tensors: list, positions: list[int]):
        self.group = group
        self.tensors = tensors                    # the recorder's RecordedTensor records (nbkit.record.setup)
        self.positions = positions                # their positions in the recording (tensor order)
        dtype = tensors[0].param.dtype
        sizes = [t.param.numel() for t in tensors]
        offsets = [0]
        for n in sizes:
            offsets.append(offsets[-1] + n)
        spans = list(zip(offsets, offsets[1:], tensors))
        self.before_flat = torch.empty(offsets[-1], dtype=dtype)
        self.befores = [self.before_flat[a:b].view(t.param.shape) for a, b, t in spans]
        # two gradient buffers, alternating: this step's gradient and the previous recorded one
        self.grad_flats = [torch.zeros(offsets[-1], dtype=dtype), torch.zeros(offsets[-1], dtype=dtype)]
        self.grads = [[flat[a:b].view(t.param.shape) for a, b, t in spans] for flat in self.grad_flats]
        self.turn = 0                                # which gradient buffer the next step writes
        self.pending = None                          # Future of the statistics of the last step
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
        # concatenating a state key costs one pass over all its coordinates: worth it when most are sampled
        self.concatenate = offsets[-1] <= 4 * int(self.valid.sum())
        self.has_previous = [False] * len(tensors)   # grad buffer holds the previous recorded gradient
        self.previous_norms = [math.nan] * len(tensors)
        self.previous_sample = None                  # (T, S) sampled previous gradient
        self.state_before: dict = {}                 # key -> (T, S) sampled state before the step
        self.copied = False
        self.scratch = None                          # the profiles' work buffer (statistics thread only)


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


def _sample_state(block: Block, members: list[int], states: list[dict]) -> dict:
    """(R, S) sampled values of each state key. A block of small tensors (most coordinates sampled)
    concatenates each key's tensors and gathers once; large tensors are gathered one by one."""
    keys = sorted(set().union(*[s.keys() for s in states])) if states else []
    out = {}
    everything = len(members) == len(block.tensors)
    for key in keys:
        if block.concatenate and everything and all(key in s for s in states):
            flat = torch.cat([s[key].reshape(-1) for s in states])
            out[key] = _gather(flat, block.flat_index, block.work)
            continue
        S = block.local.shape[1]
        out[key] = torch.stack([s[key].reshape(-1).index_select(0, block.local[r]) if key in s else
                                torch.full((S,), math.nan) for r, s in zip(members, states)]).to(block.work)
    return out


@torch.no_grad()
def copy_before(blocks: list[Block], optimizer, before_keys: tuple) -> None:
    """Pre-step: copy θ of every tensor into its block's buffer (one foreach call per block), and
    sample the state keys the adapter needs from before the step (`before_keys`)."""
    for block in blocks:
        wait(block)
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


def wait_all(blocks: list[Block]) -> None:
    """Before an optimizer step that is not measured: the last statistics must have read the state."""
    for block in blocks:
        wait(block)


def wait(block: Block) -> None:
    """Block until the statistics of the block's last step are done (its buffers are free)."""
    if block.pending is not None:
        pending, block.pending = block.pending, None
        pending.exception()                          # waits; the error is reported with the row


@dataclass
class BlockJob:
    """What the statistics of one block's step need, taken on the training thread (prepare_block).
    R = the block's tensors measured at this step; S = sampled coordinates per tensor."""

    block: Block
    members: list[int]              # the measured tensors (their indices in the block)
    everything: bool                # members are every tensor of the block
    current: list                   # this step's gradients (the block's copies)
    previous: list                  # the previous recorded gradients, None where there is none
    minus_update: list              # −Δθ per tensor (the block's buffers)
    flat_index: torch.Tensor        # (R, S) sampled coordinates in the block's flat buffers
    current_flat: torch.Tensor      # the flat buffer holding `current`
    theta_before: torch.Tensor      # (R, S) sampled θ before the step
    weight_norm: torch.Tensor       # (R,) ‖θ before‖
    weight_nonfinite: torch.Tensor  # (R,) non-finite coordinates of θ before
    previous_norms: torch.Tensor    # (R,) norms of the previous gradients
    has_previous: list[bool]
    before: dict                    # state key -> (R, S) sampled optimizer state before the step
    optimizer: object
    params: list                    # the parameters (their state is read after the step)
    group: dict                     # the parameter group's settings at this step
    adapter: Adapter
    probes: int
    deliver: Callable[["BlockStatistics"], None]   # called with the results on the statistics thread
    profiles: bool = False          # per-unit profiles of the members that have units


@dataclass
class BlockStatistics:
    """The statistics of one block's step: R tensors, in the job's row order."""

    whole: dict                     # exact quantity -> (R,) tensor (nbkit.measure.step_stats)
    sampled: dict                   # sampled quantity -> (R,) tensor
    histograms: torch.Tensor        # (3, R, HISTOGRAM_BINS + 2) grad, update, gain
    probes: dict                    # probe field -> (R, probes) tensor
    state_nonfinite: torch.Tensor | None   # (R,) non-finite optimizer state values, None without state
    profiles: dict = None           # member row -> {axis: (units, 3) float64} (nbkit.measure.profiles)


@torch.no_grad()
def prepare_block(block: Block, members: list[int], optimizer, adapter: Adapter, probes: int, *,
                  deliver, profiles: bool = False) -> BlockJob:
    """Post-step, on the training thread: what the statistics of the tensors `members` of `block`
    (those with a dense gradient) need from tensors that change before the next step.

    That is θ_after − θ_before into the block's buffer, a copy of the gradients (the next backward
    pass changes them), ‖θ_before‖ and a sample of θ_before, and the parameter group (a scheduler
    changes it). `block_statistics(job)` does the rest, on the statistics thread or in the hook
    (nbkit.record.pacing): it reads the block's own buffers and the optimizer state, which only
    optimizer.step() changes (every step's pre-hook waits for it). wait(block) must come before the
    block's buffers are reused or the optimizer steps again.
    """
    wait(block)
    everything = len(members) == len(block.tensors)
    pick = (lambda xs: xs) if everything else (lambda xs: [xs[r] for r in members])
    tensors = pick(block.tensors)
    grads = [t.param.grad for t in tensors]
    params = [t.param.detach() for t in tensors]
    befores = pick(block.befores)
    current, previous = block.grads[block.turn], block.grads[1 - block.turn]
    block.turn = 1 - block.turn                      # the next step writes the other gradient buffer
    flat_index = block.flat_index if everything else block.flat_index[members]

    weight_norm = norms(befores)                                                  # ‖θ before‖
    weight_nonfinite = torch.zeros(len(members), dtype=torch.float64)
    if not bool(torch.isfinite(weight_norm).all()):                               # rare: count them
        weight_nonfinite = torch.stack([(~torch.isfinite(b)).sum() for b in befores]).double()
    theta_before = _gather(block.before_flat, flat_index, block.work)            # (R, S)
    torch._foreach_sub_(befores, params)                                          # befores := −Δθ
    torch._foreach_copy_(pick(current), grads)
    before = {k: v if everything else v[members] for k, v in block.state_before.items()}
    # a scheduler changes the group after the step: copy it now
    group = {k: v for k, v in optimizer.param_groups[block.group].items() if k != "params"}
    has_previous = [block.has_previous[r] for r in members]
    previous_norms = torch.tensor([block.previous_norms[r] for r in members], dtype=torch.float64)
    job = BlockJob(block=block, members=members, everything=everything, current=pick(current),
                   previous=[p if h else None for p, h in zip(pick(previous), has_previous)],
                   minus_update=befores, flat_index=flat_index, current_flat=block.grad_flats[1 - block.turn],
                   theta_before=theta_before, weight_norm=weight_norm, weight_nonfinite=weight_nonfinite,
                   previous_norms=previous_norms, has_previous=has_previous, before=before, optimizer=optimizer,
                   params=[t.param for t in tensors], group=group, adapter=adapter, probes=probes, deliver=deliver,
                   profiles=profiles)
    for r in members:
        block.has_previous[r] = True
    return job


def _optimizer_state(job: BlockJob):
    """The sampled optimizer state after the step, and its scalars, read on the statistics thread:
    only optimizer.step() changes the state, and the next step's pre-hook waits for this job. Also the
    members' whole state tensors and scalars (the profiles' ε share reads them)."""
    block, members = job.block, job.members
    states, scalars = zip(*[state_tensors(job.optimizer, p) for p in job.params])
    after = _sample_state(block, members, list(states))
    scalar_values = {k: torch.tensor([[s.get(k, math.nan)] for s in scalars], dtype=block.work)
                     for k in sorted(set().union(*[s.keys() for s in scalars]))}
    # float64: the step-dependent coefficients (RAdam's ρ_t) cancel badly in float32
    steps = torch.tensor([[s.get("step", math.nan)] for s in scalars], dtype=torch.float64)
    return after, scalar_values, steps, states, scalars


def block_statistics(job: BlockJob) -> BlockStatistics:
    """The statistics of a prepared block (nbkit.measure.step_stats on the job's buffers); also
    keeps the block's previous gradient sample and norms for the next recorded step."""
    block, members, everything = job.block, job.members, job.everything
    after, scalar_values, steps, states, scalars = _optimizer_state(job)
    valid = block.valid if everything else block.valid[members]
    pad = block.pad if everything else block.pad[members]
    whole = whole_tensor_statistics(job.current, job.minus_update, job.previous, job.previous_norms,
                                    job.weight_norm)
    whole["weight_nonfinite"] = job.weight_nonfinite
    update = _gather(block.before_flat, job.flat_index, block.work).neg_()     # (R, S) Δθ
    grad = _gather(job.current_flat, job.flat_index, block.work)               # (R, S)
    finite = bool(torch.isfinite(torch.stack([whole["grad_norm"], whole["update_norm"]])).all())
    previous_sample = None
    if block.previous_sample is not None and all(job.has_previous):
        previous_sample = block.previous_sample if everything else block.previous_sample[members]
    sampled, histograms, probe_values = sampled_statistics(
        grad=grad, theta_before=job.theta_before, update=update, valid=valid, before=job.before,
        after=after, scalars=scalar_values, step=steps, group=job.group, lr=float(job.group["lr"]),
        adapter=job.adapter, previous_grad=previous_sample, probes=job.probes, finite=finite, pad=pad)
    state_nonfinite = None
    if after:
        state_nonfinite = sum((~torch.isfinite(v) & valid).sum(dim=1) for v in after.values())
    grad_norms = whole["grad_norm"].tolist()
    for i, r in enumerate(members):
        block.previous_norms[r] = grad_norms[i]
    if everything:
        block.previous_sample = grad
    else:
        if block.previous_sample is None:
            block.previous_sample = torch.full(block.local.shape, math.nan, dtype=block.work)
        block.previous_sample[members] = grad
    profiled = _profiles(job, states, scalars) if job.profiles else {}
    return BlockStatistics(whole, sampled, histograms, probe_values, state_nonfinite, profiled)


def _profiles(job: BlockJob, states, scalars) -> dict:
    """The exact per-unit profiles of the job's tensors that have units, from the block's −Δθ and
    gradient copies and the optimizer state (for the ε share: the adapter's eps_threshold on whole tensors)."""
    out = {}
    for i, r in enumerate(job.members):
        t = job.block.tensors[r]
        if not t.profile_at:
            continue
        eps = None
        if job.adapter.eps_threshold is not None and states[i]:
            step = torch.tensor(scalars[i].get("step", math.nan), dtype=torch.float64)
            context = StepContext(grad=job.current[i], theta=None, update=None, before={}, after=states[i],
                                  step=step, group=job.group, lr=float(job.group["lr"]), scalars=scalars[i])
            try:
                eps = job.adapter.eps_threshold(context)
            except KeyError:                # a state key this configuration does not keep: no ε share
                eps = None
        dims = {axis: {"rows": t.units.rows, "columns": t.units.columns}[axis] for axis in t.profile_at}
        out[i] = unit_profiles.unit_profiles(job.minus_update[i], job.current[i], eps, dims,
                                             _scratch(job.block, job.current[i]))
    return out


def _scratch(block: Block, grad: torch.Tensor) -> torch.Tensor:
    """The block's profile buffer, grown to the largest tensor seen (kept: a fresh one costs page faults)."""
    work = torch.float64 if grad.dtype == torch.float64 else torch.float32
    if block.scratch is None or block.scratch.numel() < grad.numel() or block.scratch.dtype != work:
        block.scratch = torch.empty(max(t.param.numel() for t in block.tensors), dtype=work)
    return block.scratch


def deliver(row: Row, ks: list, probe_counts: list, n_probes: int, results: BlockStatistics,
            profile_at: list | None = None) -> None:
    """Write one block's statistics into a recorder row (runs on the statistics thread).

    ks: the block's tensors' positions in the recording; probe_counts: probe coordinates of each;
    profile_at: each member's {axis: (offset, units)} in the row's profile arrays."""
    for name, values in (*results.whole.items(), *results.sampled.items()):
        i = QUANTITY_INDEX.get(name)
        if i is not None:
            row.quantities[i, ks] = values.numpy()
    if results.state_nonfinite is not None:
        row.quantities[QUANTITY_INDEX["state_nonfinite"], ks] = results.state_nonfinite.numpy()
    row.histograms[:, ks, :] = results.histograms.numpy()
    n_tensors = row.quantities.shape[1]
    for name, values in results.probes.items():
        block_values = row.probes.get(name)
        if block_values is None:
            block_values = row.probes[name] = np.full((n_tensors, n_probes), np.nan, dtype=np.float32)
        width = min(values.shape[1], n_probes)
        block_values[ks, :width] = values[:, :width].numpy()
        for r, count in enumerate(probe_counts):
            if count < n_probes:
                block_values[ks[r], count:] = np.nan
    for i, by_axis in (results.profiles or {}).items():
        for axis, values in by_axis.items():
            offset, units = profile_at[i][axis]
            codes = unit_profiles.encode(values)
            if np.isnan(values[:, 2]).all():
                codes[:, 2] = unit_profiles.MISSING      # no second moment: no ε share
            row.profiles[axis][offset:offset + units] = codes


def prepare_step(blocks: list[Block], row: Row, optimizer, adapter: Adapter, probes: int, *, report,
                 consecutive: bool = True, profile_units: dict | None = None) -> list[BlockJob]:
    """Post-step, on the training thread: mark `row` heavy and prepare the statistics of every block
    copied before this step (tensors with a dense gradient); the jobs' results fill in `row`.
    report(what): how a sparse gradient is reported (it is not recorded). consecutive=False: the
    previous heavy step was not the step before, so grad_cosine and sign_flip, which compare
    neighbouring steps, stay NaN. profile_units: {axis: units} of the stored profiles (None: no profiles)."""
    row.heavy = True
    if profile_units:
        row.profiles = {axis: np.full((units, len(unit_profiles.PROFILE_QUANTITIES)), unit_profiles.MISSING,
                                      dtype=np.int16) for axis, units in profile_units.items() if units}
    jobs = []
    for block in blocks:
        if not block.copied:
            continue
        block.copied = False
        if not consecutive:
            for r in range(len(block.tensors)):
                forget_gradient(block, r)
        members = []
        for r, (t, k) in enumerate(zip(block.tensors, block.positions)):
            if t.stopped:
                continue
            grad = t.param.grad
            row.quantities[QUANTITY_INDEX["grad_missing"], k] = 1.0 if grad is None else 0.0
            if grad is None:
                forget_gradient(block, r)
            elif grad.is_sparse:
                forget_gradient(block, r)
                report(f"tensor {t.name!r} has a sparse gradient, which is not recorded")
            else:
                members.append(r)
        if not members:
            continue
        ks = [block.positions[r] for r in members]
        fill = functools.partial(deliver, row, ks, [block.tensors[r].probes for r in members], probes,
                                 profile_at=[block.tensors[r].profile_at for r in members])
        jobs.append(prepare_block(block, members, optimizer, adapter, probes, deliver=fill,
                                  profiles=bool(profile_units)))
    return jobs


def forget_gradient(block: Block, r: int) -> None:
    """Tensor r had no gradient this step: the next gradient has no previous one to compare with."""
    block.has_previous[r] = False
    block.previous_norms[r] = math.nan

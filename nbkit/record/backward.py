"""What the recorder sees at the end of each backward pass: the pre-clip gradient norms (and, at a
trained-loss check, the pre-clip gradient at the probe coordinates), and from them each step's clip factor.

The end of a backward pass is reached through autograd's engine: the first loss hook of a backward (or
a post-accumulate-grad hook on one parameter, when no loss was observed) queues a callback that the
engine runs once the whole pass is done, the way torch's DistributedDataParallel finishes its gradient
reduction (torch/nn/parallel/distributed.py, `Variable._execution_engine.queue_callback`). Clipping runs
after that and before optimizer.step(); the post-step hook sees the clipped gradient.
"""
from __future__ import annotations

import math

import numpy as np
import torch


class BackwardWatch:
    """End-of-backward statistics of the recorded tensors (a Recorder's `_tensors`)."""

    def __init__(self, tensors, report):
        self.tensors = tensors
        self.report = report                # report(what, exc): a problem, recording goes on
        self.want_probes = False            # set for a trained-loss check step
        self.probes = None                  # per tensor: pre-clip gradient at its probes (or None)
        self._norms = None                  # (indices of tensors with a gradient, their float32 norms)
        self._queued = False
        self._handle = None
        self._by_size = sorted(range(len(tensors)), key=lambda i: tensors[i].param.numel())   # clip reference order
        sentinel = next((t.param for t in tensors if t.param.requires_grad), None)
        if sentinel is not None:
            self._handle = sentinel.register_post_accumulate_grad_hook(lambda _param: self.seen())

    def remove(self):
        if self._handle is not None:
            self._handle.remove()
            self._handle = None

    def seen(self) -> None:
        """A backward pass is running: have its end reported (once per pass)."""
        if self._queued:
            return
        self._queued = True
        try:
            torch.autograd.Variable._execution_engine.queue_callback(self._ended)
        except Exception as exc:            # a torch without the engine callback: no pre-clip statistics
            self._queued = False
            self.report("the end-of-backward callback could not be queued (no pre-clip gradient norms)", exc)

    def _ended(self) -> None:
        self._queued = False
        try:
            grads = [t.param.grad for t in self.tensors]
            present = [i for i, g in enumerate(grads) if g is not None and not g.is_sparse]
            self._norms = (present, torch._foreach_norm([grads[i] for i in present])) if present else None
            if self.want_probes:
                self.probes = [grads[i].reshape(-1)[t.index[:t.probes]].detach().clone()
                               if grads[i] is not None and not grads[i].is_sparse else None
                               for i, t in enumerate(self.tensors)]
        except Exception as exc:            # never into the user's backward()
            self.report("the end-of-backward statistics failed", exc)

    def step_ended(self) -> tuple[float, float, np.ndarray | None]:
        """(pre-clip gradient norm, clip factor, per-tensor pre-clip norms) of the step just taken; NaN
        (None for the norms) where no backward was seen.

        The factor is post-clip ÷ pre-clip norm of the smallest tensor with a non-zero gradient, both
        with the same kernel, so an unclipped step gives exactly 1 and clip_grad_norm_'s one common
        coefficient is measured to float32 rounding."""
        norms, self._norms = self._norms, None
        if norms is None:
            return math.nan, math.nan, None
        present, values = norms
        pre = torch.stack(values).double()
        total = float(pre.norm())
        per_tensor = np.full(len(self.tensors), np.nan, dtype=np.float32)
        per_tensor[present] = pre.numpy()
        nonzero = dict(zip(present, range(len(present))))
        flags = (pre > 0).tolist()
        k = next((nonzero[i] for i in self._by_size if i in nonzero and flags[nonzero[i]]), None)
        if k is None:
            return total, math.nan, per_tensor
        grad = self.tensors[present[k]].param.grad
        if grad is None or grad.is_sparse:
            return total, math.nan, per_tensor
        post = torch._foreach_norm([grad])[0]
        return total, float(post.double() / values[k].double()), per_tensor

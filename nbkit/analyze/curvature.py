"""Sharpness: the largest eigenvalue of the loss Hessian on one batch, by Lanczos on Hessian-vector products.

Hessian-vector products come from double backward: with g = ∇L(θ) built with create_graph=True,
H·v = ∇(g·v). The top eigenvalue is found by ARPACK's Lanczos (scipy.sparse.linalg.eigsh, which="LA")
on a LinearOperator, to the relative tolerance `tol`, from a start vector drawn from a private seeded
generator (never the global ones).

Preconditioned sharpness (Adam family). Following Cohen et al. 2022 ("Adaptive gradient methods at the
edge of stability"), Adam's update is θ ← θ − lr·P⁻¹·m with m the raw (not bias-corrected) first moment
and P = (1 − β1^t)·diag(√(v / (1 − β2^t)) + ε), v the raw second moment after t steps (amsgrad: its
running maximum; Adamax: P = (1 − β1^t)·diag(u) with u its infinity norm). The bias correction of m is
thus inside P. The preconditioned sharpness is the top eigenvalue of P^-1/2 H P^-1/2 (the same
spectrum as P⁻¹H), compared with (2 + 2β1)/((1 − β1)·lr) in nbkit.analyze.stability. NAdam's momentum
schedule and RAdam's rectification are not modelled: their P uses the same formula.

With `optimizer` given, coupled L2 weight decay wd (SGD, Adam without decoupling) adds wd·I to H.
Every estimate forks the RNG state and restores the model's buffers: training is not changed.
"""
from __future__ import annotations

import contextlib
import copy

import numpy as np
import torch
from scipy.sparse.linalg import ArpackNoConvergence, LinearOperator, eigsh
from threadpoolctl import threadpool_limits
from torch.nn.attention import SDPBackend, sdpa_kernel

from nbkit.analyze.stability import ADAM_FAMILY, coupled_weight_decay
from nbkit.errors import NbkitError

START_SEED = 20251202      # the private seed of Lanczos start vectors
PASS_SEED = 20251203       # the global generator's seed inside the forked RNG of an extra pass (dropout)


class AnalysisError(NbkitError):
    """A curvature, noise or findings computation cannot run on the given input."""


@contextlib.contextmanager
def untouched(model: torch.nn.Module):
    """Run extra passes without changing training: fork the CPU RNG state (torch.random.fork_rng)
    and restore every buffer (BatchNorm running statistics, counters) afterwards. Inside, the generator
    is seeded with PASS_SEED so estimates on a model with dropout are repeatable."""
    saved = [(b, b.detach().clone()) for b in model.buffers()]
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(PASS_SEED)
        try:
            yield
        finally:
            with torch.no_grad():
                for buffer, value in saved:
                    buffer.copy_(value)


@contextlib.contextmanager
def second_order():
    """Gradients enabled, and attention on PyTorch's math kernel: the fused CPU attention kernels have no
    double backward ("derivative for ..._flash_attention_for_cpu_backward is not implemented")."""
    with torch.enable_grad(), sdpa_kernel([SDPBackend.MATH]):
        yield


def loss_of(step_fn, model, batch) -> torch.Tensor:
    """step_fn(model, batch) as a scalar tensor that depends on the parameters, or a clear error."""
    if not callable(step_fn):
        raise AnalysisError(f"step_fn must be a callable step_fn(model, batch) -> loss, got {type(step_fn).__name__}")
    loss = step_fn(model, batch)
    if not isinstance(loss, torch.Tensor) or loss.numel() != 1:
        raise AnalysisError(f"step_fn(model, batch) must return a scalar loss tensor, got {type(loss).__name__}"
                            f"{'' if not isinstance(loss, torch.Tensor) else ' of shape ' + str(tuple(loss.shape))}; "
                            "return the mean loss of the batch")
    if not loss.requires_grad:
        raise AnalysisError("step_fn's loss does not depend on any parameter (no autograd graph); compute it "
                            "from model(...) with gradients enabled and the parameters requiring grad")
    return loss.reshape(())


def hessian_vector_product(loss: torch.Tensor, params: list[torch.Tensor]):
    """A function v -> H·v (flat float64 numpy, length Σ numel) for the Hessian of `loss` in `params`.

    H·v is the vector-Jacobian product of g = ∇L with v as its output gradient (H is symmetric;
    Pearlmutter 1994), so v goes straight into the double backward as grad_outputs: no g·v graph.
    """
    grads = torch.autograd.grad(loss, params, create_graph=True, allow_unused=True)
    live = [(k, p, g) for k, (p, g) in enumerate(zip(params, grads)) if g is not None and g.requires_grad]
    offsets = np.cumsum([0] + [p.numel() for p in params])

    def product(vector: np.ndarray) -> np.ndarray:
        if not live:
            return np.zeros(offsets[-1], dtype=np.float64)
        flat = torch.from_numpy(np.ascontiguousarray(vector, dtype=np.float64))
        as_dtype = {dtype: flat.to(dtype) for dtype in {g.dtype for _, _, g in live}}   # one cast per dtype
        directions = [as_dtype[g.dtype][offsets[k]:offsets[k + 1]].view_as(g) for k, _, g in live]
        hv = torch.autograd.grad([g for _, _, g in live], [p for _, p, _ in live], grad_outputs=directions,
                                 retain_graph=True, allow_unused=True)
        out = np.zeros(offsets[-1], dtype=np.float64)
        target = torch.from_numpy(out)
        for (k, _, _), h in zip(live, hv):
            if h is not None:                    # one pass: copy_ converts to float64 as it writes
                target[offsets[k]:offsets[k + 1]].copy_(h.reshape(-1))
        return out

    return product


LANCZOS_BASIS = 8


def top_eigenvalue(matvec, n: int, *, tol: float = 1e-6, seed: int = START_SEED) -> float:
    """Largest (algebraic) eigenvalue of the symmetric operator `matvec` on R^n by Lanczos (ARPACK).
    Below n = 3 (ARPACK needs more room) the operator is formed densely and numpy.linalg.eigvalsh used."""
    if n < 1:
        raise AnalysisError("There are no parameters to take a Hessian over")
    plain = matvec

    def matvec(v):                    # a NaN handed to ARPACK makes LAPACK print to stderr (DLASCL)
        out = plain(v)
        if not np.isfinite(out).all():
            raise AnalysisError("the Hessian-vector product is not finite (NaN or Inf in the parameters, the "
                                "loss or its gradient): no sharpness at this step")
        return out

    if n < 3:
        dense = np.stack([matvec(e) for e in np.eye(n)], axis=1)
        return float(np.linalg.eigvalsh((dense + dense.T) / 2)[-1])
    start = np.random.default_rng(seed).standard_normal(n)
    operator = LinearOperator((n, n), matvec=matvec, dtype=np.float64)
    # ARPACK keeps LANCZOS_BASIS vectors of length n (scipy's default, 20, is 160 bytes per parameter)
    # and calls BLAS for small level-2 products, between which OpenBLAS's threads spin on the cores
    # the Hessian-vector products need: one BLAS thread. Measured on the 1.33M-parameter MLP of
    # benchmarks/analysis_cost.py (2 cores): the same products and eigenvalue in half the time.
    try:
        with threadpool_limits(limits=1, user_api="blas"):
            values = eigsh(operator, k=1, which="LA", tol=tol, v0=start, ncv=min(n, LANCZOS_BASIS),
                           return_eigenvectors=False)
    except ArpackNoConvergence as exc:
        raise AnalysisError(f"Lanczos did not reach tol={tol} (ARPACK: {exc}); pass a larger tol") from exc
    return float(values[-1])


def preconditioner(optimizer_class: str, state: dict, group: dict) -> torch.Tensor | None:
    """Diagonal P of one parameter (shaped like it) from its optimizer state, as Cohen et al. 2022
    define it (module docstring); None when the optimizer is not Adam-family or has no state yet."""
    if optimizer_class not in ADAM_FAMILY or not state:
        return None
    beta1, beta2 = (float(b) for b in (group.get("betas") or (0.9, 0.999)))
    eps = float(group.get("eps", 1e-8))
    t = float(state["step"]) if "step" in state else 0.0
    if t < 1:
        return None
    if optimizer_class == "Adamax":
        return (1 - beta1 ** t) * state["exp_inf"].detach().double()
    v = state.get("max_exp_avg_sq") if group.get("amsgrad", False) else None
    v = state["exp_avg_sq"] if v is None else v
    return (1 - beta1 ** t) * ((v.detach().double() / (1 - beta2 ** t)).sqrt() + eps)


def sharpness_of(loss: torch.Tensor, params: list[torch.Tensor], *, precondition=None, weight_decay=None,
                 tol: float = 1e-6) -> float:
    """Top eigenvalue of H (+ diag(weight_decay)), or of P^-1/2 (H + wd) P^-1/2 when `precondition`
    (a list of P tensors, one per parameter) is given. Pure apart from autograd on `loss`."""
    product = hessian_vector_product(loss, params)
    n = sum(p.numel() for p in params)
    decay = np.concatenate([np.full(p.numel(), float(w)) for p, w in
                            zip(params, weight_decay or [0.0] * len(params))]) if params else np.zeros(0)
    scale = None
    if precondition is not None:
        scale = np.concatenate([P.double().reshape(-1).numpy() for P in precondition]) ** -0.5
        if not np.isfinite(scale).all():
            raise AnalysisError("The preconditioner has zero or non-finite entries (a zero second moment with "
                                "eps=0?); pass optimizer=None for the raw Hessian")

    def matvec(v):
        v = np.asarray(v, dtype=np.float64).reshape(-1)
        if scale is None:
            return product(v) + decay * v
        x = scale * v
        return scale * (product(x) + decay * x)

    return top_eigenvalue(matvec, n, tol=tol)


def _optimizer_parts(optimizer, model):
    """(params, preconditioners or None, coupled weight decays) for the optimizer's model tensors."""
    in_model = {id(p) for p in model.parameters()}
    name = type(optimizer).__name__
    params, P, decays = [], [], []
    for group in optimizer.param_groups:
        for p in group["params"]:
            if id(p) not in in_model or not p.requires_grad:
                continue
            params.append(p)
            P.append(preconditioner(name, optimizer.state.get(p, {}), group))
            decays.append(coupled_weight_decay(name, group))
    if name in ADAM_FAMILY:
        if any(x is None for x in P):
            raise AnalysisError(f"{name} has no second moment yet for some tensors (take at least one "
                                "optimizer.step() first), or pass optimizer=None for the raw Hessian's sharpness")
        return params, P, decays
    return params, None, decays


def sharpness(model, step_fn, batch, optimizer=None, tol=1e-6) -> float:
    """Largest Hessian eigenvalue of step_fn(model, batch)'s loss in the model's parameters.

    optimizer=None: the raw Hessian over all parameters requiring grad. With an optimizer: over the
    tensors it holds, with its coupled L2 weight decay added, and for the Adam family the preconditioned
    Hessian P^-1/2 H P^-1/2 (module docstring; Cohen et al. 2022). tol=1e-6: Lanczos relative tolerance.
    The RNG state and the model's buffers are left as they were; parameters' .grad are not touched.
    """
    if not isinstance(model, torch.nn.Module):
        raise AnalysisError(f"model must be a torch.nn.Module, got {type(model).__name__}")
    if not (isinstance(tol, (int, float)) and 0 < tol < 1):
        raise AnalysisError(f"Invalid tol: {tol!r}; expected a relative tolerance between 0 and 1, e.g. 1e-6")
    if optimizer is not None:
        params, P, decays = _optimizer_parts(optimizer, model)
    else:
        params, P, decays = [p for p in model.parameters() if p.requires_grad], None, None
    with untouched(model), second_order():
        loss = loss_of(step_fn, model, batch)
        return sharpness_of(loss, params, precondition=P, weight_decay=decays, tol=tol)


def keyframe_sharpness(run, model, step_fn, batch, *, tol=1e-6) -> dict[int, float]:
    """Sharpness at every keyframe of `run` that has a recorded row: {step: sharpness}. Computes only;
    nothing is written (Recording.curvature stores the values). Works on a copy of `model`.

    At keyframe s the parameters are those before step s's update, on `batch` (the same batch for every
    keyframe, so the values are comparable). Adam-family recordings get the preconditioned sharpness
    with P from the keyframe's optimizer state (none at keyframe 0, which has no second moment yet).
    tol=1e-6: Lanczos relative tolerance.
    """
    if not run.keyframes:
        raise AnalysisError(f"Recording {str(run.path)!r} has no keyframes to estimate sharpness at")
    work = copy.deepcopy(model)
    name = run.meta["optimizer"]["class"]
    groups = run.meta.get("param_groups", [])
    steps = run.steps
    by_name = dict(work.named_parameters())
    values: dict[int, float] = {}
    for step in run.keyframes:
        row = int(np.searchsorted(steps, step))
        if row >= len(steps) or steps[row] != step:
            continue                                  # the final state has no row of its own
        model_state, optimizer_state = run.state_at(step)
        try:
            work.load_state_dict(model_state)
        except RuntimeError as exc:
            raise AnalysisError(f"The model given to run.curvature does not match the recording's keyframe "
                                f"at step {step} ({exc}); pass a model of the recorded architecture") from exc
        params, P, decays = _keyframe_parts(name, groups, optimizer_state, by_name)
        if params is None:
            continue
        with untouched(work), second_order():
            loss = loss_of(step_fn, work, batch)
            values[step] = sharpness_of(loss, params, precondition=P, weight_decay=decays, tol=tol)
    return values


def _keyframe_parts(name, groups, optimizer_state, by_name):
    """Params, preconditioners and decays at a keyframe. The optimizer state dict numbers its tensors in
    group order; the recording lists each group's tensor names, assumed in the same order."""
    params, P, decays = [], [], []
    for g, (recorded, saved) in enumerate(zip(groups, optimizer_state.get("param_groups", []))):
        # the keyframe's own group settings (eps, weight_decay, ... as scheduled then) over the start values
        group = {**recorded, **{k: v for k, v in saved.items() if k != "params"}}
        for tensor_name, index in zip(recorded.get("params", []), saved.get("params", [])):
            if tensor_name not in by_name:
                continue                              # an orphan the model does not hold
            params.append(by_name[tensor_name])
            P.append(preconditioner(name, optimizer_state.get("state", {}).get(index, {}), group))
            decays.append(coupled_weight_decay(name, group))
    if name in ADAM_FAMILY:
        if any(x is None for x in P):               # keyframe 0: no second moment yet: no estimate
            return None, None, None
        return params, P, decays
    return params, None, decays

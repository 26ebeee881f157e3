"""Update rules of the torch.optim optimizers: which state tensor is which moment, and how each update
splits into factors.

For every coordinate, gain = Δθ / (-lr·g) = momentum factor × scale factor × residual (README: Quantities).
Each adapter below follows the update rule of the named torch.optim page (PyTorch 2.13 documentation,
"Algorithm" pseudo-code of each optimizer, and its source in torch/optim/<name>.py) and returns the
three factors from the state *after* the step, on sampled coordinates. All inputs are float64
matrices (T, S): T tensors of one parameter group, S sampled coordinates each.

Where the rule has nothing beyond the moments the residual is exactly 1; where an optimizer's
documentation defines no such split (LBFGS, Rprop, ASGD, Adafactor, Muon, unknown optimizers) the
factors are None: gain and the gradient/update quantities are still recorded.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import torch


@dataclass
class StepContext:
    """Sampled values of one parameter group at one step. Matrices are (T, S) float64."""

    grad: torch.Tensor
    theta: torch.Tensor            # parameter before the step
    update: torch.Tensor           # θ_after − θ_before
    before: dict[str, torch.Tensor]  # optimizer state before the step (zeros where not yet created)
    after: dict[str, torch.Tensor]   # optimizer state after the step
    step: torch.Tensor             # (T, 1) the optimizer's own step count after this step
    group: dict                    # the parameter group's hyper-parameters
    lr: float
    scalars: dict = field(default_factory=dict)   # (T, 1) scalar state after the step (NAdam's mu_product)

    def hyper(self, name, default=None):
        return self.group.get(name, default)

    def effective_grad(self) -> torch.Tensor:
        """The gradient the rule works on: sign-flipped for maximize, with coupled L2 decay added."""
        g = -self.grad if self.hyper("maximize", False) else self.grad
        decay = self.hyper("weight_decay", 0) or 0
        if decay and not self.hyper("decoupled_weight_decay", False):
            g = g + decay * self.theta
        return g


@dataclass
class Factors:
    momentum: torch.Tensor
    scale: torch.Tensor
    residual: torch.Tensor
    eps_dominated: torch.Tensor | None = None   # bool (T, S): ε outweighs the rest of the denominator


@dataclass
class Adapter:
    """How one optimizer family keeps its moments and splits its gain."""

    name: str
    first_moment: str | None = None
    second_moment: str | None = None
    factors: object = None          # callable(StepContext) -> Factors | None
    gain_applicable: bool = True    # False where post-step gradients do not belong to the update
    notes: str = ""
    before_keys: tuple = ()         # state keys the factors need from before the step (sampled pre-step)
    eps_threshold: object = None    # callable(StepContext) -> (state tensor, float): ε outweighs the rest of
    #   the denominator (the factors' eps_dominated) where the tensor is below the float; any shape
    #   (profiles compare whole tensors in one pass: squared forms of the same conditions, no square roots)

    def probe_field(self, state_key: str) -> str:
        """Name of a state tensor in the probes: first_moment / second_moment, or its own name."""
        if state_key == self.first_moment:
            return "first_moment"
        if state_key == self.second_moment:
            return "second_moment"
        return state_key


def _ones(like):
    """A factor of exactly 1, constant along each tensor: (T, 1), broadcast where used."""
    return torch.ones((like.shape[0], 1), dtype=like.dtype)


def _divide(numerator, denominator):
    """numerator / denominator, NaN where the denominator is 0 (gain is undefined where g = 0)."""
    return torch.where(denominator != 0, numerator / torch.where(denominator != 0, denominator, 1.0), torch.nan)


def _decoupled_residual(ctx: StepContext, momentum, scale):
    """Residual of decoupled weight decay: Δθ = −lr·wd·θ − lr·(rest), so gain = wd·θ/g + rest/g."""
    decay = ctx.hyper("weight_decay", 0) or 0
    if not (decay and ctx.hyper("decoupled_weight_decay", False)):
        return _ones(momentum)
    rest = momentum * scale * ctx.grad
    return 1 + _divide(decay * ctx.theta, rest)


# --- SGD: https://pytorch.org/docs/stable/generated/torch.optim.SGD.html -----------------------
# g' = g + wd·θ; b = μ·b + (1−τ)·g' (b = g' at the first step); Nesterov: d = g' + μ·b, else d = b;
# θ ← θ − lr·d. Momentum factor b/g (Nesterov (g + μ·b)/g), scale factor 1. The residual is what
# weight decay adds outside the buffer (none with plain momentum: decay is inside b).
def _sgd(ctx: StepContext) -> Factors:
    g, gd = ctx.grad, ctx.effective_grad()
    mu = ctx.hyper("momentum", 0) or 0
    if not mu:
        return Factors(_ones(g), _ones(g), _divide(gd, g) if gd is not g else _ones(g))
    buf = ctx.after["momentum_buffer"]
    sign = -1.0 if ctx.hyper("maximize", False) else 1.0
    if ctx.hyper("nesterov", False):
        momentum = _divide(sign * g + mu * buf, g)
        residual = _divide(gd + mu * buf, sign * g + mu * buf) if (ctx.hyper("weight_decay", 0) or 0) else _ones(g)
        return Factors(momentum, _ones(g), residual)
    return Factors(_divide(buf, g), _ones(g), _ones(g))


# --- Adam / AdamW: Kingma & Ba 2015, Algorithm 1; torch.optim.Adam and AdamW pages -------------
# m̂ = m/(1−β1^t), v̂ = v/(1−β2^t) (amsgrad: v̂ from max_exp_avg_sq), θ ← θ − lr·m̂/(√v̂ + ε);
# AdamW (decoupled decay) first does θ ← θ(1 − lr·wd). Momentum factor m̂/g, scale 1/(√v̂ + ε).
def _adam(ctx: StepContext) -> Factors:
    beta1, _ = ctx.hyper("betas")
    eps = ctx.hyper("eps")
    m_hat = ctx.after["exp_avg"] / (1 - beta1 ** ctx.step)
    root_v_hat = _adam_root(ctx)
    momentum = _divide(m_hat, ctx.grad)
    scale = 1 / (root_v_hat + eps)
    return Factors(momentum, scale, _decoupled_residual(ctx, momentum, scale), eps > root_v_hat)


def _adam_second(ctx: StepContext) -> torch.Tensor:
    return ctx.after["max_exp_avg_sq"] if ctx.hyper("amsgrad", False) else ctx.after["exp_avg_sq"]


def _adam_root(ctx: StepContext) -> torch.Tensor:
    _, beta2 = ctx.hyper("betas")
    return torch.sqrt(_adam_second(ctx)) / torch.sqrt(1 - beta2 ** ctx.step)


def _adam_eps(ctx: StepContext):
    # ε > √second / √(1 − β2^t)  ⇔  second < ε²·(1 − β2^t)
    _, beta2 = ctx.hyper("betas")
    return _adam_second(ctx), ctx.hyper("eps") ** 2 * float(1 - beta2 ** ctx.step)


# --- NAdam: Dozat 2016; torch.optim.NAdam page. μ_t = β1(1 − ½·0.96^(tψ)), Π_t = ∏μ_i;
# θ ← θ − lr·[(1−μ_t)/(1−Π_t)·g' + μ_{t+1}/(1−Π_t·μ_{t+1})·m] / (√v̂ + ε).
def _nadam(ctx: StepContext) -> Factors:
    beta1, _ = ctx.hyper("betas")
    eps, psi = ctx.hyper("eps"), ctx.hyper("momentum_decay")
    t = ctx.step
    mu = beta1 * (1 - 0.5 * 0.96 ** (t * psi))
    mu_next = beta1 * (1 - 0.5 * 0.96 ** ((t + 1) * psi))
    product = ctx.scalars["mu_product"]
    numerator = (1 - mu) / (1 - product) * ctx.effective_grad() + mu_next / (1 - product * mu_next) * ctx.after["exp_avg"]
    root_v_hat = _nadam_root(ctx)
    momentum = _divide(numerator, ctx.grad)
    scale = 1 / (root_v_hat + eps)
    return Factors(momentum, scale, _decoupled_residual(ctx, momentum, scale), eps > root_v_hat)


def _nadam_root(ctx: StepContext) -> torch.Tensor:
    _, beta2 = ctx.hyper("betas")
    return torch.sqrt(ctx.after["exp_avg_sq"] / (1 - beta2 ** ctx.step))


def _nadam_eps(ctx: StepContext):
    _, beta2 = ctx.hyper("betas")                  # ε > √(v / (1 − β2^t))  ⇔  v < ε²·(1 − β2^t)
    return ctx.after["exp_avg_sq"], ctx.hyper("eps") ** 2 * float(1 - beta2 ** ctx.step)


# --- RAdam: Liu et al. 2020; torch.optim.RAdam page. ρ_t = ρ∞ − 2tβ2^t/(1−β2^t); when ρ_t > 5:
# θ ← θ − lr·m̂·r_t·√(1−β2^t)/(√v + ε), else θ ← θ − lr·m̂. The rectification r_t is the residual.
def _radam(ctx: StepContext) -> Factors:
    beta1, beta2 = ctx.hyper("betas")
    eps = ctx.hyper("eps")
    t = ctx.step
    m_hat = ctx.after["exp_avg"] / (1 - beta1 ** t)
    momentum = _divide(m_hat, ctx.grad)
    rho_inf, rho_t, rectified = _radam_rectification(ctx)
    rect = torch.sqrt(((rho_t - 4) * (rho_t - 2) * rho_inf / ((rho_inf - 4) * (rho_inf - 2) * rho_t)).clamp(min=0))
    root_v = torch.sqrt(ctx.after["exp_avg_sq"])
    scale = torch.where(rectified, torch.sqrt(1 - beta2 ** t) / (root_v + eps), 1.0)
    rect = torch.where(rectified, rect, 1.0).expand_as(momentum)
    residual = rect * _decoupled_residual(ctx, momentum, scale * rect)
    return Factors(momentum, scale, residual, torch.where(rectified, eps > root_v, False))


def _radam_rectification(ctx: StepContext):
    _, beta2 = ctx.hyper("betas")
    t = ctx.step
    rho_inf = 2 / (1 - beta2) - 1
    rho_t = rho_inf - 2 * t * beta2 ** t / (1 - beta2 ** t)
    return rho_inf, rho_t, rho_t > 5


def _radam_eps(ctx: StepContext):
    rectified = bool(_radam_rectification(ctx)[2])   # unrectified steps divide by nothing: no ε anywhere
    return ctx.after["exp_avg_sq"], ctx.hyper("eps") ** 2 if rectified else 0.0


# --- Adamax: Kingma & Ba 2015, section 7.1; torch.optim.Adamax page.
# u = max(β2·u, |g'| + ε); θ ← θ − lr/(1−β1^t)·m/u. Momentum factor m̂/g, scale 1/u.
def _adamax(ctx: StepContext) -> Factors:
    beta1, _ = ctx.hyper("betas")
    eps = ctx.hyper("eps")
    u = ctx.after["exp_inf"]
    m_hat = ctx.after["exp_avg"] / (1 - beta1 ** ctx.step)
    momentum = _divide(m_hat, ctx.grad)
    return Factors(momentum, 1 / u, _ones(momentum), eps > u - eps)


def _adamax_eps(ctx: StepContext):
    return ctx.after["exp_inf"], 2 * ctx.hyper("eps")     # ε > u − ε  ⇔  u < 2ε


# --- RMSprop: torch.optim.RMSprop page (PyTorch 2.13 documentation, its Algorithm). v = αv + (1−α)g'²; centered: ḡ = αḡ +
# (1−α)g', a = √(v − ḡ²) + ε, else a = √v + ε. With momentum μ: b = μb + g'/a, θ ← θ − lr·b;
# else θ ← θ − lr·g'/a. Scale factor 1/a; momentum factor b·a/g (1 without momentum).
def _rmsprop(ctx: StepContext) -> Factors:
    eps = ctx.hyper("eps")
    root = _rmsprop_root(ctx)
    a = root + eps
    scale = 1 / a
    g, gd = ctx.grad, ctx.effective_grad()
    if ctx.hyper("momentum", 0):
        return Factors(_divide(ctx.after["momentum_buffer"] * a, g), scale, _ones(g), eps > root)
    return Factors(_ones(g), scale, _divide(gd, g) if gd is not g else _ones(g), eps > root)


def _rmsprop_v(ctx: StepContext) -> torch.Tensor:
    v = ctx.after["square_avg"]
    return v - ctx.after["grad_avg"] ** 2 if ctx.hyper("centered", False) else v


def _rmsprop_root(ctx: StepContext) -> torch.Tensor:
    return torch.sqrt(_rmsprop_v(ctx).clamp(min=0))


def _rmsprop_eps(ctx: StepContext):
    return _rmsprop_v(ctx), ctx.hyper("eps") ** 2         # ε > √max(v, 0)  ⇔  v < ε²


# --- Adagrad: Duchi et al. 2011; torch.optim.Adagrad page. clr = lr/(1 + (t−1)·lr_decay);
# s += g'²; θ ← θ − clr·g'/(√s + ε). Scale factor 1/(√s + ε); residual (clr/lr)·g'/g.
def _adagrad(ctx: StepContext) -> Factors:
    eps, decay = ctx.hyper("eps"), ctx.hyper("lr_decay", 0) or 0
    root = torch.sqrt(ctx.after["sum"])
    g, gd = ctx.grad, ctx.effective_grad()
    residual = _divide(gd, g) if gd is not g else _ones(g)
    if decay:
        residual = residual / (1 + (ctx.step - 1) * decay)
    return Factors(_ones(g), 1 / (root + eps), residual, eps > root)


def _adagrad_eps(ctx: StepContext):
    return ctx.after["sum"], ctx.hyper("eps") ** 2


def _adadelta_eps(ctx: StepContext):
    return ctx.after["square_avg"], ctx.hyper("eps")


# --- Adadelta: Zeiler 2012; torch.optim.Adadelta page. v = ρv + (1−ρ)g'²;
# Δx = √(u + ε)/√(v + ε)·g' (u before the step); u = ρu + (1−ρ)Δx²; θ ← θ − lr·Δx.
def _adadelta(ctx: StepContext) -> Factors:
    eps = ctx.hyper("eps")
    v = ctx.after["square_avg"]
    u_before = ctx.before.get("acc_delta", torch.zeros_like(v))
    g, gd = ctx.grad, ctx.effective_grad()
    scale = torch.sqrt(u_before + eps) / torch.sqrt(v + eps)
    residual = _divide(gd, g) if gd is not g else _ones(g)
    return Factors(_ones(g), scale, residual, eps > v)


def _not_applicable(ctx: StepContext):
    return None


ADAPTERS: dict[str, Adapter] = {
    "SGD": Adapter("SGD", first_moment="momentum_buffer", factors=_sgd),
    "Adam": Adapter("Adam", "exp_avg", "exp_avg_sq", _adam, eps_threshold=_adam_eps),
    "AdamW": Adapter("AdamW", "exp_avg", "exp_avg_sq", _adam, eps_threshold=_adam_eps),
    "NAdam": Adapter("NAdam", "exp_avg", "exp_avg_sq", _nadam, eps_threshold=_nadam_eps),
    "RAdam": Adapter("RAdam", "exp_avg", "exp_avg_sq", _radam, eps_threshold=_radam_eps),
    "Adamax": Adapter("Adamax", "exp_avg", None, _adamax, eps_threshold=_adamax_eps),
    "RMSprop": Adapter("RMSprop", None, "square_avg", _rmsprop, eps_threshold=_rmsprop_eps),
    "Adagrad": Adapter("Adagrad", None, "sum", _adagrad, eps_threshold=_adagrad_eps),
    "Adadelta": Adapter("Adadelta", None, "square_avg", _adadelta, before_keys=("acc_delta",),
                        eps_threshold=_adadelta_eps),
    "SparseAdam": Adapter("SparseAdam", "exp_avg", "exp_avg_sq", _not_applicable,
                          notes="sparse gradients are skipped; moments kept as probes where dense"),
    "Muon": Adapter("Muon", "momentum_buffer", None, _not_applicable,
                    notes="orthogonalised update: no per-coordinate factor split"),
    "LBFGS": Adapter("LBFGS", factors=_not_applicable, gain_applicable=False,
                     notes="gradients at the post-step hook come from the last closure evaluation"),
}
GENERIC = Adapter("generic", factors=_not_applicable,
                  notes="no documented moment split: gradient and update quantities only")


def adapter_for(optimizer: torch.optim.Optimizer) -> Adapter:
    """The adapter of the nearest torch.optim class in the optimizer's class hierarchy."""
    for cls in type(optimizer).__mro__:
        if cls.__module__.startswith("torch.optim") and cls.__name__ in ADAPTERS:
            return ADAPTERS[cls.__name__]
    return GENERIC


def step_count(state: dict) -> float:
    """The optimizer's own step counter for one parameter (a tensor or a number), NaN if absent."""
    value = state.get("step")
    if value is None:
        return math.nan
    return float(value)

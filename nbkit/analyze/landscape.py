"""Loss-landscape slices: the loss on a plane through parameter space, and runs' paths projected on it.

The plane goes through the runs' shared start point θ0. With two or more runs its axes are the
directions to the end points of the first two runs that span a plane with θ0 (a bit-exact replay
ends where its parent does), orthonormalised (Gram-Schmidt), so coordinates are distances in
parameter space. With one run they are two random directions with filter
normalisation (Li et al. 2018, "Visualizing the Loss Landscape of Neural Nets", section 4: each
filter d_i of the direction, a slice along the output dimension, is rescaled to the norm of the
same filter of θ0: d_i <- d_i / ‖d_i‖ · ‖θ0_i‖). One-dimensional tensors (biases, norm scales) get a
zero direction, as in the authors' published code by default (from memory). The loss is evaluated
with the model in eval mode and without gradients, so the surface is deterministic.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import torch
from tqdm.auto import tqdm

from nbkit.analyze.model_copy import copy_model
from nbkit.errors import NbkitError


@dataclass
class LandscapeSlice:
    alpha: np.ndarray                 # (resolution,) first-axis coordinates
    beta: np.ndarray                  # (resolution,) second-axis coordinates
    loss: np.ndarray                  # (resolution, resolution): loss[j, i] at (alpha[i], beta[j])
    origin_loss: float                # the loss at θ0, evaluated like the grid
    origin_step: int
    axes: str                         # "end points" or "random filter-normalised directions"
    axis_labels: tuple
    paths: dict = field(default_factory=dict)        # run name -> (keyframes, 2) coordinates
    path_steps: dict = field(default_factory=dict)   # run name -> (keyframes,) steps


def flat(state: dict, names: list[str]) -> torch.Tensor:
    """The named tensors of a state dict as one float64 vector."""
    return torch.cat([state[name].detach().reshape(-1).double() for name in names])


def filter_normalised_direction(origin: dict, names: list[str], generator: torch.Generator) -> torch.Tensor:
    """A Gaussian random direction with filter normalisation (Li et al. 2018, section 4), flattened."""
    parts = []
    for name in names:
        theta = origin[name].detach().double()
        if theta.dim() <= 1:
            parts.append(torch.zeros(theta.numel(), dtype=torch.float64))
            continue
        d = torch.randn(theta.shape, generator=generator, dtype=torch.float64)
        d_norm = d.reshape(d.shape[0], -1).norm(dim=1).clamp_min(1e-30)
        theta_norm = theta.reshape(theta.shape[0], -1).norm(dim=1)
        scale = (theta_norm / d_norm).reshape(-1, *([1] * (d.dim() - 1)))
        parts.append((d * scale).reshape(-1))
    return torch.cat(parts)


def orthonormal_axes(u: torch.Tensor, v: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """Gram-Schmidt on (u, v); raises when the end points do not span a plane."""
    nu = u.norm()
    if nu == 0:
        raise NbkitError("The first run ends where it starts; the plane needs runs that moved")
    e1 = u / nu
    w = v - (v @ e1) * e1
    nw = w.norm()
    if nw <= 1e-12 * max(float(nu), float(v.norm())):
        raise NbkitError("The two runs end on one line through the start point; they do not span a plane. "
                         "Pass runs that ended apart, or one run for random directions")
    return e1, w / nw


def plane_coordinates(points: torch.Tensor, origin: torch.Tensor, d1: torch.Tensor, d2: torch.Tensor) -> np.ndarray:
    """(n, 2) least-squares coordinates of `points` (n, P) in the plane origin + a·d1 + b·d2."""
    basis = torch.stack([d1, d2])                     # (2, P)
    gram = basis @ basis.T                            # (2, 2)
    rhs = (points - origin) @ basis.T                 # (n, 2)
    return torch.linalg.solve(gram, rhs.T).T.numpy()


def grid_range(coordinates: np.ndarray, base: tuple, margin: float) -> tuple[float, float]:
    low, high = min(base[0], coordinates.min(initial=base[0])), max(base[1], coordinates.max(initial=base[1]))
    span = high - low
    return low - margin * span, high + margin * span


def evaluate_plane(model, step_fn, batch, names, origin, d1, d2, alpha, beta, progress=True) -> np.ndarray:
    """loss[j, i] = step_fn(model at origin + alpha[i]·d1 + beta[j]·d2, batch); `model` is overwritten."""
    params = dict(model.named_parameters())
    shapes = [(params[n], params[n].numel()) for n in names]
    out = np.full((len(beta), len(alpha)), np.nan)
    bar = None
    if progress:
        bar = tqdm(total=out.size, unit="point", desc="loss landscape", leave=False)
    model.eval()
    with torch.no_grad():
        for j, b in enumerate(beta):
            for i, a in enumerate(alpha):
                point = origin + float(a) * d1 + float(b) * d2
                offset = 0
                for p, n in shapes:
                    p.copy_(point[offset:offset + n].reshape(p.shape))
                    offset += n
                out[j, i] = float(step_fn(model, batch))
                if bar is not None:
                    bar.update(1)
    if bar is not None:
        bar.close()
    return out


def landscape_slice(model, step_fn, batch, runs: dict, resolution: int = 21, *, seed: int = 0, margin: float = 0.25,
                    progress: bool = True) -> LandscapeSlice:
    """The slice through the runs' shared start point; `runs` maps names to Recordings."""
    if not runs:
        raise NbkitError("landscape() needs at least one recording")
    if not isinstance(resolution, int) or resolution < 3:
        raise NbkitError(f"Invalid resolution: {resolution!r}; expected an integer >= 3 (points per axis)")
    recordings = list(runs.values())
    names = [t["name"] for t in recordings[0].meta["tensors"] if t["layer"] != "(optimizer only)"]
    origin_step, origin_state = shared_start(recordings, names)
    copy = copy_model(model)
    copy.load_state_dict(origin_state)
    origin = flat(origin_state, names)
    paths_raw = {}
    for name, run in runs.items():
        steps = [k for k in run.keyframes if k >= origin_step]
        paths_raw[name] = (np.array(steps), torch.stack([flat(run.keyframe(k)["model"], names) for k in steps]))
    pair = _spanning_pair(paths_raw, origin) if len(runs) >= 2 else None
    if pair is not None:
        first, second, d1, d2 = pair
        axes, labels, base = "end points", (f"towards the end of {first}", f"towards the end of {second} "
                                            "(orthogonalised)"), (0.0, 0.0)
    else:
        generator = torch.Generator().manual_seed(seed)
        d1 = filter_normalised_direction(origin_state, names, generator)
        d2 = filter_normalised_direction(origin_state, names, generator)
        axes, labels, base = "random filter-normalised directions", ("random direction 1", "random direction 2"), \
            (-1.0, 1.0)
    paths = {name: plane_coordinates(points, origin, d1, d2) for name, (steps, points) in paths_raw.items()}
    every = np.concatenate([p for p in paths.values()])
    alpha = np.linspace(*grid_range(every[:, 0], base, margin), resolution)
    beta = np.linspace(*grid_range(every[:, 1], base, margin), resolution)
    # put the origin exactly on the grid: shift the nearest grid line onto 0
    alpha -= alpha[np.abs(alpha).argmin()]
    beta -= beta[np.abs(beta).argmin()]
    loss = evaluate_plane(copy, step_fn, batch, names, origin, d1, d2, alpha, beta, progress)
    copy.load_state_dict(origin_state)
    with torch.no_grad():
        origin_loss = float(step_fn(copy.eval(), batch))
    return LandscapeSlice(alpha, beta, loss, origin_loss, origin_step, axes, labels, paths,
                          {name: steps for name, (steps, _) in paths_raw.items()})


def _spanning_pair(paths_raw: dict, origin: torch.Tensor):
    """(name, name, e1, e2) of the first two runs, in order, whose end points span a plane with the
    start (a bit-exact replay ends where its parent ends, so it cannot serve as the second axis);
    None when all end points lie on one line (random directions are used then)."""
    names = list(paths_raw)
    for i, first in enumerate(names):
        for second in names[i + 1:]:
            try:
                e1, e2 = orthonormal_axes(paths_raw[first][1][-1] - origin, paths_raw[second][1][-1] - origin)
            except NbkitError:
                continue
            return first, second, e1, e2
    return None


def shared_start(recordings: list, names: list[str]) -> tuple[int, dict]:
    """(step, model state) of the runs' shared start point: the latest first keyframe among them. Every
    recording holding a keyframe there must hold equal parameters; one without it must be the parent
    the others were replayed from (a replay from a step between the parent's keyframes)."""
    if not all(r.keyframes for r in recordings):
        raise NbkitError("A recording without keyframes has no start point; record with keyframes")
    step = max(r.keyframes[0] for r in recordings)
    holders = [r for r in recordings if step in r.keyframes]
    parents = {Path(str((r.meta.get("replay") or {}).get("parent"))).resolve() for r in holders}
    others_ok = all(r.path.resolve() in parents for r in recordings if step not in r.keyframes)
    states = [r.keyframe(step)["model"] for r in holders]
    if others_ok and all(torch.equal(states[0][n], s[n]) for s in states[1:] for n in names):
        return step, states[0]
    raise NbkitError(f"The recordings share no start point (no keyframe at step {step} with equal parameters in "
                     "all of them); pass replays of one run from one start, with or without that run")

"""Attaching a recorder: checks on the model, optimizer and path, the tensor table, the new recording's
metadata, the disk-space check and the folder (fresh, replaced or resumed)."""
from __future__ import annotations

import datetime
import inspect
import math
import os
import random
import shutil
import sys
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import torch

from nbkit.errors import RecorderError
from nbkit.measure import profiles
from nbkit.measure.step_stats import EXACT_QUANTITIES, SAMPLED_QUANTITIES
from nbkit.measure.update_rules import Adapter, step_count
from nbkit.record.options import SAMPLE_SIZE, RecordOptions
from nbkit.record.settings import setting_columns_of
from nbkit.store.files import is_recording
from nbkit.store.layout import OPTIMIZER_ONLY_LAYER, estimate_recording_bytes, new_meta
from nbkit.store.resume import ResumePlan, plan_resume
from nbkit.store.writer import RecordingWriter

SAMPLE_SEED = 20251201  # the recorder's private generator's seed: the same coordinates in every recording


@dataclass
class RecordedTensor:
    """One parameter tensor the recorder follows."""

    name: str
    param: torch.Tensor
    group: int
    index: torch.Tensor          # sampled flat coordinates; the first `probes` are the probes
    probes: int
    shape: tuple = ()            # the shape when recording started
    stopped: str | None = None   # why this tensor is no longer recorded
    units: profiles.UnitAxes | None = None           # where its profile's units are (None: no profile)
    profile_at: dict = field(default_factory=dict)   # axis -> (offset, units) in the stored profile arrays


def jsonable(value):
    """A parameter-group setting as JSON: tensors as numbers or lists, anything unknown as its repr."""
    if isinstance(value, torch.Tensor):
        return value.item() if value.numel() == 1 else value.tolist()
    if isinstance(value, (list, tuple)):
        return [jsonable(v) for v in value]
    if isinstance(value, dict):
        return {str(k): jsonable(v) for k, v in value.items()}
    if value is None or isinstance(value, (bool, int, float, str)):
        return value
    return repr(value)


def layer_of(name: str) -> str:
    """The layer owning a tensor: "encoder.0" for "encoder.0.weight"; optimizer-only tensors group{g}.{i}
    get OPTIMIZER_ONLY_LAYER."""
    if name.startswith("group") and name.split(".")[0][5:].isdigit() and name.count(".") == 1:
        return OPTIMIZER_ONLY_LAYER
    return name.rsplit(".", 1)[0] if "." in name else "(model)"


def check_attachable(model, optimizer, path) -> None:
    """The model and optimizer can be recorded into `path`; raises RecorderError saying what to fix."""
    if not isinstance(model, torch.nn.Module):
        raise RecorderError(f"model must be a torch.nn.Module, got {type(model).__name__}")
    if not isinstance(optimizer, torch.optim.Optimizer):
        raise RecorderError(f"optimizer must be a torch.optim.Optimizer, got {type(optimizer).__name__}")
    if not any(True for _ in model.parameters()):
        raise RecorderError(f"The model ({type(model).__name__}) has no parameters: there is nothing to record")
    if not any(len(g["params"]) for g in optimizer.param_groups):
        raise RecorderError("The optimizer holds no parameters: there is nothing to record")
    for parent in Path(path).resolve().parents:
        if is_recording(parent):
            raise RecorderError(f"{str(path)!r} is inside the recording {str(parent)!r}; choose a path outside it")


def tensor_table(model, optimizer, probes: int, generator: torch.Generator):
    """(tensors in model order, orphans, frozen): every tensor the optimizer holds, with its sampled
    coordinates drawn from `generator`; orphans require grad but are in no group; frozen do not."""
    names, order = {}, {}
    for position, (name, p) in enumerate(model.named_parameters()):
        names[id(p)] = name
        order[id(p)] = position
    tensors, in_optimizer = [], set()
    for g, group in enumerate(optimizer.param_groups):
        for i, p in enumerate(group["params"]):
            in_optimizer.add(id(p))
            n = p.numel()
            size = min(SAMPLE_SIZE, n)
            index = torch.randperm(n, generator=generator)[:size] if n > size else torch.randperm(n, generator=generator)
            tensors.append(RecordedTensor(names.get(id(p), f"group{g}.{i}"), p, g, index, min(probes, size),
                                          tuple(p.shape)))
    position = {id(t.param): order.get(id(t.param), len(order) + k) for k, t in enumerate(tensors)}
    tensors.sort(key=lambda t: position[id(t.param)])
    owners = {id(p): module for module in model.modules() for p in module.parameters(recurse=False)}
    offsets = dict.fromkeys(profiles.AXES, 0)
    for t in tensors:
        t.units = profiles.unit_axes(owners.get(id(t.param)), tuple(t.param.shape))
        if t.units is None:
            continue
        for axis, dim in (("rows", t.units.rows), ("columns", t.units.columns)):
            if dim is not None:
                t.profile_at[axis] = (offsets[axis], t.param.shape[dim])
                offsets[axis] += t.param.shape[dim]
    orphans = [n for n, p in model.named_parameters() if p.requires_grad and id(p) not in in_optimizer]
    frozen = [n for n, p in model.named_parameters() if not p.requires_grad and id(p) not in in_optimizer]
    return tensors, orphans, frozen


def probe_index(tensors: list[RecordedTensor], probes: int) -> np.ndarray:
    """(tensors, probes) int64 flat probe coordinates of each tensor, -1 where it has fewer."""
    index = np.full((len(tensors), probes), -1, dtype=np.int64)
    for k, t in enumerate(tensors):
        index[k, :t.probes] = t.index[:t.probes].numpy()
    return index


def recording_meta(model, optimizer, adapter: Adapter, tensors: list[RecordedTensor], orphans: list[str],
                   frozen: list[str], options: RecordOptions, compiled: bool = False) -> dict:
    """The metadata of a new recording of `model` and `optimizer` (schema: nbkit.store.layout.new_meta);
    compiled: the recorded forward passes ran through torch.compile (a replay on the plain model runs
    eager kernels, whose numerics differ)."""
    groups = []
    for group in optimizer.param_groups:
        settings = {k: jsonable(v) for k, v in group.items() if k != "params"}
        settings["params"] = [t.name for t in tensors if any(t.param is p for p in group["params"])]
        groups.append(settings)
    sampled = [t.name for t in tensors if t.param.numel() > SAMPLE_SIZE]
    columns, not_replayed = setting_columns_of(optimizer.param_groups)
    return new_meta(
        model_class=type(model).__name__,
        optimizer={"class": type(optimizer).__name__, "module": type(optimizer).__module__,
                   "adapter": adapter.name, "defaults": jsonable(optimizer.defaults),
                   "first_moment": adapter.first_moment, "second_moment": adapter.second_moment,
                   "notes": adapter.notes},
        gain_applicable=adapter.gain_applicable, param_groups=groups,
        tensors=[{"name": t.name, "shape": list(t.param.shape), "dtype": str(t.param.dtype).replace("torch.", ""),
                  "numel": t.param.numel(), "group": t.group, "layer": layer_of(t.name), "probes": t.probes,
                  "sample_size": len(t.index)} for t in tensors],
        probes=options.probes, options=options.as_meta(), orphans=orphans, frozen=frozen, compiled=compiled,
        batch_budget_bytes=options.batch_budget, criterion_spec=criterion_spec(options.criterion),
        **({"clip": {"max_norm": float(options.clip), "over": "model", "by": "nbkit.record(clip=...)"}}
           if options.clip is not None else {}),
        settings=[c.name for c in columns], settings_not_replayed=not_replayed,
        profiles=profile_meta(tensors, options),
        created=datetime.datetime.now(datetime.timezone.utc).isoformat(),
        torch_version=torch.__version__, numpy_version=np.__version__, python_version=sys.version.split()[0],
        threads=torch.get_num_threads(), interop_threads=torch.get_num_interop_threads(), pid=os.getpid(),
        statistics={"sample_size": SAMPLE_SIZE, "sample_seed": SAMPLE_SEED, "sampled_tensors": sampled,
                    "exact": EXACT_QUANTITIES, "sampled": SAMPLED_QUANTITIES,
                    "note": f"sampled quantities use a fixed seeded sample of {SAMPLE_SIZE} coordinates per "
                            "tensor (all coordinates of smaller tensors)"})


def profile_meta(tensors: list[RecordedTensor], options: RecordOptions) -> dict:
    """meta["profiles"]: the stored quantities and codes, each profiled tensor's units (offset and count
    per axis, and how its axes were found), why the others have none, and the checked unit names."""
    by_name = {t.name: t for t in tensors}
    names = {}
    for tensor, axes in (options.unit_names or {}).items():
        t = by_name.get(tensor)
        if t is None:
            raise RecorderError(f"unit_names names the tensor {tensor!r}, which is not recorded; recorded "
                                f"weights with a profile: {[t.name for t in tensors if t.profile_at][:20]}")
        if not t.profile_at:
            raise RecorderError(f"unit_names names {tensor!r}, which has no profile ({len(t.param.shape)}-D: only "
                                "weights of 2 or more dimensions have units)")
        if not isinstance(axes, dict) or not set(axes) <= set(profiles.AXES):
            raise RecorderError(f"unit_names[{tensor!r}] must be a dict with the keys \"rows\" and/or \"columns\", "
                                f"got {axes!r}")
        names[tensor] = {}
        for axis, labels in axes.items():
            if axis not in t.profile_at:
                raise RecorderError(f"unit_names[{tensor!r}] names {axis}, but {tensor!r} has no {axis} "
                                    f"({t.units.how})")
            labels = [str(x) for x in labels]
            units = t.profile_at[axis][1]
            if len(labels) != units:
                raise RecorderError(f"unit_names[{tensor!r}][{axis!r}] has {len(labels)} names, but {tensor!r} "
                                    f"has {units} {axis} (shape {tuple(t.param.shape)}); give one name per unit")
            names[tensor][axis] = labels
    if not options.profiles:
        return {"enabled": False, "tensors": {}, "unit_names": names}
    return {
        "enabled": True, "quantities": list(profiles.PROFILE_QUANTITIES), "log2_scale": profiles.LOG2_SCALE,
        "codes": {"missing": profiles.MISSING, "zero": profiles.ZERO, "nan": profiles.NAN,
                  "infinite": profiles.INFINITE},
        "units": {axis: sum(t.profile_at.get(axis, (0, 0))[1] for t in tensors) for axis in profiles.AXES},
        "tensors": {t.name: {**{axis: list(at) for axis, at in t.profile_at.items()}, "how": t.units.how}
                    for t in tensors if t.profile_at},
        "without": {t.name: f"{len(t.param.shape)}-D: no units" for t in tensors if not t.profile_at},
        "unit_names": names,
    }


def criterion_spec(criterion) -> dict | None:
    """How a replay makes the same criterion again: a torch.nn loss class and its constructor arguments
    (read back from the same-named attributes; tensors such as a class weight as lists); None for a
    criterion of another kind (a replay then needs step_fn)."""
    if criterion is None or not type(criterion).__module__.startswith("torch.nn.modules.loss"):
        return None
    arguments = {}
    for name in inspect.signature(type(criterion).__init__).parameters:
        if name in ("self", "size_average", "reduce") or not hasattr(criterion, name):
            continue
        value = getattr(criterion, name)
        if isinstance(value, torch.Tensor):
            value = {"tensor": value.tolist(), "dtype": str(value.dtype).removeprefix("torch.")}
        elif not (value is None or isinstance(value, (bool, int, float, str))):
            return None
        arguments[name] = value
    return {"class": type(criterion).__name__, "arguments": arguments}


def keyframe_state(step: int, model, optimizer, tensors: list[RecordedTensor]) -> dict:
    """What a keyframe at `step` holds: the model's and optimizer's state_dicts, the optimizer-only
    tensors by name, and the global random states (torch, numpy, python)."""
    return {
        "step": step,
        "model": model.state_dict(),
        "optimizer": optimizer.state_dict(),
        "extra_params": {t.name: t.param for t in tensors if layer_of(t.name) == OPTIMIZER_ONLY_LAYER},
        "rng": {"torch": torch.get_rng_state(), "numpy": np.random.get_state(), "python": random.getstate()},
    }


def check_disk(meta: dict, path: Path, expected_steps: int | None, adapter: Adapter) -> None:
    """Refuse to start when the estimated size for expected_steps exceeds the free disk space; the
    estimate goes into meta["size_estimate"]."""
    if expected_steps is None:
        return
    states = 1 + sum(m is not None for m in (adapter.first_moment, adapter.second_moment))
    estimate = estimate_recording_bytes(meta, expected_steps, state_copies=states)
    meta["size_estimate"] = estimate
    existing = next(p for p in (path.resolve(), *path.resolve().parents) if p.exists())
    free = shutil.disk_usage(existing).free
    if estimate["total"] > free:
        raise RecorderError(
            f"A recording of {expected_steps} steps at {str(path)!r} needs about "
            f"{estimate['total'] / 2**20:.0f} MiB ({estimate['rows'] / 2**20:.0f} MiB of rows, "
            f"{estimate['keyframes'] / 2**20:.0f} MiB of keyframes) but only {free / 2**20:.0f} MiB are free. "
            "Free disk space, record into another disk, or raise every / keyframe_every or lower probes")


def prepare_path(path: Path, optimizer, overwrite: bool, resume) -> ResumePlan | None:
    """Make the folder ready; with resume, return the plan for continuing the recording there."""
    if resume is not False and resume is not None and is_recording(path):
        if overwrite:
            raise RecorderError("Pass either resume=True or overwrite=True, not both")
        # resume=True: restart at the optimizer's own step count when it keeps one (Adam family),
        # else right after the last committed step; an int names the restart step explicitly.
        restart = None if resume is True else int(resume)
        if restart is None:
            counts = {step_count(s) for s in optimizer.state.values()}
            if len(counts) == 1 and math.isfinite(next(iter(counts))):
                restart = int(next(iter(counts)))
        try:
            return plan_resume(path, restart)
        except (OSError, ValueError, KeyError, TypeError) as exc:
            raise RecorderError(f"Cannot resume the recording at {str(path)!r}: it is damaged ({exc}); "
                                "nbkit.load() says what is readable; record into a new path") from exc
    if path.exists() and any(path.iterdir()):
        if not is_recording(path):
            raise RecorderError(f"{str(path)!r} exists and is not an nbkit recording; "
                                "choose an empty or new folder (nothing there was touched)")
        if not overwrite:
            raise RecorderError(f"A recording already exists at {str(path)!r}; pass overwrite=True to "
                                "replace it or resume=True to continue it")
        shutil.rmtree(path)
    try:
        path.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise RecorderError(f"Cannot create the recording folder {str(path)!r} ({type(exc).__name__}: {exc}); "
                            "choose a writable location") from exc
    return None


def open_writer(path: Path, meta: dict, options: RecordOptions, optimizer, adapter: Adapter,
                probe_index: np.ndarray) -> tuple[RecordingWriter, int | None]:
    """(the writer of a new or resumed recording at `path`, the next step of a resumed one or None).
    Checks the disk first (before an old recording may be replaced), then prepares the folder."""
    check_disk(meta, path, options.expected_steps, adapter)
    resume_plan = prepare_path(path, optimizer, options.overwrite, options.resume)
    if resume_plan is not None:         # resume: the old metadata is kept
        try:
            meta = resume_plan.merged_meta(meta)
        except ValueError as exc:
            raise RecorderError(f"Cannot resume the recording at {str(path)!r}: {exc}. Resume only with the "
                                "same model, optimizer and settings, or record into a new path") from None
    try:
        writer = RecordingWriter(path, meta, commit_seconds=options.commit_seconds, probe_index=probe_index,
                                 resume=resume_plan)
    except OSError as exc:
        raise RecorderError(f"Cannot write a recording at {str(path)!r} ({type(exc).__name__}: {exc}); "
                            "choose a writable folder with free space") from exc
    return writer, resume_plan.next_step if resume_plan is not None else None

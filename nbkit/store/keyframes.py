"""Keyframes: full model + optimizer + RNG state at one step, as safetensors plus JSON side data.

Nested state (optimizer state dicts, RNG tuples) is split into a JSON skeleton and a flat dict of
tensors; tensors that share memory (tied weights) are stored once and aliased in the skeleton,
because safetensors refuses shared storage. Reading never runs code from the files: safetensors
holds raw tensors and the skeleton is plain JSON.
"""
from __future__ import annotations

import os
import re
from pathlib import Path

import torch
from safetensors import SafetensorError
from safetensors.torch import load_file, save_file

from nbkit.errors import RecordingError
from nbkit.store.files import read_json, write_json_atomic
from nbkit.store.layout import KEYFRAME_DIR

_TENSOR, _TUPLE, _ITEMS = "__tensor__", "__tuple__", "__items__"


class Keyframe:
    """State copied on the training thread, to be written later by the writer thread."""

    def __init__(self, step: int, state: dict):
        self.step = step
        self.tensors: dict[str, torch.Tensor] = {}
        self._seen: dict[tuple, str] = {}
        self.skeleton = self._encode(state, "")

    def _encode(self, value, path):
        if isinstance(value, torch.Tensor):
            return {_TENSOR: self._tensor(value, path)}
        if isinstance(value, dict):
            if all(isinstance(k, str) for k in value):
                return {k: self._encode(v, f"{path}{k}.") for k, v in value.items()}
            return {_ITEMS: [[k, self._encode(v, f"{path}{k}.")] for k, v in value.items()]}
        if isinstance(value, tuple):
            return {_TUPLE: [self._encode(v, f"{path}{i}.") for i, v in enumerate(value)]}
        if isinstance(value, list):
            return [self._encode(v, f"{path}{i}.") for i, v in enumerate(value)]
        if hasattr(value, "tolist"):       # numpy arrays and scalars (numpy RNG state)
            return value.tolist()
        if value is None or isinstance(value, (bool, int, float, str)):
            return value
        raise TypeError(f"cannot store a {type(value).__name__} in a keyframe (at {path.rstrip('.')!r})")

    def _tensor(self, tensor: torch.Tensor, path: str) -> str:
        tensor = tensor.detach()
        identity = (tensor.untyped_storage().data_ptr(), tensor.storage_offset(),
                    tuple(tensor.shape), tuple(tensor.stride()), tensor.dtype)
        if identity in self._seen and tensor.numel() > 0:
            return self._seen[identity]              # a tied tensor: store once, alias here
        name = path.rstrip(".") or "value"
        self.tensors[name] = tensor.to("cpu", copy=True).contiguous()
        self._seen[identity] = name
        return name


def _decode(value, tensors):
    if isinstance(value, dict):
        if _TENSOR in value:
            return tensors[value[_TENSOR]]
        if _TUPLE in value:
            return tuple(_decode(v, tensors) for v in value[_TUPLE])
        if _ITEMS in value:
            return {k: _decode(v, tensors) for k, v in value[_ITEMS]}
        return {k: _decode(v, tensors) for k, v in value.items()}
    if isinstance(value, list):
        return [_decode(v, tensors) for v in value]
    return value


def keyframe_paths(root: Path, step: int) -> tuple[Path, Path]:
    folder = Path(root) / KEYFRAME_DIR
    return folder / f"{step:010d}.safetensors", folder / f"{step:010d}.json"


def write_keyframe(root: Path, keyframe: Keyframe) -> None:
    """Write tensors to a temporary name, rename, then the JSON (its presence marks completeness)."""
    tensor_path, json_path = keyframe_paths(root, keyframe.step)
    tensor_path.parent.mkdir(parents=True, exist_ok=True)
    tmp = tensor_path.with_name(f".{tensor_path.name}.tmp")
    save_file(keyframe.tensors, str(tmp), metadata={"step": str(keyframe.step)})
    os.replace(tmp, tensor_path)
    write_json_atomic(json_path, {"step": keyframe.step, "state": keyframe.skeleton,
                                  "bytes": tensor_path.stat().st_size})


def list_keyframes(root: Path) -> list[int]:
    folder = Path(root) / KEYFRAME_DIR
    if not folder.is_dir():
        return []
    steps = []
    for entry in os.listdir(folder):
        match = re.fullmatch(r"(\d{10})\.json", entry)
        if match and (folder / f"{match.group(1)}.safetensors").exists():
            steps.append(int(match.group(1)))
    return sorted(steps)


def keyframe_bytes(root: Path, step: int) -> int:
    tensor_path, json_path = keyframe_paths(root, step)
    return tensor_path.stat().st_size + json_path.stat().st_size


def delete_keyframe(root: Path, step: int) -> None:
    tensor_path, json_path = keyframe_paths(root, step)
    json_path.unlink(missing_ok=True)              # JSON first: the keyframe stops being listed
    tensor_path.unlink(missing_ok=True)


def read_keyframe(root: Path, step: int) -> dict:
    """The state dict stored at `step`: {"model": ..., "optimizer": ..., "rng": ..., ...}."""
    tensor_path, json_path = keyframe_paths(root, step)
    if not json_path.exists():
        available = list_keyframes(root)
        raise RecordingError(f"No keyframe at step {step} in {str(root)!r}; keyframes exist at steps {available}")
    try:
        side = read_json(json_path)
    except (OSError, ValueError) as exc:
        raise RecordingError(f"Keyframe side file {str(json_path)!r} is not valid JSON ({exc}); "
                             "the keyframe cannot be used, pick another one") from exc
    try:
        tensors = load_file(str(tensor_path))
    except (SafetensorError, OSError, ValueError, RuntimeError) as exc:
        raise RecordingError(f"Keyframe file {str(tensor_path)!r} is not a valid safetensors file ({exc}); "
                             "nothing in it was executed. Pick another keyframe.") from exc
    try:
        return _decode(side["state"], tensors)
    except (KeyError, TypeError) as exc:
        raise RecordingError(f"Keyframe {str(json_path)!r} does not match its tensors ({exc!r})") from exc


def thin_keyframes(root: Path, budget_bytes: int, kept_recent: int) -> list[int]:
    """Keep step 0 and the newest `kept_recent` keyframes; delete every second older one while the
    keyframes exceed `budget_bytes`. Returns the deleted steps."""
    steps = list_keyframes(root)
    sizes = {s: keyframe_bytes(root, s) for s in steps}
    thinned = []
    while sum(sizes.values()) > budget_bytes:
        older = steps[1:-kept_recent]
        if not older:
            break
        for s in older[1::2] or older[:1]:
            delete_keyframe(root, s)
            thinned.append(s)
            sizes.pop(s)
        steps = sorted(sizes)
    return thinned

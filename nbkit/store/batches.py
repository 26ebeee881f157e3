"""Kept steps: what one optimizer step fed the model, so a replay can run it without the data loader.

A kept step is a list of micro-batches ({"args", "kwargs", "targets"}, nested tuples, lists and dicts
of tensors, numpy arrays and plain scalars) plus RNG states, the autocast settings, one loss scale per
micro-batch, a source and extra notes. The tree is split into a JSON spec and one flat buffer per
dtype; a group of consecutive steps is one safetensors file, with the JSON in its metadata. Reading never runs code from
the files: safetensors holds raw tensors and the spec is plain JSON, decoded by the rules below.
"""
from __future__ import annotations

import hashlib
import json
import math
import os
import re
import tempfile
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import torch
from safetensors import SafetensorError, safe_open
from safetensors.torch import save_file

from nbkit.errors import RecordingError

BATCH_DIR = "batches"
KEPT_FORMAT = 1
# The one metadata entry: a safetensors header's __metadata__ maps strings to strings only
# (safetensors format documentation), so all the JSON goes in one string.
_METADATA_KEY = "nbkit.kept_step"

# The leaf dtypes a kept step holds, and the dtype of the buffer that stores each. bfloat16 is kept
# as its raw uint16 bits so readers without bfloat16 can still load the file (safetensors.numpy maps
# U16 to numpy but has no BF16: its _TYPES table); bool as uint8, so every buffer is a plain number.
_STORED = {torch.float16: torch.float16, torch.float32: torch.float32, torch.float64: torch.float64,
           torch.bfloat16: torch.uint16, torch.bool: torch.uint8, torch.int8: torch.int8,
           torch.int16: torch.int16, torch.int32: torch.int32, torch.int64: torch.int64,
           torch.uint8: torch.uint8}
_DTYPES = {str(d).removeprefix("torch."): d for d in _STORED}
# JSON numbers exclude NaN and Infinity (RFC 8259, section 6): these floats are kept as strings
_NONFINITE = {"nan", "inf", "-inf"}


class UnstorableLeaf(ValueError):
    """A leaf of a kept step that cannot be stored without pickle; the step is not kept."""

    def __init__(self, path: str, what: str):
        self.path, self.what = path, what
        super().__init__(f"cannot keep the batch leaf at {path or 'the top level'} ({what}); this step is not kept")


def encode(tree) -> tuple[dict, dict[str, torch.Tensor]]:
    """Split `tree` into a JSON-able spec and one flat 1-D buffer per dtype tag (fresh copies).

    A dense tensor (contiguous, channels_last, any permutation of a contiguous layout) is stored in its
    memory order and decodes with the same strides. A tensor that is not dense (an expanded or sliced
    view, a numpy array with negative strides) is stored compacted and decodes contiguous. Mappings
    (OrderedDict, BatchEncoding) decode as plain dicts and tuple subclasses (namedtuples) as plain
    tuples; their type names stay in the spec. Raises UnstorableLeaf for anything else.
    """
    pieces: dict[str, list] = {}                # tag -> [(spec node, flat values)]: offsets come last
    spec = _encode(tree, "", pieces)
    buffers = {}
    for tag, leaves in pieces.items():
        offset = 0
        for node, flat in leaves:
            node["offset"], offset = offset, offset + flat.numel()
        # np.concatenate always allocates, so the buffers are copies the training loop cannot change; it is
        # one plain memcpy on the calling thread (torch.cat right after an optimizer step waits for its
        # intra-op threads to wake: 5 x slower here); numpy has no bfloat16, so the stored dtype's view
        stored = _STORED[_DTYPES[tag]]
        buffers[tag] = torch.from_numpy(np.concatenate([flat.view(stored).resolve_neg().numpy() for _, flat in leaves]))
    return spec, buffers


def _encode(value, path: str, pieces: dict) -> dict:
    if isinstance(value, torch.Tensor):
        return _tensor(value, path, pieces, "torch.Tensor")
    if isinstance(value, (np.ndarray, np.generic)):
        return _ndarray(value, path, pieces)
    if isinstance(value, Mapping):
        keys = [_scalar(k, f"{path}[{k!r}]", key=True) for k in value]
        node = {"kind": "dict", "keys": keys,
                "values": [_encode(v, f"{path}[{k!r}]", pieces) for k, v in value.items()]}
        return node if type(value) is dict else {**node, "type": type(value).__name__}
    if isinstance(value, (tuple, list)):
        node = {"kind": "tuple" if isinstance(value, tuple) else "list",
                "items": [_encode(v, f"{path}[{i}]", pieces) for i, v in enumerate(value)]}
        return node if type(value) in (tuple, list) else {**node, "type": type(value).__name__}
    return _scalar(value, path)


def _scalar(value, path: str, key: bool = False) -> dict:
    if value is None:
        return {"kind": "none"}
    if isinstance(value, bool):                 # before int: bool is an int subclass
        return {"kind": "bool", "value": value}
    if isinstance(value, int):
        return {"kind": "int", "value": int(value)}
    if isinstance(value, str):
        return {"kind": "str", "value": str(value)}
    if isinstance(value, float) and not key:
        return {"kind": "float", "value": float(value) if math.isfinite(value) else str(value)}
    raise UnstorableLeaf(path, f"a dict key of type {_type_name(value)}" if key else f"a value of type {_type_name(value)}")


def _type_name(value) -> str:
    return f"{type(value).__module__}.{type(value).__qualname__}".removeprefix("builtins.")


def _tensor(tensor: torch.Tensor, path: str, pieces: dict, kind: str) -> dict:
    what = (f"of layout {tensor.layout}" if tensor.layout != torch.strided else
            "that is nested" if tensor.is_nested else
            "that is quantized" if tensor.is_quantized else
            "on the meta device (it holds no values)" if tensor.device.type == "meta" else
            f"of dtype {tensor.dtype}" if tensor.dtype not in _STORED else None)
    if what:
        raise UnstorableLeaf(path, f"a tensor of type {_type_name(tensor)} {what}")
    tag = str(tensor.dtype).removeprefix("torch.")
    order = _memory_order(tensor)               # of the original: a copy to the CPU may change strides
    values = tensor.detach().to("cpu")
    flat = (values.permute(order) if order is not None else values).reshape(-1)
    node = {"kind": "tensor", "type": kind, "dtype": tag, "buffer": tag, "offset": None, "numel": flat.numel(),
            "shape": list(tensor.shape), "strides": list(tensor.stride()), "dense": order is not None,
            "requires_grad": tensor.requires_grad, "device": str(tensor.device)}
    pieces.setdefault(tag, []).append((node, flat))
    return node


def _ndarray(value, path: str, pieces: dict) -> dict:
    array = np.asarray(value)
    if not array.flags.writeable or any(s < 0 for s in array.strides):
        array = array.copy()   # from_numpy refuses negative strides, warns on read-only; the copy is compact
    try:
        tensor = torch.from_numpy(array)
    except (TypeError, ValueError):
        tensor = None                           # object, string, non-native byte order ...
    if tensor is None or tensor.dtype not in _STORED:
        raise UnstorableLeaf(path, f"a numpy array of dtype {array.dtype}")
    return _tensor(tensor, path, pieces, "numpy scalar" if isinstance(value, np.generic) else "numpy.ndarray")


def _memory_order(tensor: torch.Tensor) -> list[int] | None:
    """The dims from the largest stride to the smallest when that order is contiguous (the tensor is
    dense and non-overlapping); None for views with gaps or repeats."""
    order = sorted(range(tensor.dim()), key=lambda d: -tensor.stride(d))
    return order if tensor.permute(order).is_contiguous() else None


def decode(spec: dict, buffers: dict[str, torch.Tensor], device=None):
    """The tree `encode` split into `spec` and `buffers`, tensors on CPU (or `device`; never on the
    recorded device by itself). Every tensor is a fresh allocation, so none aliases another or the
    buffers and each can be modified freely: views of the buffers would be cheaper, but they keep the
    whole buffer alive and cannot take the recorded strides. Numpy leaves come back as numpy, on CPU."""
    kind = spec["kind"]
    if kind == "tensor":
        return _decode_tensor(spec, buffers, device)
    if kind == "dict":
        pairs = zip(spec["keys"], spec["values"], strict=True)
        return {decode(k, buffers): decode(v, buffers, device) for k, v in pairs}
    if kind in ("tuple", "list"):
        items = [decode(v, buffers, device) for v in spec["items"]]
        return tuple(items) if kind == "tuple" else items
    if kind == "float":
        value = spec["value"]
        if isinstance(value, str) and value not in _NONFINITE:
            raise ValueError(f"a float stored as {value!r}")
        return float(value)
    if kind == "none":
        return None
    types = {"bool": bool, "int": int, "str": str}
    if kind not in types or type(spec["value"]) is not types[kind]:   # `is`: True is no int here
        raise ValueError(f"a spec node {spec!r} that is no kept leaf")
    return spec["value"]


def _decode_tensor(spec: dict, buffers: dict, device) -> torch.Tensor | np.ndarray:
    dtype, buffer = _DTYPES[spec["dtype"]], buffers[spec["buffer"]]
    shape, offset, numel = [int(n) for n in spec["shape"]], int(spec["offset"]), int(spec["numel"])
    if (buffer.dtype != _STORED[dtype] or buffer.dim() != 1 or math.prod(shape) != numel
            or not 0 <= offset <= len(buffer) - numel):
        raise ValueError(f"tensor {spec!r} does not fit buffer {spec['buffer']!r} "
                         f"({buffer.dtype}, {buffer.numel()} values)")
    numpy = spec["type"] != "torch.Tensor"
    device = "cpu" if numpy or device is None else device
    out = (torch.empty_strided(shape, spec["strides"], dtype=dtype, device=device) if spec["dense"]
           else torch.empty(shape, dtype=dtype, device=device))
    order = _memory_order(out) or list(range(len(shape)))
    out.permute(order).copy_(buffer[offset:offset + numel].view(dtype).view([shape[d] for d in order]))
    if spec["type"] == "numpy scalar":
        return out.numpy()[()]
    return out.numpy() if numpy else out.requires_grad_(bool(spec["requires_grad"]))


def layout_signature(spec: dict) -> str:
    """A short digest of what a replay's code sees: structure, keys, dtypes, ranks and scalar types.
    Steps whose batches differ only in dim sizes (ragged sequence lengths) or values share it."""
    return hashlib.sha256(json.dumps(_layout(spec), sort_keys=True).encode()).hexdigest()[:16]


def _layout(node):
    if isinstance(node, list):
        return [_layout(n) for n in node]
    if not isinstance(node, dict):
        return node
    if node.get("kind") == "tensor":
        return {"kind": "tensor", "type": node["type"], "dtype": node["dtype"], "rank": len(node["shape"]),
                "requires_grad": node["requires_grad"], "device": node["device"]}
    if node.get("kind") in ("none", "bool", "int", "float", "str"):
        return {"kind": node["kind"]}
    keys = node.get("keys")                     # dict keys are structure: their values stay
    return {k: (keys if k == "keys" else _layout(v)) for k, v in node.items()}


@dataclass
class KeptStep:
    """One optimizer step's inputs: micro-batches, RNG states (name -> uint8 CPU tensor), autocast
    settings, one loss scale per micro-batch (None: unscaled), where the batches came from, notes."""

    step: int
    micro_batches: list
    rng: dict = field(default_factory=dict)
    autocast: dict = field(default_factory=dict)
    scales: list = field(default_factory=list)
    source: str = ""
    extra: dict = field(default_factory=dict)

    def pack(self) -> "PackedStep":
        return pack_kept_step(self)


@dataclass(frozen=True)
class PackedStep:
    """A kept step copied on the training thread, to be written later by the writer thread: the spec,
    the buffers and RNG tensors (copies the training loop cannot change) and the metadata JSON."""

    spec: dict
    buffers: dict
    rng: dict
    metadata: str


def pack_kept_step(kept: KeptStep) -> PackedStep:
    """Copy everything `kept` holds; raises UnstorableLeaf, or ValueError for side data that is no JSON."""
    if len(kept.scales) != len(kept.micro_batches):
        raise ValueError(f"step {kept.step}: {len(kept.scales)} scales for {len(kept.micro_batches)} micro-batches")
    for name, state in kept.rng.items():
        if not (isinstance(name, str) and isinstance(state, torch.Tensor) and state.dtype == torch.uint8):
            raise ValueError(f"step {kept.step}: RNG state {name!r} is not a uint8 tensor")
    spec, buffers = encode(list(kept.micro_batches))
    scales = [None if s is None else _scalar(float(s), "")["value"] for s in kept.scales]
    try:
        metadata = json.dumps({"kept_format": KEPT_FORMAT, "step": kept.step, "spec": spec, "autocast": kept.autocast,
                               "scales": scales, "source": str(kept.source), "extra": kept.extra}, allow_nan=False)
    except (TypeError, ValueError) as exc:
        raise ValueError(f"step {kept.step}: autocast and extra must be plain JSON ({exc}); "
                         "the step is not kept") from exc
    rng = {name: state.detach().to("cpu", copy=True).contiguous() for name, state in kept.rng.items()}
    return PackedStep(spec, buffers, rng, metadata)


# One file holds a group of consecutive kept steps, <first>-<last>.safetensors: a file per step costs
# the writer a file creation each step (about 0.2 ms of CPU here), a group costs it once.
_GROUP_FILE = re.compile(r"(\d{10})-(\d{10})\.safetensors")


def group_path(root: Path, first: int, last: int) -> Path:
    return Path(root) / BATCH_DIR / f"{first:010d}-{last:010d}.safetensors"


def _groups(root: Path) -> list[tuple[int, int, Path]]:
    """(first, last, path) of every group file, by first step; temporary files are ignored."""
    folder = Path(root) / BATCH_DIR
    if not folder.is_dir():
        return []
    found = [(int(m.group(1)), int(m.group(2))) for e in os.listdir(folder) if (m := _GROUP_FILE.fullmatch(e))]
    return [(a, b, group_path(root, a, b)) for a, b in sorted(found)]


def kept_step_path(root: Path, step: int) -> Path:
    """The file that holds `step` (a group of consecutive steps), or where a step alone would go."""
    for first, last, path in _groups(root):
        if first <= step <= last:
            return path
    return group_path(root, step, step)


def write_packed_steps(root: Path, items: list[tuple[int, PackedStep]]) -> int:
    """Write consecutive steps [(step, packed), ...] as one group file: a temporary name in the same
    folder, then a rename into place. Returns the file's bytes."""
    steps = [step for step, _ in items]
    if not steps or steps != list(range(steps[0], steps[0] + len(steps))):
        raise ValueError(f"a group file holds consecutive steps, got {steps}")
    path = group_path(root, steps[0], steps[-1])
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    os.close(fd)
    tensors = {}
    for step, packed in items:
        tensors.update({f"{step}.buffer.{tag}": buffer for tag, buffer in packed.buffers.items()})
        tensors.update({f"{step}.rng.{name}": state for name, state in packed.rng.items()})
    # each step's metadata is already JSON: joined, not encoded again
    side = "{" + ", ".join(f'"{step}": {packed.metadata}' for step, packed in items) + "}"
    try:
        save_file(tensors, tmp, metadata={_METADATA_KEY: side})
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return path.stat().st_size


def write_packed_step(root: Path, step: int, packed: PackedStep) -> int:
    return write_packed_steps(root, [(step, packed)])


def _read_group(path: Path, what: str, step: int | None = None) -> tuple[dict, dict]:
    """(metadata by step, tensors by name) of one group file, only `step`'s tensors when it is given;
    RecordingError when the file is damaged."""
    prefix = "" if step is None else f"{step}."
    try:
        with safe_open(str(path), framework="pt") as handle:
            side = json.loads((handle.metadata() or {})[_METADATA_KEY])
            tensors = {name: handle.get_tensor(name) for name in handle.keys() if name.startswith(prefix)}
    except (SafetensorError, OSError, ValueError, KeyError, RuntimeError) as exc:
        raise RecordingError(f"Kept batches of {what} in {str(path)!r} are damaged ({exc!r}); "
                             "nothing in it was executed. The step cannot be replayed from its batches.") from exc
    return side, tensors


def _step_tensors(tensors: dict, step: int) -> tuple[dict, dict]:
    """(buffers by tag, RNG states by name) of `step` among a group file's tensors."""
    named = {kind: {} for kind in ("buffer.", "rng.")}
    for name, tensor in tensors.items():
        head, _, rest = name.partition(".")
        kind, _, key = rest.partition(".")
        if head == str(step) and kind + "." in named:
            named[kind + "."][key] = tensor
    return named["buffer."], named["rng."]


def _packed_steps(path: Path) -> dict[int, PackedStep]:
    """Every step of one group file as PackedStep, from one read of the file (to write it again)."""
    side, tensors = _read_group(path, f"the group {path.name}")
    return {int(step): PackedStep(meta["spec"], *_step_tensors(tensors, int(step)), json.dumps(meta))
            for step, meta in side.items()}


def write_kept_step(root: Path, step: int, kept: KeptStep) -> int:
    """Keep (or replace) one step; a step inside a group file is replaced there."""
    path = kept_step_path(root, step)
    if not path.is_file():
        return write_packed_step(root, step, pack_kept_step(kept))
    packed = _packed_steps(path)
    packed[step] = pack_kept_step(kept)
    return write_packed_steps(root, sorted(packed.items()))


def read_kept_step(root: Path, step: int) -> KeptStep:
    """The step kept at `step`, tensors on CPU; RecordingError when it is missing or damaged."""
    path = kept_step_path(root, step)
    if not path.is_file():
        steps = kept_steps(root)
        held = f"{len(steps)} steps are kept, from step {steps[0]} to {steps[-1]}" if steps else "no steps are kept"
        raise RecordingError(f"No kept batches for step {step} in {str(Path(root) / BATCH_DIR)!r}; {held}")
    side, tensors = _read_group(path, f"step {step}", step)
    try:
        side = side[str(step)]
        if side["kept_format"] != KEPT_FORMAT or side["step"] != step:
            raise ValueError(f"format {side['kept_format']!r} of step {side['step']!r}")
        buffers, rng = _step_tensors(tensors, step)
        scales = [None if s is None else float(s) for s in side["scales"]]
        return KeptStep(step, decode(side["spec"], buffers), rng, side["autocast"], scales, side["source"],
                        side["extra"])
    except (KeyError, TypeError, ValueError, RuntimeError, IndexError) as exc:
        raise RecordingError(f"Kept batches of step {step} in {str(path)!r} do not match their spec ({exc!r}); "
                             "nothing in it was executed.") from exc


def kept_steps(root: Path) -> list[int]:
    return [step for first, last, _ in _groups(root) for step in range(first, last + 1)]


def kept_bytes(root: Path) -> int:
    return sum(path.stat().st_size for _, _, path in _groups(root))


def delete_kept_steps(root: Path, steps) -> None:
    """Forget `steps`: a group file wholly among them is deleted, one partly among them is rewritten
    with the steps that stay (the writer deletes whole groups: they never span a keyframe)."""
    doomed = set(steps)
    for first, last, path in _groups(root):
        inside = [s for s in range(first, last + 1) if s in doomed]
        if not inside:
            continue
        packed = _packed_steps(path)
        items = [(s, packed[s]) for s in range(first, last + 1) if s not in doomed]
        path.unlink(missing_ok=True)
        run: list = []
        for item in items:                        # the steps that stay, in consecutive runs
            if run and item[0] != run[-1][0] + 1:
                write_packed_steps(root, run)
                run = []
            run.append(item)
        if run:
            write_packed_steps(root, run)


def windows(steps: list[int], keyframes: list[int]) -> list[tuple[int, int]]:
    """The replayable windows (first, last), inclusive: a replay starts at a keyframe k whose step is
    kept and runs while the following steps are kept. Keyframes in one run of consecutive kept steps
    give one window, from the first of them."""
    kept, starts, found = set(steps), set(keyframes), []
    for first in sorted(kept):
        if first - 1 in kept:
            continue                            # not the start of a consecutive run
        last = first
        while last + 1 in kept:
            last += 1
        keyed = [k for k in starts if first <= k <= last]
        if keyed:
            found.append((min(keyed), last))
    return found

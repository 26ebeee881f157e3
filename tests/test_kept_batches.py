"""Kept steps (nbkit.store.batches): the tree encoding, its layout signature, the files and the windows."""
import json
import math
import random
import warnings
from collections import OrderedDict, namedtuple

import numpy as np
import pytest
import torch
from safetensors.torch import load_file, save_file

from nbkit.errors import RecordingError
from nbkit.store import batches
from nbkit.store.batches import (BATCH_DIR, KeptStep, UnstorableLeaf, decode, delete_kept_steps, encode, kept_bytes,
                                 kept_step_path, kept_steps, layout_signature, pack_kept_step, read_kept_step,
                                 windows, write_kept_step, write_packed_step)

Pair = namedtuple("Pair", "left right")
STORED_AS = {torch.bfloat16: torch.uint16, torch.bool: torch.uint8}
DTYPES = [torch.float16, torch.float32, torch.float64, torch.bfloat16, torch.int8, torch.int16, torch.int32,
          torch.int64, torch.uint8, torch.bool]


def sample(dtype, *shape, seed=0):
    generator = torch.Generator().manual_seed(seed)
    if dtype == torch.bool:
        return torch.rand(*shape, generator=generator) > 0.5
    if dtype.is_floating_point:
        return torch.randn(*shape, generator=generator).to(dtype)
    low = 0 if dtype == torch.uint8 else -100
    return torch.randint(low, 100, shape, generator=generator, dtype=dtype)


def round_trip(tree, device=None):
    spec, buffers = encode(tree)
    json.dumps(spec, allow_nan=False)          # the spec must be plain JSON
    return decode(spec, buffers, device), spec, buffers


def micro_batch(length, seed=0):
    return {"args": (sample(torch.int64, 2, length, seed=seed),),
            "kwargs": {"attention_mask": sample(torch.bool, 2, length, seed=seed)},
            "targets": (sample(torch.int64, 2, length, seed=seed + 1),)}


def assert_same_tree(got, expected):
    """Two kept micro-batch lists hold equal tensors in the same places."""
    flat_got, flat_expected = torch.utils._pytree.tree_flatten(got), torch.utils._pytree.tree_flatten(expected)
    assert flat_got[1] == flat_expected[1]
    for a, b in zip(flat_got[0], flat_expected[0]):
        assert torch.equal(a, b) if isinstance(b, torch.Tensor) else a == b


def kept(step, micro_batches, **side):
    return KeptStep(step, micro_batches, side.get("rng", {"cpu": torch.get_rng_state()}),
                    side.get("autocast", {"enabled": False}), side.get("scales", [None] * len(micro_batches)),
                    side.get("source", "test loader"), side.get("extra", {}))


# --- the tree encoding -------------------------------------------------------------------------------

@pytest.mark.parametrize("dtype", DTYPES, ids=str)
def test_every_supported_dtype_round_trips_through_one_buffer_of_its_tag(dtype):
    tree = [sample(dtype, 3, 4), {"b": sample(dtype, 5, seed=1)}]
    out, spec, buffers = round_trip(tree)
    tag = str(dtype).removeprefix("torch.")
    assert list(buffers) == [tag]
    assert buffers[tag].dtype == STORED_AS.get(dtype, dtype) and buffers[tag].dim() == 1
    assert buffers[tag].numel() == tree[0].numel() + tree[1]["b"].numel()
    if dtype == torch.bfloat16:                # the raw bits, unchanged
        assert torch.equal(buffers[tag][:12], tree[0].reshape(-1).view(torch.uint16))
    for original, decoded in [(tree[0], out[0]), (tree[1]["b"], out[1]["b"])]:
        assert decoded.dtype == dtype and torch.equal(decoded, original)
    assert spec["items"][0]["dtype"] == spec["items"][0]["buffer"] == tag


@pytest.mark.parametrize("make", [lambda: torch.randn(2, 3, 4, 5).to(memory_format=torch.channels_last),
                                  lambda: torch.randn(4, 6).t(),
                                  lambda: torch.randn(2, 1, 3).permute(2, 1, 0)],
                         ids=["channels_last", "transposed", "permuted with a size-1 dim"])
def test_a_dense_tensor_decodes_with_its_strides(make):
    tensor = make()
    assert not tensor.is_contiguous()
    out, spec, buffers = round_trip([tensor])
    assert spec["items"][0]["dense"] is True
    assert out[0].stride() == tensor.stride() and torch.equal(out[0], tensor)
    in_memory = tensor.as_strided((tensor.numel(),), (1,))    # the storage, read in address order
    assert torch.equal(buffers["float32"], in_memory)


def test_views_that_are_not_dense_are_stored_compacted_and_decode_contiguous():
    base = torch.randn(6, 8)
    views = [base[::2, 1:5], base[:, 3], torch.randn(3, 1).expand(3, 4), base.t()[2:5]]
    out, spec, buffers = round_trip(views)
    for view, decoded, leaf in zip(views, out, spec["items"]):
        assert torch.equal(decoded, view) and decoded.is_contiguous()
        assert leaf["strides"] == list(view.stride()) and leaf["dense"] is False
    assert buffers["float32"].numel() == sum(view.numel() for view in views)
    _, spec, buffers = round_trip([base[2:4]])            # dense, inside a bigger storage
    assert spec["items"][0]["dense"] is True and torch.equal(buffers["float32"], base[2:4].reshape(-1))


def test_zero_dimensional_and_empty_tensors_round_trip():
    tree = (torch.tensor(2.5), torch.tensor(7), torch.zeros(0, 4), torch.ones(3, 0, 2, dtype=torch.int32),
            torch.zeros(0, dtype=torch.bfloat16))
    out, _, _ = round_trip(tree)
    for original, decoded in zip(tree, out):
        assert decoded.shape == original.shape and decoded.dtype == original.dtype
        assert torch.equal(decoded, original)


def test_numpy_arrays_and_scalars_decode_as_numpy_of_the_same_dtype():
    tree = {"f": np.arange(12, dtype=np.float32).reshape(3, 4), "i": np.arange(5, dtype=np.int16),
            "b": np.array([True, False]), "fortran": np.asfortranarray(np.random.rand(3, 5)),
            "reversed": np.arange(6)[::-1], "frozen": np.arange(4, dtype=np.uint8),
            "scalar": np.float32(1.5), "flag": np.bool_(True)}
    tree["frozen"].flags.writeable = False
    out, _, _ = round_trip(tree)
    for key, original in tree.items():
        assert type(out[key]) is type(original) and out[key].dtype == original.dtype
        assert np.array_equal(out[key], original)
    assert out["fortran"].strides == tree["fortran"].strides
    assert out["frozen"].flags.writeable


def test_nested_containers_with_mixed_key_types_decode_as_plain_containers():
    tree = [{"args": (Pair(torch.ones(2), "x"), [1, 2.5, None]),
             "kwargs": OrderedDict(labels=torch.arange(3)),
             "targets": {0: torch.zeros(1), "a": True, True: "yes", None: -3, 5: {"deep": [()]}}}]
    out, spec, _ = round_trip(tree)
    targets = out[0]["targets"]
    assert [(type(k), k) for k in targets] == [(type(k), k) for k in tree[0]["targets"]]
    assert type(out[0]["kwargs"]) is dict and torch.equal(out[0]["kwargs"]["labels"], torch.arange(3))
    assert type(out[0]["args"][0]) is tuple and out[0]["args"][0][1] == "x"
    assert out[0]["args"][1] == [1, 2.5, None] and type(out[0]["args"][1][0]) is int
    assert targets["a"] is True and targets[True] == "yes" and targets[None] == -3 and targets[5] == {"deep": [()]}
    batch = spec["items"][0]["values"]
    assert batch[0]["items"][0]["type"] == "Pair" and batch[1]["type"] == "OrderedDict"


def test_nonfinite_floats_and_negative_zero_round_trip():
    values = [float("nan"), float("inf"), float("-inf"), -0.0, 1e-310, 3.25]
    out, _, _ = round_trip(values)
    assert math.isnan(out[0]) and out[1:3] == values[1:3] and out[4:] == values[4:]
    assert math.copysign(1.0, out[3]) == -1.0
    assert all(type(v) is float for v in out)


def test_decoded_tensors_are_fresh_and_writable():
    a, b = torch.arange(4.0), torch.arange(4.0, 8.0)
    spec, buffers = encode([a, b, np.arange(3.0)])
    first = decode(spec, buffers)
    first[0].add_(100)
    first[2] += 100
    buffers["float32"].zero_()
    assert torch.equal(first[1], b)             # no alias of a neighbour or of the buffer
    assert first[0].untyped_storage().data_ptr() != first[1].untyped_storage().data_ptr()
    assert torch.equal(first[0], a + 100) and np.array_equal(first[2], np.arange(3.0) + 100)


def test_decode_puts_tensors_on_the_given_device_and_numpy_stays_on_the_cpu():
    out, spec, buffers = round_trip([torch.ones(2, 3), np.ones(2)])
    assert spec["items"][0]["device"] == "cpu"
    moved = decode(spec, buffers, device="meta")
    assert moved[0].device.type == "meta" and moved[0].shape == (2, 3)
    assert isinstance(moved[1], np.ndarray) and np.array_equal(moved[1], np.ones(2))


def test_requires_grad_is_recorded_and_restored():
    weight = torch.randn(3, requires_grad=True)
    out, spec, _ = round_trip({"w": weight, "x": torch.randn(3)})
    assert spec["values"][0]["requires_grad"] is True and out["w"].requires_grad and not out["x"].requires_grad
    assert torch.equal(out["w"].detach(), weight.detach())


# --- unstorable leaves -------------------------------------------------------------------------------

def quantized():
    with warnings.catch_warnings():             # torch deprecates quantized tensors; users may still pass one
        warnings.simplefilter("ignore", UserWarning)
        return torch.quantize_per_tensor(torch.randn(4), 0.1, 0, torch.qint8)


@pytest.mark.parametrize("tree, path, what", [
    (lambda: [micro_batch(3), {"kwargs": {"mask": torch.zeros(2, dtype=torch.complex64)}}],
     "[1]['kwargs']['mask']", "torch.complex64"),
    (lambda: [{"args": (torch.ones(1), 3, torch.float32)}], "[0]['args'][2]", "torch.dtype"),
    (lambda: [{"targets": {7: [object()]}}], "[0]['targets'][7][0]", "object"),
    (lambda: {"s": torch.eye(3).to_sparse()}, "['s']", "sparse_coo"),
    (lambda: ({"q": quantized()},), "[0]['q']", "quantized"),
    (lambda: [torch.empty(2, device="meta")], "[0]", "meta"),
    (lambda: [{None: np.array(["a", "b"])}], "[0][None]", "numpy array of dtype <U1"),
    (lambda: [{(1, 2): 0}], "[0][(1, 2)]", "dict key of type tuple"),
    (lambda: {1.5: 0}, "[1.5]", "dict key of type float"),
    (lambda: b"raw", "", "bytes"),
], ids=["complex", "dtype", "object", "sparse", "quantized", "meta", "numpy strings", "tuple key", "float key", "top"])
def test_an_unstorable_leaf_names_its_path_and_type(tree, path, what):
    with pytest.raises(UnstorableLeaf) as caught:
        encode(tree())
    assert isinstance(caught.value, ValueError) and caught.value.path == path
    message = str(caught.value)
    assert (path or "the top level") in message and what in message and "not kept" in message


# --- layout signatures -------------------------------------------------------------------------------

def test_ragged_micro_batches_round_trip_and_share_a_signature_with_other_lengths():
    step = [micro_batch(5), micro_batch(9, seed=3)]
    out, spec, _ = round_trip(step)
    for original, decoded in zip(step, out):
        assert torch.equal(decoded["args"][0], original["args"][0])
        assert torch.equal(decoded["kwargs"]["attention_mask"], original["kwargs"]["attention_mask"])
    other, _ = encode([micro_batch(2, seed=7), micro_batch(31, seed=8)])
    assert layout_signature(spec) == layout_signature(other)
    assert layout_signature(spec) == layout_signature(json.loads(json.dumps(spec)))


def with_scalar(value):
    return [{"args": (torch.ones(2, 3),), "kwargs": {"n": value}, "targets": ()}]


@pytest.mark.parametrize("first, second", [
    ([micro_batch(4)], [micro_batch(4), micro_batch(4)]),
    ([micro_batch(4)], [{**micro_batch(4), "kwargs": {"mask": micro_batch(4)["kwargs"]["attention_mask"]}}]),
    ([micro_batch(4)], [{**micro_batch(4), "args": (sample(torch.int32, 2, 4),)}]),
    ([micro_batch(4)], [{**micro_batch(4), "args": (sample(torch.int64, 2, 4, 1),)}]),
    (with_scalar(3), with_scalar(3.0)),
    (with_scalar(None), with_scalar("none")),
    ([{"targets": (1, 2)}], [{"targets": [1, 2]}]),
    ([{"targets": {0: 1}}], [{"targets": {"0": 1}}]),
    ([torch.ones(2)], [np.ones(2, dtype=np.float32)]),
], ids=["micro-batch count", "key", "dtype", "rank", "int vs float", "None vs str", "tuple vs list",
        "key type", "tensor vs numpy"])
def test_the_signature_changes_with_structure(first, second):
    assert layout_signature(encode(first)[0]) != layout_signature(encode(second)[0])


def test_the_signature_ignores_scalar_values_and_memory_layout():
    dense = torch.randn(2, 3, 4, 5)
    assert layout_signature(encode(with_scalar(3))[0]) == layout_signature(encode(with_scalar(-8))[0])
    assert (layout_signature(encode([dense])[0])
            == layout_signature(encode([dense.to(memory_format=torch.channels_last)])[0])
            == layout_signature(encode([dense[:, :, ::2]])[0]))


# --- files -------------------------------------------------------------------------------------------

def test_a_kept_step_round_trips_through_its_file(tmp_path):
    torch.manual_seed(4)
    step = kept(12, [micro_batch(5), micro_batch(8, seed=2)], scales=[0.5, None],
                autocast={"enabled": True, "dtype": "bfloat16", "device_type": "cpu"},
                extra={"accumulation": 2, "note": ["a", 1]}, source="DataLoader(shuffle=True)")
    size = write_kept_step(tmp_path, 12, step)
    path = tmp_path / BATCH_DIR / "0000000012-0000000012.safetensors"
    assert kept_step_path(tmp_path, 12) == path and size == path.stat().st_size
    back = read_kept_step(tmp_path, 12)
    assert back.step == 12 and back.scales == [0.5, None] and back.source == step.source
    assert back.autocast == step.autocast and back.extra == step.extra
    assert set(back.rng) == {"cpu"} and torch.equal(back.rng["cpu"], torch.get_rng_state())
    assert back.rng["cpu"].dtype == torch.uint8
    for original, decoded in zip(step.micro_batches, back.micro_batches):
        assert torch.equal(decoded["targets"][0], original["targets"][0])
        assert decoded["kwargs"]["attention_mask"].dtype == torch.bool
    stored = load_file(str(path))
    assert set(stored) == {"12.buffer.int64", "12.buffer.bool", "12.rng.cpu"}
    assert stored["12.buffer.bool"].dtype == torch.uint8


def test_pack_copies_so_later_changes_to_the_inputs_are_not_written(tmp_path):
    inputs, labels, state = torch.arange(6.0).reshape(2, 3), torch.arange(2), torch.get_rng_state()
    snapshot = (inputs.clone(), labels.clone(), state.clone())
    batch = {"args": (inputs,), "kwargs": {}, "targets": (inputs[0], labels)}    # labels: alone in its buffer
    packed = pack_kept_step(kept(3, [batch], rng={"cpu": state}))
    for tensor in (inputs, labels, state):
        tensor.zero_()                          # the training loop reuses its tensors
    write_packed_step(tmp_path, 3, packed)
    back = read_kept_step(tmp_path, 3)
    assert torch.equal(back.micro_batches[0]["args"][0], snapshot[0])
    assert torch.equal(back.micro_batches[0]["targets"][0], snapshot[0][0])
    assert torch.equal(back.micro_batches[0]["targets"][1], snapshot[1])
    assert torch.equal(back.rng["cpu"], snapshot[2])
    assert layout_signature(packed.spec) == layout_signature(kept(3, [batch]).pack().spec)


def test_nonfinite_scales_are_kept(tmp_path):
    write_kept_step(tmp_path, 0, kept(0, [micro_batch(2), micro_batch(2)], scales=[float("inf"), float("nan")]))
    scales = read_kept_step(tmp_path, 0).scales
    assert scales[0] == float("inf") and math.isnan(scales[1])


@pytest.mark.parametrize("side, problem", [
    ({"scales": [1.0, 1.0]}, "2 scales for 1 micro-batches"),
    ({"rng": {"cpu": torch.zeros(4)}}, "RNG state 'cpu'"),
    ({"extra": {"dtype": torch.float16}}, "plain JSON"),
    ({"autocast": {"scale": float("nan")}}, "plain JSON"),
])
def test_side_data_that_cannot_be_kept_is_refused_when_packed(side, problem):
    with pytest.raises(ValueError, match=problem):
        pack_kept_step(kept(1, [micro_batch(2)], **side))


def test_the_write_is_atomic_and_temporary_files_are_not_steps(tmp_path, monkeypatch):
    write_kept_step(tmp_path, 5, kept(5, [micro_batch(3)]))
    assert sorted(p.name for p in (tmp_path / BATCH_DIR).iterdir()) == ["0000000005-0000000005.safetensors"]
    before = kept_step_path(tmp_path, 5).read_bytes()

    def interrupted(tensors, filename, metadata=None):
        save_file(tensors, filename, metadata)  # a partial file under the temporary name ...
        raise KeyboardInterrupt                 # ... then the writer dies before the rename

    monkeypatch.setattr(batches, "save_file", interrupted)
    with pytest.raises(KeyboardInterrupt):
        write_kept_step(tmp_path, 5, kept(5, [micro_batch(9)]))
    assert sorted(p.name for p in (tmp_path / BATCH_DIR).iterdir()) == ["0000000005-0000000005.safetensors"]
    assert kept_step_path(tmp_path, 5).read_bytes() == before
    (tmp_path / BATCH_DIR / ".0000000006.safetensors.abc.tmp").write_bytes(b"partial")
    assert kept_steps(tmp_path) == [5]


def test_a_damaged_file_is_refused_without_running_anything(tmp_path):
    write_kept_step(tmp_path, 7, kept(7, [micro_batch(3)]))
    path = kept_step_path(tmp_path, 7)
    path.write_bytes(path.read_bytes()[:40])
    with pytest.raises(RecordingError, match="nothing in it was executed") as caught:
        read_kept_step(tmp_path, 7)
    assert "step 7" in str(caught.value) and str(path) in str(caught.value)


@pytest.mark.parametrize("metadata", [
    {"nbkit.kept_step": "{not json"},
    {"other": "{}"},
    {"nbkit.kept_step": json.dumps({"kept_format": 1, "step": 8, "spec": {"kind": "tensor", "type": "torch.Tensor",
                                    "dtype": "float32", "buffer": "float32", "offset": 2, "numel": 4, "shape": [4],
                                    "strides": [1], "dense": True, "requires_grad": False, "device": "cpu"},
                                    "autocast": {}, "scales": [], "source": "", "extra": {}})},
    {"nbkit.kept_step": json.dumps({"kept_format": 1, "step": 8, "spec": {"kind": "__reduce__", "value": "os.system"},
                                    "autocast": {}, "scales": [], "source": "", "extra": {}})},
    {"nbkit.kept_step": json.dumps({"kept_format": 1, "step": 9, "spec": {"kind": "list", "items": []},
                                    "autocast": {}, "scales": [], "source": "", "extra": {}})},
], ids=["bad JSON", "no kept-step entry", "offset past the buffer", "unknown node kind", "another step's file"])
def test_a_file_whose_json_does_not_fit_is_refused(tmp_path, metadata):
    path = kept_step_path(tmp_path, 8)
    path.parent.mkdir(parents=True)
    save_file({"buffer.float32": torch.zeros(5)}, str(path), metadata=metadata)
    with pytest.raises(RecordingError, match="nothing in it was executed") as caught:
        read_kept_step(tmp_path, 8)
    assert "step 8" in str(caught.value) and str(path) in str(caught.value)


def test_a_missing_step_names_the_file_and_the_kept_range(tmp_path):
    with pytest.raises(RecordingError, match="no steps are kept"):
        read_kept_step(tmp_path, 3)
    for step in (4, 9, 20):
        write_kept_step(tmp_path, step, kept(step, [micro_batch(2)]))
    with pytest.raises(RecordingError) as caught:
        read_kept_step(tmp_path, 10)
    message = str(caught.value)
    assert "step 10" in message and str(tmp_path / BATCH_DIR) in message
    assert "3 steps are kept, from step 4 to 20" in message


def test_delete_and_kept_bytes(tmp_path):
    assert kept_steps(tmp_path) == [] and kept_bytes(tmp_path) == 0
    sizes = {step: write_kept_step(tmp_path, step, kept(step, [micro_batch(step + 1)])) for step in (0, 1, 2, 5)}
    assert kept_steps(tmp_path) == [0, 1, 2, 5] and kept_bytes(tmp_path) == sum(sizes.values())
    delete_kept_steps(tmp_path, [1, 5, 99])
    assert kept_steps(tmp_path) == [0, 2] and kept_bytes(tmp_path) == sizes[0] + sizes[2]


# --- windows -----------------------------------------------------------------------------------------

@pytest.mark.parametrize("steps, keyframes, expected", [
    ([0, 1, 2, 3], [0], [(0, 3)]),
    ([0, 1, 2, 3], [2], [(2, 3)]),
    ([0, 1, 2, 3], [1, 3], [(1, 3)]),            # keyframes in one run merge
    ([0, 1, 3, 4, 5, 9], [0, 3, 9], [(0, 1), (3, 5), (9, 9)]),
    ([1, 2, 3, 6, 7], [0, 5], []),               # a keyframe whose step is not kept starts nothing
    ([1, 2, 3, 6, 7], [0, 2, 7, 8], [(2, 3), (7, 7)]),
    ([], [0, 1], []),
], ids=["one run", "late keyframe", "merge", "gaps", "keyframes not kept", "mixed", "nothing kept"])
def test_windows(steps, keyframes, expected):
    assert windows(steps, keyframes) == expected


def replayed_windows(steps, keyframes):
    """The definition, step by step: replay from each kept keyframe while steps are kept, then merge."""
    runs = []
    for k in sorted(keyframes):
        last = k - 1
        while last + 1 in steps:
            last += 1
        if last >= k and not (runs and runs[-1][1] == last):
            runs.append((k, last))
    return runs


def test_windows_agree_with_a_step_by_step_replay():
    rng = random.Random(0)
    for _ in range(200):
        steps = sorted(rng.sample(range(40), rng.randint(0, 40)))
        keyframes = rng.sample(range(40), rng.randint(0, 8))
        assert windows(rng.sample(steps, len(steps)), keyframes) == replayed_windows(set(steps), keyframes)


def test_a_group_file_holds_consecutive_steps_and_each_reads_back_alone(tmp_path):
    """The writer keeps steps in groups (one file creation for many steps): each step of a group reads
    back alone, replacing one rewrites the group, deleting some splits it into consecutive runs."""
    from nbkit.store.batches import delete_kept_steps, kept_steps, pack_kept_step, write_packed_steps

    steps = {s: kept(s, [micro_batch(s % 3 + 1)]) for s in range(20, 26)}
    write_packed_steps(tmp_path, [(s, pack_kept_step(k)) for s, k in steps.items()])
    assert [p.name for p in (tmp_path / BATCH_DIR).iterdir()] == ["0000000020-0000000025.safetensors"]
    assert kept_steps(tmp_path) == list(range(20, 26))
    for s, expected in steps.items():
        assert_same_tree(read_kept_step(tmp_path, s).micro_batches, expected.micro_batches)
    write_kept_step(tmp_path, 22, kept(22, [micro_batch(7)]))
    assert_same_tree(read_kept_step(tmp_path, 22).micro_batches, kept(22, [micro_batch(7)]).micro_batches)
    assert_same_tree(read_kept_step(tmp_path, 23).micro_batches, steps[23].micro_batches)
    delete_kept_steps(tmp_path, [21, 22])
    assert kept_steps(tmp_path) == [20, 23, 24, 25]
    assert sorted(p.name for p in (tmp_path / BATCH_DIR).iterdir()) == [
        "0000000020-0000000020.safetensors", "0000000023-0000000025.safetensors"]
    assert_same_tree(read_kept_step(tmp_path, 24).micro_batches, steps[24].micro_batches)
    with pytest.raises(ValueError, match="consecutive"):
        write_packed_steps(tmp_path, [(30, pack_kept_step(steps[20])), (32, pack_kept_step(steps[20]))])

"""The batch fingerprint keeps its recorded layout: recordings made before a change must still replay.

`first_layout` is the fingerprint as it was first written (the layout in the module docstring of
nbkit.measure.fingerprint), kept here as the reference of the stored format."""
import collections
import warnings
import zlib

import numpy as np
import pytest
import torch
from torch.utils._pytree import tree_flatten

from nbkit.measure.fingerprint import fingerprint, matches
from nbkit.measure.fingerprint import FINGERPRINT_WIDTH


def first_layout(*values):
    out = np.full(FINGERPRINT_WIDTH, np.nan)
    tensors = [t for t in tree_flatten(values)[0] if isinstance(t, torch.Tensor)]
    if not tensors:
        return out
    description = ";".join(f"{tuple(t.shape)}:{t.dtype}" for t in tensors)
    out[0], out[1], out[2] = len(tensors), sum(t.numel() for t in tensors), zlib.crc32(description.encode())
    total = 0.0
    for t in tensors:
        t = t.detach()
        total += float(t.sum(dtype=torch.float64) if not t.is_complex() else t.abs().sum(dtype=torch.float64))
    out[3] = total
    first = tensors[0].detach().reshape(-1)
    if first.numel():
        sample = first[::max(1, first.numel() // 16)][:16]
        out[4:4 + sample.numel()] = sample.to(torch.float64).numpy()
    return out


generator = torch.Generator().manual_seed(0)
image = torch.randn(8, 3, 5, 7, generator=generator)
Pair = collections.namedtuple("Pair", "x y")
CASES = {
    "contiguous float32": ((image,), {}),
    "channels-last view (not contiguous)": ((image.permute(0, 2, 3, 1),), {}),
    "transposed matrix": (torch.randn(40, 30, generator=generator).t(),),
    "int64 targets": (torch.randint(0, 10, (64,), generator=generator),),
    "fewer elements than samples": (torch.tensor([1.5, -2.0, 3.25]),),
    "a scalar": (torch.tensor(7.0),),
    "empty": (torch.zeros(0, 4),),
    "bool mask and half": ((torch.rand(33, generator=generator) > 0.5, torch.randn(5).half()), {}),
    "requires grad": (torch.randn(6, 6, generator=generator, requires_grad=True),),
    "complex": (torch.randn(20, dtype=torch.complex64, generator=generator),),
    "nested containers": ((Pair(image[:2], {"mask": torch.ones(3)}), [torch.arange(5)]), {"k": torch.ones(2)}),
    "no tensors": ((1, "a"), {}),
}


@pytest.mark.parametrize("case", list(CASES))
def test_fingerprint_equals_the_first_recorded_layout(case):
    values = CASES[case]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")                  # complex -> float64 drops the imaginary part
        expected, seen = first_layout(*values), fingerprint(*values)
    np.testing.assert_array_equal(seen, expected)
    assert seen.dtype == np.float64 and seen.shape == (FINGERPRINT_WIDTH,)


def test_different_batches_give_different_fingerprints():
    a = torch.randn(64, 10, generator=generator)
    b = a.clone()
    b[63, 9] += 1.0                                      # one element not in the strided sample
    assert matches(fingerprint((a,)), [fingerprint((a.clone(),))])
    assert not matches(fingerprint((a,)), [fingerprint((b,))])
    assert not matches(fingerprint((a,)), [fingerprint((a[1:],))])


def test_fingerprints_match_more_or_fewer_passes_over_one_batch():
    from nbkit.measure.fingerprint import combine, fingerprint, matches

    one = fingerprint(torch.arange(6.0))
    other = fingerprint(torch.arange(6.0) + 1)
    assert matches(one, [one]) and matches(one, [one, one, one])           # a closure optimizer evaluates more
    assert matches(combine([one] * 4), [one])                             # ... or the recording did
    assert matches(combine([one, other]), [one, other])                   # gradient accumulation
    assert not matches(one, [other]) and not matches(combine([one, other]), [one])


def test_the_fingerprints_short_path_flattens_like_torch_pytree():
    """Oracle: torch.utils._pytree.tree_flatten, which the fingerprint used before its short path."""
    from torch.utils._pytree import tree_flatten

    from nbkit.measure.fingerprint import _tensors

    a, b, c = torch.randn(3), torch.arange(4), torch.ones(2, 2)
    for value in [((a,), {}), ((a, [b, {"z": c, "y": a}]), {"k": b}), ({"b": a, "a": [c, 3, None]},)]:
        found = []
        assert _tensors(value, found)
        expected = [t for t in tree_flatten(value)[0] if isinstance(t, torch.Tensor)]
        assert len(found) == len(expected) and all(x is y for x, y in zip(found, expected))

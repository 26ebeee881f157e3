"""The module tree (nbkit.analyze.module_tree) and robust colour limits (nbkit.analyze.scales)."""
from __future__ import annotations

import numpy as np
import pytest

from nbkit.analyze.module_tree import block_name, block_rows, build_tree, row_tensor, row_values, tree_rows
from nbkit.analyze.scales import normalise_rows, robust_limits


def resnet18_names():
    """torchvision's resnet18().named_parameters() names, 62 tensors (written out, no torchvision)."""
    names = ["conv1.weight", "bn1.weight", "bn1.bias"]
    for layer in range(1, 5):
        for unit in range(2):
            p = f"layer{layer}.{unit}"
            names += [f"{p}.conv1.weight", f"{p}.bn1.weight", f"{p}.bn1.bias",
                      f"{p}.conv2.weight", f"{p}.bn2.weight", f"{p}.bn2.bias"]
            if layer > 1 and unit == 0:
                names += [f"{p}.downsample.0.weight", f"{p}.downsample.1.weight", f"{p}.downsample.1.bias"]
    return names + ["fc.weight", "fc.bias"]


def gpt2_names(layers=2):
    names = ["transformer.wte.weight", "transformer.wpe.weight"]
    for k in range(layers):
        p = f"transformer.h.{k}"
        names += [f"{p}.{m}" for m in ("ln_1.weight", "ln_1.bias", "attn.c_attn.weight", "attn.c_attn.bias",
                                       "attn.c_proj.weight", "attn.c_proj.bias", "ln_2.weight", "ln_2.bias",
                                       "mlp.c_fc.weight", "mlp.c_fc.bias", "mlp.c_proj.weight", "mlp.c_proj.bias")]
    return names + ["transformer.ln_f.weight", "transformer.ln_f.bias"]


def test_resnet18_labels_are_distinct_and_keep_the_block():
    names = resnet18_names()
    assert len(names) == 62
    tree = build_tree(names)
    labels = [tree.label(k) for k in range(len(names))]
    assert len(set(labels)) == 62
    assert "layer3.0 · downsample.0.weight" in labels
    assert [b.name for b in tree.blocks][:4] == ["conv1", "bn1", "layer1.0", "layer1.1"]
    assert len(tree.blocks) == 3 + 8   # conv1, bn1, fc and eight residual units
    # every label ends with the tensor's own name after the block: nothing cut away
    for k, name in enumerate(names):
        block, rest = labels[k].split(" · ")
        assert f"{block}.{rest}" == name


def test_gpt2_labels_keep_the_transformer_prefix():
    tree = build_tree(gpt2_names())
    assert tree.label(0) == "transformer.wte · weight"
    assert tree.label(2) == "transformer.h.0 · ln_1.weight"
    assert block_name("encoder.layers.encoder_layer_2.mlp.0.weight") == "encoder.layers.encoder_layer_2"
    assert block_name("weight") == "weight"


def test_collapsed_blocks_expand_and_filter_narrows():
    names = resnet18_names()
    tree = build_tree(names)
    rows = tree_rows(tree)
    assert len(rows) == len(tree.blocks)
    assert rows[2].label == "▸ layer1.0 (6)" and rows[2].tensor is None
    expanded = tree_rows(tree, {"layer3.0"})
    assert len(expanded) == len(rows) + 9   # the collapsed row becomes a header and 9 tensors
    header = [r for r in expanded if r.label.startswith("▾")]
    assert header[0].label == "▾ layer3.0"
    assert [names[r.tensor] for r in tree_rows(tree, text="DOWNSAMPLE.0")] == \
        [f"layer{k}.0.downsample.0.weight" for k in (2, 3, 4)]
    assert tree_rows(tree, text="no-such-thing") == []


def test_block_aggregates_median_max_and_worst():
    tree = build_tree(["a.0.w", "a.0.b", "a.0.c", "head.w"])
    values = np.array([[1.0, 1.0], [2.0, 50.0], [3.0, np.nan], [7.0, 8.0]])
    rows = tree_rows(tree)
    assert len(rows) == 2
    assert row_values(rows, tree, values, "max").tolist() == [[3.0, 50.0], [7.0, 8.0]]
    assert row_values(rows, tree, values, "median").tolist() == [[2.0, 25.5], [7.0, 8.0]]
    assert row_values(rows, tree, values, "worst")[0].tolist() == [2.0, 50.0]
    assert row_tensor(rows[0], tree, values) == 1
    # low is worse for cosines
    assert row_tensor(rows[0], tree, -values, "grad_cosine") == 1
    signed = np.array([[1.0, -9.0], [-4.0, 2.0], [np.nan, np.nan], [0.0, 0.0]])
    assert row_values(rows, tree, signed, "largest")[0].tolist() == [-4.0, -9.0]
    with pytest.raises(ValueError, match="aggregate"):
        row_values(rows, tree, values, "mean")
    assert [r.label for r in block_rows(tree, [0, 3])] == ["a.0 (3)", "head · w"]


def test_robust_limits_ignore_one_extreme_value():
    values = np.full((20, 50), 1e-3)
    values[:, ::2] = 2e-3
    values[0, 0] = 1e3                                     # one class-token outlier
    limits = robust_limits(values, log=True)
    assert limits.high < 1e-2 and limits.above and not limits.below
    assert limits.extend == "max"
    assert robust_limits(np.full((2, 2), np.nan)) is None
    signed = robust_limits(np.linspace(-1, 0.5, 101), symmetric=True)
    assert signed.low == -signed.high


def test_normalise_rows_maps_each_row_to_its_own_range():
    values = np.array([[1.0, 2.0, 3.0], [100.0, 200.0, 300.0], [5.0, 5.0, 5.0], [np.nan] * 3])
    out = normalise_rows(values)
    assert np.allclose(out[0], out[1])
    assert out[0, 0] < 0.05 and out[0, 2] > 0.95
    assert np.allclose(out[2], 0.5) and np.isnan(out[3]).all()

"""The module tree the views order tensors by: blocks of tensors, their labels and aggregates.

Pure functions on names and arrays (no drawing). A *block* is the first module in a tensor's
name whose last part is a position in a container (`layer3.0`, `transformer.h.11`,
`encoder.layers.encoder_layer_2`): the repeated unit of a deep network. A tensor with no such part
belongs to its layer (`conv1`, `fc`, `transformer.wte`). A tensor's *label* is its block, " · ",
and the rest of its name (`layer3.0 · downsample.0.weight`), so no two labels read alike and no
prefix is cut away.
"""
from __future__ import annotations

import re
import warnings
from dataclasses import dataclass, field

import numpy as np

AGGREGATES = ("median", "max", "worst")     # how a collapsed block's row is made from its tensors
SEPARATOR = " · "
# quantities where a low value is the bad one (a gradient turning against its predecessor)
LOW_IS_WORSE = {"grad_cosine", "update_grad_cosine"}
_POSITION = re.compile(r"^(\d+|.*_\d+)$")   # "0", "11", "encoder_layer_2"


@dataclass(frozen=True)
class Block:
    """One block of the module tree.

    name: the block's module path ("layer3.0"); tensors: positions of its tensors in the
    recording's tensor list, in model order; labels: one label per tensor, as the views show it.
    """
    name: str
    tensors: tuple[int, ...]
    labels: tuple[str, ...]


@dataclass(frozen=True)
class Row:
    """One drawn row. block: position of its block in the tree; tensor: the tensor's position in
    the recording (None for a collapsed block or an expanded block's header); label: the text."""
    block: int
    tensor: int | None
    label: str


@dataclass(frozen=True)
class ModuleTree:
    """Blocks in model order (a block's first tensor decides its place)."""
    blocks: tuple[Block, ...]
    names: tuple[str, ...] = field(default=())

    def block_of(self, tensor: int) -> int:
        for b, block in enumerate(self.blocks):
            if tensor in block.tensors:
                return b
        raise ValueError(f"tensor position {tensor} is in no block of this tree ({len(self.names)} tensors)")

    def label(self, tensor: int) -> str:
        block = self.blocks[self.block_of(tensor)]
        return block.labels[block.tensors.index(tensor)]


def block_name(tensor: str, layer: str | None = None) -> str:
    """The block of `tensor`: the shortest module prefix ending in a container position, else its
    layer (the module owning it), else the name without its last part."""
    parts = tensor.split(".")
    for k in range(1, len(parts) - 1):
        if _POSITION.match(parts[k]):
            return ".".join(parts[:k + 1])
    if layer:
        return layer
    return ".".join(parts[:-1]) if len(parts) > 1 else tensor


def build_tree(tensors: list[str], layers: dict[str, list[str]] | None = None) -> ModuleTree:
    """The module tree of `tensors` (names in model order); `layers` is run.layers (layer -> tensors)."""
    layer_of = {t: layer for layer, members in (layers or {}).items() for t in members}
    order: dict[str, list[int]] = {}
    for k, name in enumerate(tensors):
        order.setdefault(block_name(name, layer_of.get(name)), []).append(k)
    blocks = []
    for name, members in order.items():
        labels = []
        for k in members:
            tensor = tensors[k]
            rest = tensor[len(name) + 1:] if tensor.startswith(name + ".") else tensor
            labels.append(f"{name}{SEPARATOR}{rest}" if rest != tensor else tensor)
        blocks.append(Block(name, tuple(members), tuple(labels)))
    return ModuleTree(tuple(blocks), tuple(tensors))


def tree_rows(tree: ModuleTree, expanded: set[str] | frozenset = frozenset(), text: str = "") -> list[Row]:
    """The rows to draw: a block of one tensor is that tensor's row; a collapsed block is one row
    ("▸ name (n)"); an expanded one is a header ("▾ name") and its tensors. With `text`, only the
    tensors whose name holds it (case-insensitive) are rows, each with its label; [] when none does."""
    rows = []
    needle = text.strip().lower()
    for b, block in enumerate(tree.blocks):
        if needle:
            rows += [Row(b, k, label) for k, label in zip(block.tensors, block.labels)
                     if needle in tree.names[k].lower()]
        elif len(block.tensors) == 1:
            rows.append(Row(b, block.tensors[0], block.labels[0]))
        elif block.name in expanded:
            rows.append(Row(b, None, f"▾ {block.name}"))
            rows += [Row(b, k, "· " + label.split(SEPARATOR, 1)[-1]) for k, label in zip(block.tensors, block.labels)]
        else:
            rows.append(Row(b, None, f"▸ {block.name} ({len(block.tensors)})"))
    return rows


def worst_tensor(values: np.ndarray, quantity: str) -> int:
    """Position (in `values`' first axis) of the tensor with the most extreme values over the columns:
    the highest 99th percentile, or the lowest 1st percentile where a low value is the bad one.
    values: (tensors, columns). All-NaN tensors are never the worst unless every one is."""
    with np.errstate(all="ignore"):

        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            if quantity in LOW_IS_WORSE:
                score = -np.nanpercentile(values, 1, axis=1)
            else:
                score = np.nanpercentile(values, 99, axis=1)
    score = np.where(np.isfinite(score), score, -np.inf)
    return int(np.argmax(score))


def row_values(rows: list[Row], tree: ModuleTree, values: np.ndarray, how: str = "max",
               quantity: str = "") -> np.ndarray:
    """(rows, columns) values of the drawn rows from (tensors, columns) `values`: a tensor row is its
    tensor; a block row (collapsed, or an expanded header) aggregates its tensors column by column:
    "median", "max" (NaN ignored; NaN where all are), "worst" (the row of worst_tensor) or "largest"
    (per column the value of largest magnitude, sign kept: for maps of differences)."""
    if how not in (*AGGREGATES, "largest"):
        raise ValueError(f"Unknown aggregate {how!r}; choose one of {', '.join(AGGREGATES)}")
    out = np.full((len(rows), values.shape[1]), np.nan)

    for r, row in enumerate(rows):
        if row.tensor is not None:
            out[r] = values[row.tensor]
            continue
        members = values[list(tree.blocks[row.block].tensors)]
        if how == "worst":
            out[r] = members[worst_tensor(members, quantity)]
            continue
        if how == "largest":
            size = np.where(np.isfinite(members), np.abs(members), -1.0)
            pick = members[np.argmax(size, axis=0), np.arange(members.shape[1])]
            out[r] = np.where(size.max(axis=0) >= 0, pick, np.nan)
            continue
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)       # all-NaN columns stay NaN
            out[r] = np.nanmedian(members, axis=0) if how == "median" else np.nanmax(members, axis=0)
    return out


def row_tensor(row: Row, tree: ModuleTree, values: np.ndarray | None = None, quantity: str = "") -> int:
    """The tensor a row stands for: its own, or for a block row the block's worst tensor (its first
    without values)."""
    if row.tensor is not None:
        return row.tensor
    members = list(tree.blocks[row.block].tensors)
    if values is None:
        return members[0]
    return members[worst_tensor(values[members], quantity)]


def tree_order(tree: ModuleTree) -> list[int]:
    """Tensor positions in tree order (blocks in model order, each block's tensors together)."""
    return [k for block in tree.blocks for k in block.tensors]


def block_rows(tree: ModuleTree, tensors: list[int]) -> list[Row]:
    """One collapsed row per block holding any of `tensors` (positions), in tree order; for maps
    too dense to show every tensor."""
    wanted = set(tensors)
    return [Row(b, None, block.labels[0] if len(block.tensors) == 1 else f"{block.name} ({len(block.tensors)})")
            for b, block in enumerate(tree.blocks) if wanted.intersection(block.tensors)]

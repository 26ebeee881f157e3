"""The recording's layout: file and array names, chunking, the metadata schema and one step row.

The one owner of these facts: the writer, the reader, the synthetic recordings and the size estimate
all take them from here. A recording directory holds

    nbkit.json            META_FILE: what the recording is (new_meta below)
    committed.json        COMMITTED_FILE: rows safely on disk, published after the data
    keyframes/            KEYFRAME_DIR: <step>.safetensors + <step>.json
    step, loss, lr, heavy, fingerprint          one row per optimizer step (STEP_CHUNK rows a chunk)
    grad_norm, clip_factor, rng_digest          per step (meta["backward_stats"]): the pre-clip gradient
                          norm, post-clip ÷ pre-clip norm, CRC32 of the CPU RNG state at the step's first
                          training forward; tensor_grad_norm (steps, tensors) the pre-clip norm per tensor
    batches/              kept steps (nbkit.store.batches): <step>.safetensors each
    settings              (steps, groups, settings) float64: every numeric group setting, in
                          meta["settings"] order (tuples split: betas.0, betas.1; setting_name)
    q/<quantity>          (steps, tensors) float32 per-tensor series
    overview/<quantity>   (blocks, tensors, 2) min/max per OVERVIEW_BLOCK steps; overview/loss (blocks, 2)
    hist/<grad|update|gain>   (steps, tensors, bins + 2) uint32 (DETAIL_CHUNK rows a chunk)
    probe/<field>         (steps, tensors, probes) float32; probe_index (tensors, probes) int64
    profile/<rows|columns>  (steps, units, 3) int16 log2 codes of every profiled weight's units, each
                          tensor at its offset (meta["profiles"]; nbkit.measure.profiles)
    local/step, local/values  per-rank local gradients under torch.distributed (optional)
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from nbkit.measure.fingerprint import FINGERPRINT_WIDTH
from nbkit.measure.profiles import MISSING as PROFILE_MISSING
from nbkit.measure.quantities import HISTOGRAM_BINS, HISTOGRAM_LOW, QUANTITIES
from nbkit.version import __version__

FORMAT_VERSION = 1
META_FILE = "nbkit.json"
COMMITTED_FILE = "committed.json"
KEYFRAME_DIR = "keyframes"
STEP_CHUNK = 1024                   # rows per chunk for summaries, loss, learning rates
DETAIL_CHUNK = 256                  # rows per chunk for histograms and probes (bigger rows)
OVERVIEW_BLOCK = 256                # steps per row of the min/max overview
OVERVIEW_CHUNK = 256                # overview rows per chunk

KEYFRAME_BUDGET_BYTES = 1 << 30     # above this estimated total, older keyframes are thinned
KEYFRAMES_KEPT_RECENT = 4           # the newest keyframes are never thinned

OPTIMIZER_ONLY_LAYER = "(optimizer only)"  # the layer of tensors the optimizer holds and the model does not
HISTOGRAMS = ("grad", "update", "gain")     # the histogram arrays, in the order of Row.histograms
STEP, LOSS, LR, HEAVY, FINGERPRINT = "step", "loss", "lr", "heavy", "fingerprint"
SETTINGS = "settings"
GRAD_NORM, CLIP_FACTOR, RNG_DIGEST = "grad_norm", "clip_factor", "rng_digest"
BACKWARD_ARRAYS = (GRAD_NORM, CLIP_FACTOR, RNG_DIGEST)
TENSOR_GRAD_NORMS = "tensor_grad_norm"       # (steps, tensors) float32 pre-clip gradient norm, every step
KEPT_BATCH_BUDGET_BYTES = 1 << 30   # kept batches above this: only the newest windows stay
PROBE_INDEX = "probe_index"
OVERVIEW_LOSS = "overview/loss"
LOCAL_STEP, LOCAL_VALUES = "local/step", "local/values"
LOCAL_ARRAYS = (LOCAL_STEP, LOCAL_VALUES)


def series_array(quantity: str) -> str:
    return f"q/{quantity}"


def overview_array(quantity: str) -> str:
    return f"overview/{quantity}"


def is_overview(name: str) -> bool:
    return name.startswith("overview/")


def histogram_array(quantity: str) -> str:
    return f"hist/{quantity}"


def probe_array(probe_field: str) -> str:
    return f"probe/{probe_field}"


def profile_array(axis: str) -> str:
    return f"profile/{axis}"


@dataclass(frozen=True)
class SettingColumn:
    """One stored setting: its name (\"betas.0\"), the parameter-group key (\"betas\") and, for an
    element of a tuple, its position (0); None for a plain number."""

    name: str
    key: str
    index: int | None = None


def setting_name(key: str, index: int | None = None) -> str:
    """The stored name of a group setting: the key, or key.index for an element of a tuple."""
    return key if index is None else f"{key}.{index}"


def setting_columns(meta: dict) -> list[SettingColumn]:
    """The recorded settings (meta["settings"]; none in recordings before they were stored), in the
    order of the settings array's last axis. A name ending in .<digits> is an element of a tuple: the
    recorder never records a plain key of that form (it is noted in meta["settings_not_replayed"])."""
    columns = []
    for name in meta.get("settings") or []:
        key, _, tail = name.rpartition(".")
        columns.append(SettingColumn(name, key, int(tail)) if key and tail.isdigit() else SettingColumn(name, name))
    return columns


@dataclass(frozen=True)
class ArraySpec:
    """One stored array: the shape after the step axis, dtype, rows per chunk and fill value."""

    tail: tuple
    dtype: str
    chunk: int
    fill: object


def row_arrays(meta: dict, groups: int) -> dict[str, ArraySpec]:
    """Every per-step array of a recording described by `meta` with `groups` parameter groups."""
    T, P = len(meta["tensors"]), meta["probes"]
    specs = {
        STEP: ArraySpec((), "int64", STEP_CHUNK, -1),
        LOSS: ArraySpec((), "float64", STEP_CHUNK, np.nan),
        LR: ArraySpec((groups,), "float64", STEP_CHUNK, np.nan),
        HEAVY: ArraySpec((), "bool", STEP_CHUNK, False),
        FINGERPRINT: ArraySpec((2, FINGERPRINT_WIDTH), "float64", STEP_CHUNK, np.nan),
    }
    if meta.get("backward_stats"):
        for name in BACKWARD_ARRAYS:
            specs[name] = ArraySpec((), "float64", STEP_CHUNK, np.nan)
        specs[TENSOR_GRAD_NORMS] = ArraySpec((T,), "float32", STEP_CHUNK, np.nan)
    if meta.get("settings"):
        specs[SETTINGS] = ArraySpec((groups, len(meta["settings"])), "float64", STEP_CHUNK, np.nan)
    for q in meta["quantities"]:
        specs[series_array(q)] = ArraySpec((T,), "float32", STEP_CHUNK, np.nan)
    for h in HISTOGRAMS:
        specs[histogram_array(h)] = ArraySpec((T, meta["histogram_bins"] + 2), "uint32", DETAIL_CHUNK, 0)
    for name in meta.get("probe_fields", []):
        specs[probe_array(name)] = ArraySpec((T, P), "float32", DETAIL_CHUNK, np.nan)
    table = meta.get("profiles") or {}
    for axis, units in (table.get("units") or {}).items():
        if table.get("enabled") and units:
            specs[profile_array(axis)] = ArraySpec((units, len(table["quantities"])), "int16", DETAIL_CHUNK,
                                                   PROFILE_MISSING)
    return specs


def overview_arrays(meta: dict) -> dict[str, ArraySpec]:
    """The min/max overview arrays (one row per OVERVIEW_BLOCK steps)."""
    T = len(meta["tensors"])
    specs = {OVERVIEW_LOSS: ArraySpec((2,), "float32", OVERVIEW_CHUNK, np.nan)}
    for q in meta["quantities"]:
        specs[overview_array(q)] = ArraySpec((T, 2), "float32", OVERVIEW_CHUNK, np.nan)
    return specs


def probe_index_array(meta: dict) -> ArraySpec:
    """The (tensors, probes) int64 probe coordinates, -1 padded: one chunk, written with the first rows."""
    return ArraySpec((meta["probes"],), "int64", len(meta["tensors"]), -1)


def local_arrays(tail: tuple) -> dict[str, ArraySpec]:
    """The per-rank local gradient arrays; tail = (ranks, tensors, 1 + probes)."""
    return {LOCAL_STEP: ArraySpec((), "int64", DETAIL_CHUNK, -1),
            LOCAL_VALUES: ArraySpec(tail, "float32", DETAIL_CHUNK, np.nan)}


def overview_rows(rows: int) -> int:
    """Overview rows that cover `rows` step rows (one spare, so a growing block always has a row)."""
    return rows // OVERVIEW_BLOCK + 1


@dataclass
class Row:
    """One recorded optimizer step, as the writer stores it. T tensors, Q quantities, G groups.

    A light row (heavy=False) holds NaN quantities, zero histograms and no probes; a heavy row's
    quantities, histograms and probes are filled in by the recorder's statistics, possibly on the
    statistics thread after the row was made.
    """

    step: int
    loss: float
    lr: np.ndarray                      # (G,) float64 learning rate of each parameter group
    fingerprint: np.ndarray             # (2, FINGERPRINT_WIDTH) float64: model inputs, targets
    quantities: np.ndarray              # (Q, T) float32, in QUANTITIES order
    histograms: np.ndarray              # (3, T, HISTOGRAM_BINS + 2) uint32, in HISTOGRAMS order
    probes: dict = field(default_factory=dict)   # probe field -> (T, probes) float32
    heavy: bool = False
    settings: np.ndarray | None = None  # (G, S) float64 in meta["settings"] order; NaN: not a number now
    grad_norm: float = float("nan")     # pre-clip gradient norm over the recorded tensors
    clip_factor: float = float("nan")   # post-clip ÷ pre-clip gradient norm (1: not clipped)
    rng_digest: float = float("nan")    # CRC32 of the CPU RNG state at the step's first training forward
    tensor_grad_norm: np.ndarray | None = None   # (T,) float32 pre-clip gradient norm per tensor (NaN: none)
    profiles: dict | None = None        # axis -> (units, 3) int16 log2 codes (nbkit.measure.profiles); None: light

    @classmethod
    def light(cls, step: int, loss: float, lr: np.ndarray, fingerprint: np.ndarray, tensors: int,
              settings: np.ndarray | None = None) -> "Row":
        return cls(step, loss, lr, fingerprint,
                   np.full((len(QUANTITIES), tensors), np.nan, dtype=np.float32),
                   np.zeros((len(HISTOGRAMS), tensors, HISTOGRAM_BINS + 2), dtype=np.uint32), settings=settings)

    def set_quantity(self, name: str, values) -> None:
        """Write one quantity for every tensor (a number or a (T,) array)."""
        self.quantities[QUANTITIES.index(name), :] = values

    def nbytes(self) -> int:
        settings = self.settings.nbytes if self.settings is not None else 0
        profiles = sum(v.nbytes for v in (self.profiles or {}).values())
        return (256 + settings + profiles + self.quantities.nbytes + self.histograms.nbytes
                + sum(v.nbytes for v in self.probes.values()))


def new_meta(*, model_class: str, optimizer: dict, gain_applicable: bool, param_groups: list[dict],
             tensors: list[dict], probes: int, options: dict, settings: list[str] = (),
             settings_not_replayed: dict | None = None, **extra) -> dict:
    """The metadata of a new recording (nbkit.json), the one schema every writer of recordings uses.

    optimizer: {"class", "module", "adapter", "defaults", "first_moment", "second_moment", "notes"};
    param_groups: each group's settings plus "params" (tensor names); tensors: one entry per tensor
    {"name", "shape", "dtype", "numel", "group", "layer", "probes", "sample_size"}; options: the
    recording options (RecordOptions.as_meta()); settings: the names of the group settings stored each
    step (setting_name; fixed at the start); settings_not_replayed: {key: why} for group keys that are
    not numbers or tuples of numbers (their start values stay in param_groups); extra: further entries
    (versions, statistics ...).
    """
    meta = {
        "format_version": FORMAT_VERSION, "nbkit_version": __version__, "model_class": model_class,
        "optimizer": optimizer, "gain_applicable": gain_applicable, "param_groups": param_groups,
        "tensors": tensors, "settings": list(settings), "settings_not_replayed": dict(settings_not_replayed or {}),
        "orphans": [], "frozen": [], "quantities": list(QUANTITIES), "probes": probes,
        "histogram_bins": HISTOGRAM_BINS, "histogram_low": dict(HISTOGRAM_LOW),
        "keyframe_retention": {"budget_bytes": KEYFRAME_BUDGET_BYTES, "kept_recent": KEYFRAMES_KEPT_RECENT,
                               "thinned": []},
        "backward_stats": True, "closed": False,
    }
    meta.update(options)
    meta.update(extra)
    return meta


def commit_seconds(meta: dict, default: float = 5.0) -> float:
    """The recording's commit interval; recordings before the rename call it flush_seconds."""
    return float(meta.get("commit_seconds", meta.get("flush_seconds", default)))


def estimate_recording_bytes(meta: dict, expected_steps: int, *, state_copies: int) -> dict:
    """An upper estimate of a recording's size: rows uncompressed, keyframes at full size.

    state_copies: parameter-sized tensors in a keyframe (1 for the model plus one per optimizer state
    tensor, e.g. 3 for Adam). Keyframe retention (KEYFRAME_BUDGET_BYTES) caps the keyframe share.
    """
    T, P, Q = len(meta["tensors"]), meta["probes"], len(meta["quantities"])
    bins = meta["histogram_bins"] + 2
    G = len(meta.get("param_groups", [])) or 1
    light = 8 + 8 + 8 * G * (1 + len(meta.get("settings", []))) + 1 + 2 * FINGERPRINT_WIDTH * 8
    fields = 2 + state_copies                              # grad, update, and the moments kept as probes
    heavy = 4 * T * (Q + 3 * bins + fields * P)
    table = meta.get("profiles") or {}
    if table.get("enabled"):                               # int16 codes per unit and stored quantity
        heavy += 2 * len(table.get("quantities") or ()) * sum((table.get("units") or {}).values())
    every = meta.get("every", 1)
    every = every if isinstance(every, int) and every >= 1 else 1      # "auto": every step, the upper bound
    row_bytes = expected_steps * light + -(-expected_steps // every) * heavy
    param_bytes = sum(t["numel"] * (8 if t["dtype"] in ("float64", "int64") else 4) for t in meta["tensors"])
    keyframe = state_copies * param_bytes
    count = expected_steps // max(1, int(meta.get("keyframe_every", 100))) + 2
    keyframes = min(count * keyframe, max(KEYFRAME_BUDGET_BYTES, (KEYFRAMES_KEPT_RECENT + 2) * keyframe))
    return {"rows": row_bytes, "keyframes": keyframes, "total": row_bytes + keyframes,
            "bytes_per_heavy_step": heavy, "bytes_per_keyframe": keyframe}

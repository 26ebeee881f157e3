"""Reading a recording from disk: every stored array and keyframe, while a recorder may still write it.

The analysis methods (findings, curvature) are added above the analysis layer, in nbkit.recording;
this module only reads.
"""
from __future__ import annotations

import os
import warnings
from pathlib import Path

import numpy as np
import zarr

from nbkit.errors import RecordingError, RecordingWarning
from nbkit.measure import profiles as unit_profiles
from nbkit.store import batches as kept
from nbkit.store import keyframes as kf
from nbkit.store import layout
from nbkit.store.files import read_json
from nbkit.store.layout import COMMITTED_FILE, FORMAT_VERSION, HISTOGRAMS, META_FILE, OVERVIEW_BLOCK


class RecordingReader:
    """A finished or growing recording on disk. Call `refresh()` to see steps written since.

    nbkit.load(path) returns its subclass nbkit.recording.Recording, which adds the analysis methods.
    """

    def __init__(self, path):
        self.path = Path(path)
        if not self.path.exists():
            raise RecordingError(f"No recording found at {str(self.path)!r}: the path does not exist")
        if not (self.path / META_FILE).is_file():
            raise RecordingError(f"No recording found at {str(self.path)!r}: it has no {META_FILE}. "
                                 "Pass the folder given to nbkit.record(...).")
        self.refresh()

    # --- opening and growth ---------------------------------------------------------------------
    def refresh(self) -> "RecordingReader":
        """Re-read the metadata and the committed row count (a recording may still be growing)."""
        meta_path = self.path / META_FILE
        try:
            meta = read_json(meta_path)
        except (OSError, ValueError) as exc:
            raise RecordingError(f"Metadata file {str(meta_path)!r} is damaged ({exc}); "
                                 "the data arrays may still be intact but cannot be interpreted without it") from exc
        if not isinstance(meta, dict) or not isinstance(meta.get("format_version"), int):
            raise RecordingError(f"Metadata file {str(meta_path)!r} has no integer format_version: "
                                 "it was not written by nbkit or was tampered with")
        if meta["format_version"] > FORMAT_VERSION:
            raise RecordingError(f"Recording {str(self.path)!r} has format version {meta['format_version']}, "
                                 f"newer than this nbkit reads ({FORMAT_VERSION}); upgrade nbkit")
        for key, kind in (("tensors", list), ("quantities", list), ("probes", int)):
            if not isinstance(meta.get(key), kind):
                raise RecordingError(f"Metadata file {str(meta_path)!r} lacks a valid {key!r} entry "
                                     f"(expected {kind.__name__}); it was tampered with or truncated")
        _check_entries(meta, meta_path)
        self.meta = meta
        committed_path = self.path / COMMITTED_FILE
        try:
            committed = read_json(committed_path)
            self._committed = int(committed["rows"])
            if not isinstance(committed, dict) or isinstance(committed["rows"], bool):
                raise TypeError("not a row count")
        except (OSError, ValueError, KeyError, TypeError, OverflowError) as exc:
            raise RecordingError(f"Commit file {str(committed_path)!r} is missing or damaged ({exc})") from exc
        if self._committed < 0:
            raise RecordingError(f"Commit file {str(committed_path)!r} has a negative row count; it was tampered with")
        self.closed_cleanly = bool(committed.get("closed", False))
        local_rows = committed.get("local_rows", 0)
        self._local_rows = local_rows if isinstance(local_rows, int) and local_rows > 0 else 0
        self._group = None
        self._cache: dict = {}
        if not self.closed_cleanly and not getattr(self, "_warned_unclosed", False) \
                and (meta.get("writer_error") or not _writer_alive(meta)):
            self._warned_unclosed = True
            cause = f" (the writer reported {meta['writer_error']})" if meta.get("writer_error") else ""
            warnings.warn(f"Recording {str(self.path)!r} was not closed cleanly{cause}: it holds {self._committed} "
                          f"committed steps{_last_step_text(committed)}; steps after the last commit were lost. "
                          "Everything it holds is readable.", RecordingWarning, stacklevel=3)
        return self

    def _open_group(self):
        if self._group is None and self._committed:
            self._group = zarr.open_group(str(self.path), mode="r", use_consolidated=False)
        return self._group

    def _read(self, name: str, selection=slice(None)) -> np.ndarray:
        group = self._open_group()
        if group is None:
            raise RecordingError(f"Recording {str(self.path)!r} holds no committed steps yet")
        try:
            array = group[name]
        except KeyError as exc:
            raise RecordingError(f"Recording {str(self.path)!r} has no array {name!r}") from exc
        try:
            return array[selection]
        except Exception as exc:    # zarr reports checksum and decode failures as several types
            raise RecordingError(f"Data of {name!r} in {str(self.path)!r} is damaged ({exc}); "
                                 "a chunk failed its CRC32C checksum or could not be decoded. Other arrays "
                                 "and other steps can still be read.") from exc

    def _rows_of(self, name: str, extra=()) -> np.ndarray:
        return self._read(name, (slice(0, self._committed), *extra))

    # --- the public API -------------------------------------------------------------------------
    def __repr__(self):
        state = "closed" if self.closed_cleanly else "open or not closed cleanly"
        return (f"Recording({str(self.path)!r}: {self._committed} steps, {len(self.tensors)} tensors, "
                f"{self.meta.get('optimizer', {}).get('class', '?')}, {state})")

    def __len__(self):
        return self._committed

    @property
    def steps(self) -> np.ndarray:
        """The optimizer step of each row (read-only; read once per refresh)."""
        if self._committed == 0:
            return np.zeros(0, dtype=np.int64)
        steps = self._cache.get("step")
        if steps is None:
            steps = self._cache["step"] = self._rows_of(layout.STEP)
            steps.flags.writeable = False
        return steps

    @property
    def tensors(self) -> list[str]:
        return [t["name"] for t in self.meta["tensors"]]

    @property
    def layers(self) -> dict[str, list[str]]:
        layers: dict[str, list[str]] = {}
        for t in self.meta["tensors"]:
            layers.setdefault(t["layer"], []).append(t["name"])
        return layers

    @property
    def quantities(self) -> list[str]:
        return list(self.meta["quantities"])

    def tensor_index(self, tensor: str) -> int:
        try:
            return self.tensors.index(tensor)
        except ValueError:
            raise RecordingError(f"No tensor named {tensor!r} in this recording; "
                                 f"tensors are {self.tensors[:8]}{' ...' if len(self.tensors) > 8 else ''}") from None

    def _check_quantity(self, q: str) -> None:
        if q not in self.meta["quantities"]:
            raise RecordingError(f"Unknown quantity {q!r}; run.quantities lists the valid names: "
                                 f"{', '.join(self.meta['quantities'])}")

    def series(self, q: str, tensor: str | None = None, *, rows: slice | None = None) -> np.ndarray:
        """Quantity `q` per step: (steps, tensors), or (steps,) for one tensor."""
        self._check_quantity(q)
        if self._committed == 0:
            return np.zeros((0,) if tensor else (0, len(self.tensors)), dtype=np.float32)
        rows = _clip(rows, self._committed)
        if tensor is None:
            return self._read(layout.series_array(q), (rows,))
        return self._read(layout.series_array(q), (rows, self.tensor_index(tensor)))

    def overview(self, q: str) -> tuple[np.ndarray, np.ndarray]:
        """(block start rows, (blocks, tensors, 2) min/max) over blocks of OVERVIEW_BLOCK steps."""
        blocks = -(-self._committed // OVERVIEW_BLOCK)
        if q == "loss":
            data = self._read(layout.OVERVIEW_LOSS, slice(0, blocks))
        else:
            self._check_quantity(q)
            data = self._read(layout.overview_array(q), slice(0, blocks))
        return np.arange(blocks) * OVERVIEW_BLOCK, data

    @property
    def loss(self) -> np.ndarray:
        return self._rows_of(layout.LOSS) if self._committed else np.zeros(0)

    @property
    def lr(self) -> np.ndarray:
        """(steps, param_groups) float64 learning rates: learning_rates() over every step."""
        return self.learning_rates()

    @property
    def settings(self) -> dict[str, np.ndarray]:
        """Each parameter-group setting that changed during the run: name -> (steps, groups) float64.

        Names are the group keys, tuples split (betas.0, betas.1); meta["settings"] lists every stored
        one, meta["param_groups"] their start values. A recording made before settings were stored
        gives its learning rate alone, when it changed.
        """
        values = self.setting_values()                                   # (steps, groups, settings)
        names = [c.name for c in layout.setting_columns(self.meta)]
        if not names:
            values, names = self.lr[:, :, None], ["lr"]
        changed = {}
        for s, name in enumerate(names):
            column = values[:, :, s]
            same = (column == column[:1]) | (np.isnan(column) & np.isnan(column[:1]))
            if len(column) and not same.all():
                changed[name] = column
        return changed

    def setting_values(self, *, rows: slice | None = None) -> np.ndarray:
        """(steps, groups, settings) float64: every stored setting of every group, in meta["settings"]
        order (nbkit.store.layout.setting_columns), over `rows` (None: every step); NaN where a group's
        value was not a number. The last axis is empty for recordings made before settings were stored."""
        groups, count = len(self.meta.get("param_groups", [])), len(self.meta.get("settings") or [])
        if self._committed == 0 or count == 0:
            steps = len(range(*_clip(rows, self._committed).indices(self._committed)))
            return np.zeros((steps, groups, 0))
        return self._read(layout.SETTINGS, (_clip(rows, self._committed),))

    @property
    def heavy(self) -> np.ndarray:
        """True at steps whose per-tensor quantities were computed (every=N records 1 step in N)."""
        return self._rows_of(layout.HEAVY) if self._committed else np.zeros(0, dtype=bool)

    @property
    def fingerprints(self) -> np.ndarray:
        """(steps, 2, width) batch fingerprints: row 0 the model inputs, row 1 the targets."""
        return self._rows_of(layout.FINGERPRINT)

    def probe_index(self, tensor: str) -> np.ndarray:
        i = self.tensor_index(tensor)
        index = self._cache.get("probe_index")
        if index is None:
            index = self._cache["probe_index"] = self._read(layout.PROBE_INDEX)
        return index[i][index[i] >= 0]

    def probes(self, tensor: str, *, rows: slice | None = None, fields=None) -> dict[str, np.ndarray]:
        """Probe coordinates of `tensor`: "index" and every recorded field, each (steps, probes).

        fields=None: decode every recorded field; a list of names decodes only those of them the
        recording holds (the others are left out), so a caller that draws two fields reads two.
        """
        i = self.tensor_index(tensor)
        index = self.probe_index(tensor)
        rows = _clip(rows, self._committed)
        n = len(range(*rows.indices(self._committed)))
        out = {"index": np.broadcast_to(index, (n, len(index)))}
        recorded = self.meta.get("probe_fields", [])
        for name in recorded if fields is None else [f for f in fields if f in recorded]:
            out[name] = self._read(layout.probe_array(name), (rows, i, slice(0, len(index))))
        return out

    def histogram(self, q: str, tensor: str, *, rows: slice | None = None) -> tuple[np.ndarray, np.ndarray]:
        """(bin edges in log2 units, counts (steps, bins)) of finite non-zero |values| of q."""
        if q not in HISTOGRAMS:
            raise RecordingError(f"No histogram of {q!r}; histograms exist for {', '.join(HISTOGRAMS)}")
        bins = self.meta["histogram_bins"]
        low = self.meta["histogram_low"][q]
        counts = self._read(layout.histogram_array(q), (_clip(rows, self._committed), self.tensor_index(tensor), slice(0, bins)))
        return np.arange(low, low + bins + 1, dtype=np.float64), counts

    @property
    def profile_tensors(self) -> list[str]:
        """The tensors with a per-unit profile (weights of 2 or more dimensions), in recording order."""
        table = self.meta.get("profiles") or {}
        return [t for t in self.tensors if t in (table.get("tensors") or {})] if table.get("enabled") else []

    def _profile_entry(self, tensor: str, axis: str) -> dict:
        self.tensor_index(tensor)                     # an unknown tensor: the error that lists them
        table = self.meta.get("profiles") or {}
        if axis not in unit_profiles.AXES:
            raise RecordingError(f"No profile axis {axis!r}; the axes are \"rows\" (output units) and \"columns\" "
                                 "(input features)")
        if not table.get("enabled"):
            raise RecordingError(f"Recording {str(self.path)!r} has no profiles: "
                                 + ("it was recorded with profiles=False" if table else "it predates them"))
        entry = (table.get("tensors") or {}).get(tensor)
        if entry is None:
            why = (table.get("without") or {}).get(tensor, "no profile")
            raise RecordingError(f"{tensor!r} has no profile ({why}); tensors with one: {self.profile_tensors[:20]}")
        if axis not in entry:
            raise RecordingError(f"{tensor!r} has no {axis} ({entry['how']})")
        return entry

    def profile(self, tensor: str, q: str = "gain", axis: str = "rows", *, rows: slice | None = None) -> np.ndarray:
        """(steps, units) float64 per-unit profile of `tensor` along `axis` ("rows": output units,
        "columns": input features); q in update_rms, plain_rms (lr · gradient RMS), gain (update_rms ÷
        plain_rms), eps_share, grad_rms. NaN at steps without a profile (light steps) and where a value
        is undefined (gain where the unit's gradient is zero); stored within 0.35 % (log2 codes)."""
        if q not in unit_profiles.READ_QUANTITIES:
            raise RecordingError(f"No profile quantity {q!r}; choose from {', '.join(unit_profiles.READ_QUANTITIES)}")
        offset, units = self._profile_entry(tensor, axis)[axis]
        if self._committed == 0:
            return np.zeros((0, units))
        rows = _clip(rows, self._committed)
        stored = list((self.meta["profiles"]["quantities"]))

        def read(name):
            codes = self._read(layout.profile_array(axis), (rows, slice(offset, offset + units), stored.index(name)))
            return unit_profiles.decode(codes)

        if q in stored:
            return read(q)
        group = self.meta["tensors"][self.tensor_index(tensor)]["group"]
        plain = read("grad_rms") * self.learning_rates(rows=rows)[:, group:group + 1]
        if q == "plain_rms":
            return plain
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(plain > 0, read("update_rms") / np.where(plain > 0, plain, 1.0), np.nan)

    def unit_names(self, tensor: str, axis: str = "rows") -> list[str]:
        """The names of `tensor`'s units along `axis`: record(unit_names=...) where given, else indices."""
        offset, units = self._profile_entry(tensor, axis)[axis]
        given = ((self.meta["profiles"].get("unit_names") or {}).get(tensor) or {}).get(axis)
        return list(given) if given else [str(u) for u in range(units)]

    # --- reads for the views: row slices of every tensor at once ----------------------------------
    def histogram_counts(self, q: str, *, rows: slice | None = None) -> tuple[np.ndarray, np.ndarray]:
        """(bin edges in log2 units (bins + 1,), counts (steps, tensors, bins)) of q for every tensor.

        The same bins and counts as histogram(q, tensor), for all tensors in one read; rows=None
        reads every committed step, a slice reads those rows.
        """
        if q not in HISTOGRAMS:
            raise RecordingError(f"No histogram of {q!r}; histograms exist for {', '.join(HISTOGRAMS)}")
        bins = self.meta["histogram_bins"]
        low = self.meta["histogram_low"][q]
        counts = self._read(layout.histogram_array(q), (_clip(rows, self._committed), slice(None), slice(0, bins)))
        return np.arange(low, low + bins + 1, dtype=np.float64), counts

    def learning_rates(self, *, rows: slice | None = None) -> np.ndarray:
        """(steps, param_groups) float64 learning rate of each group, over `rows` (None: every step)."""
        if self._committed == 0:
            return np.zeros((0, len(self.meta.get("param_groups", []))))
        return self._read(layout.LR, (_clip(rows, self._committed),))

    @property
    def keyframes(self) -> list[int]:
        return kf.list_keyframes(self.path)

    def keyframe(self, step: int) -> dict:
        """Everything stored at a keyframe: model, optimizer, rng, and orphan tensors."""
        return kf.read_keyframe(self.path, step)

    # --- the backward pass and kept batches -------------------------------------------------------
    def _backward_array(self, name: str) -> np.ndarray:
        if not self.meta.get("backward_stats") or self._committed == 0:
            return np.full(self._committed, np.nan)          # recordings before these were stored
        return self._rows_of(name)

    @property
    def grad_norm(self) -> np.ndarray:
        """(steps,) float64 gradient norm over the recorded tensors before clipping (NaN: not seen)."""
        return self._backward_array(layout.GRAD_NORM)

    @property
    def tensor_grad_norms(self) -> np.ndarray:
        """(steps, tensors) float32 pre-clip gradient norm of each tensor at every step, heavy or not
        (NaN: no gradient, or a recording before these were stored)."""
        if not self.meta.get("backward_stats") or self._committed == 0:
            return np.full((self._committed, len(self.tensors)), np.nan, dtype=np.float32)
        return self._rows_of(layout.TENSOR_GRAD_NORMS)

    @property
    def clip_factor(self) -> np.ndarray:
        """(steps,) float64 post-clip ÷ pre-clip gradient norm: 1 where nothing clipped, NaN: unknown."""
        return self._backward_array(layout.CLIP_FACTOR)

    @property
    def rng_digests(self) -> np.ndarray:
        """(steps,) CRC32 of the CPU random state at each step's first training forward (NaN: none)."""
        return self._backward_array(layout.RNG_DIGEST)

    @property
    def kept_steps(self) -> list[int]:
        """The steps whose batches are kept in the recording (record(keep_batches=...))."""
        return kept.kept_steps(self.path)

    @property
    def replayable_windows(self) -> list[tuple[int, int]]:
        """(first, last) step ranges a replay can run without `batches`: each starts at a keyframe and
        every step in it is kept."""
        return kept.windows(self.kept_steps, self.keyframes)

    def batch(self, step: int) -> list[dict]:
        """The kept step: a list of micro-batches {"args", "kwargs", "targets"}, as training saw them."""
        return self.kept_step(step).micro_batches

    def kept_step(self, step: int):
        """Everything kept of one step (nbkit.store.batches.KeptStep): micro-batches, the random and
        autocast state at its first forward, and each micro-batch's back-propagated loss scale."""
        if self.meta.get("keep_batches") is False:
            raise RecordingError(f"{str(self.path)!r} was recorded with keep_batches=False: no batch is kept; "
                                 "record with keep_batches=True (the default) to replay without a loader")
        return kept.read_kept_step(self.path, int(step))

    def state_at(self, step: int):
        """(model_state_dict, optimizer_state_dict) at keyframe `step`, ready for load_state_dict."""
        state = self.keyframe(step)
        return state["model"], state["optimizer"]

    def rows_for_steps(self, first: int, last: int) -> slice:
        """Row slice covering optimizer steps first..last (inclusive)."""
        steps = self.steps
        return slice(int(np.searchsorted(steps, first)), int(np.searchsorted(steps, last, side="right")))

    def size_report(self) -> dict:
        """Bytes on disk by part ("rows": step arrays, "keyframes", "batches": kept steps, "metadata",
        "total") and per step."""
        parts = {"rows": 0, "keyframes": 0, "batches": 0, "metadata": 0}
        for f in self.path.rglob("*"):
            if f.is_file():
                top = f.relative_to(self.path).parts[0]
                part = ("keyframes" if top == layout.KEYFRAME_DIR else "batches" if top == kept.BATCH_DIR
                        else "metadata" if len(f.relative_to(self.path).parts) == 1 else "rows")
                parts[part] += f.stat().st_size
        parts["total"] = sum(parts.values())
        parts["steps"] = self._committed
        parts["row_bytes_per_step"] = parts["rows"] / self._committed if self._committed else float("nan")
        parts["estimate"] = self.meta.get("size_estimate")
        return parts

    def local_gradients(self, tensor: str) -> dict[str, np.ndarray]:
        """Each rank's own gradient before DDP averaged it (nbkit.record_local_gradients).

        "step": (rows,); "grad_norm": (rows, ranks); "grad": (rows, ranks, probes) at the tensor's
        probe coordinates (the same ones as probes(tensor)["index"]).
        """
        if not self.meta.get("distributed", {}).get("local_gradients"):
            raise RecordingError(f"Recording {str(self.path)!r} has no local gradients; record them with "
                                 "nbkit.record_local_gradients(ddp_model, recorder) before the first backward")
        i, n = self.tensor_index(tensor), len(self.probe_index(tensor)) if self._committed else 0
        if self._local_rows == 0:
            ranks = self.meta["distributed"]["world_size"]
            return {"step": np.zeros(0, np.int64), "grad_norm": np.zeros((0, ranks)), "grad": np.zeros((0, ranks, n))}
        values = self._read(layout.LOCAL_VALUES, (slice(0, self._local_rows), slice(None), i))    # (rows, ranks, 1 + P)
        return {"step": self._read(layout.LOCAL_STEP, slice(0, self._local_rows)),
                "grad_norm": values[:, :, 0], "grad": values[:, :, 1:1 + n]}


def _check_entries(meta: dict, meta_path: Path) -> None:
    """The entries every reader method relies on, checked once so tampering gives one clear error."""
    def bad(what):
        raise RecordingError(f"Metadata file {str(meta_path)!r} has an invalid {what}; "
                             "it was tampered with or truncated. Restore it from a copy of the recording")
    if meta["probes"] < 0 or isinstance(meta["probes"], bool):
        bad("'probes' entry")
    for t in meta["tensors"]:
        if not (isinstance(t, dict) and isinstance(t.get("name"), str) and isinstance(t.get("layer", ""), str)
                and isinstance(t.get("shape", []), list)):
            bad(f"tensor entry {str(t)[:60]!r}")
    if not all(isinstance(q, str) for q in meta["quantities"]):
        bad("'quantities' entry")
    for key, kind in (("probe_fields", list), ("optimizer", dict), ("param_groups", list), ("distributed", dict),
                      ("settings", list)):
        if key in meta and not isinstance(meta[key], kind):
            bad(f"{key!r} entry (expected {kind.__name__})")
    if not all(isinstance(name, str) for name in meta.get("settings", [])):
        bad("'settings' entry (expected setting names)")


def _writer_alive(meta: dict) -> bool:
    """Whether the process that wrote the recording may still be writing it (same machine only)."""
    pid = meta.get("pid")
    if not isinstance(pid, int) or pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except (ProcessLookupError, OverflowError):
        return False
    except OSError:                      # e.g. PermissionError: a process of another user has it
        return True
    return True


def _last_step_text(committed: dict) -> str:
    last = committed.get("last_step")
    return f" (up to optimizer step {last})" if isinstance(last, int) else ""


def _clip(rows: slice | None, n: int) -> slice:
    if rows is None:
        return slice(0, n)
    start, stop, _ = rows.indices(n)
    return slice(start, stop)

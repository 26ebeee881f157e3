"""The recording's arrays the finding rules read, read once, and the robust summaries the rules take of them."""
from __future__ import annotations

import math
import warnings

import numpy as np

from nbkit.store.layout import setting_columns


class FindingInputs:
    """The recording's arrays, read once: heavy rows for per-tensor series, all rows for loss.

    Built by `find` from a Recording; every rule reads the run through it. Series are cached per
    quantity, so rules that share a quantity read it from disk once.
    """

    def __init__(self, run):
        self.run, self.meta = run, run.meta
        self.tensors = run.tensors
        self.steps = run.steps
        self.heavy_rows = np.flatnonzero(run.heavy) if len(self.steps) else np.zeros(0, dtype=np.int64)
        self.heavy_steps = self.steps[self.heavy_rows]
        self.loss = np.asarray(run.loss, dtype=np.float64)
        self._series: dict = {}
        self._profiles: dict = {}
        self._changed: dict | None = None
        self.profile_tensors = set(run.profile_tensors) if len(self.steps) else set()

    def group_settings(self, row: int) -> list[dict]:
        """Each parameter group's settings at `row`: its start values (meta["param_groups"]) with every
        setting that changed during the run (run.settings; tuples such as betas reassembled) and the
        learning rate (run.lr) at that row."""
        if self._changed is None:
            self._changed = self.run.settings if len(self.steps) else {}
            self._lr = np.asarray(self.run.lr, dtype=np.float64)
        columns = {c.name: c for c in setting_columns(self.meta)}
        out = []
        for g, start in enumerate(self.meta.get("param_groups", [])):
            group = {k: list(v) if isinstance(v, (list, tuple)) else v for k, v in start.items() if k != "params"}
            for name, values in self._changed.items():
                column = columns.get(name)
                value = float(values[row, g])
                if column is None or not math.isfinite(value):
                    continue
                if column.index is None:
                    group[column.key] = value
                elif isinstance(group.get(column.key), list) and column.index < len(group[column.key]):
                    group[column.key][column.index] = value
            if g < self._lr.shape[1]:
                group["lr"] = float(self._lr[row, g])
            out.append(group)
        return out

    def series(self, q) -> np.ndarray:
        """(heavy rows, tensors) float64; all NaN for a quantity the recording does not hold."""
        if q not in self._series:
            if q not in self.run.quantities or not len(self.heavy_rows):
                self._series[q] = np.full((len(self.heavy_rows), len(self.tensors)), np.nan)
            else:
                self._series[q] = np.asarray(self.run.series(q), dtype=np.float64)[self.heavy_rows]
        return self._series[q]

    def profile(self, k, q, axis) -> np.ndarray | None:
        """(heavy rows, units) float64 per-unit profile q of tensor k along axis ("rows" or "columns");
        None where the recording has none (a recording before profiles, profiles=False, a 1-D tensor,
        an axis the tensor lacks)."""
        key = (k, q, axis)
        if key not in self._profiles:
            name = self.tensors[k]
            entry = (self.meta.get("profiles") or {}).get("tensors", {}).get(name, {})
            if name not in self.profile_tensors or axis not in entry or not len(self.heavy_rows):
                self._profiles[key] = None
            else:
                self._profiles[key] = np.asarray(self.run.profile(name, q, axis), dtype=np.float64)[self.heavy_rows]
        return self._profiles[key]

    def unit_names(self, k, axis) -> list[str]:
        """The names of tensor k's units along axis: record(unit_names=...) where given, else indices."""
        return self.run.unit_names(self.tensors[k], axis)

    def tensor_lr(self) -> np.ndarray:
        """(heavy rows, tensors): each tensor's learning rate (its group's) at each heavy row."""
        lr = np.asarray(self.run.lr, dtype=np.float64)[self.heavy_rows]            # (rows, groups)
        return lr[:, [t["group"] for t in self.meta["tensors"]]]

    def shape(self, k) -> list[int]:
        """The recorded shape of tensor k."""
        return self.meta["tensors"][k]["shape"]

    def global_grad_norm(self) -> np.ndarray:
        """(heavy rows,): the norm of all tensors' gradients together; NaN where none is finite."""
        g = self.series("grad_norm")
        with np.errstate(all="ignore"):
            total = np.sqrt(np.nansum(g ** 2, axis=1))
        total[~np.isfinite(g).any(axis=1) | ~np.isfinite(total)] = np.nan
        return total

    def weight_columns(self) -> list[int]:
        """Indices of the tensors with two or more dimensions (weights, not biases or norm scales)."""
        return [k for k in range(len(self.tensors)) if len(self.shape(k)) >= 2]

    def group_lr_share(self) -> np.ndarray:
        """(heavy rows, tensors): each tensor's learning rate as a share of its group's largest."""
        lr = np.asarray(self.run.lr, dtype=np.float64)[self.heavy_rows]            # (rows, groups)
        with np.errstate(all="ignore"):
            share = lr / np.nanmax(np.asarray(self.run.lr, dtype=np.float64), axis=0)
        groups = [t["group"] for t in self.meta["tensors"]]
        return share[:, groups]

    def relevant(self, relevant_grad: float) -> np.ndarray:
        """(heavy rows, tensors): tensors whose gradient RMS is at least relevant_grad × the median tensor's.
        A tensor with a negligible gradient (a bias cancelled by a following BatchNorm) has no update worth
        protecting: ε dominating it, or its updates rounding away, is harmless."""
        rms = self.series("grad_rms")
        with warnings.catch_warnings(), np.errstate(all="ignore"):
            warnings.simplefilter("ignore", RuntimeWarning)
            typical = np.nanmedian(rms, axis=1, keepdims=True)
            return rms >= relevant_grad * typical


def finite_median(x) -> float:
    """The median of the finite values of x; NaN when there are none."""
    x = x[np.isfinite(x)]
    return float(np.median(x)) if len(x) else math.nan


def rolling_median(x, width):
    """Centred running median of `width` values, padded at both ends with the first and last full window's."""
    if len(x) < width:
        return x.copy()
    windows = np.lib.stride_tricks.sliding_window_view(x, width)
    core = np.median(windows, axis=1)
    pad = width // 2
    return np.concatenate([np.full(pad, core[0]), core, np.full(len(x) - len(core) - pad, core[-1])])

"""The Recording users open with nbkit.load: the store's reader plus the analysis methods.

Assembled here, above both layers, so that the store never imports the analysis and the analysis
writes nothing: `curvature()` computes with nbkit.analyze and stores through nbkit.store.annotate.
"""
from __future__ import annotations

import numpy as np

from nbkit.analyze.curvature import keyframe_sharpness
from nbkit.analyze.findings import find
from nbkit.analyze.step_quality import StepQuality
from nbkit.store import export
from nbkit.store.annotate import write_series
from nbkit.store.quality import read_step_quality
from nbkit.store.reader import RecordingReader


class Recording(RecordingReader):
    """A finished or growing recording on disk (nbkit.load). Call `refresh()` to see new steps."""

    def findings(self, **thresholds) -> list:
        """The automatic findings (heuristics: verify each with a replay); keyword arguments override
        the thresholds of nbkit.analyze.findings.Thresholds."""
        return find(self, **thresholds)

    def frame(self, q: str | None = None, *, dropna: bool = True):
        """pandas DataFrame of quantity `q`: index step, one column per tensor (run.series(q)); no `q`:
        a long table step, tensor, quantity, value (NaN values left out unless dropna=False).
        Needs pandas: pip install 'nbkit[data]'. See nbkit.store.export.frame."""
        return export.frame(self, q, dropna=dropna)

    def to_xarray(self):
        """xarray Dataset of the committed steps (dims step, tensor, group; probes and per-unit profiles
        as their own variables). Needs xarray: pip install 'nbkit[data]'. See nbkit.store.export."""
        return export.to_xarray(self)

    def curvature(self, model, step_fn, batch) -> dict[int, float]:
        """Estimate sharpness at every keyframe that has a recorded row, on `batch`, and store it in the
        `sharpness` series (the recording must be closed). Returns {step: sharpness}."""
        values = keyframe_sharpness(self, model, step_fn, batch)
        rows = [int(np.searchsorted(self.steps, step)) for step in values]
        write_series(self.path, "sharpness", rows, np.array(list(values.values()), dtype=np.float32))
        self.refresh()
        return values

    def step_quality(self) -> StepQuality | None:
        """The step quality stored by nbkit.step_quality (ρ, predicted and actual change per step; which
        steps have values: meta["step_quality"]), or None where none was computed."""
        arrays = read_step_quality(self.path)
        return None if arrays is None else StepQuality(tensors=list(self.tensors), **arrays)


def load(path) -> Recording:
    """Open the recording at `path` (a folder written by nbkit.record), or a live Recorder's."""
    if hasattr(path, "recording_path"):          # a live Recorder
        path = path.recording_path
    return Recording(path)

"""The timeline's step-quality axes (views.timeline): where a recording holds step-quality arrays
(nbkit.step_quality), the ρ line shows the computed steps' ρ = actual / predicted, which on least squares
along the top eigenvector is 1 − lr·λ/2 (analytic; λ from numpy.linalg.eigh, as tests/test_step_quality.py);
a recording without them gets no extra axes."""
from __future__ import annotations

import numpy as np
import pytest

import nbkit
from nbkit.views.data import ExplorerData
from nbkit.views.timeline import Timeline
from tests.test_step_quality import _least_squares_run


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    base = tmp_path_factory.mktemp("timeline-quality")
    with_quality, make, lam, lr = _least_squares_run(base / "with", 0.95, steps=8)
    quality = nbkit.step_quality(with_quality, make(), start=2, steps=4)        # a window inside the run
    without, *_ = _least_squares_run(base / "without", 0.95, steps=8)
    return nbkit.load(base / "with"), quality, 1 - lr * lam / 2, nbkit.load(base / "without")


def test_the_rho_line_holds_the_computed_steps_values(runs):
    run, quality, expected, _ = runs
    timeline = Timeline(ExplorerData(run), lambda step: None)
    timeline.load()
    assert len(timeline.figure.axes) == 4 and timeline.rho_axes is not None
    steps, rho = timeline.rho_line.get_data()
    assert list(steps) == [2, 3, 4, 5]
    np.testing.assert_array_equal(rho, quality.rho_first)
    np.testing.assert_allclose(rho, expected, atol=1e-7)                        # 1 − 0.95 = 0.05: poor
    thresholds = sorted({float(line.get_ydata()[0]) for line in timeline.rho_axes.lines
                         if line.get_linestyle() == "--"})
    assert thresholds == [0.25, 0.75]
    assert "Nocedal & Wright ch. 4" in " ".join(t.get_text() for t in timeline.rho_axes.get_legend().get_texts())
    # the bars: one predicted and one actual per computed step, at the stored values
    predicted = [segment[1][1] for segment in timeline.predicted_bars.get_segments()]
    np.testing.assert_allclose(predicted, quality.predicted_first)
    actual = [segment[1][1] for segment in timeline.actual_bars.get_segments()]
    np.testing.assert_allclose(actual, quality.actual)
    assert "ρ 0.05" in timeline.quality_at(3) and "weight 100%" in timeline.quality_at(3)
    assert timeline.quality_at(7) == ""                                          # not measured
    timeline.canvas.close()


def test_without_step_quality_arrays_there_is_no_extra_axis(runs):
    *_, without = runs
    assert without.step_quality() is None
    timeline = Timeline(ExplorerData(without), lambda step: None)
    timeline.load()
    assert len(timeline.figure.axes) == 2
    assert timeline.rho_axes is None and timeline.change_axes is None and timeline.quality_at(3) == ""
    timeline.canvas.close()

"""The verdict (nbkit.analyze.verdict): shared window, final-window loss, findings, margin and noise."""
import numpy as np
import pytest

from nbkit.analyze.finding import Finding
from nbkit.analyze.verdict import block_bootstrap_interval, fidelity_text, verdict


def _f(kind, a, b):
    return Finding(kind=kind, tensors=["w"], first_step=a, last_step=b, severity="warning", evidence={},
                   suggestion="", source="common practice")


def test_final_window_best_and_a_clear_margin():
    steps = np.arange(100, 300)
    a = np.linspace(2, 1, 200)
    b = a + 0.2 + 0.01 * np.sin(steps)                 # always worse by about 0.2
    v = verdict({"a": (steps, a), "b": (steps[50:], b[50:])})
    assert v.window == (150, 299) and v.final == (285, 299)
    row = {r.name: r for r in v.rows}
    assert row["a"].final_loss == pytest.approx(a[-15:].mean())
    assert row["a"].best_loss == pytest.approx(a.min()) and row["a"].best_step == 299
    assert v.best == "a" and v.margin.runner_up == "b" and v.margin.clear
    assert v.margin.low > 0.15


def test_noise_only_margin_is_not_clear():
    rng = np.random.default_rng(1)
    steps = np.arange(1000)
    base = np.ones(1000)
    v = verdict({"a": (steps, base + 0.1 * rng.standard_normal(1000)),
                 "b": (steps, base + 0.1 * rng.standard_normal(1000))})
    assert not v.margin.clear and v.margin.low < 0 < v.margin.high


def test_block_bootstrap_widens_for_correlated_steps():
    rng = np.random.default_rng(0)
    walk = np.cumsum(rng.standard_normal(500)) * 0.05           # strongly autocorrelated
    narrow = block_bootstrap_interval(walk, block=1)
    wide = block_bootstrap_interval(walk, block=25)
    assert (wide[1] - wide[0]) > 1.5 * (narrow[1] - narrow[0])


def test_findings_counted_only_at_steps_every_run_recorded_in_full():
    steps = np.arange(100)
    loss = np.ones(100)
    findings = {"a": [_f("grad-spike", 15, 15), _f("grad-spike", 20, 20), _f("oscillation", 3, 5)], "b": []}
    full = {"a": steps, "b": steps[::10]}                        # b thinned: every 10th step in full
    v = verdict({"a": (steps, loss), "b": (steps, loss)}, findings=findings, full_steps=full)
    assert v.rows[0].findings == {"grad-spike": 1}              # 15 and 3-5 fall between b's full steps


def test_no_shared_step_explains_and_gives_ranges():
    v = verdict({"a": (np.arange(10), np.ones(10)), "b": (np.arange(20, 30), np.ones(10))})
    assert v.window is None and v.best is None
    assert "share no step" in v.note and "a 0–9" in v.note and "b 20–29" in v.note


def test_fidelity_words():
    assert fidelity_text({"replay": {"fidelity": {"identical": True}}}) == "identical to its parent"
    assert fidelity_text({"replay": {"fidelity": {"identical": False, "first_step": 7,
                                                  "first_difference": "lr of group 0"}}}) == \
        "differs from step 7: lr of group 0"
    assert fidelity_text({}) == ""


def test_one_step_runs_have_no_margin_but_a_reason():
    v = verdict({"a": (np.array([0]), np.array([1.0])), "b": (np.array([0]), np.array([2.0]))})
    assert v.best == "a" and v.margin is None and "too few" in v.note


def test_a_bit_exact_replay_ties_and_the_margin_is_over_the_next_run():
    steps = np.arange(50)
    a = np.linspace(2, 1, 50)
    v = verdict({"a": (steps, a), "replay": (steps, a.copy()), "c": (steps, a + 0.5)})
    assert v.best == "a" and v.ties == ("replay",) and v.margin.runner_up == "c" and v.margin.clear

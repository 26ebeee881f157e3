"""The list of every finding rule, in the order they run, and `find`, which runs them over a recording.

`find(run, **thresholds)` (run.findings) reads the recorded series once (FindingInputs) and returns
Finding objects sorted by first step, then severity (errors first), then kind. Every finding is a
heuristic: its suggestion says to verify it with a replay.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

from nbkit.analyze.finding import Finding
from nbkit.analyze.findings import configuration, gradients, loss, nonfinite, quality, units, updates
from nbkit.analyze.findings.data import FindingInputs
from nbkit.analyze.findings.thresholds import Thresholds, thresholds_from_keywords


@dataclass(frozen=True)
class Rule:
    """One finding rule: check(FindingInputs, Thresholds) -> the findings of the kinds it names."""

    kinds: tuple[str, ...]                                      # the finding kinds it can return
    check: Callable[[FindingInputs, Thresholds], list[Finding]]
    without_rows: bool = False          # True: it judges the configuration alone, so it also runs on a
                                        # recording with no rows yet


RULES = (
    Rule(("orphan",), configuration.orphans, without_rows=True),
    Rule(("no-gradient",), configuration.no_gradient),
    Rule(("nonfinite",), nonfinite.nonfinite),
    Rule(("grad-spike",), gradients.grad_spike),
    Rule(("oversized-updates",), updates.oversized_updates),
    Rule(("stalled-updates",), updates.stalled_updates),
    Rule(("eps-dominated",), updates.eps_dominated),
    Rule(("oscillation",), gradients.oscillation),
    Rule(("overshoot",), gradients.overshoot),
    Rule(("dead-units",), gradients.dead_units),
    Rule(("damped-units",), units.damped_units),
    Rule(("lost-updates",), updates.lost_updates),
    Rule(("plateau",), loss.plateau),
    Rule(("over-stability-limit",), loss.over_stability_limit),
    Rule(("coupled-decay",), configuration.coupled_decay, without_rows=True),
    Rule(("noise-scale",), configuration.noise_scale),
    Rule(("step-overran",), quality.step_overran),
)

SEVERITY_RANK = {"error": 0, "warning": 1, "info": 2}


def find(run, **thresholds) -> list[Finding]:
    """All findings of a recording, sorted by first step. Keyword arguments override Thresholds
    (unknown names raise AnalysisError; the deprecated names of DEPRECATED_THRESHOLDS warn and still apply)."""
    t = thresholds_from_keywords(**thresholds)
    data = FindingInputs(run)
    found: list[Finding] = []
    for rule in RULES:
        if len(data.steps) or rule.without_rows:     # nothing recorded yet: only the configuration is judged
            found.extend(rule.check(data, t))
    return sorted(found, key=lambda f: (f.first_step, SEVERITY_RANK[f.severity], f.kind))

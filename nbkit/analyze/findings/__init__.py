"""Automatic findings: known failure patterns located at a step range and tensor of a recording.

`find(run, **thresholds)` runs every rule of `RULES` (nbkit.analyze.findings.rules) over a recording;
`Thresholds` holds the documented defaults (nbkit.analyze.findings.thresholds). The rules are grouped
by what they read: configuration, nonfinite, gradients, updates, loss; "sustained" is defined in
nbkit.analyze.findings.sustained.
"""
from nbkit.analyze.finding import Finding
from nbkit.analyze.findings.rules import RULES, Rule, find
from nbkit.analyze.findings.thresholds import DEPRECATED_THRESHOLDS, Thresholds

__all__ = [
    # running the rules
    "find", "RULES", "Rule",
    # their settings
    "Thresholds", "DEPRECATED_THRESHOLDS",
    # their result
    "Finding",
]

"""The Finding record shared by the findings engine, the explorer and the report."""
from __future__ import annotations

from dataclasses import asdict, dataclass, field

SEVERITIES = ("info", "warning", "error")


@dataclass(frozen=True)
class Finding:
    """An automatic diagnosis. A heuristic: verify it with a replay before acting on it."""

    kind: str                     # e.g. "grad-spike"; the table in README.md lists every kind
    tensors: list[str]            # tensor names involved (may be empty for run-wide findings)
    first_step: int               # first optimizer step of the pattern (a view jumps here)
    last_step: int
    severity: str                 # "info" | "warning" | "error"
    evidence: dict = field(default_factory=dict)   # the numbers that triggered it
    suggestion: str = ""
    source: str = "common practice"   # a citation, or "common practice" for rules of thumb
    units: dict = field(default_factory=dict)      # per-unit findings: {tensor: {axis: [unit names]}}, axis
                                                   # "rows" (output units) or "columns" (input features)

    def __post_init__(self):
        if self.severity not in SEVERITIES:
            raise ValueError(f"Invalid severity {self.severity!r}; expected one of {SEVERITIES}")

    def to_dict(self) -> dict:
        return asdict(self)

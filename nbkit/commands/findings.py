"""`nbkit findings RUN`: print a recording's findings as a table; exit non-zero on errors (a CI gate).

Exit status: 0 when no finding is an error (nor a warning with --strict), 1 otherwise, 2 when the
recording cannot be read or a threshold is unknown.
"""
from __future__ import annotations

import json
import sys
from dataclasses import fields

import nbkit
from nbkit.analyze.findings import DEPRECATED_THRESHOLDS, Thresholds
from nbkit.errors import NbkitError


def add_arguments(parser) -> None:
    parser.add_argument("run", nargs="+", help="recording folder(s) written by nbkit.record")
    parser.add_argument("--strict", action="store_true", help="also exit non-zero when a finding is a warning")
    parser.add_argument("--json", action="store_true", help="print the findings as JSON instead of a table")
    parser.add_argument("--set", dest="thresholds", action="append", default=[], metavar="NAME=VALUE",
                        help="override a threshold, e.g. --set spike_factor=20 (names: "
                             + ", ".join(f.name for f in fields(Thresholds)) + ")")


def _parse_thresholds(pairs) -> dict:
    """{name: value} of --set pairs. A deprecated name is kept (run.findings warns and applies it) and
    a note naming the new one is printed, since the command line hides DeprecationWarnings by default."""
    types = {f.name: f.type for f in fields(Thresholds)}
    out = {}
    for pair in pairs:
        name, _, value = pair.partition("=")
        new = DEPRECATED_THRESHOLDS.get(name)
        if (name not in types and new is None) or not value:
            raise ValueError(f"--set {pair!r}: expected NAME=VALUE with NAME one of {', '.join(types)}")
        if new is not None:
            print(f"nbkit findings: --set {name} is deprecated; use --set {new}", file=sys.stderr)
        out[name] = int(value) if types[new or name] in (int, "int") else float(value)
    return out


def _table(run_path, findings) -> str:
    lines = [f"{run_path}: {len(findings)} finding{'s' if len(findings) != 1 else ''}"]
    if not findings:
        return lines[0]
    rows = [("severity", "kind", "steps", "tensors", "evidence")]
    for f in findings:
        steps = str(f.first_step) if f.first_step == f.last_step else f"{f.first_step}-{f.last_step}"
        tensors = ", ".join(f.tensors[:3]) + (f" (+{len(f.tensors) - 3})" if len(f.tensors) > 3 else "") or "-"
        evidence = ", ".join(f"{k}={v:.3g}" if isinstance(v, float) else f"{k}={v}" for k, v in f.evidence.items())
        rows.append((f.severity, f.kind, steps, tensors, evidence))
    widths = [max(len(r[i]) for r in rows) for i in range(4)]
    for r in rows:
        lines.append("  ".join(c.ljust(w) for c, w in zip(r[:4], widths)) + "  " + r[4])
    lines.append("")
    for i, f in enumerate(findings, 1):
        lines.append(f"[{i}] {f.kind} at step {f.first_step}: {f.suggestion} (source: {f.source})")
    return "\n".join(lines)


def run(args) -> int:
    try:
        thresholds = _parse_thresholds(args.thresholds)
    except ValueError as exc:
        print(f"nbkit findings: {exc}", file=sys.stderr)
        return 2
    loud = {"error"} | ({"warning"} if args.strict else set())
    status, report = 0, {}
    for path in args.run:
        try:
            findings = nbkit.load(path).findings(**thresholds)
        except NbkitError as exc:
            print(f"nbkit findings: {exc}", file=sys.stderr)
            return 2
        report[path] = [f.to_dict() for f in findings]
        if not args.json:
            print(_table(path, findings))
        if any(f.severity in loud for f in findings):
            status = 1
    if args.json:
        print(json.dumps(report, indent=1, default=float))
    return status

"""The verdict (DESIGN §2): several runs summarised over the window they share.

Pure functions on arrays and findings. Per run: the loss over the shared window (the mean of its
last 10 % of steps, "final-window loss", and the best), the findings present in that window by
kind (counted at steps every run recorded in full, so a thinned run is not flattered by its
gaps), and for a self-replay its fidelity. The run with the lowest final-window loss is marked;
its margin over the runner-up is judged against the noise of the paired per-step loss
differences on the shared batches, with a moving-block bootstrap over steps (Künsch 1989, "The
jackknife and the bootstrap for general stationary observations", Annals of Statistics 17(3)):
blocks keep the steps' autocorrelation that an ordinary bootstrap would break. The block length
n^(1/3) is common practice, not a derived optimum.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

FINAL_SHARE = 0.10        # the final window: the last 10 % of the shared steps (at least one step)
RESAMPLES = 2000          # bootstrap resamples; the seed is fixed so a verdict reads the same twice
CONFIDENCE = 0.95


@dataclass(frozen=True)
class RunVerdict:
    """One row of the verdict table.

    name: the run's name; final_loss: mean loss over the final window (NaN without a finite loss);
    best_loss: lowest loss in the shared window (and best_step, its step); findings: {kind: count}
    of findings overlapping the steps every run recorded in full; fidelity: for a self-replay,
    "identical" or "differs from step S: cause", else ""."""
    name: str
    final_loss: float
    best_loss: float
    best_step: int | None
    findings: dict = field(default_factory=dict)
    fidelity: str = ""


@dataclass(frozen=True)
class Margin:
    """How far the best run is ahead of the runner-up over the final window.

    difference: mean of (runner-up loss − best loss) per shared step; low, high: its CONFIDENCE
    moving-block bootstrap interval; block: the block length in steps; steps: paired steps used;
    clear: the interval lies above zero (else the margin is within the noise)."""
    runner_up: str
    difference: float
    low: float
    high: float
    block: int
    steps: int
    clear: bool


@dataclass(frozen=True)
class Verdict:
    """window: (first, last) shared step or None; final: (first, last) step of the final window;
    rows: one per run, in the order given; best: the best run's name or None; margin: Margin or None
    (fewer than two runs with a final loss, or too few paired steps); note: why something is missing."""
    window: tuple[int, int] | None
    final: tuple[int, int] | None
    rows: list[RunVerdict]
    best: str | None
    margin: Margin | None
    note: str = ""
    ranges: dict = field(default_factory=dict)     # {name: (first, last)} of every run's own steps
    ties: tuple = ()     # runs whose losses over the shared window equal the best run's, step for step


def shared_steps(steps: dict[str, np.ndarray]) -> np.ndarray:
    """Steps every run recorded (sorted)."""
    arrays = [np.asarray(s, dtype=np.int64) for s in steps.values()]
    out = arrays[0]
    for s in arrays[1:]:
        out = np.intersect1d(out, s)
    return out


def block_bootstrap_interval(d: np.ndarray, *, block: int | None = None, resamples: int = RESAMPLES,
                             confidence: float = CONFIDENCE, seed: int = 0) -> tuple[float, float, int]:
    """(low, high, block) percentile interval of the mean of `d` under the moving-block bootstrap
    (Künsch 1989): resample overlapping blocks of `block` consecutive values (default
    round(n^(1/3)), common practice) until n values, take the mean; repeat `resamples` times."""
    d = np.asarray(d, dtype=np.float64)
    n = len(d)
    if n == 0:
        return np.nan, np.nan, 0
    block = int(block or max(1, round(n ** (1 / 3))))
    block = min(block, n)
    starts_count = n - block + 1
    per = -(-n // block)
    rng = np.random.default_rng(seed)
    starts = rng.integers(0, starts_count, size=(resamples, per))               # (resamples, blocks)
    index = (starts[:, :, None] + np.arange(block)[None, None, :]).reshape(resamples, -1)[:, :n]
    means = d[index].mean(axis=1)
    tail = (1 - confidence) / 2
    low, high = np.quantile(means, [tail, 1 - tail])
    return float(low), float(high), block


def fidelity_text(meta: dict) -> str:
    """What a self-replay's stored fidelity (meta["replay"]["fidelity"]) says, in words; "" otherwise."""
    fidelity = (meta.get("replay") or {}).get("fidelity")
    if not fidelity:
        return ""
    if fidelity.get("identical"):
        return "identical to its parent"
    first = fidelity.get("first_step")
    cause = fidelity.get("first_difference") or "a difference"
    return f"differs from step {first}: {cause}" if first is not None else f"differs: {cause}"


def verdict(losses: dict[str, tuple[np.ndarray, np.ndarray]], *, findings: dict[str, list] | None = None,
            full_steps: dict[str, np.ndarray] | None = None, metas: dict[str, dict] | None = None) -> Verdict:
    """The verdict of runs {name: (steps, loss)} (loss NaN where unknown).

    findings: {name: [Finding]}; full_steps: {name: steps whose per-tensor quantities were recorded}
    (default: all its steps); metas: {name: run.meta} for the fidelity of self-replays."""
    names = list(losses)
    ranges = {n: (int(s[0]), int(s[-1])) for n, (s, _) in losses.items() if len(s)}
    common = shared_steps({n: s for n, (s, _) in losses.items()})
    if len(common) == 0:
        return Verdict(None, None, [RunVerdict(n, np.nan, np.nan, None, {}, fidelity_text((metas or {}).get(n, {})))
                                    for n in names], None, None,
                       "The runs share no step, so no window to compare them over; each run's own steps: "
                       + "; ".join(f"{n} {a}–{b}" for n, (a, b) in ranges.items()), ranges)
    count = max(1, int(np.ceil(FINAL_SHARE * len(common))))
    final_steps = common[-count:]
    aligned = {}
    for n, (s, loss) in losses.items():
        rows = np.searchsorted(s, common)
        aligned[n] = np.asarray(loss, dtype=np.float64)[rows]                  # (shared steps,)
    full = shared_steps(full_steps) if full_steps else common
    full = np.intersect1d(full, common)
    rows_out = []
    for n in names:
        loss = aligned[n]
        final = loss[-count:]
        final_loss = float(np.nanmean(final)) if np.isfinite(final).any() else np.nan
        best_at = int(np.nanargmin(loss)) if np.isfinite(loss).any() else None
        kinds: dict[str, int] = {}
        for f in (findings or {}).get(n, []):
            inside = full[(full >= f.first_step) & (full <= f.last_step)]
            if len(inside):
                kinds[f.kind] = kinds.get(f.kind, 0) + 1
        rows_out.append(RunVerdict(n, final_loss, float(loss[best_at]) if best_at is not None else np.nan,
                                   int(common[best_at]) if best_at is not None else None, dict(sorted(kinds.items())),
                                   fidelity_text((metas or {}).get(n, {}))))
    ranked = sorted((r for r in rows_out if np.isfinite(r.final_loss)), key=lambda r: r.final_loss)
    best = ranked[0].name if ranked else None
    margin, note = None, ""
    ties = tuple(r.name for r in ranked[1:] if np.array_equal(aligned[r.name], aligned[best], equal_nan=True))
    others = [r for r in ranked[1:] if r.name not in ties]      # a bit-exact self-replay is no rival
    if others:
        second = others[0].name
        d = aligned[second][-count:] - aligned[best][-count:]
        d = d[np.isfinite(d)]
        if len(d) >= 2:
            low, high, block = block_bootstrap_interval(d)
            margin = Margin(second, float(d.mean()), low, high, block, len(d), bool(low > 0))
        else:
            note = (f"only {len(d)} paired final-window step(s): too few to judge the margin against noise; "
                    "record or replay more steps in common")
    return Verdict((int(common[0]), int(common[-1])), (int(final_steps[0]), int(final_steps[-1])), rows_out, best,
                   margin, note, ranges, ties)

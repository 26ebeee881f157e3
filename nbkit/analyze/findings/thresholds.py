"""The finding thresholds: their defaults with the reason for each, and the keywords that override them.

README.md, "Findings", explains each threshold. `thresholds_from_keywords` is the one place that
checks override names, including the deprecated names (one release of grace).
"""
from __future__ import annotations

import inspect
import os
import warnings
from dataclasses import dataclass, fields

from nbkit.analyze.curvature import AnalysisError


@dataclass(frozen=True)
class Thresholds:
    """Documented defaults; the reason for each is beside it (README.md, "Findings")."""

    window: int = 20                  # heavy rows a pattern must last to count as sustained
    sustained_share: float = 0.8      # share of the window's rows that must meet the condition
    spike_factor: float = 10.0        # grad-spike: global gradient norm above 10× its running median ...
    spike_over_max: float = 1.5       # ... and 1.5× the largest of the history (not an ordinary swing)
    spike_history: int = 50           # rows of running history
    spike_min_history: int = 10       # rows needed before spikes are judged
    oversized_ratio: float = 0.25     # oversized-updates: 250× the common-practice 1e-3: weights rewritten
                                      # every few steps ...
    oversized_single_step: float = 1.0  # ... or any single step that moves a weight by more than its own norm
    tiny_weight: float = 1e-3         # ... both ignore a weight while its RMS is below 1e-3 × the median weight's
                                      # (class tokens and position embeddings initialised near 0, zero gates)
    stalled_ratio: float = 1e-5       # stalled-updates: 100× below 1e-3 while the learning rate is not decayed
    eps_share: float = 0.5            # "most coordinates": ε outweighs √v̂ for over half of them
    relevant_grad: float = 1e-4       # eps-dominated, lost-updates: only tensors whose gradient RMS is at
                                      # least 1e-4 × the median tensor's (others barely matter to the loss)
    tiny_input: float = 1e-3          # ... or weights whose gradient RMS is below 1e-3 × their own layer's
                                      # bias gradient RMS: the layer's inputs are ~1000× below unit scale
    sign_flip: float = 0.25           # oscillation: a quarter of the coordinates flip sign (the sharp
                                      # directions that oscillate are few, but dominate the gradient) ...
    grad_cosine: float = -0.3         # ... with consecutive gradients pointing against each other ...
    oscillation_decay: float = 0.5    # ... a gradient norm that does not decay (a converging zig-zag) ...
    oscillation_progress: float = 0.05  # ... a loss that does not fall by 5 % meanwhile ...
    oscillation_gap: float = 0.1      # ... and sits above its best by 10 % of the run's loss range
    reversed_share: float = 0.3       # overshoot: many updates move against the gradient ...
    reversed_over_flip: float = 2.0   # ... twice as often as gradients flip sign (noise reverses about as
                                      # often as it flips; momentum carried past a minimum reverses more)
    dead_share: float = 0.25          # dead-units: a quarter of a weight's rows without gradient (info;
    dead_share_warning: float = 0.5   # half of them: warning) ...
    dead_window: int = 50             # ... in every row of this many heavy rows
    damped_update: float = 0.05      # damped-units: a unit's update RMS below 1/20 of its tensor's median unit's ...
    damped_gain: float = 0.05        # ... and its gain below 1/20 of the median unit's gain (a noisy unit under
                                      # Adam or momentum sits near 0.2×; below 0.05× the step is cut by
                                      # something outside the optimizer's rule)
    lost_share: float = 0.25          # lost-updates: a quarter of the updates round to nothing
    plateau_window: int = 100         # plateau: loss rows per window
    plateau_flat: float = 0.02        # loss change within the window, as a share of the run's progress
    plateau_gap: float = 0.2          # window loss above the best by this share of the progress
    plateau_grad: float = 0.1         # global gradient norm below this share of its peak level
    stability_margin: float = 1.0     # over-stability-limit: sharpness above the limit ...
    stability_rise: float = 1.05      # ... with the loss's median over the next steps 5 % above the one before
    stability_window: int = 10        # ... (steps in each of the two windows)
    stability_far: float = 4.0        # or far above the limit with the loss rising at all
    noise_factor: float = 10.0        # batch size 10× below / above the gradient noise scale
    overran_rho: float = 0.1          # step-overran: first-order ρ far below Nocedal & Wright's 1/4 ...
    overran_window: int = 5           # ... sustained over this many computed steps (or ρ < 0 at any one)
    overran_noise: float = 1e-4       # ... only steps predicted to change the loss by more than 1e-4 × |loss|
                                      # (float32 losses round at about 1e-7 relative: common practice margin)


# Old threshold name -> its new name. The finding kind update-ratio became oversized-updates and
# stalled-updates after nbkit 0.1.0; the old names keep working, with a DeprecationWarning, for one release.
DEPRECATED_THRESHOLDS = {
    "update_ratio_high": "oversized_ratio",
    "update_ratio_extreme": "oversized_single_step",
    "update_ratio_low": "stalled_ratio",
}


NBKIT_FOLDER = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))


def stacklevel_outside_nbkit() -> int:
    """The warnings.warn stacklevel, for a warning raised by its caller, of the first frame outside the
    nbkit package: the warning then names the user's line (run.findings or find, whichever they called)
    and is shown where Python shows DeprecationWarnings by default (__main__, notebooks, test runners)."""
    frame, level = inspect.currentframe().f_back, 1
    while frame.f_back is not None and os.path.abspath(frame.f_code.co_filename).startswith(NBKIT_FOLDER + os.sep):
        frame, level = frame.f_back, level + 1
    return level


def thresholds_from_keywords(**keywords) -> Thresholds:
    """Thresholds with `keywords` overriding the defaults. A deprecated name warns (DeprecationWarning,
    naming the new one) and sets the new field; an unknown name, or an old and a new name for the same
    threshold, raises AnalysisError."""
    valid = [f.name for f in fields(Thresholds)]
    unknown = sorted(set(keywords) - set(valid) - set(DEPRECATED_THRESHOLDS))
    if unknown:
        raise AnalysisError(f"Unknown finding threshold(s) {unknown}; valid names are {sorted(valid)}")
    values = {}
    for name, value in keywords.items():
        new = DEPRECATED_THRESHOLDS.get(name)
        if new is None:
            values[name] = value
            continue
        if new in keywords:
            raise AnalysisError(f"The finding thresholds {name!r} and {new!r} are the same threshold "
                                f"(got {keywords[name]!r} and {keywords[new]!r}); pass only {new!r}")
        warnings.warn(f"The finding threshold {name!r} is deprecated and will be removed in the next release; "
                      f"use {new!r} (the finding kind update-ratio is now oversized-updates and stalled-updates)",
                      DeprecationWarning, stacklevel=stacklevel_outside_nbkit())
        values[new] = value
    return Thresholds(**values)

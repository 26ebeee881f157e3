"""The recording options: one frozen dataclass, validated once, written to the metadata by one method."""
from __future__ import annotations

import warnings
from dataclasses import dataclass, field, fields
from typing import Callable

import torch

from nbkit.errors import RecorderError
from nbkit.store.layout import KEPT_BATCH_BUDGET_BYTES

SAMPLE_SIZE = 4096      # sampled coordinates per tensor for shares and histograms (all when smaller)

# old keyword -> new keyword; each old one keeps working for one release, with a DeprecationWarning
RENAMED = {"flush_seconds": "commit_seconds"}


def option(default, help: str):
    """A recording option: its default and what it does (shown by help(nbkit.record))."""
    return field(default=default, metadata={"help": help})


@dataclass(frozen=True)
class RecordOptions:
    """Every keyword of nbkit.record after model, optimizer and path, with its default."""

    every: int | str = option("auto", "heavy per-tensor quantities every N steps, or \"auto\": the stride (in "
                                      "pairs of neighbouring steps, the first 50 steps in full) that keeps the "
                                      "recorder's measured cost within 5 % of the training step; loss, settings, "
                                      "fingerprints, kept batches and gradient norms every step")
    probes: int = option(64, "probe coordinates per tensor, kept in full every heavy step")
    keyframe_every: int = option(100, "keyframe stride (plus step 0 and the final state at close())")
    criterion: torch.nn.Module | None = option(None, "an nn.Module loss; its training-mode outputs give each "
                                                     "step's loss")
    step_fn: Callable | None = option(None, "step_fn(model, micro_batch) -> loss: the trained loss of one kept "
                                            "micro-batch {\"args\", \"kwargs\", \"targets\"}; checked against "
                                            "the recorded gradient, then used for curvature, noise and replays")
    keep_batches: bool | int = option(True, "store each step's micro-batches with their random and autocast state, "
                                            "so replays need no loader: True keeps up to 1 GiB (then the newest "
                                            "windows after keyframes), an int is the budget in bytes, False "
                                            "keeps none")
    clip: float | None = option(None, "the max norm your loop clips gradients to (clip_grad_norm_ over "
                                      "model.parameters()), so replays re-apply it; the trainer callbacks read it "
                                      "from the trainer")
    profiles: bool = option(True, "per-unit profiles (update and gradient RMS, ε-share per output unit and input "
                                  "feature) of every weight of 2 or more dimensions, at each heavy step")
    unit_names: dict | None = option(None, "names of a weight's units in the views and findings: {tensor: "
                                           "{\"rows\": [...], \"columns\": [...]}} (indices otherwise)")
    curvature_every: int | str = option(0, "sharpness every N steps (0 = off), or \"auto\": as often as 1 % of the "
                                           "training step allows (one estimate costs 50-150 steps)")
    noise_every: int | str = option(0, "gradient noise scale every N steps (0 = off), or \"auto\" (as curvature_every)")
    commit_seconds: float = option(5.0, "rows are committed to disk at least this often: a crash loses at most "
                                        "this much (flush_seconds, its old name, works until the next release)")
    expected_steps: int | None = option(None, "lets record() refuse when the disk cannot hold the run")
    strict: bool = option(False, "True: recorder errors raise instead of warning once")
    resume: bool | int = option(False, "True: append to an existing recording, steps continue (an int names "
                                       "the restart step; an overlap or gap is stated under \"resumes\")")
    overwrite: bool = option(False, "True: replace an existing recording at the path")

    def __post_init__(self):
        if self.every != "auto" and (not isinstance(self.every, int) or isinstance(self.every, bool) or self.every < 1):
            raise RecorderError(f"Invalid every: {self.every!r}; expected \"auto\" (the default: within 5 % of the "
                                "training step) or a positive integer (1: every step in full)")
        for name, low in (("probes", 0), ("keyframe_every", 1), ("curvature_every", 0),
                          ("noise_every", 0)):
            value = getattr(self, name)
            if value == "auto" and name in ("curvature_every", "noise_every"):
                continue
            if not isinstance(value, int) or isinstance(value, bool) or value < low:
                also = " or \"auto\"" if name in ("curvature_every", "noise_every") else ""
                raise RecorderError(f"Invalid {name}: {value!r}; expected an integer >= {low}{also}")
        if not isinstance(self.keep_batches, (bool, int)) or (type(self.keep_batches) is int and self.keep_batches < 0):
            raise RecorderError(f"Invalid keep_batches: {self.keep_batches!r}; expected True, False or a byte budget "
                                "(an integer >= 0)")
        if self.clip is not None and (isinstance(self.clip, bool) or not isinstance(self.clip, (int, float))
                                      or not self.clip > 0):
            raise RecorderError(f"Invalid clip: {self.clip!r}; expected the positive max norm your loop passes to "
                                "torch.nn.utils.clip_grad_norm_, or None")
        if self.probes > SAMPLE_SIZE:
            raise RecorderError(f"Invalid probes: {self.probes}; at most {SAMPLE_SIZE} probe coordinates per tensor")
        if not (isinstance(self.commit_seconds, (int, float)) and not isinstance(self.commit_seconds, bool)
                and self.commit_seconds > 0):
            raise RecorderError(f"Invalid commit_seconds: {self.commit_seconds!r}; expected a positive number of "
                                "seconds")
        if self.expected_steps is not None and (not isinstance(self.expected_steps, int) or self.expected_steps < 1):
            raise RecorderError(f"Invalid expected_steps: {self.expected_steps!r}; expected a positive integer or None")
        if self.criterion is not None and not isinstance(self.criterion, torch.nn.Module):
            raise RecorderError(f"criterion must be an nn.Module loss (e.g. torch.nn.CrossEntropyLoss()), got "
                                f"{type(self.criterion).__name__}; for a loss function, call rec.loss(loss) instead")
        if not isinstance(self.profiles, bool):
            raise RecorderError(f"Invalid profiles: {self.profiles!r}; expected True or False")
        if self.unit_names is not None and not isinstance(self.unit_names, dict):
            raise RecorderError(f"Invalid unit_names: {type(self.unit_names).__name__}; expected a dict "
                                "{tensor name: {\"rows\": [...], \"columns\": [...]}}")
        if self.step_fn is not None and not callable(self.step_fn):
            raise RecorderError(f"step_fn must be callable as step_fn(model, batch) -> loss, got {self.step_fn!r}")

    @property
    def batch_budget(self) -> int:
        """Bytes of kept batches the recording may hold (0: none are kept)."""
        if self.keep_batches is True:
            return KEPT_BATCH_BUDGET_BYTES
        return 0 if self.keep_batches is False else int(self.keep_batches)

    @classmethod
    def from_keywords(cls, **keywords) -> "RecordOptions":
        """The options from nbkit.record's keywords; an unknown one is an error naming the valid ones,
        a renamed one warns (DeprecationWarning) and is applied under its new name."""
        for old, new in RENAMED.items():
            if old in keywords:
                warnings.warn(f"nbkit.record({old}=...) is renamed {new}=...; {old} stops working in the next "
                              "release", DeprecationWarning, stacklevel=3)
                if new in keywords:
                    raise RecorderError(f"Pass {new}= only (the same option as the deprecated {old}=)")
                keywords[new] = keywords.pop(old)
        valid = [f.name for f in fields(cls)]
        unknown = sorted(set(keywords) - set(valid))
        if unknown:
            raise RecorderError(f"Unknown recording option(s) {unknown}; nbkit.record accepts {', '.join(valid)}")
        return cls(**keywords)

    @classmethod
    def describe(cls) -> str:
        """One line per option: name=default: what it does."""
        return "\n".join(f"    {f.name}={f.default!r}: {f.metadata['help']}" for f in fields(cls))

    @classmethod
    def from_meta(cls, meta: dict, **overrides) -> "RecordOptions":
        """The options a recording's metadata states (as_meta's inverse, where it can be: a criterion and
        a step_fn are not stored), with `overrides`."""
        stored = {f.name: meta[f.name] for f in fields(cls) if f.name in meta
                  and f.name not in ("criterion", "clip", "profiles", "unit_names")}
        profiles = meta.get("profiles")
        if isinstance(profiles, dict):          # meta["profiles"] is the table (nbkit.record.setup.profile_meta)
            stored["profiles"] = bool(profiles.get("enabled", True))
            stored["unit_names"] = profiles.get("unit_names") or None
        if "commit_seconds" not in meta and "flush_seconds" in meta:     # recordings before the rename
            stored["commit_seconds"] = meta["flush_seconds"]
        stored["probes"] = meta["probes"]
        return cls(**{**stored, **overrides})

    def as_meta(self) -> dict:
        """The options as the recording's metadata states them (the criterion by its class name)."""
        # a function cannot be stored; resume and overwrite describe the set-up, not the run; probes is
        # a top-level entry of the layout; clip is meta["clip"], the rule a replay re-applies; profiles and
        # unit_names are in meta["profiles"] (nbkit.record.setup.profile_meta)
        meta = {f.name: getattr(self, f.name) for f in fields(self)
                if f.name not in ("step_fn", "resume", "overwrite", "probes", "clip", "profiles", "unit_names")}
        meta["criterion"] = type(self.criterion).__name__ if self.criterion is not None else None
        return meta

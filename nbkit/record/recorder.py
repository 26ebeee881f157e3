"""The Recorder: optimizer and module hooks that turn each training step into one recorded row.

The recorder only orchestrates: numbers come from nbkit.measure, files from nbkit.store. It never
draws from the global random generators (its sample of coordinates comes from a private
torch.Generator), so a recorded run ends bit-identical to the same run unrecorded.
"""
from __future__ import annotations

import atexit
import collections
import functools
import datetime
import math
import os
import random
import shutil
import sys
import warnings
import weakref
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import torch
from torch.utils.hooks import RemovableHandle

from nbkit.errors import RecorderError, RecorderWarning
from nbkit.measure.quantities import HISTOGRAM_BINS, HISTOGRAM_LOW, QUANTITIES
from nbkit.record import capture
from nbkit.measure.update_rules import adapter_for, step_count
from nbkit.measure.fingerprint import combine, fingerprint
from nbkit.store import keyframes as kf
from nbkit.store.files import is_recording
from nbkit.store.writer import RecordingWriter, estimate_recording_bytes, plan_resume

SAMPLE_SIZE = 4096      # sampled coordinates per tensor for shares and histograms (all when smaller)
SAMPLE_SEED = 20251201  # the private generator's seed: the same coordinates in every recording

_live_recorders: "weakref.WeakSet[Recorder]" = weakref.WeakSet()


@atexit.register
def _close_all_at_exit():
    for recorder in list(_live_recorders):
        try:
            recorder.close()
        except Exception:           # strict mode raises; at interpreter exit there is no caller to tell
            pass


_exit_hook_registered = False


def _close_before_thread_pools_stop():
    """Also close at threading shutdown, which runs before atexit: by atexit time the thread pools
    that zarr writes through already refuse work, and an open recording would lose every row
    since its last flush. Registered after zarr is imported, so it runs before their exit hooks."""
    global _exit_hook_registered
    if _exit_hook_registered:
        return
    import threading

    try:
        threading._register_atexit(_close_all_at_exit)
        _exit_hook_registered = True
    except (AttributeError, RuntimeError):      # no such hook in this Python, or already shutting down
        pass


@dataclass
class _Tensor:
    name: str
    param: torch.Tensor
    group: int
    index: torch.Tensor          # sampled flat coordinates; the first `probes` are the probes
    probes: int
    shape: tuple = ()            # the shape when recording started
    stopped: str | None = None   # why this tensor is no longer recorded


def _jsonable(value):
    if isinstance(value, torch.Tensor):
        return value.item() if value.numel() == 1 else value.tolist()
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if value is None or isinstance(value, (bool, int, float, str)):
        return value
    return repr(value)


def _layer_of(name: str) -> str:
    if name.startswith("group") and name.split(".")[0][5:].isdigit() and name.count(".") == 1:
        return "(optimizer only)"
    return name.rsplit(".", 1)[0] if "." in name else "(model)"


class Recorder:
    """Records every optimizer step of `optimizer` training `model` into a recording at `path`.

    Created by nbkit.record(...); see its docstring for the arguments. Use as a context manager or
    call close(). Like torch's hook handles, close() (alias remove()) is safe to call twice.
    """

    def __init__(self, model, optimizer, path, *, every=1, probes=64, keyframe_every=100, criterion=None,
                 step_fn=None, curvature_every=0, noise_every=0, flush_seconds=5.0, expected_steps=None,
                 strict=False, resume=False, overwrite=False, _extra_meta=None, _first_step=0):
        self._validate(model, optimizer, path, every, probes, keyframe_every, curvature_every, noise_every,
                       flush_seconds, expected_steps)
        self.model, self.optimizer, self.criterion, self.step_fn = model, optimizer, criterion, step_fn
        self.every, self.probes, self.keyframe_every = int(every), int(probes), int(keyframe_every)
        self.strict = strict
        self.recording_path = Path(path)
        self.adapter = adapter_for(optimizer)
        self._closed = False
        self._failed = False
        self._warned: set[str] = set()
        self._depth = 0
        self.step = int(_first_step)    # a replay keeps its parent's step numbering
        self._open_row: dict | None = None
        self._forward_since_step = False
        self._reported_loss = None
        self._criterion_losses: list = []
        self._closure_loss = None
        self._input_prints: list = []
        self._target_prints: list = []
        self._last_keyframe = None
        # Curvature / noise estimates during recording (nbkit.analyze.during_recording) need the
        # step's batch: the last training forward's inputs and the criterion's targets.
        self._analysis = None
        self._last_inputs = None      # (args, kwargs) of the last training-mode forward
        self._last_targets = None     # criterion inputs after the prediction
        self._paused = False          # True while the analysis runs its extra passes: hooks ignore them
        self._step_hooks = collections.OrderedDict()   # add_step_hook: handle id -> hook(row) (weakref-able)
        from nbkit.analyze.during_recording import analysis_for

        self._analysis = analysis_for(self, curvature_every, noise_every)   # None when both are 0
        self._generator = torch.Generator().manual_seed(SAMPLE_SEED)
        self._blocks = None                 # nbkit.record.capture.Block list, made at the first step
        self._waiting_rows = collections.deque()   # rows whose statistics are still being computed
        self.background = True              # statistics on a background thread (False: in the hook)
        self._pacer = capture.Pacer()       # when they run there
        self._q_index = {q: i for i, q in enumerate(QUANTITIES)}
        self._tensors, orphans, frozen = self._table(model, optimizer)
        self._groups = [[t for t in self._tensors if t.group == g] for g in range(len(optimizer.param_groups))]
        meta = self._meta(model, optimizer, orphans, frozen, flush_seconds, expected_steps, curvature_every,
                          noise_every)
        meta.update(_extra_meta or {})      # replays add their parent recording and start step
        self._check_disk(meta, expected_steps)     # before _prepare_path may remove an old recording
        plan = self._prepare_path(overwrite, resume)
        if plan is not None:                # resume: steps continue, the old metadata is kept
            try:
                meta = plan.merged_meta(meta)
            except ValueError as exc:
                raise RecorderError(f"Cannot resume the recording at {str(self.recording_path)!r}: {exc}. "
                                    "Resume only with the same model, optimizer and settings, or record "
                                    "into a new path") from None
            self.step = plan.next_step
        try:
            self._writer = RecordingWriter(self.recording_path, meta, flush_seconds=flush_seconds, resume=plan)
        except OSError as exc:
            raise RecorderError(f"Cannot write a recording at {str(self.recording_path)!r} "
                                f"({type(exc).__name__}: {exc}); choose a writable folder with free space") from exc
        try:
            self._snapshot(self.step)
        except Exception as exc:            # e.g. optimizer state a keyframe cannot hold: rows go on
            self._fail(f"the keyframe at step {self.step} could not be taken", exc, stop=False)
        self._handles = [
            optimizer.register_step_pre_hook(self._pre_step),
            optimizer.register_step_post_hook(self._post_step),
            model.register_forward_pre_hook(self._before_forward, with_kwargs=True),
            model.register_forward_hook(lambda module, args, output: self._pacer.forward_ended()),
        ]
        if criterion is not None:
            self._handles.append(criterion.register_forward_hook(self._after_criterion))
        optimizer._nbkit_recorder = weakref.ref(self)
        _live_recorders.add(self)
        _close_before_thread_pools_stop()

    # --- set-up ---------------------------------------------------------------------------------
    @staticmethod
    def _validate(model, optimizer, path, every, probes, keyframe_every, curvature_every, noise_every,
                  flush_seconds, expected_steps):
        if not isinstance(model, torch.nn.Module):
            raise RecorderError(f"model must be a torch.nn.Module, got {type(model).__name__}")
        if not isinstance(optimizer, torch.optim.Optimizer):
            raise RecorderError(f"optimizer must be a torch.optim.Optimizer, got {type(optimizer).__name__}")
        for name, value, low in (("every", every, 1), ("probes", probes, 0), ("keyframe_every", keyframe_every, 1),
                                 ("curvature_every", curvature_every, 0), ("noise_every", noise_every, 0)):
            if not isinstance(value, int) or isinstance(value, bool) or value < low:
                raise RecorderError(f"Invalid {name}: {value!r}; expected an integer >= {low}")
        if probes > SAMPLE_SIZE:
            raise RecorderError(f"Invalid probes: {probes}; at most {SAMPLE_SIZE} probe coordinates per tensor")
        if not (isinstance(flush_seconds, (int, float)) and flush_seconds > 0):
            raise RecorderError(f"Invalid flush_seconds: {flush_seconds!r}; expected a positive number of seconds")
        if expected_steps is not None and (not isinstance(expected_steps, int) or expected_steps < 1):
            raise RecorderError(f"Invalid expected_steps: {expected_steps!r}; expected a positive integer or None")
        if not any(True for _ in model.parameters()):
            raise RecorderError(f"The model ({type(model).__name__}) has no parameters: there is nothing to record")
        if not any(len(g["params"]) for g in optimizer.param_groups):
            raise RecorderError("The optimizer holds no parameters: there is nothing to record")
        existing = getattr(optimizer, "_nbkit_recorder", None)
        if existing is not None and existing() is not None and not existing()._closed:
            raise RecorderError(f"This optimizer is already recorded into {str(existing().recording_path)!r}; "
                                "close that recorder first (rec.close())")
        for parent in Path(path).resolve().parents:
            if is_recording(parent):
                raise RecorderError(f"{str(path)!r} is inside the recording {str(parent)!r}; "
                                    "choose a path outside it")

    def _prepare_path(self, overwrite, resume):
        """Make the folder ready; with resume, return the plan for continuing the recording there."""
        path = self.recording_path
        if resume is not False and resume is not None and is_recording(path):
            if overwrite:
                raise RecorderError("Pass either resume=True or overwrite=True, not both")
            # resume=True: restart at the optimizer's own step count when it keeps one (Adam family),
            # else right after the last committed step; an int names the restart step explicitly.
            restart = None if resume is True else int(resume)
            if restart is None:
                counts = {step_count(s) for s in self.optimizer.state.values()}
                if len(counts) == 1 and math.isfinite(next(iter(counts))):
                    restart = int(next(iter(counts)))
            try:
                return plan_resume(path, restart)
            except (OSError, ValueError, KeyError, TypeError) as exc:
                raise RecorderError(f"Cannot resume the recording at {str(path)!r}: it is damaged ({exc}); "
                                    "nbkit.load() says what is readable; record into a new path") from exc
        if path.exists() and any(path.iterdir()):
            if not is_recording(path):
                raise RecorderError(f"{str(path)!r} exists and is not an nbkit recording; "
                                    "choose an empty or new folder (nothing there was touched)")
            if not overwrite:
                raise RecorderError(f"A recording already exists at {str(path)!r}; pass overwrite=True to "
                                    "replace it or resume=True to continue it")
            shutil.rmtree(path)
        try:
            path.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise RecorderError(f"Cannot create the recording folder {str(path)!r} ({type(exc).__name__}: {exc}); "
                                "choose a writable location") from exc
        return None

    def _check_disk(self, meta, expected_steps):
        """Refuse to start when the estimated size for expected_steps exceeds the free disk space."""
        if expected_steps is None:
            return
        states = 1 + sum(m is not None for m in (self.adapter.first_moment, self.adapter.second_moment))
        estimate = estimate_recording_bytes(meta, expected_steps, state_copies=states)
        meta["size_estimate"] = estimate
        existing = next(p for p in (self.recording_path.resolve(), *self.recording_path.resolve().parents) if p.exists())
        free = shutil.disk_usage(existing).free
        if estimate["total"] > free:
            raise RecorderError(
                f"A recording of {expected_steps} steps at {str(self.recording_path)!r} needs about "
                f"{estimate['total'] / 2**20:.0f} MiB ({estimate['rows'] / 2**20:.0f} MiB of rows, "
                f"{estimate['keyframes'] / 2**20:.0f} MiB of keyframes) but only {free / 2**20:.0f} MiB are free. "
                "Free disk space, record into another disk, or raise every / keyframe_every or lower probes")

    def _table(self, model, optimizer):
        names = {}
        order = {}
        for position, (name, p) in enumerate(model.named_parameters()):
            names[id(p)] = name
            order[id(p)] = position
        tensors, in_optimizer = [], set()
        for g, group in enumerate(optimizer.param_groups):
            for i, p in enumerate(group["params"]):
                in_optimizer.add(id(p))
                n = p.numel()
                size = min(SAMPLE_SIZE, n)
                index = torch.randperm(n, generator=self._generator)[:size] if n > size else \
                    torch.randperm(n, generator=self._generator)
                tensors.append(_Tensor(names.get(id(p), f"group{g}.{i}"), p, g, index, min(self.probes, size),
                                       tuple(p.shape)))
        position = {id(t.param): order.get(id(t.param), len(order) + k) for k, t in enumerate(tensors)}
        tensors.sort(key=lambda t: position[id(t.param)])
        orphans = [n for n, p in model.named_parameters() if p.requires_grad and id(p) not in in_optimizer]
        frozen = [n for n, p in model.named_parameters() if not p.requires_grad and id(p) not in in_optimizer]
        return tensors, orphans, frozen

    def _meta(self, model, optimizer, orphans, frozen, flush_seconds, expected_steps, curvature_every, noise_every):
        index = np.full((len(self._tensors), self.probes), -1, dtype=np.int64)
        for k, t in enumerate(self._tensors):
            index[k, :t.probes] = t.index[:t.probes].numpy()
        sampled = [t.name for t in self._tensors if t.param.numel() > SAMPLE_SIZE]
        groups = []
        for group in optimizer.param_groups:
            hyper = {k: _jsonable(v) for k, v in group.items() if k != "params"}
            hyper["params"] = [t.name for t in self._tensors if any(t.param is p for p in group["params"])]
            groups.append(hyper)
        from nbkit import __version__

        return {
            "created": datetime.datetime.now(datetime.timezone.utc).isoformat(),
            "nbkit_version": __version__, "torch_version": torch.__version__, "numpy_version": np.__version__,
            "python_version": sys.version.split()[0], "threads": torch.get_num_threads(),
            "interop_threads": torch.get_num_interop_threads(), "pid": os.getpid(),
            "model_class": type(model).__name__,
            "optimizer": {"class": type(optimizer).__name__, "module": type(optimizer).__module__,
                          "adapter": self.adapter.name, "defaults": _jsonable(optimizer.defaults),
                          "first_moment": self.adapter.first_moment, "second_moment": self.adapter.second_moment,
                          "notes": self.adapter.notes},
            "gain_applicable": self.adapter.gain_applicable,
            "param_groups": groups,
            "tensors": [{"name": t.name, "shape": list(t.param.shape), "dtype": str(t.param.dtype).replace("torch.", ""),
                         "numel": t.param.numel(), "group": t.group, "layer": _layer_of(t.name),
                         "probes": t.probes, "sample_size": len(t.index)} for t in self._tensors],
            "orphans": orphans, "frozen": frozen,
            "quantities": list(QUANTITIES), "probes": self.probes, "_probe_index": index,
            "statistics": {
                "sample_size": SAMPLE_SIZE, "sample_seed": SAMPLE_SEED, "sampled_tensors": sampled,
                "exact": ["grad_norm", "grad_rms", "grad_max", "weight_norm", "update_norm", "update_ratio",
                          "grad_cosine", "update_grad_cosine", "dead_rows", "nonfinite", "weight_nonfinite",
                          "update_nonfinite", "grad_missing"],
                "sampled": ["gain_median", "accelerated", "damped", "reversed", "momentum_factor_median",
                            "scale_factor_median", "residual_median", "sign_flip", "eps_share",
                            "zero_grad_share", "lost_update_share", "state_nonfinite", "histograms"],
                "note": f"sampled quantities use a fixed seeded sample of {SAMPLE_SIZE} coordinates per tensor "
                        "(all coordinates of smaller tensors)",
            },
            "histogram_bins": HISTOGRAM_BINS, "histogram_low": dict(HISTOGRAM_LOW),
            "every": self.every, "keyframe_every": self.keyframe_every,
            "criterion": type(self.criterion).__name__ if self.criterion is not None else None,
            "curvature_every": curvature_every, "noise_every": noise_every,
            "flush_seconds": flush_seconds, "expected_steps": expected_steps, "strict": self.strict,
            "closed": False, "parent": None,
        }

    # --- reporting ------------------------------------------------------------------------------
    def _fail(self, what: str, exc: BaseException | None = None, *, stop: bool = True):
        """Report a recorder problem once; stop recording; raise only in strict mode."""
        if self.strict:
            raise RecorderError(f"nbkit recorder: {what}") from exc
        if what not in self._warned:
            self._warned.add(what)
            cause = f": {type(exc).__name__}: {exc}" if exc is not None else ""
            action = "recording stopped; training continues" if stop else "recording continues"
            warnings.warn(f"nbkit recorder ({self.recording_path}): {what}{cause}; {action}. "
                          "Pass strict=True to raise instead.", RecorderWarning, stacklevel=3)
        if stop:
            self._failed = True
            try:                     # the previous step's row is complete: keep it
                self._finalize_row()
            except Exception:
                pass

    def _check_writer(self):
        if self._writer.error is not None and not self._failed:
            self._fail("writing the recording failed", self._writer.error)
        if self._writer.dropped_rows and "the writer fell behind" not in self._warned:
            self._fail("the writer fell behind", RuntimeError(
                f"{self._writer.dropped_rows} rows were dropped because the disk is slower than training; "
                "raise every= to record heavy rows less often"), stop=False)

    @property
    def active(self) -> bool:
        return not (self._closed or self._failed or self._paused)

    # --- hooks ----------------------------------------------------------------------------------
    def _before_forward(self, module, args, kwargs):
        if not self.active:
            return None
        try:
            self._finalize_row()
            if module.training and torch.is_grad_enabled():
                self._input_prints.append(fingerprint(args, kwargs))
                if self._analysis is not None:
                    self._last_inputs = (args, kwargs)
                self._forward_since_step = True
        except Exception as exc:
            self._fail("a forward pre-hook failed", exc)
        return None

    def _after_criterion(self, module, inputs, output):
        if not self.active:
            return None
        try:
            if torch.is_grad_enabled() and self.model.training and isinstance(output, torch.Tensor):
                self._criterion_losses.append(output.detach())
                if len(inputs) > 1:
                    self._target_prints.append(fingerprint(inputs[1:]))
                    if self._analysis is not None:
                        self._last_targets = inputs[1:]
        except Exception as exc:
            self._fail("the criterion hook failed", exc)
        return None

    def _pre_step(self, optimizer, args, kwargs):
        self._depth += 1
        if self._depth > 1 or not self.active:
            return None                     # a subclass calling super().step(): record once
        try:
            self._check_writer()
            self._pacer.step_started()
            self._finalize_row()
            if self._heavy(self.step):
                self._copy_before()
            elif self._blocks:
                capture.wait_all(self._blocks)   # the statistics thread reads the optimizer state
            # args holds the optimizer itself first, then step()'s own arguments
            closure = kwargs.get("closure", args[1] if len(args) > 1 else None)
            if closure is not None:
                return self._wrap_closure(closure, args, kwargs)
        except Exception as exc:
            self._fail("the step pre-hook failed", exc)
        return None

    def _wrap_closure(self, closure, args, kwargs):
        self._closure_loss = None

        def recorded_closure():
            loss = closure()
            if self._closure_loss is None and loss is not None:
                self._closure_loss = loss.detach() if isinstance(loss, torch.Tensor) else loss
            return loss

        if "closure" in kwargs:
            return args, {**kwargs, "closure": recorded_closure}
        return (args[0], recorded_closure, *args[2:]), kwargs

    def _post_step(self, optimizer, args, kwargs):
        self._depth -= 1
        if self._depth > 0 or not self.active:
            if self._depth <= 0 and not self.active:
                self.step += 1
            return
        try:
            row = self._light_row()
            if self._heavy(self.step):
                self._heavy_row(row)
            if self._analysis is not None:
                self._analysis.after_step(self, row)     # may fill row["q"] sharpness / noise_scale
            for hook in list(self._step_hooks.values()):
                hook(row)
            self._open_row = row
            self._forward_since_step = False
            if (self.step + 1) % self.keyframe_every == 0:
                self._snapshot(self.step + 1)
        except Exception as exc:
            self._fail(f"recording step {self.step} failed", exc)
        finally:
            self.step += 1
        self._check_writer()

    # --- rows -----------------------------------------------------------------------------------
    def _heavy(self, step: int) -> bool:
        return step % self.every == 0

    def _light_row(self) -> dict:
        if self._criterion_losses:
            loss = float(torch.stack([l.float().mean() for l in self._criterion_losses]).mean())
        elif self._closure_loss is not None:
            loss = float(self._closure_loss)
        else:
            loss = math.nan
        if self._reported_loss is not None:
            loss, self._reported_loss = self._reported_loss, None
        prints = np.stack([combine(self._input_prints), combine(self._target_prints)])
        self._criterion_losses, self._input_prints, self._target_prints = [], [], []
        self._closure_loss = None
        lrs = np.array([float(g["lr"]) for g in self.optimizer.param_groups], dtype=np.float64)
        return {"step": self.step, "loss": loss, "lr": lrs, "heavy": False, "fingerprint": prints,
                "q": np.full((len(QUANTITIES), len(self._tensors)), np.nan, dtype=np.float32),
                "hist": np.zeros((3, len(self._tensors), HISTOGRAM_BINS + 2), dtype=np.uint32), "probes": {}}

    def _finalize_row(self, force: bool = False):
        """Hand finished rows to the writer, in step order. A row whose statistics still run on
        the background thread waits for a later hook unless `force` (flush, close)."""
        if self._open_row is not None:
            row, self._open_row = self._open_row, None
            self._waiting_rows.append(row)
        while self._waiting_rows:
            row = self._waiting_rows[0]
            if not force and not all(job.done() for job in row.get("_jobs", ())):
                return
            self._waiting_rows.popleft()
            self._complete_row(row)
            self._writer.put_row(row)

    def _complete_row(self, row: dict):
        """Wait for the background statistics of the row (re-raising their error, if any)."""
        for job in row.pop("_jobs", ()):
            job.result()

    def loss(self, value) -> None:
        """Report the loss: for the step about to be taken, or for the step just taken when called
        after optimizer.step() and before the next forward pass. Wins over `criterion`."""
        if not self.active:
            return
        try:
            value = float(value.detach().float().mean()) if isinstance(value, torch.Tensor) else float(value)
        except (TypeError, ValueError) as exc:
            self._fail(f"rec.loss() got {value!r}, which is not a number or tensor", exc, stop=False)
            return
        if self._open_row is not None and not self._forward_since_step:
            self._open_row["loss"] = value
        else:
            self._reported_loss = value

    def _copy_before(self):
        """Pre-step: θ of every live tensor into its block's buffer (nbkit.record.capture)."""
        if self._blocks is None:
            self._blocks = capture.make_blocks(self._tensors)
        for t in self._tensors:
            if not t.stopped and t.param.shape != t.shape:
                t.stopped = f"shape changed from {tuple(t.shape)} to {tuple(t.param.shape)}"
                self._fail(f"tensor {t.name!r}: {t.stopped}; its recording stops", stop=False)
        capture.copy_before(self._blocks, self.optimizer, self.adapter.before_keys)

    def _heavy_row(self, row: dict):
        """Post-step: the per-tensor quantities, histograms and probes of every block into `row`."""
        row["heavy"] = True
        q_index = self._q_index
        summary = row["q"]
        missing = q_index["grad_missing"]
        jobs = []
        for block in self._blocks or ():
            if not block.copied:
                continue
            block.copied = False
            rows = []
            for r, (t, k) in enumerate(zip(block.tensors, block.positions)):
                if t.stopped:
                    continue
                grad = t.param.grad
                summary[missing, k] = 1.0 if grad is None else 0.0
                if grad is None:
                    capture.forget_gradient(block, r)
                elif grad.is_sparse:
                    capture.forget_gradient(block, r)
                    self._fail(f"tensor {t.name!r} has a sparse gradient, which is not recorded", stop=False)
                else:
                    rows.append(r)
            if not rows:
                continue
            ks = [block.positions[r] for r in rows]
            deliver = functools.partial(capture.deliver, row, ks, [block.tensors[r].probes for r in rows],
                                        self._q_index, len(self._tensors), self.probes)
            jobs.append(capture.measure_block(block, rows, self.optimizer, self.adapter, self.probes,
                                              deliver=deliver))
        if jobs:
            row["_jobs"] = [self._pacer.submit(jobs, background=self.background)]

    # --- keyframes ------------------------------------------------------------------------------
    def _snapshot(self, step: int):
        if self._last_keyframe == step:
            return
        self._last_keyframe = step
        extra = {t.name: t.param for t in self._tensors if t.name.startswith("group") and _layer_of(t.name) == "(optimizer only)"}
        state = {
            "step": step,
            "model": self.model.state_dict(),
            "optimizer": self.optimizer.state_dict(),
            "extra_params": extra,
            "rng": {"torch": torch.get_rng_state(), "numpy": np.random.get_state(), "python": random.getstate()},
        }
        try:
            snapshot = kf.Snapshot(step, state)
        except TypeError as exc:        # state a keyframe cannot hold without pickle: rows go on
            self._fail("an optimizer or model state could not be stored in a keyframe", exc, stop=False)
            return
        self._writer.put_keyframe(snapshot)

    # --- closing --------------------------------------------------------------------------------
    def flush(self, wait: bool = True) -> None:
        """Hand every finished row to the writer and ask it to commit them now.

        wait=True: return once they are on disk (committed); False: return at once (the rows reach
        the disk within milliseconds; a live view refreshes from what is committed).
        """
        if self._closed:
            return
        self._finalize_row(force=True)
        self._writer.flush(timeout=60.0 if wait else 0)
        self._check_writer()

    def add_step_hook(self, hook) -> RemovableHandle:
        """Call hook(row) after each recorded step, on the training thread; returns a handle whose
        remove() unregisters it (safe to call twice). `row` is the step's Row (nbkit.record.rows);
        its per-tensor statistics may still be computing. An exception in a hook is reported like
        any recorder error (RecorderWarning; recording stops) and never reaches the training loop."""
        handle = RemovableHandle(self._step_hooks)
        self._step_hooks[handle.id] = hook
        return handle

    def close(self):
        """Stop recording, write the final keyframe and flush. Safe to call twice."""
        if self._closed:
            return
        try:
            for handle in self._handles:
                handle.remove()
            if not self._failed:
                self._finalize_row(force=True)
                self._snapshot(self.step)
        except Exception as exc:
            self._fail("closing the recording failed", exc)
        finally:
            self._closed = True
            self._writer.close()
            _live_recorders.discard(self)
        if self._writer.error is not None and "writing the recording failed" not in self._warned:
            self._fail("writing the recording failed", self._writer.error)

    remove = close

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False

    def __repr__(self):
        state = "closed" if self._closed else ("stopped after an error" if self._failed else "recording")
        return f"Recorder({str(self.recording_path)!r}, step {self.step}, {len(self._tensors)} tensors, {state})"

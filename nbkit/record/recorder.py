"""The Recorder: optimizer and module hooks that turn each training step into one recorded Row.

The recorder only orchestrates: numbers come from nbkit.measure (through nbkit.record.capture),
files from nbkit.store. It never draws from the global random generators (its sample of coordinates
comes from a private torch.Generator), so a recorded run ends bit-identical to the same run unrecorded.

Its public surface, in the manner of torch's hooks (DEVELOPERS.md lists it), is all that estimates
during recording, DDP, replays, the live view and the tests use.
"""
from __future__ import annotations

import collections
import contextlib
import functools
import time
import weakref
from pathlib import Path
from traceback import format_exception

import numpy as np
import torch
from torch.utils.hooks import RemovableHandle

from nbkit.analyze.model_copy import register_hook_owner
from nbkit.errors import RecorderError
from nbkit.measure.update_rules import adapter_for
from nbkit.record import capture, lifetime, setup, trained_loss, wrappers
from nbkit.record.backward import BackwardWatch
from nbkit.record.budget import StrideBudget, budget_share
from nbkit.record.estimates import estimates_for
from nbkit.record.options import RecordOptions
from nbkit.record.pacing import Pacer
from nbkit.record.reporting import ProblemReports
from nbkit.record.settings import SettingsReader
from nbkit.record.step_inputs import LOSS_RULES, NO_LOSS, StepInputs, StepTaken
from nbkit.store import batches as kept
from nbkit.store import keyframes as kf
from nbkit.store.layout import Row, setting_columns

_recorder_of: weakref.WeakKeyDictionary = weakref.WeakKeyDictionary()   # optimizer -> its open Recorder


class Recorder:
    """Records every optimizer step of `optimizer` training `model` into a recording at `path`.

    Created by nbkit.record(...) (options: nbkit.record.options.RecordOptions). Use as a context
    manager or call close(). Like torch's hook handles, close() (alias remove()) is safe to call twice.
    extra_meta: entries added to the recording's metadata (replays name their parent); first_step:
    the number of the first recorded step (a replay keeps its parent's numbering); check_loss=False:
    no trained-loss check (a replay's recorder: the replay rebuilt the loss itself).
    """

    def __init__(self, model, optimizer, path, options: RecordOptions | None = None, *,
                 extra_meta: dict | None = None, first_step: int = 0, check_loss: bool = True, **keywords):
        if keywords:                        # Recorder(model, optimizer, path, every=2, ...), as nbkit.record
            if options is not None:
                raise RecorderError("Pass the recording options either as RecordOptions or as keywords, not both")
            options = RecordOptions.from_keywords(**keywords)
        options = options or RecordOptions()
        parts = wrappers.unwrap_model(model)        # DDP's module, compile's _orig_mod: the plain model's names
        model, optimizer = parts.plain, wrappers.unwrap_optimizer(optimizer)
        setup.check_attachable(model, optimizer, path)
        existing = _recorder_of.get(optimizer)
        if existing is not None and not existing._closed:
            raise RecorderError(f"This optimizer is already recorded into {str(existing.recording_path)!r}; "
                                "close that recorder first (rec.close())")
        self.model, self.optimizer, self.options = model, optimizer, options
        self.strict = options.strict        # may be changed while recording: True makes errors raise
        self.recording_path = Path(path)
        self.adapter = adapter_for(optimizer)
        self.step = int(first_step)
        self.background = True              # statistics on a background thread (False: in the hook)
        self._closed = self._failed = self._paused = False
        self._reports = ProblemReports(self.recording_path)
        self._depth = 0                     # nesting of optimizer.step() (a subclass calling super().step())
        self._open_row: Row | None = None   # the last step's row, open for a rec.loss() after the step
        self._open_tasks: list = []         # ... and the statistics tasks that fill it in
        self._waiting: collections.deque = collections.deque()   # (row, statistics tasks) still computing
        self._forward_since_step = False
        self._traced = False                # a forward pre-hook ran inside torch.compile's tracing
        self._last_keyframe = None
        self._step_hooks: collections.OrderedDict = collections.OrderedDict()   # weakref-able, as torch's
        estimates = estimates_for(options)             # raises when they cannot work
        self._inputs = StepInputs(on_backward=self._backward_seen)
        self.loss_rebuildable: bool | None = None      # the trained-loss check's latest verdict (None: not yet)
        self._loss_checks: list = []
        self._check_pending = check_loss               # check the rebuilt loss at the first step
        self._params_before = None                     # the parameters before a check step's update
        self._kept_layout = None                       # layout signature of the last kept step
        self._layout_changes: list = []
        self._keeping = options.batch_budget > 0
        # estimates with stride "auto" take their share out of the recorder's 5 %
        auto_estimates = [options.curvature_every, options.noise_every].count("auto")
        self._budget = StrideBudget(share=budget_share(auto_estimates)) if options.every == "auto" else None
        self._stride = 1 if self._budget is not None else options.every
        self._last_heavy = None                        # the last heavy step (neighbour comparisons need step - 1)
        self._spent = [0.0, 0.0]                       # this step's training-thread seconds: light, heavy extras
        self._background_seen = (0.0, 0.0)             # statistics and writer CPU seconds measured so far
        self._blocks = None                 # nbkit.record.capture.Block list, made at the first step
        self.pacer = Pacer()                # when the statistics run (tests set its thresholds)
        self._tensors, orphans, frozen = setup.tensor_table(
            model, optimizer, self.probes, torch.Generator().manual_seed(setup.SAMPLE_SEED))
        meta = setup.recording_meta(model, optimizer, self.adapter, self._tensors, orphans, frozen, options,
                                    compiled=parts.compiled)
        meta.update(extra_meta or {})
        self._writer, next_step = setup.open_writer(self.recording_path, meta, options, optimizer, self.adapter,
                                                    setup.probe_index(self._tensors, self.probes))
        self.step = self.step if next_step is None else next_step     # resume: steps continue
        self._strides = list(self._writer.meta.get("strides") or []) + [[self.step, self._stride]]   # resume: kept
        self._writer.update_meta(strides=self._strides)
        self._settings = SettingsReader(setting_columns(self._writer.meta))   # the stored keys: fixed at the start
        table = self._writer.meta.get("profiles") or {}
        self._profile_units = table.get("units") if table.get("enabled") else None
        self._backward = BackwardWatch(self._tensors, self.report_problem)
        self._backward.want_probes = check_loss
        try:
            self._take_keyframe(self.step)
        except Exception as exc:            # e.g. optimizer state a keyframe cannot hold: rows go on
            self._fail(f"the keyframe at step {self.step} could not be taken", exc, stop=False)
        self._handles = [
            optimizer.register_step_pre_hook(self._pre_step),
            optimizer.register_step_post_hook(self._post_step),
            parts.forward_module.register_forward_pre_hook(self._before_forward, with_kwargs=True),
            parts.forward_module.register_forward_hook(self._after_forward),
        ]
        if self.criterion is not None:
            self._handles.append(self.criterion.register_forward_hook(self._after_criterion))
        if estimates is not None:           # a weak reference: the hook must not keep its recorder alive
            self.add_step_hook(functools.partial(estimates.after_step, weakref.proxy(self)))
        register_hook_owner(self)           # model copies (replays, landscapes) leave these hooks behind
        _recorder_of[optimizer] = self
        lifetime.keep_until_exit(self)

    # --- the public surface ---------------------------------------------------------------------
    @property
    def active(self) -> bool:
        return not (self._closed or self._failed or self._paused)

    # the options, read-only (self.options holds them all)
    criterion = property(lambda self: self.options.criterion)
    step_fn = property(lambda self: self.options.step_fn)
    every = property(lambda self: self.options.every)
    probes = property(lambda self: self.options.probes)
    keyframe_every = property(lambda self: self.options.keyframe_every)

    @property
    def tensors(self) -> list[str]:
        """The recorded tensors' names, in the recording's order."""
        return [t.name for t in self._tensors]

    def probe_coordinates(self, tensor: str) -> torch.Tensor:
        """The flat coordinates of `tensor` kept as probes (as Recording.probe_index gives them)."""
        for t in self._tensors:
            if t.name == tensor:
                return t.index[:t.probes]
        raise RecorderError(f"No tensor named {tensor!r} is recorded; recorder.tensors lists them")

    def tensor_name(self, param: torch.Tensor) -> str | None:
        """The recorded name of a parameter tensor (by identity), or None when it is not recorded."""
        return next((t.name for t in self._tensors if t.param is param), None)

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
            self._open_row.loss = value
            self._inputs.without_loss = False
        else:
            self._inputs.reported_loss = value

    def keep(self, batch) -> None:
        """Plain loops: what the loader yielded for the current micro-batch (call it once per micro-batch,
        before or after the model's forward). The kept micro-batch is then {"args", "kwargs"} the model
        received and "targets": the parts of `batch` the model did not receive, which is what a
        step_fn(model, micro_batch) for a loss function needs."""
        if self.active:
            try:
                self._inputs.keep(batch)
            except Exception as exc:
                self._fail("rec.keep() failed", exc, stop=False)

    def keep_training_step(self, args: tuple, kwargs: dict) -> None:
        """The arguments of a training-step method (a LightningModule's training_step) that computes one
        micro-batch's loss: kept as they are, and rebuilt as model.training_step(*args, **kwargs)."""
        if self.active:
            self._inputs.keep_call(args, kwargs)

    def observe_loss(self, loss) -> None:
        """The loss of the current micro-batch as the training code computed it, before its backward (the
        trainer callbacks pass it): its back-propagated scale is measured on it, and it wins over the
        criterion's output and the loss the model returns."""
        if self.active and isinstance(loss, torch.Tensor) and torch.is_grad_enabled():
            self._inputs.observe_loss(loss)

    def set_loss_rule(self, rule: str) -> None:
        """How a step's loss combines its micro-batches' losses: "mean" (the default) or "backpropagated"
        (Σ scale × loss, the objective the backward passes summed); stored as meta["loss_rule"]."""
        if rule not in LOSS_RULES:
            raise RecorderError(f"Unknown loss rule {rule!r}; expected one of {LOSS_RULES}")
        self._inputs.rule = rule
        self.note(loss_rule=rule)

    def observe_criterion(self, inputs: tuple, output) -> None:
        """A criterion call the recorder's own hook did not see (a replay's criterion object): its
        training-mode output counts towards the step's loss and its targets towards the fingerprint."""
        if not self.active:
            return
        try:
            if torch.is_grad_enabled() and self.model.training and isinstance(output, torch.Tensor):
                self._inputs.criterion(inputs, output)
        except Exception as exc:
            self._fail("the criterion hook failed", exc)

    def trained_loss(self):
        """(loss_fn(model, micro_batch) -> loss, the last micro-batch of the step just taken) when the
        trained-loss check passed (nbkit.record.trained_loss), else None."""
        last = self._inputs.last
        if not self.loss_rebuildable or last is None or not last.micro_batches:
            return None
        kind = trained_loss.rebuild_kind(last.micro_batches, self.criterion, self.step_fn)[0]
        if kind is None:
            return None
        return trained_loss.micro_batch_loss(kind, self.criterion, self.step_fn), last.micro_batches[-1].as_kept()

    @contextlib.contextmanager
    def pause(self):
        """Within this block the hooks ignore forward passes and optimizer steps (extra passes of an
        estimate, an evaluation inside the training step)."""
        paused, self._paused = self._paused, True
        try:
            yield self
        finally:
            self._paused = paused

    def add_step_hook(self, hook) -> RemovableHandle:
        """Call hook(row) after each recorded step, on the training thread, before the row goes to the
        writer; returns a handle whose remove() unregisters it (safe to call twice). `row` is the
        step's nbkit.store.layout.Row; its per-tensor statistics may still be computing. An exception
        in a hook is reported like any recorder error (RecorderWarning; recording stops) and never
        reaches the training loop."""
        handle = RemovableHandle(self._step_hooks)
        self._step_hooks[handle.id] = hook
        return handle

    def report_problem(self, what: str, exc: BaseException | None = None, *, traceback: bool = False) -> None:
        """Report a problem once (RecorderWarning; raised in strict mode); recording continues. traceback:
        the warning shows where `exc` was raised (user code such as a step_fn)."""
        self._fail(what, exc, stop=False, traceback=traceback)

    def note(self, **entries) -> None:
        """Add entries to the recording's metadata (written by the writer thread, in order)."""
        self._writer.update_meta(**entries)

    def recorded_meta(self, key: str, default=None):
        """An entry of the recording's metadata as this recorder wrote it."""
        return self._writer.meta.get(key, default)

    def put_local_gradients(self, step: int, values: np.ndarray) -> None:
        """Per-rank local gradient values of one step, (ranks, tensors, 1 + probes) (nbkit.record.distributed)."""
        if self.active:
            self._writer.put_local(step, values)

    def flush(self, wait: bool = True) -> None:
        """Hand every finished row to the writer and ask it to commit them now.

        wait=True: wait for the statistics still computing and return once every row is on disk
        (committed); False: hand over the finished rows and return at once (they reach the disk within
        milliseconds; a live view refreshes from what is committed).
        """
        if self._closed:
            return
        self._finalize_rows(force=wait)       # wait=False leaves rows whose statistics still run
        self._writer.flush(timeout=60.0 if wait else 0)
        self._check_writer()

    def close(self) -> None:
        """Stop recording, write the final keyframe and flush. Safe to call twice."""
        if self._closed:
            return
        try:
            for handle in self._handles:
                handle.remove()
            self._backward.remove()
            if not self._failed:
                self._finalize_rows(force=True)
                self._take_keyframe(self.step)
        except Exception as exc:
            self._fail("closing the recording failed", exc)
        finally:
            self._closed = True
            self._writer.close()
            lifetime.forget(self)
        if self._writer.error is not None and "writing the recording failed" not in self._reports.said:
            self._fail("writing the recording failed", self._writer.error)
        self._check_writer_kept()             # a disk that filled up during the last steps

    remove = close

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False

    def __repr__(self):
        state = "closed" if self._closed else ("stopped after an error" if self._failed else "recording")
        return f"Recorder({str(self.recording_path)!r}, step {self.step}, {len(self._tensors)} tensors, {state})"

    # --- reporting ------------------------------------------------------------------------------
    def _fail(self, what: str, exc: BaseException | None = None, *, stop: bool = True, traceback: bool = False):
        """Report a recorder problem once; stop recording unless `stop` is False; raise in strict mode."""
        detail = "".join(format_exception(exc)) if traceback and exc is not None else ""
        self._reports.problem(what, exc, stop=stop, strict=self.strict, detail=detail)
        if stop:
            self._failed = True
            try:                     # the previous step's row is complete: keep it
                self._finalize_rows()
            except Exception:
                pass

    def _check_writer(self):
        if self._writer.error is not None and not self._failed:
            self._fail("writing the recording failed", self._writer.error)
        if self._writer.dropped_rows and "the writer fell behind" not in self._reports.said:
            self._fail("the writer fell behind", RuntimeError(
                f"{self._writer.dropped_rows} rows were dropped because the disk is slower than training; "
                "raise every= to record heavy rows less often"), stop=False)

    # --- hooks ----------------------------------------------------------------------------------
    def _before_forward(self, module, args, kwargs):
        if torch.compiler.is_compiling():   # traced into a graph (the model was compiled after record()):
            self._traced = True             # add nothing to it; the next optimizer step warns
            return None
        if not self.active:
            return None
        started = time.perf_counter()
        try:
            self._finalize_rows()
            if self.model.training and torch.is_grad_enabled():
                self._inputs.forward(args, kwargs)
                self._forward_since_step = True
        except Exception as exc:
            self._fail("a forward pre-hook failed", exc)
        self._spent[0] += time.perf_counter() - started
        return None

    def _after_forward(self, module, args, output):
        if torch.compiler.is_compiling():
            return None
        self.pacer.forward_ended()
        if self.active and self.model.training and torch.is_grad_enabled():
            try:
                self._inputs.model_output(output)      # a loss the model returns (output.loss, ["loss"])
            except Exception as exc:
                self._fail("a forward hook failed", exc)
        return None

    def _after_criterion(self, module, inputs, output):
        self.observe_criterion(inputs, output)

    def _pre_step(self, optimizer, args, kwargs):
        self._depth += 1
        if self._depth > 1 or not self.active:
            return None                     # a subclass calling super().step(): record once
        started = time.perf_counter()
        if self._budget is not None:
            self._budget.step_started(started)
        try:
            if self._traced:
                self._reports.usage(wrappers.COMPILED_AFTER_RECORD)
            self._check_writer()
            self.pacer.step_started()
            self._finalize_rows()
            if self._check_pending:
                self._params_before = [t.param.detach().clone() for t in self._tensors]
            heavy_started = time.perf_counter()
            if self._heavy(self.step):
                self._copy_before()
            elif self._blocks:
                capture.wait_all(self._blocks)   # the statistics thread reads the optimizer state
            heavy_seconds = time.perf_counter() - heavy_started
            self._spent[1] += heavy_seconds
            self._spent[0] += heavy_started - started
            # args holds the optimizer itself first, then step()'s own arguments
            closure = kwargs.get("closure", args[1] if len(args) > 1 else None)
            if closure is not None:                  # its loss is the step's loss when nothing else gives one
                return self._inputs.wrap_closure(closure, args, kwargs)
        except Exception as exc:
            self._fail("the step pre-hook failed", exc)
        return None

    def _post_step(self, optimizer, args, kwargs):
        self._depth -= 1
        if self._depth > 0 or not self.active:
            if self._depth <= 0 and not self.active:
                self.step += 1
            return
        started = time.perf_counter()
        try:
            taken = self._inputs.take()
            row = self._light_row(taken)
            row.grad_norm, row.clip_factor, row.tensor_grad_norm = self._backward.step_ended()
            row.rng_digest = taken.rng_digest
            heavy = self._heavy(self.step)
            heavy_started = time.perf_counter()
            tasks = self._heavy_row(row) if heavy else []
            heavy_seconds = time.perf_counter() - heavy_started
            # outside the stride budget: the trained-loss check (once) and the step hooks (estimates
            # budget themselves, nbkit.record.estimates)
            outside = time.perf_counter()
            if self._check_pending:
                self._check_trained_loss(taken)
            outside = time.perf_counter() - outside
            self._keep(taken)
            hooks_started = time.perf_counter()
            for hook in list(self._step_hooks.values()):
                hook(row)
            outside += time.perf_counter() - hooks_started
            self._open_row, self._open_tasks = row, tasks
            self._forward_since_step = False
            self._spend(time.perf_counter() - started - heavy_seconds - outside, heavy_seconds, heavy)
            if (self.step + 1) % self.keyframe_every == 0:
                self._take_keyframe(self.step + 1)
                self._choose_stride(self.step + 1)
        except Exception as exc:
            if self.strict and isinstance(exc, RecorderError):
                raise                       # a problem reported in strict mode: raised as it was said
            self._fail(f"recording step {self.step} failed", exc)
        finally:
            self.step += 1
        self._check_writer()

    # --- rows -----------------------------------------------------------------------------------
    def _heavy(self, step: int) -> bool:
        if self._budget is not None:
            return StrideBudget.heavy(step, self._stride)
        return step % self._stride == 0

    def _spend(self, light: float, extra: float, heavy: bool) -> None:
        """This step's own cost into the budget (every="auto"), with the background threads' CPU time."""
        spent, self._spent = self._spent, [0.0, 0.0]
        if self._budget is None:
            return
        self._budget.measured(spent[0] + light, spent[1] + extra, heavy)
        background = (self.pacer.cpu_seconds, self._writer.cpu_seconds)
        seen, self._background_seen = self._background_seen, background
        self._budget.background(background[0] - seen[0], background[1] - seen[1])

    def _choose_stride(self, step: int) -> None:
        """every="auto": the stride from keyframe `step` on; stored in the metadata when it changes."""
        if self._budget is None:
            return
        stride = self._budget.stride_at(step)
        if stride != self._stride:
            self._stride = stride
            self._strides.append([step, stride])
        self.note(strides=self._strides[-1000:], budget=self._budget.report())

    def _light_row(self, taken: StepTaken) -> Row:
        groups = self.optimizer.param_groups
        lrs = np.array([float(g["lr"]) for g in groups], dtype=np.float64)
        return Row.light(self.step, taken.loss, lrs, taken.fingerprints, len(self._tensors),
                         self._settings.read(groups))

    # --- kept batches and the trained loss ------------------------------------------------------
    def _backward_seen(self):
        if self.active:
            self._backward.seen()

    def _keep(self, taken: StepTaken):
        """Hand the step's micro-batches to the writer (packed here: the loop may reuse its tensors)."""
        self._check_writer_kept()
        if not self._keeping or not taken.micro_batches:
            return
        try:
            packed = kept.pack_kept_step(taken.kept_step(self.step))
        except kept.UnstorableLeaf as exc:
            self._reports.usage(f"{exc}; later steps with such a leaf are not kept either (replays of them need "
                                "batches=)", key="unstorable leaf")
            return
        layout = kept.layout_signature(packed.spec)
        if self._kept_layout is not None and layout != self._kept_layout:
            self._layout_changes.append(self.step)
            self.note(kept_layout_changes=self._layout_changes[-100:])
            self._reports.usage(f"the kept batch's structure changed at step {self.step} (keys, dtypes, ranks or "
                                "the number of micro-batches); each step's structure is stored with it and the "
                                "rebuilt loss is checked again", key="kept layout changed")
            self._check_pending = True           # the forward's signature changed: check the next step
            self._backward.want_probes = True
        self._kept_layout = layout
        self._writer.put_kept(self.step, packed)

    def _check_writer_kept(self):
        if self._keeping and self._writer.kept_error is not None:
            self._keeping = False
            self._fail("keeping batches stopped", self._writer.kept_error, stop=False)
        if self._writer.dropped_kept:
            self._reports.usage(f"the writer fell behind: {self._writer.dropped_kept} kept batches were not kept so "
                                "far (replays of those steps need batches=); a faster disk or keep_batches=False "
                                "avoids it", key="kept batches dropped")

    def _check_trained_loss(self, taken: StepTaken):
        """Rebuild this step's loss and compare gradients (nbkit.record.trained_loss); note the verdict."""
        self._check_pending, self._backward.want_probes = False, False
        before, self._params_before = self._params_before, None
        probes, self._backward.probes = self._backward.probes, None
        result = trained_loss.verify(self.model, self._tensors, before, probes, taken, self.criterion, self.step_fn,
                                     self.pause, self.step)
        exc = result.pop("exception", None)        # the user's code raised: the warning shows where
        self._loss_checks = (self._loss_checks + [result])[-20:]
        self.loss_rebuildable = result["verdict"] in (trained_loss.EXACT, trained_loss.CLOSE)
        self.note(trained_loss={"rebuildable": self.loss_rebuildable,
                                "rebuild": result["rebuild"] if self.loss_rebuildable else None,
                                "checks": self._loss_checks})
        problem = trained_loss.problem(result, estimates=bool(self.options.curvature_every or self.options.noise_every))
        if problem:
            self.report_problem(problem, exc, traceback=exc is not None)

    def _finalize_rows(self, force: bool = False):
        """Hand finished rows to the writer, in step order. The open row (the last step's, kept for a
        rec.loss() after the step) is finished first. A row whose statistics still run on the
        statistics thread waits for a later hook unless `force` (flush, close)."""
        if self._open_row is not None:
            if self._inputs.without_loss:   # nothing gave this step a loss, also not a rec.loss() after it
                self._reports.usage(NO_LOSS.format(step=self._open_row.step), key=NO_LOSS)
            self._waiting.append((self._open_row, self._open_tasks))
            self._open_row, self._open_tasks = None, []
        while self._waiting:
            row, tasks = self._waiting[0]
            if not force and not all(task.done() for task in tasks):
                return
            self._waiting.popleft()
            for task in tasks:
                task.result()           # re-raises an error of the statistics
            self._writer.put_row(row)

    def _copy_before(self):
        """Pre-step: θ of every live tensor into its block's buffer (nbkit.record.capture)."""
        if self._blocks is None:
            self._blocks = capture.make_blocks(self._tensors)
        for t in self._tensors:
            if not t.stopped and t.param.shape != t.shape:
                t.stopped = f"shape changed from {tuple(t.shape)} to {tuple(t.param.shape)}"
                self._fail(f"tensor {t.name!r}: {t.stopped}; its recording stops", stop=False)
        capture.copy_before(self._blocks, self.optimizer, self.adapter.before_keys)

    def _heavy_row(self, row: Row) -> list:
        """Post-step: start the per-tensor quantities, histograms and probes of `row`; returns the
        statistics tasks that fill them in."""
        consecutive, self._last_heavy = self._last_heavy == self.step - 1, self.step
        jobs = capture.prepare_step(self._blocks or (), row, self.optimizer, self.adapter, self.probes,
                                    report=self.report_problem, consecutive=consecutive,
                                    profile_units=self._profile_units)
        return [self.pacer.submit(jobs, background=self.background)] if jobs else []

    # --- keyframes ------------------------------------------------------------------------------
    def _take_keyframe(self, step: int):
        if self._last_keyframe == step:
            return
        self._last_keyframe = step
        try:
            keyframe = kf.Keyframe(step, setup.keyframe_state(step, self.model, self.optimizer, self._tensors))
        except TypeError as exc:        # state a keyframe cannot hold without pickle: rows go on
            self._fail("an optimizer or model state could not be stored in a keyframe", exc, stop=False)
            return
        self._writer.put_keyframe(keyframe)

"""nbkit.replay: re-run a recording from a keyframe on the same batches, with the recorded or other
optimizers (the order of one replayed step: nbkit.replay.loop)."""
from __future__ import annotations

from nbkit.analyze.model_copy import copy_model
from nbkit.record.wrappers import unwrap_model
from nbkit.recording import Recording, load
from nbkit.replay.loop import run_plan
from nbkit.replay.plan import make_plan
from nbkit.replay.workers import in_workers


def replay(run, model, step_fn=None, batches=None, optimizers=None, start=None, steps=None, to=None, before_step=None,
           every=None, workers=1, progress=True, strict=True) -> dict:
    """Replay `run` from the keyframe at or before `start` on the same batches (README: Replays).

    run: a Recording (or its path). model: the recorded architecture (only copies are trained); a
    torch.compile'd or DDP-wrapped model is replayed as its plain module, eagerly.
    step_fn and batches: both optional when the recording kept the window's batches (run.replayable_windows)
    and verified its trained loss (run.meta["trained_loss"]); then each kept micro-batch
    {"args", "kwargs", "targets"} is run again with its recorded random and autocast state, its loss
    rebuilt as verified (or by step_fn(model, micro_batch) -> loss) and back-propagated with its recorded
    scale, and the recorded clipping re-applied unless before_step is given. With batches:
    step_fn(model, batch) -> loss per step; batches an iterable yielding the run's batches from step 0,
    or a callable batches(step) -> batch. optimizers=None: {"recorded": None}; otherwise name ->
    factory(groups) -> optimizer, where groups are the recorded parameter groups as [{"params": [...]}]
    plus the settings that stay constant over the run, differ between groups and the target optimizer
    knows (e.g. a no-decay group's weight_decay=0; never lr; nbkit.replay.restore.factory_optimizer,
    which may call the factory twice to learn what the target knows); a value None stands for the
    recorded optimizer. start=None: the run's first step. steps=None: to
    the run's last step. to=None: "<run path>.replays/<name>"; otherwise a folder holding <name>.
    before_step=None: before_step(model, optimizer, step) before every optimizer.step(). every: the
    replays' recording stride (None: 1, every step in full); every=1 given with optimizers=None is a
    detail window of a thinned recording: the recorded optimizer re-records steps start..end in full,
    bit-exactly, under the name "full-<start>-<end>" (so windows do not overwrite each other). workers=1:
    replays run in this many spawned processes. progress=True: a tqdm.auto bar. strict=True: a batch
    whose fingerprint differs from the recording stops the replay (False: a warning, listed in meta).
    Returns {name: Recording}; each replay's meta["replay"] holds its parent, start, process id,
    thread count and, for the recorded optimizer, the largest differences from the parent
    ("fidelity", with the first differing step and tensor or setting). The model copies run in
    training mode. The recorded optimizer gets the recorded learning rates and every other recorded
    setting (momentum, betas, weight_decay, ...: run.meta["settings"]) after before_step, so a
    scheduler's effect is reproduced without its object (and a scheduler stepped in before_step does
    not change it). For closure optimizers (LBFGS) before_step
    runs once before step(closure), not inside the closure. An earlier replay of the same run in the
    target folder is replaced; any other recording there is left alone (an error says so).
    """
    run = run if isinstance(run, Recording) else load(run)
    model = unwrap_model(model).plain      # a compiled (or DDP) model: its plain module, replayed eagerly
    plan = make_plan(run, model, step_fn, batches, optimizers, start, steps, to, before_step, workers, strict,
                     every=every)
    names = list(plan.factories)
    if workers > 1 and len(names) > 1:
        paths = in_workers(plan, copy_model(model), step_fn, batches, workers, progress)
    else:
        paths = run_plan(plan, model, step_fn, batches, names, progress)
    return {name: (load(paths[name]) if plan.record else None) for name in names}

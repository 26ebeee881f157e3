"""Importable, picklable pieces for replay tests: a model with dropout, its batches, step_fn, factories.

Spawned workers (workers=2) and the `nbkit replay` command import these by module name, so nothing
here may be a lambda or a nested function.
"""
import torch

import nbkit

_generator = torch.Generator().manual_seed(0)
INPUTS = torch.randn(512, 8, generator=_generator)                          # (examples, features)
TARGETS = (INPUTS[:, 0] > 0).long() + (INPUTS[:, 1] > 0).long()             # (examples,) 3 classes
CRITERION = torch.nn.CrossEntropyLoss()


def make_model(seed=0):
    torch.manual_seed(seed)
    return torch.nn.Sequential(torch.nn.Linear(8, 32), torch.nn.ReLU(), torch.nn.Dropout(0.3),
                               torch.nn.Linear(32, 3))


class Batches:
    """batches(step) -> (inputs, targets): each step's rows drawn from a generator seeded by the step."""

    def __init__(self, seed=0, size=32, corrupt_at=None):
        self.seed, self.size, self.corrupt_at = seed, size, corrupt_at

    def __call__(self, step):
        generator = torch.Generator().manual_seed(self.seed * 1_000_003 + step)
        rows = torch.randint(0, len(INPUTS), (self.size,), generator=generator)
        x, y = INPUTS[rows], TARGETS[rows]
        if step == self.corrupt_at:
            x = x + 1e-3
        return x, y


def iterate_batches(steps, seed=0):
    """The same batches as an iterable from step 0 (what a loop over a seeded DataLoader gives)."""
    batches = Batches(seed)
    return (batches(step) for step in range(steps))


def step_fn(model, batch):
    x, y = batch
    return CRITERION(model(x), y)


def accumulating_step_fn(model, batch):
    """Two micro-batches per step, backward on each (gradient accumulation); returns a float."""
    x, y = batch
    total = 0.0
    for part in (slice(0, 16), slice(16, 32)):
        loss = CRITERION(model(x[part]), y[part]) / 2
        loss.backward()
        total += float(loss)
    return total


def adam(groups):
    return torch.optim.Adam(groups, lr=1e-2)


def sgd_momentum(groups):
    return torch.optim.SGD(groups, lr=0.05, momentum=0.9)


def rmsprop(groups):
    return torch.optim.RMSprop(groups, lr=1e-3)


def clip(model, optimizer, step):
    torch.nn.utils.clip_grad_norm_(model.parameters(), 0.5)


def record_run(path, steps=230, keyframe_every=50, schedule=False, clipping=False, seed=0, accumulate=False):
    """Record `steps` Adam steps of make_model() on Batches(seed); returns the Recording."""
    model = make_model()
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-2)
    scheduler = torch.optim.lr_scheduler.StepLR(optimizer, step_size=40, gamma=0.5) if schedule else None
    batches = Batches(seed)
    with nbkit.record(model, optimizer, path, criterion=CRITERION, keyframe_every=keyframe_every, probes=16,
                      every=1):                      # replay tests compare probes at every step
        for step in range(steps):
            optimizer.zero_grad()
            if accumulate:
                accumulating_step_fn(model, batches(step))
            else:
                step_fn(model, batches(step)).backward()
            if clipping:
                clip(model, optimizer, step)
            optimizer.step()
            if scheduler is not None:
                scheduler.step()
    return nbkit.load(path)


def train_recorded(model, optimizer, path, steps=10, after_step=None):
    """`steps` steps of the standard batches, recorded into `path` (keyframes every 5 steps);
    after_step() runs after each optimizer step (a scheduler)."""
    with nbkit.record(model, optimizer, path, criterion=CRITERION, keyframe_every=5):
        for step in range(steps):
            optimizer.zero_grad()
            step_fn(model, Batches()(step)).backward()
            optimizer.step()
            if after_step is not None:
                after_step()


def setup():
    """For `nbkit replay --setup replay_setup:setup`: (model, step_fn, batches)."""
    return make_model(), step_fn, Batches()

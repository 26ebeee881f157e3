"""Training code as people write it: wrapped optimizers, torch.compile'd models, and models that return
their own loss (issue 11, items 2 and 3).

Oracles: the optimizer a wrapper holds is the one torch.optim's step hooks fire on; a compiled module's
graphs are counted by a backend of our own (torch.compile calls its backend once per graph, see
torch.compiler's "custom backends" page) and by torch._dynamo.explain; a returned loss is compared
with the value the model computed.
"""
from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np
import pytest
import torch

import nbkit
import nbkit.store.batches
from nbkit.cli import main as cli
from nbkit.errors import RecorderError, RecorderWarning


def make_model(seed=0):
    torch.manual_seed(seed)
    return torch.nn.Sequential(torch.nn.Linear(4, 8), torch.nn.Tanh(), torch.nn.Linear(8, 1))


def batches(steps, seed=1):
    generator = torch.Generator().manual_seed(seed)
    return [(torch.randn(16, 4, generator=generator), torch.randn(16, 1, generator=generator)) for _ in range(steps)]


def recorder_warnings(caught):
    return [str(w.message) for w in caught if issubclass(w.category, RecorderWarning)]


# --- optimizer wrappers ---------------------------------------------------------------------------
class StepWrapper:
    """The pattern of accelerate's AcceleratedOptimizer and Lightning's LightningOptimizer: the real
    optimizer in .optimizer, step() and zero_grad() forwarded."""

    def __init__(self, optimizer):
        self.optimizer = optimizer

    def step(self, closure=None):
        return self.optimizer.step(closure)

    def zero_grad(self, set_to_none=True):
        self.optimizer.zero_grad(set_to_none=set_to_none)


class HalfInitialisedOptimizer(torch.optim.Optimizer):
    """An Optimizer subclass that never calls Optimizer.__init__ (as AcceleratedOptimizer does): it has
    no step-hook tables of its own."""

    def __init__(self, optimizer):          # noqa: the missing super().__init__ is the point
        self.optimizer = optimizer

    def step(self, closure=None):
        return self.optimizer.step(closure)

    def zero_grad(self, set_to_none=True):
        self.optimizer.zero_grad(set_to_none=set_to_none)


def train(model, optimizer, data, criterion):
    for x, y in data:
        optimizer.zero_grad()
        loss = criterion(model(x), y)
        loss.backward()
        optimizer.step()


@pytest.mark.parametrize("wrap", [StepWrapper, HalfInitialisedOptimizer, lambda o: StepWrapper(StepWrapper(o))],
                         ids=["wrapper", "optimizer-subclass", "two-wrappers"])
def test_a_wrapped_optimizer_is_recorded_through_the_one_it_holds(tmp_path, wrap):
    model = make_model()
    inner = torch.optim.SGD(model.parameters(), lr=0.1, momentum=0.9)
    wrapped = wrap(inner)
    criterion = torch.nn.MSELoss()
    with nbkit.record(model, wrapped, tmp_path / "run", criterion=criterion) as rec:
        assert rec.optimizer is inner
        train(model, wrapped, batches(4), criterion)
    run = nbkit.load(tmp_path / "run")
    assert run.steps.tolist() == [0, 1, 2, 3]
    assert run.meta["optimizer"]["class"] == "SGD"
    assert np.isfinite(run.loss).all()


def test_accelerates_optimizer_is_unwrapped(tmp_path):
    accelerate = pytest.importorskip("accelerate")
    model = make_model()
    inner = torch.optim.AdamW(model.parameters(), lr=1e-3)
    wrapped = accelerate.Accelerator(cpu=True).prepare_optimizer(inner)     # what a Trainer steps
    assert type(wrapped).__name__ == "AcceleratedOptimizer" and wrapped.optimizer is inner
    criterion = torch.nn.MSELoss()
    with nbkit.record(model, wrapped, tmp_path / "run", criterion=criterion) as rec:
        assert rec.optimizer is inner
        train(model, wrapped, batches(3), criterion)
    assert nbkit.load(tmp_path / "run").steps.tolist() == [0, 1, 2]


def test_a_wrapper_chain_without_an_optimizer_is_refused_naming_the_types(tmp_path):
    with pytest.raises(RecorderError, match=r"StepWrapper -> StepWrapper -> dict.*pass the torch.optim.Optimizer"):
        nbkit.record(make_model(), StepWrapper(StepWrapper({})), tmp_path / "run")
    looped = StepWrapper(None)
    looped.optimizer = looped
    with pytest.raises(RecorderError, match=r"StepWrapper -> StepWrapper"):
        nbkit.record(make_model(), looped, tmp_path / "run")
    with pytest.raises(RecorderError, match=r"got list.*pass the torch.optim.Optimizer"):
        nbkit.record(make_model(), [], tmp_path / "run")
    assert not (tmp_path / "run").exists()


# --- compiled models ------------------------------------------------------------------------------
class GraphCounter:
    """A torch.compile backend that runs each graph as traced and counts them. inside_float64=True runs
    them in float64 and casts back: numerics that differ from eager float32, as inductor's kernels do."""

    def __init__(self, inside_float64=False):
        self.graphs = 0
        self.inside_float64 = inside_float64

    def __call__(self, graph_module, example_inputs):
        self.graphs += 1
        if not self.inside_float64:
            return graph_module.forward

        def run(*inputs):
            wide = [t.double() if isinstance(t, torch.Tensor) and t.is_floating_point() else t for t in inputs]
            return [o.float() if isinstance(o, torch.Tensor) and o.is_floating_point() else o
                    for o in graph_module(*wide)]
        return run


def test_a_compiled_model_is_recorded_under_the_plain_names_in_one_graph(tmp_path):
    model = make_model()
    backend = GraphCounter()
    compiled = torch.compile(model, backend=backend)
    optimizer = torch.optim.SGD(compiled.parameters(), lr=0.1)
    criterion = torch.nn.MSELoss()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        with nbkit.record(compiled, optimizer, tmp_path / "run", criterion=criterion) as rec:
            assert rec.tensors == ["0.weight", "0.bias", "2.weight", "2.bias"]
            train(compiled, optimizer, batches(5), criterion)
    assert backend.graphs == 1                       # the recorder's hooks broke no graph
    assert recorder_warnings(caught) == []
    run = nbkit.load(tmp_path / "run")
    assert run.meta["compiled"] is True
    assert list(run.keyframe(0)["model"]) == ["0.weight", "0.bias", "2.weight", "2.bias"]
    assert np.isfinite(run.fingerprints[:, 0]).all()   # the hooks on the wrapper saw every forward pass
    eager = make_model()
    eager_optimizer = torch.optim.SGD(eager.parameters(), lr=0.1)
    expected = []
    for x, y in batches(5):
        eager_optimizer.zero_grad()
        loss = criterion(eager(x), y)
        expected.append(float(loss.detach()))
        loss.backward()
        eager_optimizer.step()
    np.testing.assert_array_equal(run.loss, np.array(expected))
    assert nbkit.load(tmp_path / "run").meta["compiled"]


def test_the_recorders_hooks_add_no_graph_break_when_the_model_is_compiled_later(tmp_path):
    """Hooks registered on the plain model run inside dynamo's trace when the model is compiled after
    record(): they step aside (one graph, no break) and the recorder warns once."""
    model = make_model()
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    criterion = torch.nn.MSELoss()
    rec = nbkit.record(model, optimizer, tmp_path / "run", criterion=criterion)
    explained = torch._dynamo.explain(model)(torch.randn(16, 4))
    assert (explained.graph_count, explained.graph_break_count) == (1, 0)
    torch._dynamo.reset()
    backend = GraphCounter()
    compiled = torch.compile(model, backend=backend)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        train(compiled, optimizer, batches(4), criterion)
        rec.close()
    assert backend.graphs == 1
    messages = recorder_warnings(caught)
    assert len(messages) == 1 and "compiled after nbkit.record()" in messages[0]
    assert "nbkit.record(torch.compile(model)" in messages[0]
    run = nbkit.load(tmp_path / "run")
    assert run.steps.tolist() == [0, 1, 2, 3] and run.meta["compiled"] is False


def test_a_compiled_recording_replays_on_the_plain_model_and_says_compiled_vs_eager(tmp_path):
    model = make_model()
    compiled = torch.compile(model, backend=GraphCounter(inside_float64=True))
    optimizer = torch.optim.SGD(compiled.parameters(), lr=0.1)
    criterion = torch.nn.MSELoss()
    data = batches(6)
    with nbkit.record(compiled, optimizer, tmp_path / "run", criterion=criterion):
        train(compiled, optimizer, data, criterion)
    run = nbkit.load(tmp_path / "run")

    def step_fn(model, batch):
        x, y = batch
        return criterion(model(x), y)

    with pytest.warns(UserWarning, match="differs: compiled vs eager numerics") as caught:
        child = nbkit.replay(run, make_model(), step_fn, data, start=0, steps=6, to=tmp_path / "replays",
                             progress=False)["recorded"]
    assert not any("differs from its parent" in str(w.message) for w in caught)
    assert child.steps.tolist() == list(range(6)) and not child.meta["replay"]["fidelity"]["identical"]
    np.testing.assert_allclose(child.loss, run.loss, rtol=1e-4)    # the same run, other rounding
    # the compiled model itself may be given: it is replayed as its plain module, eagerly
    with pytest.warns(UserWarning, match="differs: compiled vs eager numerics"):
        again = nbkit.replay(run, torch.compile(make_model(), backend=GraphCounter()), step_fn, data, start=0,
                             steps=6, to=tmp_path / "replays", progress=False)["recorded"]
    np.testing.assert_array_equal(again.loss, child.loss)


# --- a loss the model returns ---------------------------------------------------------------------
@dataclass
class ModelOutput:
    """What a transformers model returns: the loss (when labels are given) beside the logits."""

    loss: torch.Tensor | None
    logits: torch.Tensor


class ReturnsItsLoss(torch.nn.Module):
    def __init__(self, as_dict=False):
        super().__init__()
        self.body = make_model()
        self.as_dict = as_dict
        self.losses = []           # every training loss it computed, in order

    def forward(self, x, labels=None):
        logits = self.body(x)
        loss = torch.nn.functional.mse_loss(logits, labels) if labels is not None else None
        if loss is not None and self.training and torch.is_grad_enabled():
            self.losses.append(float(loss))
        if self.as_dict:
            return {"logits": logits, **({"loss": loss} if loss is not None else {})}
        return ModelOutput(loss, logits)


def loss_of(output):
    return output["loss"] if isinstance(output, dict) else output.loss


@pytest.mark.parametrize("as_dict", [False, True], ids=["output.loss", "dict"])
def test_the_loss_a_model_returns_is_the_steps_loss(tmp_path, as_dict):
    model = ReturnsItsLoss(as_dict)
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-2)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        with nbkit.record(model, optimizer, tmp_path / "run"):
            for x, y in batches(4):
                optimizer.zero_grad()
                loss_of(model(x, labels=y)).backward()
                model.eval()
                with torch.no_grad():
                    model(x, labels=y)                # an evaluation: not the trained loss
                model.train()
                optimizer.step()
    assert recorder_warnings(caught) == []
    np.testing.assert_array_equal(nbkit.load(tmp_path / "run").loss, np.array(model.losses))


def test_accumulated_returned_losses_give_their_mean(tmp_path):
    model = ReturnsItsLoss()
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    data = batches(6)
    with nbkit.record(model, optimizer, tmp_path / "run"):
        for first, second in zip(data[::2], data[1::2]):
            optimizer.zero_grad()
            for x, y in (first, second):
                (model(x, labels=y).loss / 2).backward()
            optimizer.step()
    expected = np.array(model.losses, dtype=np.float32).reshape(3, 2).mean(axis=1)
    np.testing.assert_allclose(nbkit.load(tmp_path / "run").loss, expected, rtol=1e-6)


def test_a_criterion_and_rec_loss_win_over_the_returned_loss(tmp_path):
    model = ReturnsItsLoss()
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    criterion = torch.nn.L1Loss()
    criterion_losses = []
    with nbkit.record(model, optimizer, tmp_path / "run", criterion=criterion) as rec:
        for step, (x, y) in enumerate(batches(4)):
            optimizer.zero_grad()
            output = model(x, labels=y)
            trained = criterion(output.logits, y)
            criterion_losses.append(float(trained))
            trained.backward()
            if step == 3:
                rec.loss(123.0)
            optimizer.step()
    loss = nbkit.load(tmp_path / "run").loss
    np.testing.assert_array_equal(loss[:3], np.array(criterion_losses[:3]))
    assert loss[3] == 123.0
    assert not np.allclose(loss[:3], model.losses[:3])      # the returned MSE was a different number


# --- a step without any loss ----------------------------------------------------------------------
@pytest.mark.parametrize("strict", [False, True])
def test_a_step_without_a_loss_warns_once_and_info_counts_them(tmp_path, capsys, strict):
    model = make_model()
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        with nbkit.record(model, optimizer, tmp_path / "run", strict=strict) as rec:
            for step, (x, y) in enumerate(batches(5)):
                optimizer.zero_grad()
                loss = torch.nn.functional.mse_loss(model(x), y)
                loss.backward()
                optimizer.step()
                if step >= 3:
                    rec.loss(loss)                  # after the step: still this step's loss
    messages = recorder_warnings(caught)
    assert len(messages) == 1
    for part in ("step 0 has no loss", "criterion=", "rec.loss(", "nbkit.transformers_callback",
                 "nbkit.lightning_callback", "when available"):
        assert part in messages[0], part
    run = nbkit.load(tmp_path / "run")
    assert np.isnan(run.loss[:3]).all() and np.isfinite(run.loss[3:]).all()
    assert cli(["info", str(tmp_path / "run")]) == 0
    assert "3 of 5 steps without a loss" in capsys.readouterr().out


def test_a_loss_reported_after_every_step_gives_no_warning(tmp_path, capsys):
    model = make_model()
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        with nbkit.record(model, optimizer, tmp_path / "run") as rec:
            for x, y in batches(3):
                optimizer.zero_grad()
                loss = torch.nn.functional.mse_loss(model(x), y)
                loss.backward()
                optimizer.step()
                rec.loss(loss)
    assert recorder_warnings(caught) == []
    assert not math.isnan(nbkit.load(tmp_path / "run").loss[-1])
    cli(["info", str(tmp_path / "run")])
    assert "without a loss" not in capsys.readouterr().out


def test_an_autocast_step_is_kept_with_its_autocast_state_and_replays_bit_exactly(tmp_path):
    """bfloat16 autocast on the CPU, dropout and a label-smoothed criterion: the kept step holds the
    autocast state in force at its forward, the replay enters it again and remakes the criterion."""
    def make():
        torch.manual_seed(0)
        return torch.nn.Sequential(torch.nn.Linear(16, 32), torch.nn.GELU(), torch.nn.Dropout(0.1),
                                   torch.nn.Linear(32, 4))

    model, criterion = make(), torch.nn.CrossEntropyLoss(label_smoothing=0.1)
    optimizer = torch.optim.AdamW(model.parameters(), lr=1e-2)
    generator = torch.Generator().manual_seed(1)
    data = [(torch.randn(16, 16, generator=generator), torch.randint(0, 4, (16,), generator=generator))
            for _ in range(12)]
    with nbkit.record(model, optimizer, tmp_path / "run", criterion=criterion, keyframe_every=4):
        for x, y in data:
            optimizer.zero_grad()
            with torch.autocast("cpu", dtype=torch.bfloat16):
                loss = criterion(model(x), y)
            loss.backward()
            optimizer.step()
    run = nbkit.load(tmp_path / "run")
    assert run.kept_step(3).autocast["cpu"] == [True, "bfloat16"]
    assert run.meta["criterion_spec"]["arguments"]["label_smoothing"] == 0.1
    assert run.meta["trained_loss"]["checks"][0]["verdict"] == "bit-exact"
    fidelity = nbkit.replay(run, make(), start=5, progress=False)["recorded"].meta["replay"]["fidelity"]
    assert fidelity["identical"], fidelity
    # without the autocast state the replay runs in float32 and differs: the check above could fail
    for step in run.kept_steps:
        kept = run.kept_step(step)
        kept.autocast = {"cpu": [False, "bfloat16"]}
        nbkit.store.batches.write_kept_step(run.path, step, kept)
    fidelity = nbkit.replay(run, make(), start=5, progress=False, strict=False)["recorded"].meta["replay"]["fidelity"]
    assert not fidelity["identical"]

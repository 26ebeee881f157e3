"""One check over every built-in optimizer of the installed torch.optim (and its foreach/fused
variants): what the recording says about each probe coordinate against what the test measures
itself, outside the recorder.

- the recorded update equals θ_after − θ_before, copied by the test around optimizer.step();
- gain equals update / (−lr·g) (definition in DESIGN.md section 2), computed here with NumPy;
- momentum factor × scale factor × residual equals gain coordinate by coordinate, and the
  residual is exactly 1 where the optimizer's rule (torch.optim documentation page of each
  optimizer, "Algorithm" pseudo-code) has nothing beyond its moments;
- LBFGS marks gain and the factors not applicable; an unknown optimizer records the gradient,
  the update and its parameter-shaped state under its own names, without an error.

The model's tensors have at most 64 coordinates, so every coordinate is a probe and a sampled
share is a share over the whole tensor.
"""
import warnings

import numpy as np
import pytest
import torch

import nbkit

O = torch.optim
HAS_FUSED_CPU = True      # torch >= 2.4 ships fused Adam/AdamW/SGD/Adagrad kernels for the CPU

# (id, factory(params), rule has nothing beyond its moments -> residual exactly 1)
CONFIGS = [
    ("sgd", lambda p: O.SGD(p, lr=0.05), True),
    ("sgd-momentum", lambda p: O.SGD(p, lr=0.05, momentum=0.9), True),
    ("sgd-dampening", lambda p: O.SGD(p, lr=0.05, momentum=0.9, dampening=0.3), True),
    ("sgd-nesterov", lambda p: O.SGD(p, lr=0.05, momentum=0.9, nesterov=True), True),
    ("sgd-nesterov-decay", lambda p: O.SGD(p, lr=0.05, momentum=0.9, nesterov=True, weight_decay=0.1), False),
    ("sgd-decay", lambda p: O.SGD(p, lr=0.05, weight_decay=0.1), False),
    ("sgd-foreach", lambda p: O.SGD(p, lr=0.05, momentum=0.9, foreach=True), True),
    ("sgd-fused", lambda p: O.SGD(p, lr=0.05, momentum=0.9, fused=True), True),
    ("sgd-maximize", lambda p: O.SGD(p, lr=0.05, momentum=0.9, maximize=True), True),
    ("adam", lambda p: O.Adam(p, lr=0.01), True),
    ("adam-foreach", lambda p: O.Adam(p, lr=0.01, foreach=True), True),
    ("adam-fused", lambda p: O.Adam(p, lr=0.01, fused=True), True),
    ("adam-amsgrad", lambda p: O.Adam(p, lr=0.01, amsgrad=True), True),
    ("adam-l2", lambda p: O.Adam(p, lr=0.01, weight_decay=0.1), False),
    ("adamw", lambda p: O.AdamW(p, lr=0.01, weight_decay=0.1), False),
    ("adamw-fused", lambda p: O.AdamW(p, lr=0.01, weight_decay=0.1, fused=True), False),
    ("adamw-amsgrad-foreach", lambda p: O.AdamW(p, lr=0.01, amsgrad=True, foreach=True), False),
    ("nadam", lambda p: O.NAdam(p, lr=0.01), True),
    ("nadam-decoupled", lambda p: O.NAdam(p, lr=0.01, weight_decay=0.1, decoupled_weight_decay=True), False),
    ("radam", lambda p: O.RAdam(p, lr=0.01), False),        # rectification goes into the residual
    ("radam-foreach", lambda p: O.RAdam(p, lr=0.01, foreach=True), False),
    ("adamax", lambda p: O.Adamax(p, lr=0.01), True),
    ("rmsprop", lambda p: O.RMSprop(p, lr=0.01), True),
    ("rmsprop-centered-momentum", lambda p: O.RMSprop(p, lr=0.01, centered=True, momentum=0.9), True),
    ("rmsprop-foreach", lambda p: O.RMSprop(p, lr=0.01, momentum=0.5, foreach=True), True),
    ("adagrad", lambda p: O.Adagrad(p, lr=0.05), True),
    ("adagrad-lr-decay", lambda p: O.Adagrad(p, lr=0.05, lr_decay=0.1), False),
    ("adagrad-fused", lambda p: O.Adagrad(p, lr=0.05, fused=True), True),
    ("adadelta", lambda p: O.Adadelta(p, lr=1.0), True),
    ("adadelta-foreach", lambda p: O.Adadelta(p, lr=1.0, weight_decay=0.01, foreach=True), False),
    ("asgd", lambda p: O.ASGD(p, lr=0.01), None),
    ("rprop", lambda p: O.Rprop(p, lr=0.01), None),
    ("adafactor", lambda p: O.Adafactor(p, lr=0.01), None),
]
# Every optimizer class the installed torch.optim ships must be covered here or below.
COVERED = {"SGD", "Adam", "AdamW", "NAdam", "RAdam", "Adamax", "RMSprop", "Adagrad", "Adadelta", "ASGD", "Rprop",
           "Adafactor", "Muon", "LBFGS", "SparseAdam"}


def _model():
    torch.manual_seed(0)
    return torch.nn.Sequential(torch.nn.Linear(6, 8), torch.nn.Tanh(), torch.nn.Linear(8, 3))


def _data():
    generator = torch.Generator().manual_seed(1)
    x = torch.randn(40, 6, generator=generator)
    y = torch.randint(0, 3, (40,), generator=generator)
    return x, y


def _run(tmp_path, factory, steps=6, model=None, closure=False):
    """Train with a recorder; the test's own copies of θ before/after each step and of g."""
    model = model or _model()
    optimizer = factory(model.parameters())
    x, y = _data()
    criterion = torch.nn.CrossEntropyLoss()
    rec = nbkit.record(model, optimizer, tmp_path / "r", criterion=criterion, strict=True)
    seen = []
    for s in range(steps):
        rows = slice(4 * s, 4 * s + 16)
        before = {n: p.detach().clone() for n, p in model.named_parameters()}

        def evaluate():
            optimizer.zero_grad()
            loss = criterion(model(x[rows]), y[rows])
            loss.backward()
            return loss

        if closure:
            optimizer.step(evaluate)
        else:
            evaluate()
            grads = {n: p.grad.detach().clone() for n, p in model.named_parameters()}
            optimizer.step()
        after = {n: p.detach().clone() for n, p in model.named_parameters()}
        seen.append((before, after, None if closure else grads, [g["lr"] for g in optimizer.param_groups]))
    rec.close()
    return nbkit.load(tmp_path / "r"), seen, model


def test_every_torch_optimizer_is_covered():
    shipped = {n for n in dir(torch.optim) if isinstance(getattr(torch.optim, n), type)
               and issubclass(getattr(torch.optim, n), torch.optim.Optimizer) and n != "Optimizer"}
    assert shipped <= COVERED, f"optimizers without a check: {shipped - COVERED}"


@pytest.mark.parametrize("name,factory,residual_one", CONFIGS, ids=[c[0] for c in CONFIGS])
def test_probe_update_gain_and_factors(tmp_path, name, factory, residual_one):
    run, seen, model = _run(tmp_path, factory)
    assert run.steps.tolist() == list(range(len(seen)))
    for k, tensor in enumerate(run.tensors):
        probes = run.probes(tensor)
        index = probes["index"][0]
        assert sorted(index.tolist()) == list(range(dict(model.named_parameters())[tensor].numel()))
        for s, (before, after, grads, lrs) in enumerate(seen):
            theta = before[tensor].reshape(-1).double().numpy()[index]
            update = (after[tensor] - before[tensor]).reshape(-1).double().numpy()[index]   # measured here
            grad = grads[tensor].reshape(-1).double().numpy()[index]
            np.testing.assert_allclose(probes["update"][s], update, rtol=1e-6, atol=1e-12)
            np.testing.assert_allclose(probes["grad"][s], grad, rtol=1e-6, atol=1e-12)
            defined = grad != 0
            gain = update[defined] / (-lrs[0] * grad[defined])                       # DESIGN.md §2
            positive = np.sort(gain[gain > 0])
            recorded_median = run.series("gain_median", tensor)[s]
            if positive.size:
                # lower median, as torch.nanmedian; float32 storage of the series
                np.testing.assert_allclose(recorded_median, positive[(positive.size - 1) // 2], rtol=1e-5)
                np.testing.assert_allclose(run.series("reversed", tensor)[s], np.mean(gain < 0), atol=1e-6)
            if residual_one is None:
                assert "momentum_factor" not in probes
                continue
            product = (probes["momentum_factor"][s].astype(np.float64) * probes["scale_factor"][s]
                       * probes["residual"][s])
            # predicted update from the factors vs the measured one: float32 rounding of θ allowed
            predicted = product[defined] * (-lrs[0] * grad[defined])
            tolerance = 4 * np.finfo(np.float32).eps * np.abs(theta[defined]) + 1e-4 * np.abs(update[defined]) + 1e-12
            assert np.all(np.abs(predicted - update[defined]) <= tolerance), (
                name, tensor, s, np.max(np.abs(predicted - update[defined]) / tolerance))
            if residual_one:
                assert np.all(probes["residual"][s][defined] == 1.0), (name, tensor, s)


def test_lbfgs_marks_gain_and_factors_not_applicable(tmp_path):
    run, seen, _ = _run(tmp_path, lambda p: O.LBFGS(p, lr=0.5, max_iter=4), steps=3, closure=True)
    assert run.meta["gain_applicable"] is False
    assert np.isnan(run.series("gain_median")).all()
    assert np.isnan(run.series("momentum_factor_median")).all()
    for tensor in run.tensors:
        probes = run.probes(tensor)
        assert "momentum_factor" not in probes
        index = probes["index"][0]
        for s, (before, after, _, _) in enumerate(seen):
            update = (after[tensor] - before[tensor]).reshape(-1).double().numpy()[index]
            np.testing.assert_allclose(probes["update"][s], update, rtol=1e-6, atol=1e-12)
    assert np.isfinite(run.loss).all()          # the closure's first evaluation


def test_muon_records_update_and_momentum(tmp_path):
    torch.manual_seed(0)
    model = torch.nn.Sequential(torch.nn.Linear(6, 8, bias=False), torch.nn.Tanh(), torch.nn.Linear(8, 3, bias=False))
    run, seen, _ = _run(tmp_path, lambda p: O.Muon(p, lr=0.02), model=model)
    for tensor in run.tensors:
        probes = run.probes(tensor)
        index = probes["index"][0]
        for s, (before, after, _, _) in enumerate(seen):
            update = (after[tensor] - before[tensor]).reshape(-1).double().numpy()[index]
            np.testing.assert_allclose(probes["update"][s], update, rtol=1e-6, atol=1e-12)
        assert np.isfinite(probes["first_moment"]).all()           # momentum_buffer


def test_sparse_adam_is_recorded_or_clearly_skipped(tmp_path):
    torch.manual_seed(0)
    model = torch.nn.Embedding(10, 4, sparse=True)
    optimizer = O.SparseAdam(model.parameters(), lr=0.01)
    rec = nbkit.record(model, optimizer, tmp_path / "r")
    with pytest.warns(nbkit.RecorderWarning, match="sparse gradient"):
        for s in range(3):
            optimizer.zero_grad()
            model(torch.tensor([1, 2, s])).sum().backward()
            optimizer.step()
    rec.close()
    run = nbkit.load(tmp_path / "r")
    assert run.steps.tolist() == [0, 1, 2]
    assert np.isnan(run.series("grad_norm")).all()          # skipped, and said so in the warning


class Velocity(torch.optim.Optimizer):
    """A custom optimizer nbkit knows nothing about: v = 0.5·v + g; θ ← θ − lr·v."""

    def __init__(self, params, lr=0.1):
        super().__init__(params, {"lr": lr})

    @torch.no_grad()
    def step(self, closure=None):
        for group in self.param_groups:
            for p in group["params"]:
                if p.grad is None:
                    continue
                state = self.state[p]
                v = state.setdefault("velocity", torch.zeros_like(p))
                state["calls"] = state.get("calls", 0) + 1
                v.mul_(0.5).add_(p.grad)
                p.add_(v, alpha=-group["lr"])


def test_unknown_optimizer_records_its_own_state(tmp_path):
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        run, seen, _ = _run(tmp_path, lambda p: Velocity(p, lr=0.1))
    assert run.meta["optimizer"]["adapter"] == "generic"
    for tensor in run.tensors:
        probes = run.probes(tensor)
        assert "velocity" in probes and "momentum_factor" not in probes
        index = probes["index"][0]
        for s, (before, after, grads, _) in enumerate(seen):
            update = (after[tensor] - before[tensor]).reshape(-1).double().numpy()[index]
            np.testing.assert_allclose(probes["update"][s], update, rtol=1e-6, atol=1e-12)
            # v_s = −update / lr, measured independently
            np.testing.assert_allclose(probes["velocity"][s], -update / 0.1, rtol=1e-4, atol=1e-7)
    assert np.isfinite(run.series("grad_norm")).all()
    assert np.isfinite(run.series("update_norm")).all()

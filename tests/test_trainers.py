"""The trainer callbacks on code nobody here wrote: a tiny GPT-2 trained by transformers' Trainer, and
a LightningModule trained by Lightning's Trainer. Oracles: each framework's own record of its loss
(the Trainer's log_history; the module's own training_step results)."""
from __future__ import annotations

import inspect
import json.decoder
import warnings
from pathlib import Path

import numpy as np
import pytest
import torch

import nbkit

pytestmark = pytest.mark.slow


def text_batches(length=64):
    """Byte sequences of standard-library source text (ships with Python)."""
    text = inspect.getsource(json.decoder).encode() + inspect.getsource(inspect).encode()
    ids = torch.tensor(list(text[: (len(text) // length) * length]), dtype=torch.long).view(-1, length)
    return [{"input_ids": row, "labels": row} for row in ids]


def gpt2_model():
    transformers = pytest.importorskip("transformers")
    torch.manual_seed(0)
    config = transformers.GPT2Config(n_layer=2, n_embd=64, n_head=2, vocab_size=256, n_positions=64,
                                     bos_token_id=0, eos_token_id=0)      # dropout 0.1 (GPT2Config's default)
    return transformers.GPT2LMHeadModel(config)


def gpt2_trainer(tmp_path, callback, steps, examples=None, **arguments):
    transformers = pytest.importorskip("transformers")
    model = gpt2_model()
    arguments.setdefault("per_device_train_batch_size", 8)
    args = transformers.TrainingArguments(output_dir=str(tmp_path / "trainer"), max_steps=steps, logging_steps=1,
                                          report_to="none", use_cpu=True, save_strategy="no", learning_rate=1e-3,
                                          disable_tqdm=True, seed=0, **arguments)
    return transformers.Trainer(model=model, args=args, train_dataset=text_batches()[:examples], callbacks=[callback])


@pytest.mark.parametrize("smoothing, steps", [(0.0, 150), (0.1, 30)])
def test_a_trainer_run_records_the_loss_the_trainer_logs(tmp_path, smoothing, steps):
    callback = nbkit.transformers_callback(tmp_path / "gpt", keyframe_every=50)
    trainer = gpt2_trainer(tmp_path, callback, steps, label_smoothing_factor=smoothing, max_grad_norm=1.0)
    trainer.train()
    run = nbkit.load(tmp_path / "gpt")
    logged = np.array([entry["loss"] for entry in trainer.state.log_history if "loss" in entry])
    assert len(run) == steps == len(logged)
    # transformers rounds logged losses to 4 decimals (trainer.py, _maybe_log_save_evaluate): tolerance 5e-5
    np.testing.assert_allclose(run.loss, logged, rtol=0, atol=5e-5 + 1e-6)
    assert run.meta["clip"]["max_norm"] == 1.0 and "_orig_mod" not in " ".join(run.tensors)
    assert run.meta["optimizer"]["class"] == "AdamW" and len(run.tensors) >= 20


def test_a_trainer_run_self_replays_bit_exactly_from_its_kept_batches(tmp_path):
    """Dropout on, 2 micro-batches a step, clipping, 40 examples (5 steps an epoch, so the run crosses two
    epoch boundaries where the Trainer's loader reshuffles): the replay needs neither batches nor step_fn."""
    callback = nbkit.transformers_callback(tmp_path / "gpt", keyframe_every=5)
    trainer = gpt2_trainer(tmp_path, callback, 12, examples=40, per_device_train_batch_size=4,
                           gradient_accumulation_steps=2, max_grad_norm=1.0, weight_decay=0.1)
    trainer.train()
    run = nbkit.load(tmp_path / "gpt")
    logged = np.array([entry["loss"] for entry in trainer.state.log_history if "loss" in entry])
    np.testing.assert_allclose(run.loss, logged, rtol=0, atol=5e-5 + 1e-6)    # logged to 4 decimals
    assert run.meta["trained_loss"]["rebuild"] == "returned" and run.kept_steps == list(range(12))
    assert all(len(run.batch(step)) == 2 for step in run.kept_steps)
    assert (run.clip_factor <= 1.0).all() and (run.clip_factor < 1.0).any()
    runs = nbkit.replay(run, gpt2_model(), start=3, progress=False)
    fidelity = runs["recorded"].meta["replay"]["fidelity"]
    assert fidelity["identical"] and fidelity["steps"] == 9, fidelity
    # a swapped optimizer keeps the Trainer's groups: weight decay 0.1, and 0 for biases and LayerNorms
    swapped = nbkit.replay(run, gpt2_model(), start=5, steps=3, progress=False,
                           optimizers={"sgd": lambda groups: torch.optim.SGD(groups, lr=1e-3, momentum=0.9)})
    decays = [group["weight_decay"] for group in swapped["sgd"].meta["param_groups"]]
    assert sorted(decays) == [0.0, 0.1] and swapped["sgd"].meta["optimizer"]["class"] == "SGD"


def test_a_bad_option_fails_when_the_callback_is_made(tmp_path):
    with pytest.raises(nbkit.RecorderError, match="keyframes"):
        nbkit.transformers_callback(tmp_path / "x", keyframes=10)
    with pytest.raises(nbkit.RecorderError, match="every"):
        nbkit.lightning_callback(tmp_path / "y", every=0)


def digits_module(seen, hidden=32, dropout=0.0):
    """A LightningModule on sklearn's load_digits that keeps its own record of its training losses."""
    pl = pytest.importorskip("lightning.pytorch")

    class Digits(pl.LightningModule):
        def __init__(self):
            super().__init__()
            self.net = torch.nn.Sequential(torch.nn.Linear(64, hidden), torch.nn.ReLU(), torch.nn.Dropout(dropout),
                                           torch.nn.Linear(hidden, 10))

        def training_step(self, batch, batch_idx):
            loss = torch.nn.functional.cross_entropy(self.net(batch[0]), batch[1])
            if self._trainer is not None:     # not the recorder's trained-loss check (a copy, no trainer)
                seen.append(float(loss.detach()))
            return loss

        def configure_optimizers(self):
            optimizer = torch.optim.AdamW(self.parameters(), lr=3e-3)
            schedule = torch.optim.lr_scheduler.StepLR(optimizer, step_size=10, gamma=0.5)
            return [optimizer], [{"scheduler": schedule, "interval": "step"}]

    return Digits()


def digits_loader():
    from sklearn.datasets import load_digits

    digits = load_digits()
    x = torch.tensor(digits.data / 16.0, dtype=torch.float32)
    dataset = torch.utils.data.TensorDataset(x[:640], torch.tensor(digits.target)[:640])
    return torch.utils.data.DataLoader(dataset, batch_size=32)


def fit(module, callback, epochs, **arguments):
    pl = pytest.importorskip("lightning.pytorch")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")              # Lightning's advice on workers and loggers
        trainer = pl.Trainer(max_epochs=epochs, callbacks=[callback], logger=False, enable_checkpointing=False,
                             enable_progress_bar=False, enable_model_summary=False, accelerator="cpu", devices=1,
                             **arguments)
        trainer.fit(module, digits_loader())


def test_a_lightning_run_with_accumulation_records_the_undivided_mean(tmp_path):
    torch.manual_seed(0)
    seen = []
    callback = nbkit.lightning_callback(tmp_path / "digits", keyframe_every=10)
    fit(digits_module(seen), callback, 2, accumulate_grad_batches=2, gradient_clip_val=0.5)
    run = nbkit.load(tmp_path / "digits")
    expected = np.array(seen).reshape(-1, 2).mean(axis=1)          # 20 micro-batches an epoch, 2 per step
    assert len(run) == len(expected) == 20
    np.testing.assert_allclose(run.loss, expected, rtol=1e-6)
    assert run.meta["clip"]["max_norm"] == 0.5 and "undivided" in run.meta["loss_source"]
    assert run.settings["lr"][:, 0].tolist()[9:11] == pytest.approx([3e-3, 1.5e-3])   # StepLR after 10 steps


def test_a_lightning_run_self_replays_bit_exactly_from_its_kept_batches(tmp_path):
    """Dropout on, 2 micro-batches a step, clipping, 2 epochs (10 steps each): the replay runs the module's
    training_step on the kept (batch, batch_idx) with no batches and no step_fn, across the boundary."""
    torch.manual_seed(0)
    module = digits_module([], dropout=0.2)
    callback = nbkit.lightning_callback(tmp_path / "digits", keyframe_every=5)
    fit(module, callback, 2, accumulate_grad_batches=2, gradient_clip_val=0.5)
    run = nbkit.load(tmp_path / "digits")
    assert run.meta["trained_loss"]["rebuild"] == "training_step" and len(run.kept_steps) == 20
    assert run.kept_step(0).scales == [0.5, 0.5]        # Lightning divides by accumulate_grad_batches
    torch.manual_seed(1)
    runs = nbkit.replay(run, digits_module([], dropout=0.2), start=6, progress=False)
    fidelity = runs["recorded"].meta["replay"]["fidelity"]
    assert fidelity["identical"] and fidelity["steps"] == 14, fidelity


def test_a_second_fit_appends_and_another_model_is_refused(tmp_path):
    torch.manual_seed(0)
    module, callback = digits_module([]), nbkit.lightning_callback(tmp_path / "digits")
    fit(module, callback, 1)
    fit(module, callback, 1)                          # a new Trainer, the same module: steps continue
    run = nbkit.load(tmp_path / "digits")
    assert run.steps.tolist() == list(range(40)) and len(run.meta["resumes"]) == 1
    with pytest.raises(nbkit.RecorderError, match="Cannot resume.*tensors differ"):
        fit(digits_module([], hidden=16), callback, 1)
    assert nbkit.load(tmp_path / "digits").steps.tolist() == list(range(40))     # nothing recorded is lost


@pytest.mark.parametrize("name, library", [("transformers_callback", "transformers"), ("lightning_callback", "lightning")])
def test_a_missing_framework_names_the_extra_to_install(name, library):
    import subprocess
    import sys

    code = (f"import sys; sys.modules[{library!r}] = None\n"      # as if the library were not installed
            f"import nbkit\ntry:\n    nbkit.{name}('x')\nexcept ImportError as e:\n    print(e)\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert f"pip install 'nbkit[{library}]'" in out.stdout, out.stdout + out.stderr


CRASHING_RUN = """
import sys, transformers
sys.path.insert(0, {tests!r})
from test_trainers import gpt2_trainer
import nbkit
from pathlib import Path

class Crash(transformers.TrainerCallback):
    def on_step_end(self, args, state, control, **kwargs):
        if state.global_step == 10:
            raise RuntimeError("the training loop crashed")

trainer = gpt2_trainer(Path({folder!r}), nbkit.transformers_callback(Path({folder!r}) / "gpt"), 50)
trainer.add_callback(Crash())
trainer.train()                                  # raises: on_train_end never runs
"""


def test_a_trainer_that_crashes_before_train_end_leaves_a_readable_recording(tmp_path):
    import subprocess
    import sys

    pytest.importorskip("transformers")
    script = CRASHING_RUN.format(tests=str(Path(__file__).parent), folder=str(tmp_path))
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=300)
    assert done.returncode != 0 and "the training loop crashed" in done.stderr
    run = nbkit.load(tmp_path / "gpt")              # closed by the recorder's exit hooks
    assert run.closed_cleanly and run.steps.tolist() == list(range(10)) and np.isfinite(run.loss).all()

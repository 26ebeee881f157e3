"""Findings on real runs: models from `transformers` (tests/real_runs.py names each model's source) must
stay quiet when healthy, with curvature on, and name planted faults at their step and tensor.

The two false alarms this guards against were seen before the fix (this repository at commit a1604b5,
checked by running the same runs of tests/real_runs.py there): the ViT, whose class token starts at std 1e-6, got
oversized-updates on `vit.embeddings.cls_token` at step 0 (update ratio 934); the ResNet with SGD +
Nesterov, OneCycleLR and clipping at 0.25 (63 % of steps clipped, loss 2.42 → 0.005) got
over-stability-limit from step 25 (sharpness 19.5 against a limit of 5.47, its evidence
"loss_rise_next_10_steps" = 1.0) although its loss fell.
"""
from __future__ import annotations

import pytest

from tests.real_runs import FAULT_STEP, NAN_TENSOR, ORPHAN, describe, findings_of, image_run

pytestmark = pytest.mark.slow
transformers = pytest.importorskip("transformers")


@pytest.mark.parametrize("kind", ["vit", "resnet"])
def test_a_healthy_transformers_model_is_quiet(tmp_path, kind):
    run = image_run(kind, tmp_path / kind)
    assert run.loss[-1] < 0.7 * run.loss[0]                       # it trained
    assert "sharpness" in run.quantities and (run.series("sharpness") == run.series("sharpness")).any()
    assert findings_of(run) == [], describe(findings_of(run))


def test_a_healthy_gpt2_trainer_run_with_curvature_is_quiet(tmp_path):
    import nbkit
    from tests.test_trainers import gpt2_trainer
    callback = nbkit.transformers_callback(tmp_path / "gpt2", every=1, curvature_every=25)
    gpt2_trainer(tmp_path, callback, 150).train()
    run = nbkit.load(tmp_path / "gpt2")
    assert (run.series("sharpness") == run.series("sharpness")).any()
    assert findings_of(run) == [], describe(findings_of(run))


@pytest.mark.parametrize("kind", ["vit", "resnet"])
def test_a_learning_rate_30_times_too_high_is_a_stability_finding_at_its_step(tmp_path, kind):
    run = image_run(kind, tmp_path / kind, "lr30")
    stability = [f for f in findings_of(run) if f.kind == "over-stability-limit"]
    assert stability, describe(findings_of(run))
    assert FAULT_STEP <= stability[0].first_step <= FAULT_STEP + 25       # the next sharpness estimate
    assert stability[0].evidence["loss_after_over_before"] > 1


@pytest.mark.parametrize("kind", ["vit", "resnet"])
def test_an_orphan_and_a_nan_are_named_at_their_tensor(tmp_path, kind):
    orphan = findings_of(image_run(kind, tmp_path / "orphan", "orphan"))
    assert [f.tensors for f in orphan if f.kind == "orphan"] == [[ORPHAN[kind]]], describe(orphan)
    nan = findings_of(image_run(kind, tmp_path / "nan", "nan"))
    named = [f for f in nan if f.kind == "nonfinite"]
    assert named and named[0].tensors == [NAN_TENSOR[kind]] and named[0].first_step == FAULT_STEP, describe(nan)


def test_an_input_channel_far_below_scale_is_eps_dominated_in_the_vits_patch_projection(tmp_path):
    run = image_run("vit", tmp_path / "vit", "scaled")
    found = [f for f in findings_of(run) if f.kind == "eps-dominated"]
    projection = "vit.embeddings.patch_embeddings.projection.weight"
    assert [f.tensors for f in found] == [[projection]], describe(findings_of(run))
    assert found[0].units == {projection: {"columns": ["0"]}}

"""Real runs for the findings corpus: models from `transformers` (sources named beside each), trained on
scikit-learn's digits (upscaled to 32×32, three channels) or standard-library text, with curvature on
(explicit strides, so the stability rule is exercised), healthy or with one planted fault.

Faults, each planted at FAULT_STEP: "lr30" (every group's learning rate × 30), "nan" (a NaN written into
one weight), "orphan" (one weight left out of the optimizer from the start), "scaled" (the first input
channel scaled by SCALED from the start). SCALED is 1e-8, not 1e-6: measured on the ViT, a channel scaled by
1e-6 still has a gradient RMS of 6.9e-8 in the patch projection, above AdamW's ε = 1e-8, so Adam normalises
it and ε does not dominate (the finding is rightly quiet there); at 1e-8 the gradient falls under ε.
"""
from __future__ import annotations

import warnings

import numpy as np
import torch
from sklearn.datasets import load_digits

import nbkit

STEPS = 150
FAULT_STEP = 100
BATCH = 32
CURVATURE_EVERY = 25
SCALED = 1e-8


def digits_images(size=32, channels=3, n=512):
    """load_digits upscaled bilinearly to size × size, repeated over channels, standardised."""
    data = load_digits()
    x = torch.tensor(data.data[:n] / 16.0, dtype=torch.float32).view(-1, 1, 8, 8)
    x = torch.nn.functional.interpolate(x, size=size, mode="bilinear").repeat(1, channels, 1, 1)
    return (x - 0.3) / 0.4, torch.tensor(data.target[:n])


def vit(seed=0):
    """transformers' ViTForImageClassification (ViTConfig tiny: image 32, patch 4, width 64, 2 layers),
    class token initialised at std 1e-6 (transformers' default is 0.02)."""
    import transformers
    config = transformers.ViTConfig(image_size=32, patch_size=4, num_channels=3, hidden_size=64,
                                    num_hidden_layers=2, num_attention_heads=2, intermediate_size=128, num_labels=10)
    torch.manual_seed(seed)
    model = transformers.ViTForImageClassification(config)
    with torch.no_grad():
        model.vit.embeddings.cls_token.normal_(0, 1e-6)
    return model


def resnet(seed=0):
    """transformers' ResNetForImageClassification (ResNetConfig: basic blocks, 16-32 channels, batch norm)."""
    import transformers
    config = transformers.ResNetConfig(num_channels=3, embedding_size=16, hidden_sizes=[16, 32], depths=[1, 1],
                                       layer_type="basic", num_labels=10)
    torch.manual_seed(seed)
    return transformers.ResNetForImageClassification(config)


def image_run(kind, path, fault=None, steps=STEPS):
    """Train `kind` ("vit": AdamW, bf16 autocast; "resnet": SGD + Nesterov, OneCycleLR, clipping at 0.25)
    with `fault` planted; returns the Recording."""
    model = vit() if kind == "vit" else resnet()
    x, y = digits_images()
    if fault == "scaled":
        x = x.clone()
        x[:, 0] *= SCALED
    params = [p for n, p in model.named_parameters() if not (fault == "orphan" and n == ORPHAN[kind])]
    clip = None
    if kind == "vit":
        optimizer = torch.optim.AdamW(params, lr=1e-3)
        scheduler = None
    else:
        optimizer = torch.optim.SGD(params, lr=0.05, momentum=0.9, nesterov=True)
        scheduler = torch.optim.lr_scheduler.OneCycleLR(optimizer, max_lr=0.4, total_steps=steps)
        clip = 0.25
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")          # transformers' config notes, not the recorder's
        rec = nbkit.record(model, optimizer, path, every=1, curvature_every=CURVATURE_EVERY, clip=clip)
        for step in range(steps):
            if step == FAULT_STEP:
                plant(fault, model, optimizer, kind)
            batch = slice((step * BATCH) % 480, (step * BATCH) % 480 + BATCH)
            optimizer.zero_grad()
            with torch.autocast("cpu", dtype=torch.bfloat16, enabled=kind == "vit"):
                output = model(pixel_values=x[batch], labels=y[batch])
            output.loss.backward()
            if clip:
                torch.nn.utils.clip_grad_norm_(model.parameters(), clip)
            optimizer.step()
            if scheduler is not None:
                scheduler.step()
        rec.close()
    return nbkit.load(path)


ORPHAN = {"vit": "vit.layers.1.mlp.fc2.weight", "resnet": "resnet.encoder.stages.1.layers.0.layer.1.convolution.weight"}
NAN_TENSOR = {"vit": "vit.layers.0.attention.q_proj.weight",
              "resnet": "resnet.encoder.stages.0.layers.0.layer.0.convolution.weight"}


def plant(fault, model, optimizer, kind):
    if fault == "lr30":
        for group in optimizer.param_groups:
            group["lr"] *= 30
            if "max_lr" in group:                   # OneCycleLR sets lr from these every step
                group["max_lr"] *= 30
                group["initial_lr"] *= 30
                group["min_lr"] *= 30
    elif fault == "nan":
        with torch.no_grad():
            dict(model.named_parameters())[NAN_TENSOR[kind]].view(-1)[0] = float("nan")


def findings_of(run):
    return [f for f in run.findings() if f.severity in ("warning", "error")]


def describe(findings) -> str:
    return "; ".join(f"{f.kind} {f.tensors[:2]} from step {f.first_step}" for f in findings) or "none"


__all__ = ["image_run", "findings_of", "describe", "FAULT_STEP", "ORPHAN", "NAN_TENSOR", "np"]

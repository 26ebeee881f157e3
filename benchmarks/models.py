"""The models the recording benchmarks train, written with torch.nn (torchvision's build here does not
import), and their batches.

  mlp          784-1024-512-10, batch 64 of 1×28×28 (1.33M parameters, 6 tensors)
  conv         four conv + batch-norm blocks, batch 64 of 3×32×32 (0.39M, 14 tensors)
  transformer  a 2-layer encoder, width 128, sequence 64, batch 16 (0.47M, 28 tensors)
  resnet18     ResNet-18 in torchvision's layout (7×7 stem, BasicBlocks 64-128-256-512, two per stage,
               batch norm), batch 32 of 3×32×32 (11.18M, 62 tensors)
  gpt2-tiny    transformers' GPT2LMHeadModel, 2 layers, width 128, 2 heads, vocabulary 256, 64
               positions, batch 16 (0.44M, 28 tensors), trained on its own returned loss, with AdamW
"""
from __future__ import annotations

import copy

import torch
from torch import nn


def mlp():
    model = nn.Sequential(nn.Flatten(), nn.Linear(784, 1024), nn.ReLU(), nn.Linear(1024, 512), nn.ReLU(),
                          nn.Linear(512, 10))
    return model, (64, 1, 28, 28), 10


def conv():
    def block(i, o):
        return [nn.Conv2d(i, o, 3, padding=1, bias=False), nn.BatchNorm2d(o), nn.ReLU(), nn.MaxPool2d(2)]
    model = nn.Sequential(*block(3, 32), *block(32, 64), *block(64, 128), *block(128, 256),
                          nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(256, 10))
    return model, (64, 3, 32, 32), 10


class Encoder(nn.Module):
    def __init__(self, vocab=256, width=128, layers=2, heads=4, ff=512, seq=64):
        super().__init__()
        self.embed = nn.Embedding(vocab, width)
        self.position = nn.Parameter(torch.zeros(seq, width))
        layer = nn.TransformerEncoderLayer(width, heads, ff, dropout=0.0, batch_first=True)
        self.encoder = nn.TransformerEncoder(layer, layers, enable_nested_tensor=False)
        self.head = nn.Linear(width, vocab)

    def forward(self, tokens):
        return self.head(self.encoder(self.embed(tokens) + self.position)).flatten(0, 1)


def transformer():
    return Encoder(), (16, 64), 256


class BasicBlock(nn.Module):
    """ResNet's basic block: two 3×3 convolutions with batch norm, a 1×1 projection when the shape changes."""

    def __init__(self, inputs, outputs, stride):
        super().__init__()
        self.conv1 = nn.Conv2d(inputs, outputs, 3, stride, 1, bias=False)
        self.bn1 = nn.BatchNorm2d(outputs)
        self.conv2 = nn.Conv2d(outputs, outputs, 3, 1, 1, bias=False)
        self.bn2 = nn.BatchNorm2d(outputs)
        self.shortcut = nn.Sequential()
        if stride != 1 or inputs != outputs:
            self.shortcut = nn.Sequential(nn.Conv2d(inputs, outputs, 1, stride, bias=False), nn.BatchNorm2d(outputs))

    def forward(self, x):
        out = torch.relu(self.bn1(self.conv1(x)))
        return torch.relu(self.bn2(self.conv2(out)) + self.shortcut(x))


def resnet18():
    """ResNet-18 as torchvision lays it out (7×7 stride-2 stem and max pool: one step ~0.1–0.3 s on 2
    cores at 32×32; a CIFAR 3×3 stem would be ~10× slower), with 10 classes."""
    layers = [nn.Conv2d(3, 64, 7, 2, 3, bias=False), nn.BatchNorm2d(64), nn.ReLU(), nn.MaxPool2d(3, 2, 1)]
    channels = 64
    for width, stride in ((64, 1), (128, 2), (256, 2), (512, 2)):
        layers += [BasicBlock(channels, width, stride), BasicBlock(width, width, 1)]
        channels = width
    model = nn.Sequential(*layers, nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(512, 10))
    return model, (32, 3, 32, 32), 10


def gpt2_tiny():
    from transformers import GPT2Config, GPT2LMHeadModel
    config = GPT2Config(n_layer=2, n_embd=128, n_head=2, vocab_size=256, n_positions=64,
                        bos_token_id=None, eos_token_id=None)     # GPT-2's 50256 is outside this vocabulary
    return GPT2LMHeadModel(config), (16, 64), 256


def transformers_missing() -> str | None:
    try:
        import transformers  # noqa: F401
    except Exception as exc:      # noqa: BLE001 - any import failure means: skip it
        return f"{type(exc).__name__}: {exc}"
    return None


# name -> (builder, optimizer class, trained through a criterion)
MODELS = {
    "mlp": (mlp, torch.optim.Adam, True),
    "conv": (conv, torch.optim.Adam, True),
    "transformer": (transformer, torch.optim.Adam, True),
    "resnet18": (resnet18, torch.optim.Adam, True),
    "gpt2-tiny": (gpt2_tiny, torch.optim.AdamW, False),
}


class ReturnedLoss:
    """The model's own loss (GPT-2 with labels) in a criterion's shape:
    forward(x) = model(input_ids=x, labels=x), criterion(output, y) = output.loss."""

    def __init__(self, model):
        self.model = model

    def __call__(self, x):
        return self.model(input_ids=x, labels=x)

    @staticmethod
    def criterion(output, targets):
        return output.loss


def training_copy(base, optimizer_class, with_criterion):
    """A copy of `base` in training mode with a fresh optimizer: (model, optimizer, criterion, forward,
    loss_of), where loss_of(forward(x), y) is the step's loss (the model's own loss without a criterion)."""
    model = copy.deepcopy(base)
    model.train()
    optimizer = optimizer_class(model.parameters())
    criterion = nn.CrossEntropyLoss() if with_criterion else None
    forward, loss_of = (model, criterion) if with_criterion else (ReturnedLoss(model), ReturnedLoss.criterion)
    return model, optimizer, criterion, forward, loss_of


def batches(shape, classes, n, seed=0):
    """n (inputs, targets) pairs: token ids for a 2-d shape, Gaussian images otherwise."""
    generator = torch.Generator().manual_seed(seed)
    out = []
    for _ in range(n):
        if len(shape) == 2:        # token ids
            x = torch.randint(0, classes, shape, generator=generator)
            y = torch.randint(0, classes, (shape[0] * shape[1],), generator=generator)
        else:
            x = torch.randn(shape, generator=generator)
            y = torch.randint(0, classes, (shape[0],), generator=generator)
        out.append((x, y))
    return out

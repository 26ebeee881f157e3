"""`nbkit demo --out DIR`: record a small run and say where it went (the full story comes later)."""
from __future__ import annotations

from pathlib import Path


def add_arguments(parser):
    parser.add_argument("--out", default="demo-out", help="output folder (default: demo-out)")


def run(args) -> int:
    import torch

    import nbkit

    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    torch.manual_seed(0)
    model = torch.nn.Sequential(torch.nn.Linear(12, 32), torch.nn.Tanh(), torch.nn.Linear(32, 1))
    optimizer = torch.optim.Adam(model.parameters(), lr=3e-3)
    criterion = torch.nn.MSELoss()
    generator = torch.Generator().manual_seed(1)
    sensors = torch.randn(2048, 12, generator=generator)
    leaf_temperature = sensors @ torch.linspace(-1, 1, 12) + 0.1 * torch.randn(2048, generator=generator)
    with nbkit.record(model, optimizer, out / "run", criterion=criterion, overwrite=True) as rec:
        for step in range(300):
            rows = torch.randint(0, 2048, (64,), generator=generator)
            optimizer.zero_grad()
            criterion(model(sensors[rows]).squeeze(1), leaf_temperature[rows]).backward()
            optimizer.step()
    recording = nbkit.load(out / "run")
    print(f"recorded {len(recording.steps)} steps of {len(recording.tensors)} tensors into {recording.path}")
    return 0

"""Render docs/explorer.png: the tour notebook's run, recorded here, drawn by the explorer's to_png.

    .venv/bin/python docs/render_explorer.py
"""
import tempfile
from pathlib import Path

import torch

import nbkit


def main(out=Path(__file__).with_name("explorer.png")):
    torch.manual_seed(0)
    inputs = torch.randn(512, 10)
    targets = torch.sin(inputs[:, :3].sum(dim=1, keepdim=True))
    model = torch.nn.Sequential(torch.nn.Linear(10, 64), torch.nn.ReLU(), torch.nn.Linear(64, 64), torch.nn.ReLU(),
                                torch.nn.Linear(64, 1))
    optimizer = torch.optim.Adam(model.parameters(), lr=3e-3)
    criterion = torch.nn.MSELoss()
    path = Path(tempfile.mkdtemp(prefix="nbkit-docs-")) / "tour"
    with nbkit.record(model, optimizer, path, criterion=criterion, probes=32, keyframe_every=50):
        for _ in range(300):
            batch = torch.randint(0, len(inputs), (64,))
            optimizer.zero_grad()
            criterion(model(inputs[batch]), targets[batch]).backward()
            optimizer.step()
    view = nbkit.explore(path)
    view.wait_for_findings(120)
    view.log_toggle.value = True
    view.tensor = "2.weight"
    view.step = 120
    view.to_png(out)
    view.close()
    print(f"wrote {out}")


if __name__ == "__main__":
    main()

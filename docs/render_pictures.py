"""Render the README's pictures from the demo scenario, drawn by the views' own to_png:
docs/explorer.png (the first run, cursor on the loss spike) and docs/comparison.png (the replays).

    .venv/bin/python docs/render_pictures.py        # or: make docs
"""
import tempfile
from pathlib import Path

import nbkit
from nbkit.demo import scenario

DOCS = Path(__file__).resolve().parent


def main():
    folder = Path(tempfile.mkdtemp(prefix="nbkit-docs-"))
    run, batches = scenario.train_first_run(folder / "first-run")
    findings = run.findings()
    spike = next(f for f in findings if f.kind == "grad-spike")
    view = nbkit.explore(run)
    view.wait_for_findings(120)
    view.log_toggle.value = True
    view.tensor = "sensors.0.weight"
    view.step = spike.first_step
    view.to_png(DOCS / "explorer.png")
    view.close()
    start = max(k for k in run.keyframes if k < spike.first_step)
    replays = nbkit.replay(run, scenario.make_model(), scenario.step_fn, batches,
                           optimizers=scenario.REPLAY_OPTIMIZERS, start=start, steps=scenario.STEPS - start,
                           progress=False)
    comparison = nbkit.compare(run, *replays.values())
    comparison.tensor = "head.2.weight"
    comparison.step = spike.first_step
    comparison.to_png(DOCS / "comparison.png")
    comparison.close()
    print(f"wrote {DOCS / 'explorer.png'} and {DOCS / 'comparison.png'}")


if __name__ == "__main__":
    main()

"""Explorer latency on synthetic recordings of 300 tensors x 100,000 steps and 62 tensors x 10,000 steps.

    .venv/bin/python benchmarks/explorer_latency.py            # both sizes, each in a fresh process
    .venv/bin/python benchmarks/explorer_latency.py --size 62x1000 --moves 100

Budgets (issue 16): open <= 2 s; cursor move median <= 50 ms and p95 <= 100 ms; expanding a block
of the layer map <= 0.3 s; filtering its rows by name <= 0.3 s (issue 3's: picking another tensor
or quantity <= 1 s). Each figure is printed with its ratio to the budget (<= 1 is within). Opening is `nbkit.explore(path)` plus the first full draw of every part (`view.draw()`, what
the browser asks for when it shows the view). A cursor move is timed from setting `explorer.step` to the end of the
drawing it causes, including the PNG that goes to the browser. With no browser attached ipympl
would also encode a full PNG for the notebook file at every redraw; a connected front end turns
that off, so the benchmark does too (`syncing_data_url = False`). Import time is printed apart.
The recordings are written once by nbkit.store.synthetic (through the real RecordingWriter) and
reused from the cache folder.
"""
from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

BUDGETS = {"open_s": 2.0, "move_median_ms": 50.0, "move_p95_ms": 100.0, "switch_max_s": 1.0,
           "expand_max_s": 0.3, "filter_max_s": 0.3}
SIZES = ["300x100000", "62x10000"]       # tensors x steps


def recording(size: str, cache: Path) -> Path:
    from nbkit.store.files import is_recording, read_committed
    from nbkit.store.synthetic import write_synthetic

    tensors, steps = (int(v) for v in size.split("x"))
    path = cache / f"nbkit-synthetic-{tensors}x{steps}"
    if not is_recording(path) or not read_committed(path).get("closed"):
        print(f"writing a synthetic recording of {tensors} tensors x {steps:,} steps to {path} ...", flush=True)
        t = time.perf_counter()
        if path.exists():
            import shutil

            shutil.rmtree(path)
        write_synthetic(path, steps=steps, tensors=tensors)
        print(f"  written in {time.perf_counter() - t:.0f} s", flush=True)
    return path


def measure(path: Path, moves: int, seed: int = 0) -> dict:
    t = time.perf_counter()
    import nbkit
    import ipympl.backend_nbagg  # noqa: F401  (ipywidgets, ipympl, matplotlib: timed as imports)
    import matplotlib.figure  # noqa: F401
    import nbkit.views.explorer  # noqa: F401
    imports = time.perf_counter() - t
    t, c = time.perf_counter(), time.process_time()
    view = nbkit.explore(path)
    view.draw()                            # the first full draw of every part, as showing it costs
    open_s, open_cpu_s = time.perf_counter() - t, time.process_time() - c
    view.wait_for_findings()               # findings run in a background thread; let them finish first
    findings_s = time.perf_counter() - t - open_s
    for part in (view.timeline, view.layer_map, view.coordinates, view.profile):
        part.canvas.syncing_data_url = False       # as once a browser has the canvas (see docstring)
    rng = np.random.default_rng(seed)
    steps = view.data.steps
    first, last = int(steps[0]), int(steps[-1])

    cpu = []

    def timed(action, values):
        out = []
        for value in values:
            t, c = time.perf_counter(), time.process_time()
            action(value)
            out.append(time.perf_counter() - t)
            cpu.append(time.process_time() - c)
        return np.array(out)

    def move(step):
        view.step = int(step)

    # Dragging: runs of small moves, as a mouse drag or the slider produces.
    scrub = []
    position = int(rng.integers(first, last + 1))
    for _ in range(moves):
        position = int(np.clip(position + rng.integers(1, max(2, (last - first) // 400)), first, last))
        if position == last:
            position = int(rng.integers(first, last + 1))
        scrub.append(position)
    scrub_s = timed(move, scrub)
    jumps_s = timed(move, rng.integers(first, last + 1, size=max(moves // 2, 10)))
    tensors = [view.run.tensors[k] for k in rng.choice(len(view.run.tensors), 8, replace=False)]
    tensor_s = timed(lambda name: setattr(view, "tensor", name), tensors)
    quantities = ["grad_norm", "gain_median", "damped", "grad_cosine", "update_norm", "update_ratio"]
    quantity_s = timed(lambda q: setattr(view, "quantity", q), quantities)
    blocks = [b.name for b in view.layer_map.tree.blocks if len(b.tensors) > 1]
    chosen = [blocks[k] for k in rng.choice(len(blocks), min(6, len(blocks)), replace=False)] if blocks else []
    expand_s = timed(view.expand, chosen)
    timed(view.collapse, chosen)
    filter_s = timed(lambda text: setattr(view.filter_box, "value", text), ["block1", "block12.w", "weight", "zzz", ""])
    errors = view.errors.value
    view.close()
    moves_all = np.concatenate([scrub_s, jumps_s])
    move_cpu = np.array(cpu[:len(moves_all)])
    return {
        "steps": len(steps), "tensors": len(view.run.tensors), "imports_s": imports, "open_s": open_s,
        "open_cpu_s": open_cpu_s, "findings_s": findings_s,
        "move_cpu_median_ms": 1e3 * np.median(move_cpu), "move_cpu_p95_ms": 1e3 * np.percentile(move_cpu, 95),
        "scrub_median_ms": 1e3 * np.median(scrub_s), "scrub_p95_ms": 1e3 * np.percentile(scrub_s, 95),
        "jump_median_ms": 1e3 * np.median(jumps_s), "jump_p95_ms": 1e3 * np.percentile(jumps_s, 95),
        "move_median_ms": 1e3 * np.median(moves_all), "move_p95_ms": 1e3 * np.percentile(moves_all, 95),
        "tensor_median_s": float(np.median(tensor_s)), "tensor_max_s": float(tensor_s.max()),
        "quantity_median_s": float(np.median(quantity_s)), "quantity_max_s": float(quantity_s.max()),
        "expand_median_s": float(np.median(expand_s)) if len(expand_s) else float("nan"),
        "expand_max_s": float(expand_s.max()) if len(expand_s) else float("nan"),
        "filter_median_s": float(np.median(filter_s)), "filter_max_s": float(filter_s.max()),
        "rows": len(view.layer_map.rows),
        "moves": len(moves_all), "view_errors": errors,
    }


def report(results: list[dict]) -> None:
    rows = [("open (s)", "open_s", "open_s"),
            ("cursor move, median (ms)", "move_median_ms", "move_median_ms"),
            ("cursor move, p95 (ms)", "move_p95_ms", "move_p95_ms"),
            ("  dragging, median / p95 (ms)", ("scrub_median_ms", "scrub_p95_ms"), None),
            ("  jumps, median / p95 (ms)", ("jump_median_ms", "jump_p95_ms"), None),
            ("pick tensor, median / max (s)", ("tensor_median_s", "tensor_max_s"), "switch_max_s"),
            ("pick quantity, median / max (s)", ("quantity_median_s", "quantity_max_s"), "switch_max_s"),
            ("expand a block, median / max (s)", ("expand_median_s", "expand_max_s"), "expand_max_s"),
            ("filter rows, median / max (s)", ("filter_median_s", "filter_max_s"), "filter_max_s"),
            ("CPU time: open (s)", "open_cpu_s", None),
            ("CPU time: move median / p95 (ms)", ("move_cpu_median_ms", "move_cpu_p95_ms"), None),
            ("findings, in the background (s)", "findings_s", None)]
    header = f"{'':34}" + "".join(f"{str(r['tensors']) + ' x ' + format(r['steps'], ','):>18}" for r in results) \
        + "   budget (worst / budget)"
    print(header)
    for label, key, budget in rows:
        line = f"{label:34}"
        for r in results:
            if isinstance(key, tuple):
                a, b = r[key[0]], r[key[1]]
                line += f"{a:>9.3g} /{b:>6.3g}" if a < 10 else f"{a:>9.0f} /{b:>6.0f}"
            else:
                line += f"{r[key]:>18.3g}"
        if budget:
            limit = BUDGETS[budget]
            worst = max((r[key[1]] if isinstance(key, tuple) else r[key]) for r in results)
            line += f"   <= {limit:g} ({worst / limit:.2f}x, {'within' if worst <= limit else 'OVER'})"
        print(line)
    for r in results:
        print(f"{r['tensors']} x {r['steps']:,}: layer map opens with {r['rows']} rows; imports {r['imports_s']:.1f} s (not part of open), {r['moves']} cursor moves"
              + ("; VIEW ERRORS: " + r["view_errors"][:500] if r["view_errors"] else ""))
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"machine: {os.cpu_count()} cores, load average {load:.1f} at the end (other work shares the "
          "machine); wall-clock figures, one run, no retries. CPU time counts every thread of the process.")


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", action="append", help="TENSORSxSTEPS (repeatable); default "
                        + " and ".join(SIZES))
    parser.add_argument("--moves", type=int, default=200, help="dragging cursor moves per size (default 200)")
    parser.add_argument("--cache", type=Path, default=Path(tempfile.gettempdir()),
                        help="folder holding the synthetic recordings (default: the temp folder)")
    parser.add_argument("--one", action="store_true", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    sizes = args.size or SIZES
    if args.one:
        print(json.dumps(measure(recording(sizes[0], args.cache), args.moves)))
        return
    for size in sizes:
        recording(size, args.cache)
    results = []
    for size in sizes:                # a fresh process per size: nothing cached from the other
        out = subprocess.run([sys.executable, __file__, "--one", "--size", size, "--moves", str(args.moves),
                              "--cache", str(args.cache)], capture_output=True, text=True, check=True)
        results.append(json.loads(out.stdout.strip().splitlines()[-1]))
    report(results)


if __name__ == "__main__":
    main()

"""Run by tests/test_crash.py: forks training children that record, and SIGKILLs each at a random step.

Importing torch once and forking keeps twenty kills cheap. Each child imports zarr itself (after the
fork), so no event-loop thread crosses a fork. Writes trials.json: per trial the recording folder,
commit_seconds, the steps the child reported (step, wall time) and the kill time.
"""
import json
import os
import random
import signal
import sys
import time

import torch


def child(folder, commit_seconds, write_fd):
    import nbkit

    torch.set_num_threads(1)
    torch.manual_seed(0)
    model = torch.nn.Sequential(torch.nn.Linear(10, 32), torch.nn.ReLU(), torch.nn.Linear(32, 4))
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-2)
    criterion = torch.nn.CrossEntropyLoss()
    rec = nbkit.record(model, optimizer, folder, criterion=criterion, probes=16, keyframe_every=7, every=1,
                       commit_seconds=commit_seconds)
    data = torch.Generator().manual_seed(1)
    for step in range(100_000):
        x, y = torch.randn(32, 10, generator=data), torch.randint(0, 4, (32,), generator=data)
        optimizer.zero_grad()
        criterion(model(x), y).backward()
        optimizer.step()
        os.write(write_fd, f"{step} {time.time()}\n".encode())
    rec.close()


def main(root, trials, seed):
    rng = random.Random(seed)
    results = []
    for trial in range(trials):
        folder = os.path.join(root, f"trial{trial:02d}")
        commit_seconds = rng.choice([0.1, 0.3, 1.0])
        target = rng.randint(1, 200)
        read_fd, write_fd = os.pipe()
        pid = os.fork()
        if pid == 0:
            os.close(read_fd)
            try:
                child(folder, commit_seconds, write_fd)
            finally:
                os._exit(0)
        os.close(write_fd)
        reports, buffer = [], b""
        with os.fdopen(read_fd, "rb", buffering=0) as pipe:
            while not reports or reports[-1][0] < target:
                chunk = pipe.read(4096)
                if not chunk:
                    break
                buffer += chunk
                *lines, buffer = buffer.split(b"\n")
                reports += [(int(a), float(b)) for a, b in (line.split() for line in lines)]
            os.kill(pid, signal.SIGKILL)
            killed = time.time()
        os.waitpid(pid, 0)
        results.append({"folder": folder, "commit_seconds": commit_seconds, "target": target,
                        "reports": reports, "killed": killed})
    with open(os.path.join(root, "trials.json"), "w") as handle:
        json.dump(results, handle)


if __name__ == "__main__":
    main(sys.argv[1], int(sys.argv[2]), int(sys.argv[3]))

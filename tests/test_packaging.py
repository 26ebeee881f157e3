"""Packaging: `nbkit --version`, and a wheel that installs into a fresh virtual environment and runs
the demo there."""
import os
import subprocess
import sys
import venv
import zipfile
from pathlib import Path

import pytest

import nbkit
from nbkit.cli import main

ROOT = Path(__file__).resolve().parent.parent


def test_version_flag_prints_the_package_version(capsys):
    with pytest.raises(SystemExit) as info:            # argparse's "version" action exits 0 after printing
        main(["--version"])
    assert info.value.code == 0
    assert capsys.readouterr().out.strip() == f"nbkit {nbkit.__version__}"


@pytest.mark.slow
@pytest.mark.timeout(1500)
def test_wheel_installs_into_a_fresh_venv_and_runs_the_demo(tmp_path):
    """Build the wheel (`python -m build --wheel`, the PyPA build frontend), install it with its
    dependencies into a new venv that does not see this environment's packages (the venv module's
    default: no system site packages), then run `nbkit --version` and `nbkit demo` from there.

    The install takes about 70 s here: torch comes from the local disk through constraints.txt (the
    CPU build pinned there; an open `torch` would pull a CUDA build). The demo takes about 40 s; the
    whole test about 100 s on this machine, well under the 5 minutes that would call for reusing this
    environment (--system-site-packages with --no-deps) instead.
    """
    dist = tmp_path / "dist"
    subprocess.run([sys.executable, "-m", "build", "--wheel", "--outdir", str(dist), str(ROOT)],
                   check=True, capture_output=True, timeout=600)
    wheels = list(dist.glob("nbkit-*.whl"))
    assert len(wheels) == 1, wheels
    wheel = wheels[0]
    assert wheel.name.startswith(f"nbkit-{nbkit.__version__}-")

    # the wheel holds the package and its metadata only: no tests, notebooks, docs or pictures
    names = zipfile.ZipFile(wheel).namelist()
    assert any(n == "nbkit/cli.py" for n in names) and any(n == "nbkit/store/export.py" for n in names)
    for name in names:
        top = name.split("/")[0]
        assert top == "nbkit" or top.endswith(".dist-info"), name
        assert not name.startswith(("tests/", "notebooks/", "docs/", "nbkit/tests/")), name
        assert not name.endswith((".ipynb", ".png", ".jpg", ".svg", ".html")), name
        assert "/test_" not in name and "conftest" not in name, name

    env_dir = tmp_path / "venv"
    venv.EnvBuilder(with_pip=True, system_site_packages=False).create(env_dir)
    python = env_dir / "bin" / "python"
    environment = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "VIRTUAL_ENV")}
    subprocess.run([str(python), "-m", "pip", "install", "--quiet", "-c", str(ROOT / "constraints.txt"), str(wheel)],
                   check=True, capture_output=True, timeout=1200, env=environment)
    # the installed copy, not this checkout: run outside the source tree with no PYTHONPATH
    probe = ("import importlib.metadata, nbkit, sys; print(nbkit.__file__); print(sys.prefix); "
             "print(importlib.metadata.version('nbkit'))")
    where = subprocess.run([str(python), "-c", probe], check=True, capture_output=True, text=True, cwd=tmp_path,
                           env=environment).stdout.split()
    assert Path(where[0]).is_relative_to(env_dir) and Path(where[1]) == env_dir
    assert where[2] == nbkit.__version__             # the wheel's metadata takes the version from nbkit/version.py

    nbkit_command = env_dir / "bin" / "nbkit"
    version = subprocess.run([str(nbkit_command), "--version"], check=True, capture_output=True, text=True,
                             cwd=tmp_path, env=environment)
    assert version.stdout.strip() == f"nbkit {nbkit.__version__}"
    out = tmp_path / "demo"
    demo = subprocess.run([str(nbkit_command), "demo", "--out", str(out)], capture_output=True, text=True,
                          cwd=tmp_path, env=environment, timeout=900)
    assert demo.returncode == 0, demo.stdout[-2000:] + demo.stderr[-2000:]
    assert (out / "report.html").stat().st_size > 10_000
    assert (out / "first-run" / "nbkit.json").is_file()

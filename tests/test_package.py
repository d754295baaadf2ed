"""The package as users get it: the wheel builds without warnings, carries its typing marker and
the demo's weights, and works outside the repository.

Built from a copy of the sources in a temporary folder (a test never writes into the
repository), with the build backend this environment has (nothing is downloaded), and
installed into a fresh virtual environment that sees this environment's packages (torch,
NumPy, ...) through a path entry, but neither the repository nor its editable install.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import sysconfig
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def wheel(tmp_path_factory) -> Path:
    src = tmp_path_factory.mktemp("src")
    for name in ("pyproject.toml", "README.md"):
        shutil.copy2(ROOT / name, src / name)
    shutil.copytree(ROOT / "qwidgets", src / "qwidgets",
                    ignore=shutil.ignore_patterns("__pycache__", "*.pyc"))
    out = tmp_path_factory.mktemp("dist")
    # the PEP 517 backend itself, every warning an error (a deprecated field fails the build)
    code = ("import sys; from setuptools import build_meta as b; "
            "print(b.build_wheel(sys.argv[1]))")
    run = subprocess.run([sys.executable, "-W", "error", "-c", code, str(out)], cwd=src,
                         capture_output=True, text=True, timeout=600)
    assert run.returncode == 0, run.stderr[-3000:]
    # setuptools' own log lines that say warning (a Python warning is already an error above),
    # less the note that this environment disables byte-compiling (PYTHONDONTWRITEBYTECODE)
    warned = [line for line in run.stderr.lower().splitlines()
              if "warn" in line and "byte-compiling is disabled" not in line]
    assert not warned, run.stderr[-3000:]
    return out / run.stdout.strip().splitlines()[-1]


def test_wheel_holds_the_typing_marker_and_the_demo_weights(wheel):
    names = set(zipfile.ZipFile(wheel).namelist())
    assert "qwidgets/py.typed" in names  # PEP 561: the public API is typed
    assert "qwidgets/data/bearing_classifier.npz" in names
    assert not any(n.startswith(("tests/", "benchmarks/", "notebooks/")) for n in names)
    meta = next(n for n in names if n.endswith(".dist-info/METADATA"))
    text = zipfile.ZipFile(wheel).read(meta).decode()
    assert "License-Expression: MIT" in text  # an SPDX expression (PEP 639), not a table


def test_wheel_works_outside_the_repository(wheel, tmp_path):
    venv = tmp_path / "venv"
    subprocess.run([sys.executable, "-m", "venv", "--without-pip", str(venv)], check=True, timeout=120)
    site = Path(subprocess.run(
        [str(venv / "bin" / "python"), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
        capture_output=True, text=True, check=True).stdout.strip())
    # this environment's packages, as a plain path entry: its .pth files (the editable install
    # of the repository) are not processed from there
    (site / "deps.pth").write_text(sysconfig.get_paths()["purelib"] + "\n")
    subprocess.run([sys.executable, "-m", "pip", "install", "--quiet", "--no-deps", "--no-index",
                    "--target", str(site), str(wheel)], check=True, timeout=300)
    code = """
import qwidgets, torch
from qwidgets.demo import accuracy, load_demo
print(qwidgets.__file__)
d = load_demo()
with torch.no_grad():
    print(accuracy(d.model(d.x_test), d.y_test))
"""
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "PYTHONHOME")}
    run = subprocess.run([str(venv / "bin" / "python"), "-c", code], cwd=tmp_path, env=env,
                         capture_output=True, text=True, timeout=300)
    assert run.returncode == 0, run.stderr[-3000:]
    where, acc = run.stdout.split()
    assert Path(where).resolve().is_relative_to(site.resolve())  # the installed wheel, not the repo
    from qwidgets.demo import load_demo

    d = load_demo()  # the repository's copy: the same shipped weights, the same accuracy
    import torch

    from qwidgets.demo import accuracy

    with torch.no_grad():
        assert float(acc) == accuracy(d.model(d.x_test), d.y_test)

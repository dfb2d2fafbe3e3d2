"""The installed package (a wheel, not the source tree) finds and runs its shipped model.

Builds the wheel from a copy of the package sources with pip (``pip wheel --no-deps
--no-build-isolation``, the setuptools already installed here), installs it with ``--no-deps``
into a fresh virtual environment, and runs the ``flairwatch`` console script of that environment
from a folder outside the repository. The fresh environment sees this test environment's
packages (numpy, SimpleITK, ONNX Runtime...) through a ``.pth`` path entry (Python's :mod:`site`
documentation: each line of a ``.pth`` file in site-packages is added to ``sys.path``), not this
checkout's editable install: lines naming a folder add that folder only, the ``.pth`` files in it
are not read, so the checkout is never on the path. Takes about half a minute.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import subprocess
import sys
import sysconfig
import zipfile
from pathlib import Path

import pytest
import yaml

from flairwatch.engine.models import DEFAULT_MODEL
from tests.series_fixtures import SeriesSpec, write_series

ROOT = Path(__file__).resolve().parent.parent
SOURCES = ("pyproject.toml", "README.md", "LICENSE")


def run(argv: list[str], cwd: Path, env: dict[str, str] | None = None) -> str:
    done = subprocess.run(argv, cwd=cwd, env=env, capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, f"{argv}: {done.stdout}\n{done.stderr}"
    return done.stdout


@pytest.fixture(scope="module")
def installed(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A fresh venv holding only the flairwatch wheel; returns its bin folder."""
    work = tmp_path_factory.mktemp("packaging")
    src = work / "src"
    src.mkdir()
    for name in SOURCES:
        if (ROOT / name).is_file():
            shutil.copy2(ROOT / name, src / name)
    shutil.copytree(
        ROOT / "flairwatch", src / "flairwatch", ignore=shutil.ignore_patterns("__pycache__")
    )
    wheels = work / "wheels"
    pip = [sys.executable, "-m", "pip"]
    run([*pip, "wheel", "--no-deps", "--no-build-isolation", "-q", "-w", str(wheels), "."], src)
    (wheel,) = wheels.glob("flairwatch-*.whl")

    venv = work / "venv"
    run([sys.executable, "-m", "venv", "--without-pip", str(venv)], work)
    python = venv / "bin" / "python"
    site = Path(
        run(
            [str(python), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"], work
        ).strip()
    )
    # this test environment's packages, read as a plain path entry (module docstring)
    (site / "test-environment.pth").write_text(sysconfig.get_paths()["purelib"] + "\n")
    run(
        [*pip, "--python", str(python), "install", "--no-deps", "--no-index", "-q", str(wheel)],
        work,
    )
    return venv / "bin"


def test_installed_models_and_process_use_the_packaged_model(
    installed: Path, tmp_path: Path
) -> None:
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "FLAIRWATCH_MODELS")}
    elsewhere = tmp_path / "elsewhere"  # outside the repository: no source tree to fall back on
    elsewhere.mkdir()
    where = run(
        [str(installed / "python"), "-c", "import flairwatch; print(flairwatch.__file__)"],
        elsewhere,
        env,
    )
    package = Path(where.strip()).parent
    assert not package.is_relative_to(ROOT), "the installed copy runs, not the checkout"

    listing = json.loads(run([str(installed / "flairwatch"), "models", "--json"], elsewhere, env))
    default = next(m for m in listing if m["default"])
    assert default["name"] == DEFAULT_MODEL and default["source"] == "package"
    shipped = package / "models" / DEFAULT_MODEL / "model.yaml"
    assert Path(default["manifest"]) == shipped
    raw = yaml.safe_load(shipped.read_text(encoding="utf-8"))
    onnx_bytes = (shipped.parent / raw["file"]).read_bytes()
    assert hashlib.sha256(onnx_bytes).hexdigest() == raw["sha256"] == default["sha256"]

    inputs, results = tmp_path / "in", tmp_path / "results"
    write_series(inputs, SeriesSpec())
    out = run([str(installed / "flairwatch"), "process", str(inputs), "--results", str(results)],
              elsewhere, env)  # fmt: skip
    (summary_path,) = results.rglob("summary.json")
    assert summary_path.parent.name == f"{raw['name']}-{raw['version']}"
    summary = json.loads(summary_path.read_text(encoding="utf-8"))
    assert summary["model"]["name"] == raw["name"] and summary["model"]["sha256"] == raw["sha256"]
    for name in summary["files"].values():
        assert (summary_path.parent / name).is_file()
    assert f"{summary_path.parent.name}  WMH" in out  # the "done" line names the folder

    # python -m flairwatch works from the installed package too
    assert "process" in run(
        [str(installed / "python"), "-m", "flairwatch", "--help"], elsewhere, env
    )


def test_wheel_lists_model_files(installed: Path) -> None:
    """Checked on the wheel's file list (PEP 427: a wheel is a zip archive)."""
    wheel_dir = installed.parent.parent / "wheels"
    (wheel,) = wheel_dir.glob("flairwatch-*.whl")
    names = set(zipfile.ZipFile(wheel).namelist())
    for part in ("model.onnx", "model.yaml", "MODEL_CARD.md"):
        assert f"flairwatch/models/{DEFAULT_MODEL}/{part}" in names
    assert not any(n.endswith(".pt") for n in names), "training checkpoints are not packaged"

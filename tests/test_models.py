"""Finding models: manifest paths, names in the search path, the default, ``flairwatch models``.

File hashes are checked against Python's own :mod:`hashlib` SHA-256 (FIPS 180-4), computed here
independently of flairwatch's manifest code.
"""

from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path

import pytest
import yaml

from flairwatch.cli import main
from flairwatch.config import config_from_mapping, is_model_name, load_config
from flairwatch.engine import models
from flairwatch.errors import ModelInvalid
from tests.model_fixtures import make_tiny_model


def lab_model(root: Path, folder: str, version: str, name: str = "lab-wmh") -> Path:
    """A tiny model in ``root/folder`` with the manifest at the standard name ``model.yaml``."""
    target = root / folder
    target.mkdir(parents=True)
    manifest = make_tiny_model(target, version=version)
    raw = yaml.safe_load(manifest.read_text(encoding="utf-8"))
    raw["name"] = name
    (target / models.MANIFEST_FILE).write_text(yaml.safe_dump(raw), encoding="utf-8")
    manifest.unlink()
    return target / models.MANIFEST_FILE


def test_default_model_is_shipped_inside_the_package() -> None:
    path = models.manifest_path(None, env={})
    assert path == models.PACKAGE_MODELS / models.DEFAULT_MODEL / "model.yaml"
    assert path.is_relative_to(Path(models.__file__).resolve().parent.parent)  # package data
    raw = yaml.safe_load(path.read_text(encoding="utf-8"))
    onnx = path.parent / raw["file"]
    assert hashlib.sha256(onnx.read_bytes()).hexdigest() == raw["sha256"]


@pytest.mark.parametrize(
    ("ref", "name"),
    [
        ("wmh-synth", True),
        ("flairwatch-wmh", True),
        ("wmh-synth-0.1.0", True),
        ("model.yaml", False),
        ("lab/model.yaml", False),
        ("/opt/models/x", False),
        ("other.YML", False),
        ("", False),
    ],
)
def test_names_and_paths(ref: str, name: bool) -> None:
    assert is_model_name(ref) is name


def test_config_keeps_a_name_and_resolves_a_relative_path(tmp_path: Path) -> None:
    assert config_from_mapping({"model": "lab-wmh"}, base_dir=tmp_path).model == Path("lab-wmh")
    cfg = config_from_mapping({"model": "m/model.yaml"}, base_dir=tmp_path)
    assert cfg.model == tmp_path / "m" / "model.yaml"
    assert load_config(None).model is None  # the default model, found at run time


def test_search_path_order_and_versions(tmp_path: Path) -> None:
    first, second = tmp_path / "first", tmp_path / "second"
    old = lab_model(first, "lab-wmh-0.2.0", "0.2.0")
    new = lab_model(first, "lab-wmh-0.10.0", "0.10.0")  # 0.10.0 > 0.2.0 (semantic versions)
    other = lab_model(second, "lab-wmh", "9.0.0")
    env = {models.MODELS_ENV: f"{first}:{second}"}
    assert models.manifest_path("lab-wmh", env) == new  # first folder wins, highest version
    assert models.manifest_path("lab-wmh", {models.MODELS_ENV: str(second)}) == other
    shutil.rmtree(new.parent)
    assert models.manifest_path("lab-wmh", env) == old
    # a folder named like the model beats a manifest name
    assert models.manifest_path("lab-wmh", {models.MODELS_ENV: f"{second}:{first}"}) == other
    # a lab's folder may hold a model of the shipped name: it comes first
    shadow = lab_model(first, "wmh-synth", "5.0.0", name="wmh-synth")
    assert models.manifest_path(None, env) == shadow


def test_unknown_name_is_one_clear_error(tmp_path: Path) -> None:
    with pytest.raises(ModelInvalid, match=r"no model named 'nope'.*flairwatch models"):
        models.manifest_path("nope", {models.MODELS_ENV: str(tmp_path)})


def test_unknown_name_on_the_command_line_exits_2(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    (tmp_path / "in").mkdir()
    argv = ["process", str(tmp_path / "in"), "--results", str(tmp_path / "out"), "--model", "nope"]
    rc = main(argv)
    err = capsys.readouterr().err.strip().splitlines()
    assert rc == 2
    assert err[-1].startswith("flairwatch: error: no model named 'nope'")


def test_listing_shows_hash_use_location_and_problems(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    good = lab_model(tmp_path, "lab-wmh", "1.0.0")
    bad = lab_model(tmp_path, "broken", "1.0.0", name="broken")
    onnx = bad.parent / yaml.safe_load(bad.read_text(encoding="utf-8"))["file"]
    onnx.write_bytes(onnx.read_bytes() + b"\0")  # the file no longer matches its sha256
    monkeypatch.setenv(models.MODELS_ENV, str(tmp_path))
    assert main(["models", "--json"]) == 0
    rows = {r["name"]: r for r in json.loads(capsys.readouterr().out)}
    assert set(rows) >= {"lab-wmh", "broken", "wmh-synth"}
    raw = yaml.safe_load(good.read_text(encoding="utf-8"))
    assert (
        rows["lab-wmh"]["sha256"]
        == hashlib.sha256((good.parent / raw["file"]).read_bytes()).hexdigest()
    )
    assert rows["lab-wmh"]["intended_use"].startswith("research only")
    assert rows["lab-wmh"]["manifest"] == str(good)
    assert rows["lab-wmh"]["source"] == models.MODELS_ENV
    assert "hash differs" in rows["broken"]["problem"]
    assert rows["wmh-synth"]["default"] and rows["wmh-synth"]["source"] == "package"
    assert main(["models"]) == 0
    text = capsys.readouterr().out
    assert "REFUSED" in text and "* wmh-synth" in text

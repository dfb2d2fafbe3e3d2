"""Manifest checks and the ONNX runner, with a tiny model built by onnx.helper."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import yaml

from flairwatch.engine.infer import Segmenter
from flairwatch.engine.manifest import load_manifest
from flairwatch.errors import ModelInvalid
from tests.model_fixtures import build_tiny_onnx, make_tiny_model


def _edit(manifest: Path, **changes: object) -> Path:
    raw = yaml.safe_load(manifest.read_text(encoding="utf-8"))
    for dotted, value in changes.items():
        node = raw
        *parents, leaf = dotted.split("__")
        for p in parents:
            node = node[p]
        node[leaf] = value
    manifest.write_text(yaml.safe_dump(raw), encoding="utf-8")
    return manifest


def test_runner_output_is_the_models_function(tiny_model_manifest: Path) -> None:
    m = load_manifest(tiny_model_manifest)
    seg = Segmenter(m, threads=1)
    x = np.full((5, 3, 64, 64), 1.0, np.float32)
    x[:, 1, 10:20, 10:20] = 2.0
    out = seg.predict(x)
    assert out.shape == (5, 2, 64, 64)
    # sigmoid(12 * (2.0 - 1.4)) and sigmoid(12 * (1.0 - 1.4)), computed independently
    assert out[2, 0, 15, 15] == pytest.approx(1 / (1 + np.exp(-12 * 0.6)), rel=1e-5)
    assert out[2, 0, 40, 40] == pytest.approx(1 / (1 + np.exp(12 * 0.4)), rel=1e-5)
    # a batch that is not a multiple of the batch size gives the same per-slice answer
    np.testing.assert_allclose(seg.predict(x[:1]), out[:1], rtol=1e-6)


def test_hash_mismatch_is_refused(tiny_model_manifest: Path) -> None:
    _edit(tiny_model_manifest, sha256="0" * 64)
    with pytest.raises(ModelInvalid, match="sha256"):
        load_manifest(tiny_model_manifest)


def test_model_file_swapped_for_another_is_refused(tiny_model_manifest: Path) -> None:
    build_tiny_onnx(tiny_model_manifest.parent / "tiny.onnx", channels=1)
    with pytest.raises(ModelInvalid, match="corrupt or the manifest is stale"):
        load_manifest(tiny_model_manifest)


def test_channel_count_disagreeing_with_the_file_is_refused(tmp_path: Path) -> None:
    manifest = make_tiny_model(tmp_path, channels=1)
    _edit(manifest, input__channels=3)
    with pytest.raises(ModelInvalid, match="input shape"):
        Segmenter(load_manifest(manifest), threads=1)


def test_output_channels_disagreeing_with_the_model_are_refused(tiny_model_manifest: Path) -> None:
    _edit(tiny_model_manifest, output__channels=["wmh"])
    with pytest.raises(ModelInvalid, match="output shape"):
        Segmenter(load_manifest(tiny_model_manifest), threads=1)


@pytest.mark.parametrize(
    ("key", "value", "message"),
    [
        ("version", "one", "not semantic"),
        ("intended_use", "clinical", "research only"),
        ("threshold", 1.5, "threshold"),
        ("input__channels", 2, "odd"),
        ("normalisation__method", "zscore", "unknown"),
        ("input__name", "pixels", "not in the ONNX file"),
    ],
)
def test_bad_manifest_values_are_refused(
    tiny_model_manifest: Path, key: str, value: object, message: str
) -> None:
    _edit(tiny_model_manifest, **{key: value})
    with pytest.raises(ModelInvalid, match=message):
        Segmenter(load_manifest(tiny_model_manifest), threads=1)


def test_missing_manifest_says_what_to_do(tmp_path: Path) -> None:
    with pytest.raises(ModelInvalid, match="--model"):
        load_manifest(tmp_path / "nope.yaml")

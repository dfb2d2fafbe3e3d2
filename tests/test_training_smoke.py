"""Smoke test of the training script: a tiny run, exact resume, and the ONNX export round trip.

Skipped when torch (the ``train`` extra) is not installed. The reference for the exported graph
is torch itself (the network's own forward pass), and the manifest is checked by flairwatch's
own loader and runner, which the runtime uses.
"""

from __future__ import annotations

from pathlib import Path
from types import ModuleType

import numpy as np
import pytest

torch = pytest.importorskip("torch")
pytest.importorskip("onnx")

from flairwatch.engine.infer import Segmenter  # noqa: E402
from flairwatch.engine.manifest import load_manifest  # noqa: E402

TINY = ["--widths", "4", "8", "8", "16", "--batch-size", "2", "--crop", "64", "--threads", "1"]


def _scripts() -> tuple[ModuleType, ModuleType]:
    from flairwatch.training import data, loop

    return loop, data


def _fake_case(rng: np.random.Generator, k: int = 5) -> dict[str, np.ndarray]:
    """A head-like disc near 1 with a bright blob (WMH), an ignore patch and a dark ventricle."""
    yy, xx = np.mgrid[:224, :224]
    head = ((yy - 112) ** 2 + (xx - 112) ** 2) < 80**2
    lesion = ((yy - 100) ** 2 + (xx - 120) ** 2) < 6**2
    image = np.where(head, 1.0, 0.0) + 0.05 * rng.standard_normal((k, 224, 224))
    image[:, lesion] += 1.0
    wmh = np.zeros((k, 224, 224), np.uint8)
    wmh[1:4, lesion] = 1
    wmh[2, 150:155, 100:105] = 2
    icv = np.broadcast_to(head, (k, 224, 224)).astype(np.uint8)
    vent = np.zeros((k, 224, 224), np.uint8)
    vent[:, 105:125, 95:105] = 1  # a dark slab standing in for a lateral ventricle
    image[:, vent[0] == 1] = 0.2
    return {"image": image.astype(np.float16), "wmh": wmh, "icv": icv, "vent": vent}


@pytest.fixture()
def cache(tmp_path: Path) -> Path:
    _, wmhdata = _scripts()
    rng = np.random.default_rng(7)
    folder = tmp_path / "cache"
    folder.mkdir()
    for name, seed in (("gen-case-00001", 1), ("gen-case-00002", 2), ("val-gen-case-00010", 10)):
        wmhdata.save_arrays(folder / f"{name}.npz", _fake_case(rng), seed=seed, source="test")
    return folder


def _run(train_model: ModuleType, cache: Path, out: Path, *extra: str) -> None:
    argv = ["--cache", str(cache), "--bank", str(cache.parent / "no-bank"), "--out", str(out)]
    assert train_model.main([*argv, *TINY, *extra]) == 0


def test_two_steps_resume_exactly(cache: Path, tmp_path: Path) -> None:
    train_model, _ = _scripts()
    # two steps straight through...
    _run(train_model, cache, tmp_path / "a", "--minutes", "5", "--max-steps", "2")
    # ...equal one step, a stop, and a resumed second step (model, optimiser, RNG restored)
    _run(train_model, cache, tmp_path / "b", "--minutes", "5", "--max-steps", "1")
    _run(train_model, cache, tmp_path / "b", "--minutes", "5", "--max-steps", "2")
    a = torch.load(tmp_path / "a" / "training-checkpoint.pt", weights_only=False)
    b = torch.load(tmp_path / "b" / "training-checkpoint.pt", weights_only=False)
    assert a["step"] == b["step"] == 2
    assert a["cases"] == b["cases"] == ["gen-case-00001", "gen-case-00002"]  # never validation
    for key, value in a["model"].items():
        assert torch.equal(value, b["model"][key]), key
    start = train_model.build_net((4, 8, 8, 16)).state_dict()
    assert not torch.equal(start["head.weight"], a["model"]["head.weight"])  # it did learn


def test_export_round_trip(cache: Path, tmp_path: Path) -> None:
    train_model, _ = _scripts()
    out = tmp_path / "model"
    _run(train_model, cache, out, "--minutes", "5", "--max-steps", "2")
    _run(train_model, cache, out, "--export", "--eval-cases", "0", "--timing-slices", "8")
    manifest = load_manifest(out / "model.yaml")  # hash and schema, as the runtime checks them
    assert manifest.name == "flairwatch-wmh" and manifest.version == "0.2.0"
    assert manifest.output_channels == ("wmh", "intracranial", "ventricles")
    assert manifest.grid.shape == (224, 224) and manifest.channels == 3
    assert 0.0 < manifest.threshold < 1.0
    assert "research" in manifest.intended_use
    segmenter = Segmenter(manifest, threads=1)
    x = np.random.default_rng(3).random((3, 3, 224, 224), dtype=np.float32)
    got = segmenter.predict(x)
    assert got.shape == (3, 3, 224, 224)  # (K, outputs, H, W) as the manifest declares
    state = torch.load(out / "training-checkpoint.pt", weights_only=False)
    net = train_model.build_net(tuple(state["widths"]), n_out=len(state["outputs"]))
    net.load_state_dict(state["model"])
    net.eval()
    with torch.no_grad():
        expected = torch.sigmoid(net(torch.from_numpy(x))).numpy()
    # reference: the torch network itself; ONNX Runtime must reproduce it to float precision
    np.testing.assert_allclose(got, expected, atol=1e-4)
    card = (out / "MODEL_CARD.md").read_text(encoding="utf-8")
    assert "Research use only" in card and "synthetic" in card


def test_two_output_checkpoint_resumes_and_warm_starts(cache: Path, tmp_path: Path) -> None:
    """A checkpoint from before the ventricle output (no ``outputs`` key) still resumes, with
    two outputs, and a new three-output run can start from its weights."""
    train_model, _ = _scripts()
    old = tmp_path / "old"
    _run(train_model, cache, old, "--minutes", "5", "--max-steps", "1")
    state = torch.load(old / "training-checkpoint.pt", weights_only=False)
    two = train_model.build_net((4, 8, 8, 16), n_out=2)
    state["model"] = two.state_dict()
    state["optimizer"] = torch.optim.AdamW(two.parameters()).state_dict()
    del state["outputs"], state["origin"]  # the format written before the ventricle output
    torch.save(state, old / "training-checkpoint.pt")
    _run(train_model, cache, old, "--minutes", "5", "--max-steps", "2")
    resumed = torch.load(old / "training-checkpoint.pt", weights_only=False)
    assert resumed["step"] == 2 and resumed["outputs"] == ["wmh", "intracranial"]
    assert resumed["model"]["head.weight"].shape[0] == 2
    new = tmp_path / "new"
    warm = ["--warm-start", str(old / "training-checkpoint.pt"), "--max-steps", "1"]
    _run(train_model, cache, new, "--minutes", "5", *warm)
    started = torch.load(new / "training-checkpoint.pt", weights_only=False)
    assert started["outputs"] == ["wmh", "intracranial", "ventricles"]
    assert started["origin"]["warm_start"]["step"] == 2
    assert started["model"]["head.weight"].shape[0] == 3

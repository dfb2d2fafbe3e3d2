"""Export the trained WMH network to ONNX, write its manifest and model card, and check it.

The exported graph takes ``image`` (N, 3, 224, 224) float32 (NCHW, N dynamic) and returns
``probabilities`` (N, n_out, 224, 224): sigmoid outputs, inside the graph, for the checkpoint's
output channels (``wmh``, ``intracranial`` and, for networks trained with it, ``ventricles``).
The threshold is chosen on the validation split of the training phantoms (never held-out seeds);
held-out phantoms, plain and with altered acquisitions, are then run through the runtime path
(:mod:`flairwatch.training.heldout`). Research use only.
"""

from __future__ import annotations

import logging
import math
import platform
import time
import warnings
from collections import Counter
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import torch
import yaml

from flairwatch.engine import convert
from flairwatch.engine.infer import Segmenter
from flairwatch.engine.manifest import GridSpec, Normalisation, file_sha256, load_manifest
from flairwatch.research import metrics
from flairwatch.training.card import model_card, session_line
from flairwatch.training.heldout import (
    ALTERATIONS,
    THRESHOLDS,
    choose_threshold_series,
    held_out_check,
    threshold_seeds,
)
from flairwatch.training.network import WithSigmoid, WmhNet

log = logging.getLogger("train_model")

MODEL_NAME = "flairwatch-wmh"
ONNX_FILE = "model.onnx"
MANIFEST_FILE = "model.yaml"
CARD_FILE = "MODEL_CARD.md"


def export_onnx(net: WmhNet, path: Path, *, channels: int, shape: tuple[int, int]) -> None:
    """Write ``net`` with a sigmoid head as ONNX opset 17, batch axis dynamic."""
    model = WithSigmoid(net).eval()
    dummy = torch.zeros(1, channels, shape[1], shape[0])
    with warnings.catch_warnings():
        # the TorchScript exporter is deprecated but needs no extra packages; its graph is checked
        warnings.simplefilter("ignore", DeprecationWarning)
        torch.onnx.export(
            model,
            (dummy,),
            str(path),
            dynamo=False,
            opset_version=17,
            input_names=["image"],
            output_names=["probabilities"],
            dynamic_axes={"image": {0: "N"}, "probabilities": {0: "N"}},
            do_constant_folding=True,
        )


def ort_session(path: Path, threads: int) -> Any:
    import onnxruntime as ort

    opts = ort.SessionOptions()
    opts.intra_op_num_threads = threads
    opts.inter_op_num_threads = 1
    opts.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
    return ort.InferenceSession(str(path), sess_options=opts, providers=["CPUExecutionProvider"])


def predict(session: Any, x: np.ndarray, batch: int = 8) -> np.ndarray:
    """(K, C, H, W) float32 -> (K, 2, H, W) probabilities."""
    outs = [
        session.run(["probabilities"], {"image": x[s : s + batch]})[0]
        for s in range(0, len(x), batch)
    ]
    return np.concatenate(outs, axis=0)


def time_series(path: Path, threads: int, *, slices: int = 48, repeats: int = 3) -> float:
    """Median seconds for ONNX Runtime to run ``slices`` model-grid slices in batches of 8."""
    session = ort_session(path, threads)
    x = np.random.default_rng(0).random((slices, 3, 224, 224), dtype=np.float32)
    predict(session, x[:8])
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        predict(session, x)
        times.append(time.perf_counter() - start)
    return float(np.median(times))


def choose_threshold(
    session: Any, files: Sequence[Path], channels: int
) -> tuple[float, dict[str, Any]]:
    """Threshold with the best mean model-grid Dice over validation cases that have lesions."""
    dices: dict[float, list[float]] = {t: [] for t in THRESHOLDS}
    icv_dices: list[float] = []
    vent_dices: list[float] = []
    fp_px: dict[float, list[int]] = {t: [] for t in THRESHOLDS}
    for path in files:
        with np.load(path) as z:
            image, wmh, icv = z["image"], z["wmh"], z["icv"]
            vent = z["vent"] if "vent" in z.files else None
        x = convert.stack_channels(image.astype(np.float32), channels)
        prob = predict(session, x)
        keep = wmh != 2
        ref = (wmh == 1) & keep
        if (icv != 255).any():
            icv_dices.append(metrics.dice(icv == 1, prob[:, 1] >= 0.5))
        if vent is not None and prob.shape[1] > 2 and (vent != 255).any():
            vent_dices.append(metrics.dice(vent == 1, prob[:, 2] >= 0.5))
        for t in THRESHOLDS:
            seg = (prob[:, 0] >= t) & keep
            if ref.sum() >= 100:
                dices[t].append(metrics.dice(ref, seg))
            elif not ref.any():
                fp_px[t].append(int(seg.sum()))
    means = {t: float(np.mean(v)) if v else 0.0 for t, v in dices.items()}
    best = max(THRESHOLDS, key=lambda t: (round(means[t], 3), -abs(t - 0.5)))
    summary = {
        "cases": len(files),
        "cases_with_lesions": len(dices[best]),
        "threshold": best,
        "mean_dice_model_grid": round(means[best], 4),
        "median_dice_model_grid": round(float(np.median(dices[best])), 4) if dices[best] else None,
        "mean_intracranial_dice_model_grid": round(float(np.mean(icv_dices)), 4)
        if icv_dices
        else None,
        "mean_ventricle_dice_model_grid": round(float(np.mean(vent_dices)), 4)
        if vent_dices
        else None,
        "dice_by_threshold": {str(t): round(v, 4) for t, v in means.items()},
        "lesion_free_cases": len(fp_px[best]),
    }
    return float(best), summary


def _clean(value: Any) -> Any:
    """Plain YAML values: numpy scalars to float/int, NaN to None."""
    if isinstance(value, dict):
        return {str(k): _clean(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_clean(v) for v in value]
    if isinstance(value, np.integer | int) and not isinstance(value, bool):
        return int(value)
    if isinstance(value, np.floating | float):
        f = float(value)
        return None if math.isnan(f) else round(f, 4)
    return value


def write_manifest(
    out: Path,
    *,
    sha256: str,
    threshold: float,
    version: str,
    grid: GridSpec,
    norm: Normalisation,
    channels: int,
    training_data: str,
    metrics_block: dict[str, Any],
    outputs: Sequence[str] = ("wmh", "intracranial"),
) -> Path:
    raw = {
        "name": MODEL_NAME,
        "version": version,
        "file": ONNX_FILE,
        "sha256": sha256,
        "intended_use": "research only; not for diagnosis or treatment; validate on your own "
        "scans before use",
        "description": "2.5D U-Net (4 levels) segmenting white-matter hyperintensities, the "
        + (
            "intracranial mask and the lateral ventricles"
            if "ventricles" in outputs
            else "intracranial mask"
        )
        + " on axial FLAIR slices; trained on synthetic phantoms only",
        "input": {"name": "image", "layout": "NCHW", "channels": channels, "batch_size": 8},
        "grid": {
            "spacing_mm": list(grid.spacing_mm),
            "shape": list(grid.shape),
            "through_plane": grid.through_plane,
        },
        "normalisation": {
            "method": norm.method,
            "reference_percentile": norm.reference_percentile,
            "foreground_fraction": norm.foreground_fraction,
        },
        "output": {"name": "probabilities", "channels": list(outputs)},
        "threshold": float(threshold),
        "training_data": training_data,
        "metrics": _clean(metrics_block),
    }
    path = out / MANIFEST_FILE
    tmp = path.with_name(path.name + ".tmp")
    tmp.write_text(yaml.safe_dump(raw, sort_keys=False, width=100), encoding="utf-8")
    tmp.replace(path)
    return path


# -------------------------------------------------------------------------------- card and driver


def _source_of(path: Path) -> str:
    with np.load(path) as z:
        return str(z["source"]) if "source" in z.files else ""


def _seed_of(path: Path) -> int:
    with np.load(path) as z:
        return int(z["seed"])


def describe_sources(files: Sequence[Path]) -> str:
    """'N cases from generator V, ...' from the provenance stored in cached arrays."""
    counts: Counter[str] = Counter()
    for path in files:
        try:
            with np.load(path) as z:
                counts[str(z["source"]) if "source" in z.files else "unknown source"] += 1
        except OSError:
            counts["missing from the cache"] += 1
    return ", ".join(f"{n} from {src}" for src, n in sorted(counts.items())) or "none"


def _generator_version() -> str:
    try:
        from flairwatch.phantom.params import GENERATOR_VERSION
    except ImportError:
        return "unknown"
    return str(GENERATOR_VERSION)


def export_and_check(
    checkpoint: Path,
    out: Path,
    *,
    validation: Sequence[Path],
    grid: GridSpec,
    norm: Normalisation,
    version: str,
    eval_cases: int,
    threads: int,
    cache: Path,
    timing_slices: int = 48,
    series_threshold: bool = True,
    altered_cases: int = 0,
    lr: float = 2e-3,
) -> None:
    """Export ONNX, choose the threshold, write and verify the manifest, score held-out cases."""
    torch.set_num_threads(threads)
    state = torch.load(checkpoint, weights_only=False)
    outputs = list(state.get("outputs", ["wmh", "intracranial"]))
    net = WmhNet(
        in_channels=int(state["channels"]), n_out=len(outputs), widths=tuple(state["widths"])
    )
    net.load_state_dict(state["model"])
    net.eval()
    onnx_path = out / ONNX_FILE
    tmp = out / (ONNX_FILE + ".tmp")
    export_onnx(net, tmp, channels=int(state["channels"]), shape=grid.shape)
    tmp.replace(onnx_path)
    session = ort_session(onnx_path, threads)
    # the graph must compute what the network computes
    probe = torch.from_numpy(np.random.default_rng(1).random((2, 3, 224, 224), dtype=np.float32))
    with torch.no_grad():
        expected = torch.sigmoid(net(probe)).numpy()
    got = predict(session, probe.numpy())
    if not np.allclose(got, expected, atol=1e-4):
        raise SystemExit(f"ONNX output differs from torch by {np.abs(got - expected).max():.2e}")
    seconds = time_series(onnx_path, threads, slices=timing_slices)
    log.info(
        "ONNX Runtime, %d threads, %d slices: %.2f s (median of 3)", threads, timing_slices, seconds
    )
    threshold, val = choose_threshold(session, validation, int(state["channels"]))
    log.info("threshold %.2f from %d validation cases: %s", threshold, len(validation), val)
    train_files = len(state["cases"])
    train_sources = describe_sources([cache / f"{n}.npz" for n in state["cases"]])
    val_sources = describe_sources(list(validation))
    training_data = (
        f"synthetic FLAIR phantoms only; training: {train_sources}; validation: {val_sources}; "
        "no real patient data"
    )
    facts: dict[str, Any] = {
        "version": version,
        "widths": tuple(state["widths"]),
        "parameters": sum(p.numel() for p in net.parameters()),
        "onnx_mb": onnx_path.stat().st_size / 1e6,
        "generator_version": _generator_version(),
        "training_cases": train_files,
        "training_sources": train_sources,
        "validation_sources": val_sources,
        "name": MODEL_NAME,
        "outputs": outputs,
        "warm_start": (state.get("origin") or {}).get("warm_start"),
        "history": "\n".join(session_line(h) for h in state.get("history", []))
        or "  - (not recorded)",
        "validation_cases": len(validation),
        "crop": state["crop"],
        "batch_size": state["batch_size"],
        "lr": f"{lr:g}",
        "train_minutes": float(state["train_seconds"]) / 60.0,
        "steps": int(state["step"]),
        "hardware": platform.processor() or platform.machine(),
        "torch": torch.__version__,
        "inference_s_48_slices": seconds,
        "threshold": threshold,
        "validation": val,
        "held_out_quick": {"cases": 0},
    }
    block = {
        "inference_s_48_slices_2_threads": seconds,
        "training_minutes": facts["train_minutes"],
        "training_steps": facts["steps"],
        "validation": val,
    }
    sha = file_sha256(onnx_path)

    def manifest() -> Path:
        return write_manifest(
            out,
            sha256=sha,
            threshold=threshold,
            version=version,
            grid=grid,
            norm=norm,
            channels=int(state["channels"]),
            training_data=training_data,
            metrics_block=block,
            outputs=outputs,
        )

    manifest_path = manifest()
    # the validation phantoms, topped up with further validation seeds: each one is regenerated
    # and segmented (a few minutes on 2 cores)
    seeds = threshold_seeds([_seed_of(p) for p in validation if "generator" in _source_of(p)])
    if series_threshold and seeds:
        try:
            series_t, val_series = choose_threshold_series(manifest_path, seeds, threads)
        except (ImportError, ValueError, RuntimeError, KeyError, TypeError) as exc:
            log.warning("series-grid threshold failed (%s); keeping the model-grid one", exc)
        else:
            threshold = series_t
            log.info("series-grid threshold %.2f: %s", threshold, val_series)
            block["validation_series_grid"] = val_series
            facts["threshold"] = threshold
            facts["validation_series"] = val_series
            manifest_path = manifest()
    load_manifest(manifest_path)  # the runtime's own checks: hash, fields
    Segmenter(load_manifest(manifest_path), threads=threads)  # signature and a dry run
    rows: list[dict[str, Any]] = []
    altered: list[dict[str, Any]] = []
    if eval_cases > 0:
        rows, summary = held_out_check(manifest_path, eval_cases, threads)
        facts["held_out_quick"] = block["held_out_quick"] = summary
        log.info("held-out quick check: %s", summary)
        if altered_cases > 0:
            altered, summary = held_out_check(
                manifest_path, altered_cases, threads, alterations=ALTERATIONS
            )
            facts["held_out_altered"] = block["held_out_altered"] = summary
            log.info("held-out check, altered acquisitions: %s", summary)
        load_manifest(manifest())
    else:
        facts["held_out_quick"] = {"cases": 0}
    (out / CARD_FILE).write_text(model_card(facts, rows, altered), encoding="utf-8")
    log.info("wrote %s, %s and %s in %s", ONNX_FILE, MANIFEST_FILE, CARD_FILE, out)

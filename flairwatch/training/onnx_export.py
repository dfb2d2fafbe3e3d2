"""Export the trained WMH network to ONNX, write its manifest and model card, and check it.

The exported graph takes ``image`` (N, 3, 224, 224) float32 (NCHW, N dynamic) and returns
``probabilities`` (N, 2, 224, 224): sigmoid outputs for WMH and intracranial, inside the graph.
The threshold is chosen on the validation split of the training phantoms (never held-out seeds);
held-out phantoms are then run through the runtime path (:func:`flairwatch.engine.pipeline.analyse`)
and scored with :mod:`flairwatch.research.metrics`. Research use only.
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
from flairwatch.engine.pipeline import analyse
from flairwatch.research import metrics
from flairwatch.training.network import WithSigmoid, WmhNet

log = logging.getLogger("train_model")

MODEL_NAME = "flairwatch-wmh"
ONNX_FILE = "model.onnx"
MANIFEST_FILE = "model.yaml"
CARD_FILE = "MODEL_CARD.md"
THRESHOLDS = tuple(round(t, 2) for t in np.arange(0.1, 0.86, 0.05))
MIN_LESION_MM3 = 10.0  # post-processing minimum lesion size used for the held-out check
RECALL_MIN_MM3 = 30.0  # lesion recall counts reference lesions of at least this size


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
    fp_px: dict[float, list[int]] = {t: [] for t in THRESHOLDS}
    for path in files:
        with np.load(path) as z:
            image, wmh, icv = z["image"], z["wmh"], z["icv"]
        x = convert.stack_channels(image.astype(np.float32), channels)
        prob = predict(session, x)
        keep = wmh != 2
        ref = (wmh == 1) & keep
        if (icv != 255).any():
            icv_dices.append(metrics.dice(icv == 1, prob[:, 1] >= 0.5))
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
        "description": "2.5D U-Net (4 levels) segmenting white-matter hyperintensities and the "
        "intracranial mask on axial FLAIR slices; trained on synthetic phantoms only",
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


# ------------------------------------------------------------------------- held-out phantom check


def _analyse(volume: Any, segmenter: Segmenter, threshold: float) -> tuple[np.ndarray, np.ndarray]:
    """WMH mask and intracranial mask on the series grid, through the runtime path."""
    result = analyse(
        volume, segmenter, threshold=threshold, min_lesion_mm3=MIN_LESION_MM3, connectivity=26
    )
    icv = result.intracranial if result.intracranial is not None else np.zeros(volume.shape)
    return np.asarray(result.lesions.mask), np.asarray(icv)


def choose_threshold_series(
    manifest_path: Path, seeds: Sequence[int], threads: int
) -> tuple[float, dict[str, Any]]:
    """Threshold with the best median series-grid Dice over validation phantoms with >= 1 mL.

    The validation phantoms are regenerated in memory from their seeds (same frozen generator)
    and run through the runtime path once; each candidate threshold is then applied inside the
    intracranial mask. Ties go to the smaller median absolute volume difference.
    """
    from flairwatch.engine.pipeline import analyse
    from flairwatch.phantom.generator import generate
    from flairwatch.phantom.params import sample_params

    segmenter = Segmenter(load_manifest(manifest_path), threads=threads)
    dices: dict[float, list[float]] = {t: [] for t in THRESHOLDS}
    voldiff: dict[float, list[float]] = {t: [] for t in THRESHOLDS}
    fp_ml: dict[float, list[float]] = {t: [] for t in THRESHOLDS}
    for seed in seeds:
        case = generate(sample_params(seed))
        res = analyse(
            case.image, segmenter, threshold=0.5, min_lesion_mm3=MIN_LESION_MM3, connectivity=26
        )
        ref = np.asarray(case.wmh.data) > 0
        voxel_ml = case.image.voxel_volume_mm3 / 1000.0
        ref_ml = float(ref.sum()) * voxel_ml
        # the sweep skips the minimum-size cleaning (slow on 3D volumes); specks barely move Dice
        brain = np.asarray(res.intracranial) > 0 if res.intracranial is not None else True
        for t in THRESHOLDS:
            seg = (res.probability >= t) & brain
            if ref_ml >= 1.0:
                dices[t].append(metrics.dice(ref, seg))
                voldiff[t].append(abs(float(seg.sum()) * voxel_ml - ref_ml) / ref_ml * 100.0)
            elif ref_ml == 0.0:
                fp_ml[t].append(float(seg.sum()) * voxel_ml)
    med = {t: float(np.median(v)) if v else 0.0 for t, v in dices.items()}
    vd = {t: float(np.median(v)) if v else 0.0 for t, v in voldiff.items()}
    best = max(THRESHOLDS, key=lambda t: (round(med[t], 3), -vd[t]))
    summary = {
        "cases": len(seeds),
        "cases_with_1ml_or_more": len(dices[best]),
        "threshold": best,
        "median_dice_series_grid": med[best],
        "median_volume_difference_pct": vd[best],
        "median_false_positive_ml_lesion_free": _median(fp_ml[best]),
        "median_dice_by_threshold": {str(t): round(v, 4) for t, v in med.items()},
    }
    return float(best), summary


def held_out_check(
    manifest_path: Path, n_cases: int, threads: int
) -> tuple[list[dict[str, Any]], dict[str, Any]]:
    """Generate ``n_cases`` held-out phantoms, segment them as the runtime does, score them."""
    from flairwatch.phantom.bank import HELD_OUT_SEEDS
    from flairwatch.phantom.generator import generate
    from flairwatch.phantom.params import sample_params

    manifest = load_manifest(manifest_path)
    segmenter = Segmenter(manifest, threads=threads)
    rows: list[dict[str, Any]] = []
    scores = []
    pool = sorted(HELD_OUT_SEEDS)
    picks = np.linspace(0, len(pool) - 1, num=min(n_cases, len(pool))).round().astype(int)
    for seed in (pool[i] for i in picks):
        case = generate(sample_params(seed))
        start = time.perf_counter()
        mask, icv = _analyse(case.image, segmenter, manifest.threshold)
        seconds = time.perf_counter() - start
        ref = np.asarray(case.wmh.data).astype(np.int16)
        s = metrics.score_case(
            ref, mask, case.image.spacing, min_lesion_mm3_for_recall=RECALL_MIN_MM3
        )
        scores.append(s)
        acq = case.params.acquisition
        row = {
            "seed": seed,
            "kind": acq.kind,
            "field_t": acq.field_strength_t,
            "slices": case.image.shape[2],
            "reference_ml": s.reference_ml,
            "segmented_ml": s.segmentation_ml,
            "dice": s.dice,
            "hd95_mm": s.hd95_mm,
            "volume_difference_pct": s.volume_difference_pct,
            "lesion_recall_30mm3": s.lesion_recall,
            "lesion_f1": s.lesion_f1,
            "false_positive_ml": s.false_positive_ml,
            "intracranial_dice": metrics.dice(np.asarray(case.intracranial.data) > 0, icv > 0),
            "seconds": seconds,
        }
        rows.append(row)
        log.info(
            "held-out %d %s %.1fT: ref %.2f mL seg %.2f mL dice %.3f recall %.3f FP %.2f mL "
            "ICV dice %.3f (%.1f s)",
            seed,
            row["kind"],
            float(row["field_t"] or 0),
            s.reference_ml,
            s.segmentation_ml,
            s.dice,
            s.lesion_recall,
            s.false_positive_ml,
            row["intracranial_dice"],
            seconds,
        )
    with_lesion = [r for r in rows if r["reference_ml"] >= 1.0]
    lesion_free = [r for r in rows if r["reference_ml"] == 0.0]
    summary = {
        "cases": len(rows),
        "cases_with_1ml_or_more": len(with_lesion),
        "median_dice_1ml_or_more": _median([r["dice"] for r in with_lesion]),
        "median_volume_difference_pct_1ml_or_more": _median(
            [r["volume_difference_pct"] for r in with_lesion]
        ),
        "pooled_lesion_recall_30mm3": _pooled_recall(scores),
        "median_false_positive_ml_lesion_free": _median(
            [r["false_positive_ml"] for r in lesion_free]
        ),
        "median_intracranial_dice": _median([r["intracranial_dice"] for r in rows]),
        "median_seconds_per_series": _median([r["seconds"] for r in rows]),
    }
    return rows, summary


def _median(values: Sequence[float]) -> float | None:
    finite = [v for v in values if v is not None and not math.isnan(v)]
    return float(np.median(finite)) if finite else None


def _pooled_recall(scores: Sequence[metrics.CaseScores]) -> float | None:
    reference = sum(s.reference_lesions for s in scores)
    detected = sum(s.detected_lesions for s in scores)
    return detected / reference if reference else None


# -------------------------------------------------------------------------------- card and driver


def _fmt(value: Any, digits: int = 3) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "n/a"
    if isinstance(value, float):
        return f"{value:.{digits}f}"
    return str(value)


def model_card(facts: dict[str, Any], rows: list[dict[str, Any]]) -> str:
    """The model card (Markdown) from measured facts; every number is filled in by the export."""
    v, h = facts["validation"], facts["held_out_quick"]
    table = "\n".join(
        f"| {r['seed']} | {r['kind']} | {_fmt(r['field_t'], 1)} | {_fmt(r['reference_ml'], 2)} | "
        f"{_fmt(r['segmented_ml'], 2)} | {_fmt(r['dice'])} | {_fmt(r['lesion_recall_30mm3'])} | "
        f"{_fmt(r['false_positive_ml'], 2)} | {_fmt(r['intracranial_dice'])} |"
        for r in rows
    )
    return f"""# Model card: {MODEL_NAME} {facts["version"]}

**Research use only. Not for diagnosis or treatment.** Outputs must not guide the care of any
person. Validate this model on your own scans (`flairwatch validate`) before relying on any
figure it gives, and follow your local rules for handling identifiable data.

## What it does
Segments white-matter hyperintensities (WMH) on FLAIR MRI, slice by slice on axial slices of the
series' own stack (2.5D: each output slice sees itself and its two neighbours), and gives an
intracranial mask as a second output (used to normalise volumes and to suppress scalp false
positives). Model grid: 1.0 x 1.0 mm in-plane, 224 x 224 pixels, slice stack kept, intensities
divided by the head foreground median.

## Network
Our own 2.5D U-Net: 4 levels with {facts["widths"]} feature channels, two 3x3 convolutions with
batch normalisation (folded at export) and ReLU per level, max-pooling down, 2x2 transposed
convolutions up, skip connections; {facts["parameters"]} parameters; sigmoid outputs inside the
ONNX graph (opset 17, input `image` N x 3 x 224 x 224, output `probabilities` N x 2 x 224 x 224,
batch axis dynamic). File size {facts["onnx_mb"]:.2f} MB.

## Training data: synthetic only
- Physics-based FLAIR phantoms from flairwatch's own generator (current version
  `{facts["generator_version"]}`; brain anatomy derived from the ICBM152 2009 template, see the
  generator's copyright notice). No real patient data was used.
- Training cases: {facts["training_sources"]}. Validation cases (phantom seeds ending in 0, used
  for the threshold): {facts["validation_sources"]}. The generator's held-out seeds were never
  used for training or validation.
- Training sessions (resumed from the checkpoint each time):
{facts["history"]}
- Converted with flairwatch's own converter; trained on {facts["crop"]} x {facts["crop"]} crops
  with lesion-aware sampling (half lesion-bearing slices, the rest inside the head or anywhere,
  scalp included) and on-the-fly augmentation: left-right flip, in-plane blur (coarser
  resolution), smooth bias field, gamma and contrast, Rician-like noise.
- Loss: binary cross-entropy + soft Dice (batch-level) for WMH, and at half weight for the
  intracranial mask; AdamW, learning rate {facts["lr"]} with warm-up and cosine decay.

## Training time and hardware
{facts["train_minutes"]:.1f} minutes of training ({facts["steps"]} steps of batch
{facts["batch_size"]}), on a shared 2-core CPU ({facts["hardware"]}), torch {facts["torch"]}
with 2 threads. No GPU.

## Measured
- Inference time, ONNX Runtime, 2 threads, 48 slices of 224 x 224 (median of 3):
  {facts["inference_s_48_slices"]:.2f} s.
- Validation split on the model grid (mean Dice over validation cases with lesions
  {_fmt(v["mean_dice_model_grid"])}, median {_fmt(v["median_dice_model_grid"])} at its best
  threshold {v["threshold"]}; mean intracranial Dice {_fmt(v["mean_intracranial_dice_model_grid"])}).
- Threshold {facts["threshold"]}: {_threshold_note(facts)}
- Quick held-out check ({h["cases"]} held-out phantoms through the runtime path, scored on the
  series grid with flairwatch.research.metrics; minimum lesion size {MIN_LESION_MM3:g} mm^3, 26-connected;
  lesion recall for reference lesions >= {RECALL_MIN_MM3:g} mm^3):
  median Dice (cases >= 1 mL) {_fmt(h["median_dice_1ml_or_more"])}; median absolute volume
  difference {_fmt(h["median_volume_difference_pct_1ml_or_more"], 1)} %; pooled lesion recall
  {_fmt(h["pooled_lesion_recall_30mm3"])}; median false-positive volume on lesion-free cases
  {_fmt(h["median_false_positive_ml_lesion_free"], 2)} mL; median intracranial Dice
  {_fmt(h["median_intracranial_dice"])}.

| seed | acquisition | field (T) | reference mL | segmented mL | Dice | lesion recall | FP mL | ICV Dice |
|---|---|---|---|---|---|---|---|---|
{table}

This quick check is small; the project's quality gate (at least 30 held-out series across both
acquisition types, both field strengths and all load bins) is measured by the benchmark script
and is the figure to quote.

## Limits and cautions
- Trained on synthetic phantoms only: real scans differ (scanner vendors, artefacts, pathology
  that is not WMH such as infarcts, tumours, multiple-sclerosis lesions of other shapes).
  Performance on real data is unknown until you measure it on your own labelled scans.
- Lesion loads above 60 mL lie outside the training range.
- Short CPU training (minutes, not hours): retraining longer, and fine-tuning on a lab's own
  labelled cases (`scripts/train_model.py --cases DIR`), should improve it.
- Research use only; not a medical device; not for diagnosis or treatment.
"""


def _session_line(h: dict[str, Any]) -> str:
    how = (
        f"{h['prefer_share']:.0%} of crops from cases of {h['prefer']}"
        if h.get("prefer_share")
        else "all cases drawn alike"
    )
    return (
        f"  - steps {h['from_step']}-{h['to_step']}: {h['minutes']:.1f} min, {h['cases']} cases, "
        f"{how}, started {h['started']}"
    )


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


def _threshold_note(facts: dict[str, Any]) -> str:
    vs = facts.get("validation_series")
    if not vs:
        return "the best mean model-grid Dice on the validation split."
    return (
        f"chosen on {vs['cases']} validation phantoms regenerated from their seeds and run "
        "through the runtime path (series grid, inside the intracranial mask, before the "
        "minimum-size cleaning): median Dice "
        f"{_fmt(vs['median_dice_series_grid'])} over the {vs['cases_with_1ml_or_more']} with "
        f">= 1 mL, median absolute volume difference "
        f"{_fmt(vs['median_volume_difference_pct'], 1)} %."
    )


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
        "history": "\n".join(_session_line(h) for h in state.get("history", []))
        or "  - (not recorded)",
        "validation_cases": len(validation),
        "crop": state["crop"],
        "batch_size": state["batch_size"],
        "lr": "2e-3",
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
    # at most 8 validation phantoms: each one is regenerated and segmented (minutes on 2 cores)
    seeds = sorted(_seed_of(p) for p in validation if "generator" in _source_of(p))[:8]
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
    if eval_cases > 0:
        rows, summary = held_out_check(manifest_path, eval_cases, threads)
        facts["held_out_quick"] = summary
        block["held_out_quick"] = summary
        load_manifest(manifest())
        log.info("held-out quick check: %s", summary)
    else:
        facts["held_out_quick"] = {
            k: None
            for k in (
                "median_dice_1ml_or_more",
                "median_volume_difference_pct_1ml_or_more",
                "pooled_lesion_recall_30mm3",
                "median_false_positive_ml_lesion_free",
                "median_intracranial_dice",
            )
        } | {"cases": 0}
    (out / CARD_FILE).write_text(model_card(facts, rows), encoding="utf-8")
    log.info("wrote %s, %s and %s in %s", ONNX_FILE, MANIFEST_FILE, CARD_FILE, out)

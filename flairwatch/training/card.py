"""The model card (Markdown) written by the export; every number comes from measured facts.

Research use only: the card says so first, and states the limits of a model trained on
synthetic phantoms.
"""

from __future__ import annotations

import math
from typing import Any

from flairwatch.training.heldout import MIN_LESION_MM3, RECALL_MIN_MM3


def fmt(value: Any, digits: int = 3) -> str:
    """A number for the card: fixed digits, ``n/a`` for missing or NaN."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "n/a"
    if isinstance(value, float):
        return f"{value:.{digits}f}"
    return str(value)


def session_line(h: dict[str, Any]) -> str:
    """One training session of the checkpoint's history as a Markdown list item."""
    how = (
        f"{h['prefer_share']:.0%} of crops from cases of {h['prefer']}"
        if h.get("prefer_share")
        else "all cases drawn alike (lesion-free ones twice as often)"
    )
    return (
        f"  - steps {h['from_step']}-{h['to_step']}: {h['minutes']:.1f} min, {h['cases']} cases, "
        f"{how}, started {h['started']}"
    )


def threshold_note(facts: dict[str, Any]) -> str:
    """How the threshold was chosen, with the validation figures behind it."""
    vs = facts.get("validation_series")
    if not vs:
        return "the best mean model-grid Dice on the validation split."
    return (
        f"chosen on {vs['cases']} validation phantoms regenerated from their seeds and run "
        "through the runtime path (series grid, inside the intracranial mask, before the "
        "minimum-size cleaning): median Dice "
        f"{fmt(vs['median_dice_series_grid'])} over the {vs['cases_with_1ml_or_more']} with "
        f">= 1 mL, median absolute volume difference "
        f"{fmt(vs['median_volume_difference_pct'], 1)} %."
    )


def _rows_table(rows: list[dict[str, Any]]) -> str:
    head = (
        "| seed | change | acquisition | field (T) | reference mL | segmented mL | Dice | "
        "lesion recall | FP mL | ICV Dice | ventricle Dice |\n"
        "|---|---|---|---|---|---|---|---|---|---|---|"
    )
    body = "\n".join(
        f"| {r['seed']} | {r.get('alteration', 'none')} | {r['kind']} | {fmt(r['field_t'], 1)} | "
        f"{fmt(r['reference_ml'], 2)} | {fmt(r['segmented_ml'], 2)} | {fmt(r['dice'])} | "
        f"{fmt(r['lesion_recall_30mm3'])} | {fmt(r['false_positive_ml'], 2)} | "
        f"{fmt(r['intracranial_dice'])} | {fmt(r.get('ventricle_dice'))} |"
        for r in rows
    )
    return f"{head}\n{body}" if rows else "(not run)"


def _summary(h: dict[str, Any]) -> str:
    return (
        f"median Dice (cases >= 1 mL) {fmt(h.get('median_dice_1ml_or_more'))}; median absolute "
        f"volume difference {fmt(h.get('median_volume_difference_pct_1ml_or_more'), 1)} %; "
        f"pooled lesion recall {fmt(h.get('pooled_lesion_recall_30mm3'))}; median false-positive "
        f"volume on lesion-free cases {fmt(h.get('median_false_positive_ml_lesion_free'), 2)} mL; "
        f"median intracranial Dice {fmt(h.get('median_intracranial_dice'))}; median ventricle "
        f"Dice {fmt(h.get('median_ventricle_dice'))}"
    )


def _origin(facts: dict[str, Any]) -> str:
    ws = facts.get("warm_start")
    if not ws:
        return "Trained from freshly initialised weights."
    if ws.get("widened_from"):
        return (
            f"Widened from a checkpoint with level widths {tuple(ws['widened_from'])} "
            f"({ws['step']} steps; {ws['minutes']:.1f} min of CPU training behind its weights): "
            "old channels kept their weights and ignore the new ones, so training started from "
            "the same outputs; new channels started from fresh random weights."
        )
    return (
        f"Warm-started from the checkpoint of the earlier `wmh-synth` run ({ws['step']} steps, "
        f"{ws['minutes']:.1f} min of CPU training): every layer copied, the output layer's "
        "WMH and intracranial channels copied and the new ventricle channel freshly initialised."
    )


def model_card(
    facts: dict[str, Any], rows: list[dict[str, Any]], altered: list[dict[str, Any]]
) -> str:
    """The model card (Markdown) from measured facts; every number is filled in by the export."""
    v, h, a = facts["validation"], facts["held_out_quick"], facts.get("held_out_altered", {})
    total_min = facts["train_minutes"] + (facts.get("warm_start") or {}).get("minutes", 0.0)
    outputs = ", ".join(f"`{o}`" for o in facts["outputs"])
    return f"""# Model card: {facts["name"]} {facts["version"]}

**Research use only. Not for diagnosis or treatment.** Outputs must not guide the care of any
person. Validate this model on your own scans (`flairwatch validate`) before relying on any
figure it gives, and follow your local rules for handling identifiable data.

## What it does
Segments white-matter hyperintensities (WMH) on FLAIR MRI, slice by slice on axial slices of the
series' own stack (2.5D: each output slice sees itself and its two neighbours). Output channels,
in order: {outputs}. The intracranial mask normalises volumes and suppresses scalp false
positives; the lateral-ventricle mask gives the ventricle volume and the periventricular/deep
split of WMH. Model grid: 1.0 x 1.0 mm in-plane, 224 x 224 pixels, slice stack kept,
intensities divided by the head foreground median.

## Network
Our own 2.5D U-Net: 4 levels with {facts["widths"]} feature channels, two 3x3 convolutions with
batch normalisation (folded at export) and ReLU per level, max-pooling down, 2x2 transposed
convolutions up, skip connections; {facts["parameters"]} parameters; sigmoid outputs inside the
ONNX graph (opset 17, input `image` N x 3 x 224 x 224, output `probabilities`
N x {len(facts["outputs"])} x 224 x 224, batch axis dynamic). File size {facts["onnx_mb"]:.2f} MB.

## Training data: synthetic only
- Physics-based FLAIR phantoms from flairwatch's own generator (`{facts["generator_version"]}`;
  brain anatomy derived from the ICBM152 2009 template, see the generator's copyright notice),
  made in memory with their WMH, intracranial, lateral-ventricle and tissue maps. No real
  patient data was used.
- Training cases: {facts["training_sources"]}. Validation cases (phantom seeds ending in 0, used
  for the threshold): {facts["validation_sources"]}. The generator's held-out seeds were never
  used for training or validation, and the evaluation-only shift suite is never imported by the
  training code.
- {_origin(facts)}
- Training sessions of this model (resumed from its checkpoint each time):
{facts["history"]}
- Domain randomisation, so that the network learns the shape and context of lesions rather than
  one generator's intensities (on {facts["crop"]} x {facts["crop"]} crops): per-tissue intensity
  remapping from the phantom's tissue labels (fluid up to 3.5x brighter: incomplete
  suppression; grey matter 0.8-1.3x; scalp 0.4-1.8x; lesions keep 0.9-1.15x their contrast to
  white matter), random monotone contrast curves or gamma, smooth bias fields, noise of 1-12 %,
  in-plane blur, simulated thick slices (2-6 mm slabs, with or without gaps, averaged from 1 mm
  data before any other change), random scaling, rotation and elastic warps of the anatomy
  (labels moved by nearest neighbour), bright non-lesion structures labelled background
  (cortical ribbon patches, bright sulci, flow-like spots in fluid), faint lesions (in 30 % of
  crops, lesions faded to 1.08-1.35x white matter), motion: attenuated shifted copies of the
  crop, and in 30 % of crops the whole slice moving while k-space is filled (periodic motion,
  restless line-to-line jitter or one sudden move, along either in-plane axis), left-right
  flips.
- Hard negatives: lesion-free cases drawn twice as often; 40 % of non-lesion crops centred on
  bright non-lesion pixels.
- Loss: binary cross-entropy + soft Dice (batch-level) for WMH, and at half weight each for the
  intracranial mask and the lateral ventricles; AdamW, peak learning rate {facts["lr"]} with
  warm-up and cosine decay.

## Training time and hardware
This model: {facts["train_minutes"]:.1f} minutes ({facts["steps"]} steps of batch
{facts["batch_size"]}); including the run it was warm-started from, {total_min:.1f} minutes,
i.e. {total_min / 60.0:.2f} hours of training on 2 CPU cores (wall clock of the training steps;
the cores were shared with other work, so a quiet machine needs less). {facts["hardware"]},
torch {facts["torch"]}, 2 threads. No GPU.

## Measured
- Inference time, ONNX Runtime, 2 threads, 48 slices of 224 x 224 (median of 3):
  {facts["inference_s_48_slices"]:.2f} s.
- Validation split on the model grid (mean Dice over validation cases with lesions
  {fmt(v["mean_dice_model_grid"])} at its best threshold {v["threshold"]}; mean intracranial
  Dice {fmt(v["mean_intracranial_dice_model_grid"])}; mean ventricle Dice
  {fmt(v.get("mean_ventricle_dice_model_grid"))}).
- Threshold {facts["threshold"]}: {threshold_note(facts)}
- Quick held-out check ({h.get("cases", 0)} held-out phantoms of the training generator through
  the runtime path, scored on the series grid with flairwatch.research.metrics; minimum lesion
  size {MIN_LESION_MM3:g} mm^3, 26-connected; lesion recall for reference lesions
  >= {RECALL_MIN_MM3:g} mm^3): {_summary(h)}.

{_rows_table(rows)}

- Quick robustness probe ({a.get("cases", 0)} held-out phantoms, each with one acquisition
  property pushed beyond the training generator's ranges: {
        ", ".join(a.get("alterations", [])) or "none"
    }): {_summary(a) if a else "not run"}.

{_rows_table(altered)}

These quick checks are small and use the training generator; the project's quality gate on the
independent shift suite (`scripts/bench_quality.py`) is the figure to quote.

## Limits and cautions
- Trained on synthetic phantoms only: real scans differ (scanner vendors, artefacts, pathology
  that is not WMH such as infarcts, tumours, multiple-sclerosis lesions of other shapes).
  Performance on real data is unknown until you measure it on your own labelled scans.
- Lesion loads above 60 mL lie outside the training range; all phantom heads derive from one
  adult template, so unusual anatomy (children, large lesions that distort the ventricles,
  surgery) is not represented.
- Short CPU training (about {total_min / 60.0:.1f} CPU-hours): training longer from the
  committed checkpoint, and fine-tuning on a lab's own labelled cases
  (`scripts/train_model.py --cases DIR`), should improve it.
- Research use only; not a medical device; not for diagnosis or treatment.
"""

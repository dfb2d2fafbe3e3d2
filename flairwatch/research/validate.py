"""``flairwatch validate``: score a model against reference masks in case folders.

Case folders follow DESIGN.md::

    <cases>/<case-id>/image/...                DICOM series (exactly one), or image.nii.gz
    <cases>/<case-id>/wmh_reference.nii.gz     reference on the image grid: 0, 1 WMH, 2 ignore
    <cases>/<case-id>/intracranial_mask.nii.gz optional, on the image grid (non-zero = inside)
    <cases>/<case-id>/case.json                optional facts (acquisition kind, field strength)

Every figure comes from :mod:`flairwatch.research.metrics`, which follows the definitions of the 2019 IEEE
Transactions on Medical Imaging paper on standardized assessment of automatic WMH segmentation
(the WMH segmentation challenge): Dice, 95th-percentile Hausdorff distance (mm), absolute volume
difference (%), lesion-wise recall and F1 over 3-D connected components, reference label 2
ignored. Two figures are added here: lesion recall counting only reference lesions of at least
``LARGE_LESION_MM3`` mm^3, and the Dice of the model's intracranial mask against the case's.

The scoring core is pure (:func:`score_segmentation`, :func:`summarise_results`); reading case
folders and writing the output folder are the edges. Any segmenter with the :data:`Segment`
signature can be scored, so the quality benchmark scores a baseline through the same code.
Volumes (``Volume``) carry (i, j, k) arrays with an LPS affine; NIfTI files (RAS) are converted
on reading by :func:`flairwatch.intake.load.load_nifti`.
"""

from __future__ import annotations

import json
import logging
import math
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, cast

import numpy as np

from flairwatch.engine.pipeline import Engine
from flairwatch.errors import ConfigInvalid, FlairwatchError, InputRejected
from flairwatch.intake.assemble import group_series
from flairwatch.intake.discover import discover
from flairwatch.intake.load import load_nifti, load_series
from flairwatch.research import metrics
from flairwatch.volume import Volume

log = logging.getLogger(__name__)

IMAGE_NIFTI = "image.nii.gz"
IMAGE_FOLDER = "image"
REFERENCE_FILE = "wmh_reference.nii.gz"
INTRACRANIAL_FILE = "intracranial_mask.nii.gz"
CASE_FILE = "case.json"
# Lesions from this size (mm^3) get their own recall figure: the quality gate's lesion size.
LARGE_LESION_MM3 = 30.0
# Grids agree when every affine entry differs by less than this (mm, or mm per voxel): NIfTI
# headers keep the affine in float32, DICOM positions are decimal strings.
GRID_TOLERANCE_MM = 1e-2


@dataclass(frozen=True, eq=False)
class CaseInput:
    """One case folder read into memory; every array lies on ``image``'s grid, axes (i, j, k)."""

    case_id: str
    image: Volume
    reference: np.ndarray  # uint8 0 background, 1 WMH, 2 ignore
    intracranial: np.ndarray | None  # bool, when the case has a mask
    acquisition: str | None  # acquisition kind from case.json, e.g. "2d_axial"
    field_strength_t: float | None


@dataclass(frozen=True, eq=False)
class Segmentation:
    """What a segmenter made of one image, on the image's grid (axes (i, j, k))."""

    mask: np.ndarray  # WMH, non-zero = lesion
    intracranial: np.ndarray | None  # non-zero = inside, when the segmenter gives it
    seconds: float = 0.0
    warnings: tuple[str, ...] = ()


Segment = Callable[[Volume], Segmentation]


@dataclass(frozen=True)
class CaseResult:
    """Scores of one case (``scores`` per :func:`flairwatch.research.metrics.score_case`, all lesions).

    ``large_*`` count reference lesions of at least ``LARGE_LESION_MM3`` mm^3;
    ``intracranial_dice`` is NaN unless both the case and the segmenter have the mask.
    """

    case_id: str
    scores: metrics.CaseScores
    large_lesion_recall: float
    large_reference_lesions: int
    large_detected_lesions: int
    intracranial_dice: float
    acquisition: str | None
    field_strength_t: float | None
    seconds: float
    warnings: tuple[str, ...] = ()


@dataclass(frozen=True)
class CaseFailure:
    case_id: str
    message: str


# ------------------------------------------------------------------------------ reading cases


def find_case_folders(root: Path) -> list[Path]:
    """Sub-folders of ``root`` (hidden ones left out), sorted by name: one case each."""
    if not root.is_dir():
        raise ConfigInvalid(f"cases folder {root} does not exist; check --cases")
    return sorted(p for p in root.iterdir() if p.is_dir() and not p.name.startswith("."))


def _find_value(facts: Any, key: str) -> Any:
    """First value stored under ``key`` in a nested mapping (breadth first), else None."""
    queue = [facts]
    while queue:
        item = queue.pop(0)
        if isinstance(item, Mapping):
            if key in item and not isinstance(item[key], Mapping):
                return item[key]
            queue.extend(v for v in item.values() if isinstance(v, Mapping))
    return None


def case_facts(facts: Mapping[str, Any]) -> tuple[str | None, float | None]:
    """Acquisition kind and field strength (T) recorded in a case.json, where it says."""
    kind = _find_value(facts, "kind")
    field = _find_value(facts, "field_strength_t")
    kind_text = str(kind) if isinstance(kind, str) and kind else None
    field_t = float(field) if isinstance(field, int | float) and math.isfinite(field) else None
    return kind_text, field_t


def read_case_image(case_dir: Path) -> Volume:
    """The case's image: ``image.nii.gz``, or the one DICOM series under ``image/``."""
    nifti = case_dir / IMAGE_NIFTI
    if nifti.is_file():
        return load_nifti(nifti)
    folder = case_dir / IMAGE_FOLDER
    if not folder.is_dir():
        raise InputRejected(f"no {IMAGE_NIFTI} and no {IMAGE_FOLDER}/ folder; add the image")
    series, unusable = group_series(discover([folder]))
    if len(series) != 1:
        extra = f" and {len(unusable)} unusable file(s)" if unusable else ""
        raise InputRejected(
            f"{IMAGE_FOLDER}/ holds {len(series)} DICOM series{extra}; keep exactly one series there"
        )
    return load_series(series[0])


def _on_grid(mask: Volume, image: Volume, name: str) -> np.ndarray:
    if mask.shape != image.shape or not np.allclose(
        mask.affine_lps, image.affine_lps, atol=GRID_TOLERANCE_MM
    ):
        raise InputRejected(
            f"{name} (shape {mask.shape}) does not lie on the image grid (shape {image.shape}); "
            "resample it onto the image grid"
        )
    return mask.data


def read_reference(path: Path, image: Volume) -> np.ndarray:
    """Reference labels (uint8 0/1/2) on ``image``'s grid; refuses other values and grids."""
    data = _on_grid(load_nifti(path), image, path.name)
    labels = np.rint(data)
    if not np.array_equal(labels, data) or labels.min() < 0 or labels.max() > 2:
        raise InputRejected(
            f"{path.name} holds values other than 0, 1 and 2; use 0 background, 1 WMH, 2 ignore"
        )
    return labels.astype(np.uint8)


def read_case(case_dir: Path) -> CaseInput:
    """Read one case folder (layout in the module docstring)."""
    ref_path = case_dir / REFERENCE_FILE
    if not ref_path.is_file():
        raise InputRejected(f"no {REFERENCE_FILE}; add the reference mask on the image grid")
    image = read_case_image(case_dir)
    reference = read_reference(ref_path, image)
    icv_path = case_dir / INTRACRANIAL_FILE
    intracranial = None
    if icv_path.is_file():
        intracranial = _on_grid(load_nifti(icv_path), image, icv_path.name) != 0
    kind: str | None = None
    field: float | None = None
    facts_path = case_dir / CASE_FILE
    if facts_path.is_file():
        try:
            facts = json.loads(facts_path.read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            raise InputRejected(
                f"{CASE_FILE} is not readable JSON ({exc}); fix or remove it"
            ) from None
        if isinstance(facts, Mapping):
            kind, field = case_facts(facts)
    return CaseInput(case_dir.name, image, reference, intracranial, kind, field)


# ------------------------------------------------------------------------------ scoring (pure)


def score_segmentation(case: CaseInput, seg: Segmentation, *, connectivity: int = 26) -> CaseResult:
    """Score one segmentation against its case's reference (label 2 ignored)."""
    spacing = case.image.spacing
    scores = metrics.score_case(case.reference, seg.mask, spacing, connectivity=connectivity)
    ref, mask = metrics.prepare(case.reference, seg.mask)
    large = metrics.lesion_counts(
        ref, mask, spacing, connectivity=connectivity, min_reference_mm3=LARGE_LESION_MM3
    )
    icv_dice = math.nan
    if case.intracranial is not None and seg.intracranial is not None:
        icv_dice = metrics.dice(case.intracranial, seg.intracranial)
    return CaseResult(
        case_id=case.case_id,
        scores=scores,
        large_lesion_recall=large.recall,
        large_reference_lesions=large.reference_lesions,
        large_detected_lesions=large.detected_lesions,
        intracranial_dice=icv_dice,
        acquisition=case.acquisition,
        field_strength_t=case.field_strength_t,
        seconds=seg.seconds,
        warnings=seg.warnings,
    )


def _finite(values: Sequence[float]) -> list[float]:
    return [v for v in values if not math.isnan(v)]


def group_figures(results: Sequence[CaseResult]) -> dict[str, Any]:
    """Medians and pooled counts of one group (see :func:`flairwatch.research.metrics.summarise`).

    Adds pooled recall over reference lesions >= ``LARGE_LESION_MM3`` mm^3 and the median and
    minimum intracranial Dice over cases that have it. NaN where a group has nothing to count.
    """
    overall = metrics.summarise([r.scores for r in results])["overall"]
    out: dict[str, Any] = dict(cast(Mapping[str, Any], overall))
    ref = sum(r.large_reference_lesions for r in results)
    det = sum(r.large_detected_lesions for r in results)
    out["reference_lesions_30mm3"] = ref
    out["detected_lesions_30mm3"] = det
    out["pooled_lesion_recall_30mm3"] = det / ref if ref else math.nan
    icv = _finite([r.intracranial_dice for r in results])
    out["median_intracranial_dice"] = float(np.median(icv)) if icv else math.nan
    out["min_intracranial_dice"] = float(min(icv)) if icv else math.nan
    return out


def summarise_results(results: Sequence[CaseResult]) -> dict[str, Any]:
    """Figures overall, per lesion-load bin (every bin listed) and per acquisition kind."""
    kinds = sorted({r.acquisition or "unknown" for r in results})
    return {
        "overall": group_figures(results),
        "by_load_bin": {
            name: group_figures([r for r in results if r.scores.load_bin == name])
            for name in metrics.LOAD_BIN_NAMES
        },
        "by_acquisition": {
            kind: group_figures([r for r in results if (r.acquisition or "unknown") == kind])
            for kind in kinds
        },
    }


def json_safe(value: Any) -> Any:
    """Copy of ``value`` with NaN and infinities replaced by None (JSON has no NaN)."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, Mapping):
        return {str(k): json_safe(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [json_safe(v) for v in value]
    return value


# ------------------------------------------------------------------------------ running


def model_segment(engine: Engine) -> Segment:
    """A :data:`Segment` that runs the engine's model and post-processing (``analyse``)."""

    def run(volume: Volume) -> Segmentation:
        start = time.perf_counter()
        a = engine.analyse(volume)
        return Segmentation(a.lesions.mask, a.intracranial, time.perf_counter() - start, a.warnings)

    return run


def score_folders(
    case_dirs: Sequence[Path],
    segmenters: Mapping[str, Segment],
    *,
    connectivity: int = 26,
    say: Callable[[str], None] = print,
    warn: Callable[[str], None] = print,
    read: Callable[[Path], CaseInput] = read_case,
) -> tuple[dict[str, list[CaseResult]], list[CaseFailure]]:
    """Read each case once, run every named segmenter on it and score the results.

    A case that cannot be read or segmented becomes a :class:`CaseFailure` (one-line message)
    and the others carry on. Returns results per segmenter name, in case order, and failures.
    """
    results: dict[str, list[CaseResult]] = {name: [] for name in segmenters}
    failures: list[CaseFailure] = []
    total = len(case_dirs)
    for n, case_dir in enumerate(case_dirs, start=1):
        name = case_dir.name
        try:
            case = read(case_dir)
            scored = {
                key: score_segmentation(case, seg(case.image), connectivity=connectivity)
                for key, seg in segmenters.items()
            }
        except (FlairwatchError, OSError, ValueError) as exc:
            message = " ".join(str(exc).split()) or type(exc).__name__
            failures.append(CaseFailure(name, message))
            warn(f"[{n}/{total}] {name}: failed: {message}")
            continue
        for key, r in scored.items():
            results[key].append(r)
        parts = [
            f"{key} Dice {r.scores.dice:.3f}, {r.scores.segmentation_ml:.2f} mL"
            for key, r in scored.items()
        ]
        first = next(iter(scored.values()))
        say(
            f"[{n}/{total}] {name}: reference {first.scores.reference_ml:.2f} mL; "
            + "; ".join(parts)
            + f" ({sum(r.seconds for r in scored.values()):.1f} s)"
        )
    return results, failures


def run_validate(
    cases_root: Path,
    out: Path | None,
    engine: Engine,
    *,
    say: Callable[[str], None] = print,
    warn: Callable[[str], None] = print,
) -> int:
    """Score every case folder under ``cases_root``; write the report; 0 if all scored, else 1."""
    # the report module builds on this one's types, so it is imported here, not at the top
    from flairwatch.research.validate_report import (
        REPORT_MD,
        check_output_folder,
        publish_folder,
        validation_document,
        write_report_files,
    )

    case_dirs = find_case_folders(cases_root)
    if not case_dirs:
        raise ConfigInvalid(f"no case folders under {cases_root}; see the layout in DESIGN.md")
    if out is None:
        out = cases_root.resolve().parent / f"validation-{engine.manifest.label}"
    check_output_folder(out, cases_root)
    say(f"validating {engine.manifest.label} on {len(case_dirs)} case folder(s) in {cases_root}")
    per_model, failures = score_folders(
        case_dirs,
        {"model": model_segment(engine)},
        connectivity=engine.cfg.connectivity,
        say=say,
        warn=warn,
    )
    results = per_model["model"]
    document = validation_document(engine, results, failures, cases_root)
    publish_folder(out, lambda tmp: write_report_files(tmp, results, failures, document))
    overall = document["overall"]
    say(
        f"scored {len(results)} of {len(case_dirs)} case(s): median Dice "
        f"{overall['median_dice']:.3f}; report in {out / REPORT_MD}"
    )
    return 1 if failures else 0

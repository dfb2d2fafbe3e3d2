"""One series through every stage: load -> model grid -> infer -> series grid -> post-process -> write.

:func:`analyse` is the pure middle (arrays in, arrays out, the model session passed in);
:class:`Engine` holds what is built once per worker (manifest, ONNX session) and adds the edges:
reading the series and writing its result folder. ``process``, ``watch``, ``reprocess`` and
``validate`` all come through here.
"""

from __future__ import annotations

import csv
import gzip
import hashlib
import io
import logging
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np
from scipy import ndimage

from flairwatch import __version__, keys
from flairwatch.config import Config, Identifiers
from flairwatch.engine import convert, results
from flairwatch.engine.infer import Segmenter
from flairwatch.engine.manifest import ModelManifest, load_manifest
from flairwatch.engine.models import manifest_path
from flairwatch.engine.postprocess import (
    LESION_COLUMNS,
    LesionResult,
    connected_components,
    lesion_rows,
    threshold_and_clean,
)
from flairwatch.engine.qc_image import qc_montage, save_png
from flairwatch.intake.load import load_nifti, load_series
from flairwatch.notice import BANNER, NOTICE_FILE, NOTICE_TEXT
from flairwatch.records import Series, SeriesHeader
from flairwatch.volume import Volume

log = logging.getLogger(__name__)

MASK_FILE = "wmh_mask.nii.gz"
PROBABILITY_FILE = "wmh_probability.nii.gz"
LESIONS_FILE = "lesions.csv"
QC_FILE = "qc.png"
# the training data's lesion loads reach 60 mL; beyond that results are extrapolation
TRAINED_LOAD_LIMIT_ML = 60.0


@dataclass(frozen=True, eq=False)
class Analysis:
    """What the model and post-processing made of one volume, on the series' own grid."""

    probability: np.ndarray  # (I, J, K) float32 WMH probability 0..1
    intracranial: np.ndarray | None  # (I, J, K) uint8, when the model gives it
    lesions: LesionResult
    intracranial_volume_ml: float | None
    warnings: tuple[str, ...]
    timings_s: dict[str, float] = field(default_factory=dict)


@dataclass(frozen=True)
class Outcome:
    result_dir: Path
    summary: dict[str, Any]
    adopted: bool


@contextmanager
def _timed(timings: dict[str, float], stage: str) -> Iterator[None]:
    start = time.perf_counter()
    try:
        yield
    finally:
        timings[stage] = round(time.perf_counter() - start, 3)


def _largest_component_filled(mask: np.ndarray) -> np.ndarray:
    """Keep the largest 26-connected component and fill its holes (an intracranial mask is one piece)."""
    labels, n = connected_components(mask, 26)
    if n == 0:
        return mask.astype(np.uint8)
    sizes = np.bincount(labels.ravel())[1:]
    largest = labels == (int(np.argmax(sizes)) + 1)
    return np.asarray(ndimage.binary_fill_holes(largest), dtype=np.uint8)


def _head_cut_off(slices: np.ndarray, level: float = 0.3, fraction: float = 0.01) -> bool:
    """True when normalised tissue (> ``level``) covers more than ``fraction`` of the model
    grid's border pixels, i.e. the series' head does not fit the model's field of view.
    ``slices`` is (K, H, W) on the model grid."""
    border = np.concatenate(
        [slices[:, 0, :], slices[:, -1, :], slices[:, :, 0], slices[:, :, -1]], axis=1
    )
    return bool(np.mean(border > level) > fraction)


def analyse(
    volume: Volume,
    segmenter: Segmenter,
    *,
    threshold: float,
    min_lesion_mm3: float,
    connectivity: int,
) -> Analysis:
    """Segment WMH in ``volume`` and return everything on the volume's own grid."""
    m = segmenter.manifest
    timings: dict[str, float] = {}
    warnings: list[str] = []
    with _timed(timings, "to_model_grid"):
        x, gmap = convert.to_model_input(volume, m.grid, m.normalisation, m.channels)
    with _timed(timings, "infer"):
        probs = segmenter.predict(x)
    with _timed(timings, "to_series_grid"):
        wmh = convert.resample_to_series(probs[:, m.output_channels.index("wmh")], gmap)
        icv = None
        if "intracranial" in m.output_channels:
            icv_prob = convert.resample_to_series(
                probs[:, m.output_channels.index("intracranial")], gmap
            )
            icv = _largest_component_filled(icv_prob >= 0.5)
    with _timed(timings, "post_process"):
        lesions = threshold_and_clean(
            wmh,
            volume.affine_lps,
            threshold=threshold,
            min_lesion_mm3=min_lesion_mm3,
            connectivity=connectivity,
            restrict_to=icv,
        )
    icv_ml = None if icv is None else float(icv.sum()) * volume.voxel_volume_mm3 / 1000.0
    if _head_cut_off(x[:, m.channels // 2]):
        fov = np.multiply(m.grid.shape, m.grid.spacing_mm)
        warnings.append(
            f"the head reaches the edge of the model's {fov[0]:.0f} x {fov[1]:.0f} mm view; "
            "tissue outside it is not segmented: check the QC image"
        )
    if icv_ml is not None and not 800.0 <= icv_ml <= 2300.0:
        warnings.append(
            f"intracranial volume {icv_ml:.0f} mL is outside the usual adult range; check the QC image"
        )
    if lesions.total_volume_ml > TRAINED_LOAD_LIMIT_ML:
        warnings.append(
            f"lesion volume {lesions.total_volume_ml:.1f} mL is above the model's training range "
            f"(0-{TRAINED_LOAD_LIMIT_ML:.0f} mL)"
        )
    return Analysis(
        probability=wmh,
        intracranial=icv,
        lesions=lesions,
        intracranial_volume_ml=icv_ml,
        warnings=tuple(warnings),
        timings_s=timings,
    )


@dataclass(frozen=True)
class Source:
    """Where a volume came from: the facts the summary reports and the keys its folder gets."""

    kind: str  # "dicom" or "nifti"
    header: SeriesHeader | None  # None for NIfTI input
    study_id: str  # Study Instance UID, or the NIfTI file's content hash
    series_id: str  # Series Instance UID, or the NIfTI file's content hash
    label: str  # short human-readable name for messages (never used in paths)


def source_of_series(series: Series) -> Source:
    h = series.header
    label = f"series {h.series_uid[-12:]}"
    if h.series_description:
        label += f" ({h.series_description[:40]})"
    return Source("dicom", h, h.study_uid, h.series_uid, label)


def source_of_nifti(path: Path) -> Source:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)
    content = digest.hexdigest()
    return Source("nifti", None, f"nifti-{content}", f"nifti-{content}", f"file {path.name}")


def _identify(value: str | None, action: str, secret: bytes) -> str | None:
    if value is None or action == "drop":
        return None
    if action == "pseudonymise":
        return keys.subject_key(value, secret)
    return value


def header_facts(h: SeriesHeader | None, ids: Identifiers, secret: bytes) -> dict[str, Any]:
    """Header facts for the summary; identifiers follow the ``identifiers`` setting, UIDs are kept."""
    if h is None:
        return {
            "series_instance_uid": None,
            "study_instance_uid": None,
            "series_description": None,
            "acquisition_date": None,
            "patient_id": None,
            "patient_name": None,
        }
    dates = ids.dates != "drop"
    return {
        "series_instance_uid": h.series_uid,
        "study_instance_uid": h.study_uid,
        "series_description": h.series_description,
        "series_number": h.series_number,
        "acquisition_date": (h.acquisition_date or h.study_date) if dates else None,
        "patient_id": _identify(h.patient_id, ids.patient_id, secret),
        "patient_name": None if ids.patient_name != "keep" else h.patient_name,
        "manufacturer": h.manufacturer,
        "manufacturer_model": h.manufacturer_model,
        "field_strength_t": h.field_strength_t,
        "repetition_time_ms": h.repetition_time_ms,
        "echo_time_ms": h.echo_time_ms,
        "inversion_time_ms": h.inversion_time_ms,
        "mr_acquisition_type": h.mr_acquisition_type,
    }


def _nifti_bytes(data: np.ndarray, volume: Volume) -> bytes:
    img = nib.Nifti1Image(data, volume.affine_ras)
    img.set_qform(volume.affine_ras, code=1)
    img.set_sform(volume.affine_ras, code=1)
    img.header.set_xyzt_units("mm")
    return gzip.compress(img.to_bytes(), compresslevel=6, mtime=0)


def _lesions_csv(result: LesionResult) -> bytes:
    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=list(LESION_COLUMNS), lineterminator="\n")
    writer.writeheader()
    writer.writerows(lesion_rows(result))
    return buf.getvalue().encode("utf-8")


class Engine:
    """What one worker builds once: the checked model and its ONNX session, plus the settings."""

    def __init__(self, cfg: Config, *, manifest: ModelManifest | None = None) -> None:
        self.cfg = cfg
        self.manifest = (
            manifest if manifest is not None else load_manifest(manifest_path(cfg.model))
        )
        self.segmenter = Segmenter(self.manifest, threads=cfg.threads_per_worker())
        self.threshold = cfg.threshold if cfg.threshold is not None else self.manifest.threshold

    @property
    def model_name(self) -> str:
        return self.manifest.name

    @property
    def model_version(self) -> str:
        return self.manifest.version

    def analyse(self, volume: Volume) -> Analysis:
        """:func:`analyse` with this engine's model and post-processing settings."""
        return analyse(
            volume,
            self.segmenter,
            threshold=self.threshold,
            min_lesion_mm3=self.cfg.min_lesion_mm3,
            connectivity=self.cfg.connectivity,
        )

    def version_dir(
        self, results_root: Path, source: Source, *, secret: bytes, revision: int = 1
    ) -> Path:
        """Where this source's result for this model goes (see DESIGN.md)."""
        patient_id = source.header.patient_id if source.header else None
        subject = keys.subject_key(
            patient_id if source.kind == "dicom" else source.series_id, secret
        )
        return (
            results_root
            / subject
            / keys.study_key(source.study_id)
            / keys.series_key(source.series_id, revision)
            / self.manifest.label
        )

    def process(
        self, series: Series, results_root: Path, *, secret: bytes, revision: int = 1
    ) -> Outcome:
        """Load one DICOM series and write its result folder (or adopt a complete one)."""
        source = source_of_series(series)
        return self._run(lambda: load_series(series), source, results_root, secret, revision)

    def process_nifti(self, path: Path, results_root: Path, *, secret: bytes) -> Outcome:
        source = source_of_nifti(path)
        return self._run(lambda: load_nifti(path), source, results_root, secret, 1)

    def _run(
        self,
        read: Callable[[], Volume],
        source: Source,
        results_root: Path,
        secret: bytes,
        revision: int,
    ) -> Outcome:
        final = self.version_dir(results_root, source, secret=secret, revision=revision)
        if results.is_complete(final):
            log.info("%s: complete result found, adopting %s", source.label, final)
            return Outcome(final, results.read_summary(final), adopted=True)
        timings: dict[str, float] = {}
        with _timed(timings, "load"):
            volume = read()
        analysis = self.analyse(volume)
        timings.update(analysis.timings_s)

        def fill(tmp: Path) -> dict[str, Any]:
            with _timed(timings, "write"):
                (tmp / MASK_FILE).write_bytes(_nifti_bytes(analysis.lesions.mask, volume))
                (tmp / PROBABILITY_FILE).write_bytes(
                    _nifti_bytes(analysis.probability.astype(np.float32), volume)
                )
                (tmp / LESIONS_FILE).write_bytes(_lesions_csv(analysis.lesions))
                (tmp / NOTICE_FILE).write_text(NOTICE_TEXT, encoding="utf-8")
                vol_ml = analysis.lesions.total_volume_ml
                title = [
                    f"{final.parent.name}  model {self.manifest.label}",
                    f"WMH {vol_ml:.2f} mL in {len(analysis.lesions.lesions)} lesions"
                    + (
                        f"  ICV {analysis.intracranial_volume_ml:.0f} mL"
                        if analysis.intracranial_volume_ml
                        else ""
                    ),
                ]
                save_png(
                    qc_montage(
                        volume.data,
                        analysis.lesions.mask,
                        volume.affine_lps,
                        title_lines=title,
                        banner=BANNER,
                    ),
                    tmp / QC_FILE,
                )
            return self._summary(source, volume, analysis, final, revision, secret, timings)

        folder, summary, adopted = results.build_version_folder(final, fill)
        if not adopted and results.current_version(folder.parent) is None:
            results.set_current(folder.parent, folder.name)
        return Outcome(folder, summary, adopted)

    def _summary(
        self,
        source: Source,
        volume: Volume,
        analysis: Analysis,
        final: Path,
        revision: int,
        secret: bytes,
        timings: dict[str, float],
    ) -> dict[str, Any]:
        les = analysis.lesions
        icv = analysis.intracranial_volume_ml
        summary: dict[str, Any] = header_facts(source.header, self.cfg.identifiers, secret)
        summary.update(
            {
                "notice": BANNER,
                "input_kind": source.kind,
                "subject_key": final.parents[2].name,
                "study_key": final.parents[1].name,
                "series_key": final.parent.name,
                "revision": revision,
                "model": {
                    "name": self.manifest.name,
                    "version": self.manifest.version,
                    "sha256": self.manifest.sha256,
                },
                "threshold": self.threshold,
                "min_lesion_mm3": self.cfg.min_lesion_mm3,
                "connectivity": self.cfg.connectivity,
                "lesion_volume_ml": round(les.total_volume_ml, 4),
                "lesion_count": len(les.lesions),
                "removed_small_components": les.removed_count,
                "voxel_volume_mm3": round(volume.voxel_volume_mm3, 6),
                "grid": {
                    "shape": list(volume.shape),
                    "spacing_mm": [round(s, 5) for s in volume.spacing],
                },
                "intracranial_volume_ml": None if icv is None else round(icv, 2),
                "wmh_fraction_of_intracranial": (
                    None if not icv else round(les.total_volume_ml / icv, 6)
                ),
                "probability_encoding": "float32, 0 to 1",
                "files": {
                    "mask": MASK_FILE,
                    "probability": PROBABILITY_FILE,
                    "qc": QC_FILE,
                    "lesions": LESIONS_FILE,
                    "notice": NOTICE_FILE,
                },
                "timings_s": dict(timings),
                "flairwatch_version": __version__,
                "warnings": list(analysis.warnings),
            }
        )
        return summary

"""One series through every stage: load -> analyse -> write its result folder.

:func:`~flairwatch.engine.analysis.analyse` is the pure middle (arrays in, arrays out, the model
session passed in); :mod:`flairwatch.engine.outputs` writes the files. :class:`Engine` holds what
is built once per worker (manifest, ONNX session) and adds the edges: reading the series and
building its result folder. ``process``, ``watch``, ``reprocess`` and ``validate`` all come
through here.
"""

from __future__ import annotations

import hashlib
import json
import logging
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from pydicom.dataset import Dataset

from flairwatch import __version__, keys
from flairwatch.config import Config
from flairwatch.engine import results
from flairwatch.engine.analysis import Analysis, analyse, timed
from flairwatch.engine.dicom_seg import SEG_FILE
from flairwatch.engine.dicom_sr import SR_FILE
from flairwatch.engine.infer import Segmenter
from flairwatch.engine.manifest import ModelManifest, load_manifest
from flairwatch.engine.models import manifest_path
from flairwatch.engine.outputs import (
    LESIONS_FILE,
    MASK_FILE,
    PROBABILITY_FILE,
    QC_FILE,
    VENTRICLE_FILE,
    DicomJob,
    header_facts,
    summary_facts,
    write_dicom,
    write_files,
)
from flairwatch.intake.load import load_nifti, read_datasets, series_label, volume_from_datasets
from flairwatch.notice import BANNER
from flairwatch.records import Series, SeriesHeader
from flairwatch.volume import Volume

# names other modules take from here (the result files and the analysis)
__all__ = [
    "LESIONS_FILE",
    "MASK_FILE",
    "PROBABILITY_FILE",
    "QC_FILE",
    "VENTRICLE_FILE",
    "Analysis",
    "Engine",
    "Outcome",
    "Source",
    "analyse",
    "header_facts",
    "source_of_nifti",
    "source_of_series",
]

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class Outcome:
    result_dir: Path
    summary: dict[str, Any]
    adopted: bool


@dataclass(frozen=True)
class Source:
    """Where a volume came from: the facts the summary reports and the keys its folder gets."""

    kind: str  # "dicom" or "nifti"
    header: SeriesHeader | None  # None for NIfTI input
    study_id: str  # Study Instance UID, or the NIfTI file's content hash
    series_id: str  # Series Instance UID, or the NIfTI file's content hash
    label: str  # short human-readable name for messages (never used in paths)
    inputs: tuple[tuple[str, int], ...] = ()  # (SOP Instance UID, file size) of each DICOM file


def source_of_series(series: Series) -> Source:
    h = series.header
    label = f"series {h.series_uid[-12:]}"
    if h.series_description:
        label += f" ({h.series_description[:40]})"
    inputs = tuple(sorted((f.sop_uid or f.path.name, f.size) for f in series.files))
    return Source("dicom", h, h.study_uid, h.series_uid, label, inputs)


def source_of_nifti(path: Path) -> Source:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)
    content = digest.hexdigest()
    return Source("nifti", None, f"nifti-{content}", f"nifti-{content}", f"file {path.name}")


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

    def fingerprint(self, source: Source) -> str:
        """Hash of what a result depends on: the input instances, the model file, the settings.

        Stored in ``summary.json``; a complete folder is adopted after a crash only when its
        fingerprint matches, so a result of other inputs or settings is never taken for ours.
        """
        facts = {
            "series": [source.study_id, source.series_id],
            "inputs": [list(i) for i in source.inputs],
            "model_sha256": self.manifest.sha256,
            "threshold": self.threshold,
            "min_lesion_mm3": self.cfg.min_lesion_mm3,
            "connectivity": self.cfg.connectivity,
            "periventricular_mm": self.cfg.periventricular_mm,
        }
        return hashlib.sha256(json.dumps(facts, sort_keys=True).encode("utf-8")).hexdigest()

    def analyse(self, volume: Volume) -> Analysis:
        """:func:`analyse` with this engine's model and post-processing settings."""
        return analyse(
            volume,
            self.segmenter,
            threshold=self.threshold,
            min_lesion_mm3=self.cfg.min_lesion_mm3,
            connectivity=self.cfg.connectivity,
            periventricular_mm=self.cfg.periventricular_mm,
        )

    def version_dir(
        self, results_root: Path, source: Source, *, secret: bytes, revision: int = 1
    ) -> Path:
        """Where this source's result for this model goes (see docs/architecture.md)."""
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

        def read() -> tuple[Volume, list[Dataset]]:
            datasets = read_datasets(series)
            volume = volume_from_datasets(datasets, series_label(series.header))
            for ds in datasets:  # the SEG and SR need the headers only
                for keyword in ("PixelData", "FloatPixelData", "DoubleFloatPixelData"):
                    if keyword in ds:
                        delattr(ds, keyword)
            return volume, datasets

        return self._run(read, source, results_root, secret, revision)

    def process_nifti(self, path: Path, results_root: Path, *, secret: bytes) -> Outcome:
        source = source_of_nifti(path)
        return self._run(lambda: (load_nifti(path), []), source, results_root, secret, 1)

    def _run(
        self,
        read: Callable[[], tuple[Volume, list[Dataset]]],
        source: Source,
        results_root: Path,
        secret: bytes,
        revision: int,
    ) -> Outcome:
        final = self.version_dir(results_root, source, secret=secret, revision=revision)
        fingerprint = self.fingerprint(source)
        if results.is_complete(final):
            found = results.read_summary(final)
            # no fingerprint: made before flairwatch 0.2.0, adopted as it always was
            if found.get("fingerprint") in (None, fingerprint):
                log.info("%s: complete result found, adopting %s", source.label, final)
                return Outcome(final, found, adopted=True)
            aside = results.set_aside(final)
            log.warning("%s: %s was made from other inputs or settings; kept as %s, made again",
                        source.label, final, aside.name)  # fmt: skip
        timings: dict[str, float] = {}
        with timed(timings, "load"):
            volume, headers = read()
        analysis = self.analyse(volume)
        timings.update(analysis.timings_s)

        def fill(tmp: Path) -> dict[str, Any]:
            with timed(timings, "write"):
                title = self._title(final, analysis)
                threads = self.segmenter.threads
                # the SEG and SR are built beside the other files; most of their time is
                # Python in highdicom and pydicom under the interpreter lock, so this saves only
                # the few ms where write_files runs zlib or numpy (README, "Measured speed")
                with ThreadPoolExecutor(max_workers=1) as pool:
                    job = self._dicom_job(headers, secret)
                    pending = pool.submit(write_dicom, tmp, volume, analysis, job)
                    timings.update(write_files(tmp, volume, analysis, title, threads=threads))
                    dicom, dicom_timings = pending.result()
                timings.update(dicom_timings)
            summary = self._summary(source, volume, analysis, final, revision, secret, timings)
            for key, name in (("segmentation", SEG_FILE), ("measurements", SR_FILE)):
                if dicom[key] == "written":
                    summary["files"][key] = name
            return summary | {"fingerprint": fingerprint, "dicom": dicom}

        folder, summary, adopted = results.build_version_folder(final, fill)
        if not adopted and results.current_version(folder.parent) is None:
            results.set_current(folder.parent, folder.name)
        return Outcome(folder, summary, adopted)

    def _dicom_job(self, headers: list[Dataset], secret: bytes) -> DicomJob:
        m = self.manifest
        return DicomJob(headers, self.cfg.outputs, self.cfg.identifiers, secret,
                        m.name, m.version, m.sha256, __version__)  # fmt: skip

    def _title(self, final: Path, analysis: Analysis) -> list[str]:
        """The QC image's title lines: series key, model, volumes (never patient names)."""
        les = analysis.lesions
        line = f"WMH {les.total_volume_ml:.2f} mL in {len(les.lesions)} lesions"
        if analysis.split is not None:
            line += (
                f" (periventricular {analysis.split.periventricular_volume_ml:.2f}, "
                f"deep {analysis.split.deep_volume_ml:.2f})"
            )
        if analysis.intracranial_volume_ml:
            line += f"  ICV {analysis.intracranial_volume_ml:.0f} mL"
        return [f"{final.parent.name}  model {self.manifest.label}", line]

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
                **summary_facts(analysis, volume),
                "timings_s": dict(timings),
                "flairwatch_version": __version__,
                "warnings": list(analysis.warnings),
            }
        )
        return summary

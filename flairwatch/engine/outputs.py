"""The result writer: the files of one result folder and the facts of its ``summary.json``.

:func:`write_files` writes an :class:`~flairwatch.engine.analysis.Analysis` into an empty
(temporary) folder; :func:`summary_facts` gives the analysis' part of the summary. Folder
placement, atomic renaming and adoption are :mod:`flairwatch.engine.results`' job.

NIfTI outputs are gzip-compressed at a level picked per file by measurement on a 256 x 256 x 48
series (``scripts/bench_inference.py``): masks at level 6 (3 MB of mostly zeros: 9 ms, 4 kB; the
files stay byte for byte as before), the float32 probability map at level 1 (12.6 MB: level 1
takes 0.21 s for 6.76 MB, level 6 1.48 s for 6.22 MB; 8 % larger for 7 times less time;
zlib's run-length and Huffman-only strategies save another 25-40 % of the time but make the
file 30-35 % larger; figures for a map with model noise outside the head). Since the map is 0
outside the intracranial mask (:func:`flairwatch.engine.analysis.analyse`), level 1 takes 0.09 s
of CPU for 1.8 MB on the phantom. The probability map is compressed beside the QC drawing, in as
many pieces as the worker has CPUs.
"""

from __future__ import annotations

import csv
import gzip
import io
import logging
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np
from pydicom.dataset import Dataset

from flairwatch import keys
from flairwatch.config import Identifiers, OutputSettings
from flairwatch.engine.analysis import Analysis
from flairwatch.engine.dicom_seg import (
    SEG_FILE,
    NoSegmentation,
    build_segmentation,
    segment_numbers,
)
from flairwatch.engine.dicom_sr import SR_FILE, Numbers, build_report
from flairwatch.engine.postprocess import LESION_COLUMNS, lesion_rows
from flairwatch.engine.qc_image import qc_montage, save_png
from flairwatch.notice import BANNER, NOTICE_FILE, NOTICE_TEXT
from flairwatch.records import SeriesHeader
from flairwatch.volume import Volume

MASK_FILE = "wmh_mask.nii.gz"
PROBABILITY_FILE = "wmh_probability.nii.gz"
VENTRICLE_FILE = "ventricle_mask.nii.gz"
LESIONS_FILE = "lesions.csv"
QC_FILE = "qc.png"
MASK_GZIP_LEVEL = 6
log = logging.getLogger(__name__)
# what building a SEG or SR raises for a source it cannot use (highdicom raises the built-in
# types for headers it cannot take, e.g. an enhanced image with per-frame pixel measures)
DICOM_SKIP_ERRORS = (NoSegmentation, ValueError, TypeError, AttributeError, KeyError)
PROBABILITY_GZIP_LEVEL = 1
# files smaller than this are compressed as one gzip member even when threads are offered
_SPLIT_BYTES = 4 << 20


def nifti_bytes(
    data: np.ndarray, volume: Volume, *, level: int = MASK_GZIP_LEVEL, threads: int = 1
) -> bytes:
    """``data`` on ``volume``'s grid as a gzip-compressed NIfTI-1 file (RAS affine, mm units).

    The gzip header carries no time stamp, so equal data gives equal bytes. With ``threads`` > 1
    a large file is cut into that many pieces compressed side by side, each a gzip member of its
    own: a gzip file may hold several members, read as one stream (RFC 1952, section 2.2), as
    Python's gzip, nibabel and zlib-based readers do.
    """
    img = nib.Nifti1Image(data, volume.affine_ras)
    img.set_qform(volume.affine_ras, code=1)
    img.set_sform(volume.affine_ras, code=1)
    img.header.set_xyzt_units("mm")
    raw = img.to_bytes()
    if threads < 2 or len(raw) < _SPLIT_BYTES:
        return gzip.compress(raw, compresslevel=level, mtime=0)
    step = -(-len(raw) // threads)
    view = memoryview(raw)
    pieces = [view[n : n + step] for n in range(0, len(raw), step)]
    with ThreadPoolExecutor(max_workers=threads) as pool:  # zlib releases the interpreter lock
        members = list(pool.map(lambda b: gzip.compress(b, compresslevel=level, mtime=0), pieces))
    return b"".join(members)


def lesions_csv(analysis: Analysis) -> bytes:
    """The per-lesion table (:data:`~flairwatch.engine.postprocess.LESION_COLUMNS`) as CSV."""
    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=list(LESION_COLUMNS), lineterminator="\n")
    writer.writeheader()
    fraction = None if analysis.split is None else analysis.split.fraction.tolist()
    writer.writerows(lesion_rows(analysis.lesions, fraction))
    return buf.getvalue().encode("utf-8")


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


def _write(folder: Path, name: str, make: Any, timings: dict[str, float]) -> None:
    start = time.perf_counter()
    (folder / name).write_bytes(make())
    timings[f"write_{name.split('.')[0]}"] = round(time.perf_counter() - start, 3)


def write_files(
    folder: Path,
    volume: Volume,
    analysis: Analysis,
    title_lines: list[str],
    *,
    threads: int = 1,
) -> dict[str, float]:
    """Write every output file of one result into ``folder``; return seconds per file.

    Files: the WMH mask, the probability map, the ventricle mask (when the model gives one), the
    lesion table, the research-only notice and the QC image. Timing keys are ``write_<file stem>``
    and ``qc_image`` (drawing the montage; ``write_qc`` is its PNG encoding). ``threads``: the
    CPUs the probability map's compression may use (it runs beside the QC drawing).
    """
    timings: dict[str, float] = {}
    with ThreadPoolExecutor(max_workers=1) as pool:
        probability = pool.submit(
            _write,
            folder,
            PROBABILITY_FILE,
            lambda: nifti_bytes(
                analysis.probability.astype(np.float32),
                volume,
                level=PROBABILITY_GZIP_LEVEL,
                threads=threads,
            ),
            timings,
        )
        _write(folder, MASK_FILE, lambda: nifti_bytes(analysis.lesions.mask, volume), timings)
        if analysis.ventricles is not None:
            vent = analysis.ventricles
            _write(folder, VENTRICLE_FILE, lambda: nifti_bytes(vent, volume), timings)
        _write(folder, LESIONS_FILE, lambda: lesions_csv(analysis), timings)
        (folder / NOTICE_FILE).write_text(NOTICE_TEXT, encoding="utf-8")
        start = time.perf_counter()
        montage = qc_montage(
            volume.data,
            analysis.lesions.mask,
            volume.affine_lps,
            title_lines=title_lines,
            banner=BANNER,
            ventricles=analysis.ventricles,
        )
        timings["qc_image"] = round(time.perf_counter() - start, 3)
        start = time.perf_counter()
        save_png(montage, folder / QC_FILE)
        timings["write_qc"] = round(time.perf_counter() - start, 3)
        probability.result()
    return timings


@dataclass(frozen=True)
class DicomJob:
    """What the DICOM SEG and SR of one result need besides the analysis (see write_dicom)."""

    headers: list[Dataset]  # the source images' headers; empty for NIfTI input
    settings: OutputSettings
    identifiers: Identifiers
    secret: bytes
    model_name: str
    model_version: str
    model_sha256: str
    software_version: str


def _follow_identifiers(ds: Dataset, job: DicomJob) -> None:
    """Apply the ``identifiers`` setting to a SEG or SR (``outputs.identifiers: follow``)."""
    ids = job.identifiers
    name = str(ds.get("PatientName") or "") or None
    ds.PatientID = _identify(str(ds.get("PatientID") or "") or None, ids.patient_id, job.secret)
    ds.PatientName = _identify(name, ids.patient_name, job.secret) or ""
    ds.PatientID = ds.PatientID or ""
    if ids.dates == "drop":  # Type 2 in PS3.3 C.7.1.1 and C.7.2.1: present, empty
        ds.PatientBirthDate = ds.StudyDate = ds.StudyTime = ""


def write_dicom(
    folder: Path, volume: Volume, analysis: Analysis, job: DicomJob
) -> tuple[dict[str, Any], dict[str, float]]:
    """Write ``segmentation.dcm`` and ``measurements.dcm`` as ``job.settings`` asks.

    Returns the summary's ``dicom`` facts (each object ``written``, ``off`` or ``skipped``, and
    why it was skipped) and the seconds per file (``write_segmentation``, ``write_measurements``).
    A source that cannot carry a SEG (NIfTI input, no Frame of Reference, masks off the source
    grid) or that highdicom refuses is skipped with a logged reason; the NIfTI result stands.
    """
    on = job.settings
    facts: dict[str, Any] = {
        "segmentation": "on" if on.segmentation else "off",
        "measurements": "on" if on.measurements else "off",
        "skipped_reason": None,
    }
    timings: dict[str, float] = {}
    if not on.segmentation:
        return facts, timings
    masks = {"wmh": analysis.lesions.mask}
    if analysis.intracranial is not None:
        masks["intracranial"] = analysis.intracranial
    if analysis.ventricles is not None:
        masks["ventricles"] = analysis.ventricles
    algorithm = {"algorithm_name": job.model_name, "algorithm_version": job.model_version}
    try:
        start = time.perf_counter()
        seg = build_segmentation(
            job.headers, masks, volume.affine_lps, **algorithm,
            software_version=job.software_version, device_serial=job.model_sha256[:16],
        )  # fmt: skip
        if on.identifiers == "follow":
            _follow_identifiers(seg, job)
        seg.save_as(folder / SEG_FILE)
        timings["write_segmentation"] = round(time.perf_counter() - start, 3)
        facts["segmentation"] = "written"
        if on.measurements:
            start = time.perf_counter()
            split = analysis.split
            numbers = Numbers(
                wmh_ml=analysis.lesions.total_volume_ml,
                lesion_count=len(analysis.lesions.lesions),
                intracranial_ml=analysis.intracranial_volume_ml,
                ventricles_ml=None if split is None else split.ventricle_volume_ml,
                periventricular_ml=None if split is None else split.periventricular_volume_ml,
                deep_ml=None if split is None else split.deep_volume_ml,
            )
            segments = segment_numbers(list(masks))
            sr = build_report(
                seg, job.headers, numbers, segments, **algorithm,
                software_version=job.software_version,
            )  # fmt: skip
            if on.identifiers == "follow":
                _follow_identifiers(sr, job)
            sr.save_as(folder / SR_FILE)
            timings["write_measurements"] = round(time.perf_counter() - start, 3)
            facts["measurements"] = "written"
    except DICOM_SKIP_ERRORS as exc:  # the NIfTI result is still good
        reason = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        for name in (SEG_FILE, SR_FILE):
            (folder / name).unlink(missing_ok=True)
        facts.update(skipped_reason=reason[:200])
        facts.update({k: "skipped" for k in ("segmentation", "measurements") if facts[k] != "off"})
        log.warning("DICOM SEG/SR not written: %s", reason[:200])
    return facts, timings


def summary_facts(analysis: Analysis, volume: Volume) -> dict[str, Any]:
    """The analysis' part of ``summary.json``: volumes in mL, counts, grid, the file names.

    ``ventricle_volume_ml``, ``periventricular_volume_ml``, ``deep_volume_ml`` and
    ``periventricular_mm`` are null when the model has no ventricle output.
    """
    les = analysis.lesions
    icv = analysis.intracranial_volume_ml
    split = analysis.split
    files = {
        "mask": MASK_FILE,
        "probability": PROBABILITY_FILE,
        "qc": QC_FILE,
        "lesions": LESIONS_FILE,
        "notice": NOTICE_FILE,
    }
    if analysis.ventricles is not None:
        files["ventricles"] = VENTRICLE_FILE
    return {
        "lesion_volume_ml": round(les.total_volume_ml, 4),
        "lesion_count": len(les.lesions),
        "removed_small_components": les.removed_count,
        "voxel_volume_mm3": round(volume.voxel_volume_mm3, 6),
        "grid": {
            "shape": list(volume.shape),
            "spacing_mm": [round(s, 5) for s in volume.spacing],
        },
        "intracranial_volume_ml": None if icv is None else round(icv, 2),
        "wmh_fraction_of_intracranial": (None if not icv else round(les.total_volume_ml / icv, 6)),
        "ventricle_volume_ml": None if split is None else round(split.ventricle_volume_ml, 2),
        "periventricular_volume_ml": (
            None if split is None else round(split.periventricular_volume_ml, 4)
        ),
        "deep_volume_ml": None if split is None else round(split.deep_volume_ml, 4),
        "periventricular_mm": None if split is None else split.distance_mm,
        "probability_encoding": "float32, 0 to 1",
        "files": files,
    }

"""``flairwatch qc cases``: corrected masks as case folders, to feed ``validate`` and training.

For every series revision with a corrected mask, one folder in the case layout of docs/architecture.md::

    <out>/<series-key>/image.nii.gz          the series on its own grid (float32; RAS affine)
    <out>/<series-key>/wmh_reference.nii.gz  the latest corrected mask (byte copy, same grid)
    <out>/<series-key>/case.json             where it came from (keys, model, note; no names)

The image is written as NIfTI rather than copied as DICOM, so no patient identifier leaves the
results folder (NIfTI headers hold none). A case folder is built under a temporary name and
renamed into place; one that already holds the same correction is left alone, one made from an
older correction is replaced. Research use only: these references are one reviewer's work.
"""

from __future__ import annotations

import gzip
import json
import logging
import os
import shutil
import uuid
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np

from flairwatch.engine import results
from flairwatch.errors import FlairwatchError, InputRejected
from flairwatch.intake.assemble import group_series
from flairwatch.intake.discover import read_record
from flairwatch.intake.load import load_series
from flairwatch.ledger.queries import ResultRecord, reported_results
from flairwatch.ledger.store import Ledger
from flairwatch.notice import NOTICE_FILE, NOTICE_TEXT
from flairwatch.volume import Volume

log = logging.getLogger(__name__)

IMAGE_NIFTI = "image.nii.gz"  # the names validate reads (flairwatch.research.validate)
REFERENCE_FILE = "wmh_reference.nii.gz"
CASE_FILE = "case.json"


def nifti_bytes(volume: Volume) -> bytes:
    """The volume as gzipped NIfTI-1, float32, with its affine converted to RAS (qform = sform)."""
    img = nib.Nifti1Image(np.asarray(volume.data, dtype=np.float32), volume.affine_ras)
    img.set_qform(volume.affine_ras, code=1)
    img.set_sform(volume.affine_ras, code=1)
    img.header.set_xyzt_units("mm")
    return gzip.compress(img.to_bytes(), compresslevel=6, mtime=0)


def case_facts(rec: ResultRecord, summary: dict[str, Any], note: str | None) -> dict[str, Any]:
    """case.json content: keys and acquisition facts, never patient identifiers or dates."""
    kind = summary.get("mr_acquisition_type")
    return {
        "source": "flairwatch qc correction",
        "subject_key": rec.subject_key,
        "study_key": rec.study_key,
        "series_key": rec.series_key,
        "acquisition": {
            "kind": kind.lower() if isinstance(kind, str) and kind else None,
            "field_strength_t": summary.get("field_strength_t"),
            "manufacturer_model": summary.get("manufacturer_model"),
        },
        "correction": {"file": Path(rec.correction_path or "").name, "note": note},
        "model_result": {"name": rec.model_name, "version": rec.model_version},
        "notice": "research use only; a reviewer's correction, not a validated ground truth",
    }


def _series_volume(ledger: Ledger, rec: ResultRecord) -> Volume:
    paths = [Path(f.path) for f in ledger.revision_files(rec.series_id)]
    found, _ = group_series(read_record(p) for p in paths if p.is_file())
    for s in found:
        if s.key == (rec.study_uid, rec.series_uid):
            return load_series(s)
    raise InputRejected("its DICOM files are no longer where the ledger recorded them")


def _current_case(folder: Path) -> str | None:
    try:
        facts = json.loads((folder / CASE_FILE).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return str((facts.get("correction") or {}).get("file")) if isinstance(facts, dict) else None


def write_case(ledger: Ledger, rec: ResultRecord, out: Path) -> Path | None:
    """Write (or refresh) the case folder of one corrected series; None when already current."""
    assert rec.correction_path is not None
    final = out / (rec.series_key or f"series-{rec.series_id}")
    if _current_case(final) == Path(rec.correction_path).name:
        return None
    folder = Path(rec.result_path)
    summary = results.read_summary(folder) if results.is_complete(folder) else {}
    notes = ledger.query("SELECT note FROM corrected_masks WHERE path = ?", (rec.correction_path,))
    volume = _series_volume(ledger, rec)
    tmp = out / f".building-{final.name}-{uuid.uuid4().hex[:8]}"
    tmp.mkdir(parents=True, mode=results.DIR_MODE)
    try:
        (tmp / IMAGE_NIFTI).write_bytes(nifti_bytes(volume))
        shutil.copyfile(rec.correction_path, tmp / REFERENCE_FILE)
        facts = case_facts(rec, summary, notes[0][0] if notes else None)
        (tmp / CASE_FILE).write_text(json.dumps(facts, indent=2) + "\n", encoding="utf-8")
        (tmp / NOTICE_FILE).write_text(NOTICE_TEXT, encoding="utf-8")
        for item in tmp.iterdir():
            with open(item, "rb") as fh:
                os.fsync(fh.fileno())
        results.fsync_path(tmp)
        if final.exists():  # an older correction's case: move it aside, then drop it
            old = out / f".replaced-{final.name}-{uuid.uuid4().hex[:8]}"
            os.rename(final, old)
            os.rename(tmp, final)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.rename(tmp, final)
        results.fsync_path(out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return final


def export_cases(ledger: Ledger, out: Path) -> tuple[list[Path], list[str]]:
    """Case folders for every corrected series; returns (written, problems)."""
    out.mkdir(parents=True, exist_ok=True, mode=results.DIR_MODE)
    written: list[Path] = []
    problems: list[str] = []
    for rec in reported_results(ledger):
        if not rec.correction_path:
            continue
        try:
            folder = write_case(ledger, rec, out)
        except (FlairwatchError, OSError) as exc:
            problems.append(f"{rec.series_key}: {exc}")
            log.warning("series %s: no case folder: %s", rec.series_key, exc)
            continue
        if folder is not None:
            written.append(folder)
    return written, problems

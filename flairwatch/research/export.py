"""``flairwatch export``: one tidy table of every series' result, ready for a statistics package.

One row per series (its latest revision): the current result, or with ``--model-version`` the
result of that model version. One header row; units are in the column names (mL, mm, ms, T);
missing values are empty cells in CSV and ``null`` in JSON; dates are ISO 8601 (YYYY-MM-DD);
flags are 0/1 integers.

When a reviewer attached a corrected mask (``flairwatch qc correct``), the reported lesion
volume, lesion count and WMH fraction come from that mask (``mask_source`` = ``corrected``);
the model's own figures stay in the ``automatic_*`` columns.

Identifiers follow the config's ``identifiers`` setting at export time: ``drop`` empties the
column; ``pseudonymise`` gives the keyed hash (the same hash as the subject folders use); ``keep``
gives what the result summary recorded (a value pseudonymised or dropped at processing time
cannot be recovered). Dates set to ``pseudonymise`` are exported as recorded.

The research-only caution goes to stderr, and beside ``--out FILE`` as
``FILE.RESEARCH_ONLY.txt``, so the table itself keeps one header row.

Primary FLAIR rule (``primary_flair`` = 1 for exactly one series per study), the first rule
that decides wins:

1. QC status: accepted before unreviewed before rejected;
2. 3D acquisition before 2D (MR Acquisition Type);
3. thinner slices first (the series grid's third spacing, mm);
4. higher Series Number first (a repeat is usually the better one);
5. series key, for a stable answer.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from flairwatch import keys
from flairwatch.config import Identifiers
from flairwatch.engine import results
from flairwatch.engine.dicom_seg import SEG_FILE
from flairwatch.engine.dicom_sr import SR_FILE
from flairwatch.engine.pipeline import MASK_FILE
from flairwatch.ledger.queries import ResultRecord, reported_results
from flairwatch.ledger.store import Ledger
from flairwatch.research.qc_marks import MaskMeasures, corrected_measures

log = logging.getLogger(__name__)

EXPORT_COLUMNS: tuple[str, ...] = (
    "subject_key",
    "study_key",
    "series_key",
    "revision",
    "patient_id",
    "patient_name",
    "study_instance_uid",
    "series_instance_uid",
    "series_number",
    "series_description",
    "acquisition_date",
    "manufacturer",
    "manufacturer_model",
    "field_strength_t",
    "repetition_time_ms",
    "echo_time_ms",
    "inversion_time_ms",
    "mr_acquisition_type",
    "voxel_size_i_mm",
    "voxel_size_j_mm",
    "voxel_size_k_mm",
    "model_name",
    "model_version",
    "lesion_volume_ml",
    "lesion_count",
    "intracranial_volume_ml",
    "wmh_fraction_of_intracranial",
    "ventricle_volume_ml",
    "periventricular_volume_ml",
    "deep_volume_ml",
    "automatic_lesion_volume_ml",
    "automatic_lesion_count",
    "mask_source",
    "qc_status",
    "qc_note",
    "primary_flair",
    "result_path",
    "mask_path",
    "segmentation_path",
    "measurements_path",
)

_QC_RANK = {"accepted": 0, "unreviewed": 1, "rejected": 2}
_PSEUDONYM_LENGTH = 13  # "s" + 12 hex digits, as keys.subject_key makes


def iso_date(value: str | None) -> str | None:
    """DICOM DA (YYYYMMDD) to ISO 8601 (YYYY-MM-DD); other text is returned as it is."""
    if value and len(value) == 8 and value.isdigit():
        return f"{value[:4]}-{value[4:6]}-{value[6:]}"
    return value or None


def _looks_pseudonymised(value: str) -> bool:
    return (
        len(value) == _PSEUDONYM_LENGTH
        and value[0] == "s"
        and all(c in "0123456789abcdef" for c in value[1:])
    )


def identifier(value: Any, action: str, secret: Callable[[], bytes]) -> str | None:
    """Apply one ``identifiers`` action to a recorded value (see the module text)."""
    if value in (None, "") or action == "drop":
        return None
    text = str(value)
    if action == "pseudonymise" and not _looks_pseudonymised(text):
        return keys.subject_key(text, secret())
    return text


def _spacing(summary: dict[str, Any]) -> list[float | None]:
    spacing = (summary.get("grid") or {}).get("spacing_mm") or []
    out: list[float | None] = [float(s) for s in spacing[:3]]
    return out + [None] * (3 - len(out))


def build_row(
    rec: ResultRecord,
    summary: dict[str, Any],
    correction: MaskMeasures | None,
    ids: Identifiers,
    secret: Callable[[], bytes],
) -> dict[str, Any]:
    """One export row from the ledger record, the result's summary and a correction's measures.

    ``summary`` may be empty (result folder missing): the ledger's figures are used then.
    """
    model = summary.get("model") or {}
    auto_ml = summary.get("lesion_volume_ml", rec.lesion_volume_ml)
    auto_n = summary.get("lesion_count", rec.lesion_count)
    icv = summary.get("intracranial_volume_ml")
    if correction is not None:
        volume_ml: float | None = round(correction.lesion_volume_ml, 4)
        count: int | None = correction.lesion_count
        fraction = round(volume_ml / icv, 6) if icv else None
    else:
        volume_ml, count = auto_ml, auto_n
        fraction = summary.get("wmh_fraction_of_intracranial")
    i, j, k = _spacing(summary)
    return {
        "subject_key": summary.get("subject_key", rec.subject_key),
        "study_key": summary.get("study_key", rec.study_key),
        "series_key": summary.get("series_key", rec.series_key),
        "revision": rec.revision,
        "patient_id": identifier(summary.get("patient_id"), ids.patient_id, secret),
        "patient_name": identifier(summary.get("patient_name"), ids.patient_name, secret),
        "study_instance_uid": summary.get("study_instance_uid", rec.study_uid),
        "series_instance_uid": summary.get("series_instance_uid", rec.series_uid),
        "series_number": summary.get("series_number"),
        "series_description": summary.get("series_description"),
        "acquisition_date": (
            None if ids.dates == "drop" else iso_date(summary.get("acquisition_date"))
        ),
        "manufacturer": summary.get("manufacturer"),
        "manufacturer_model": summary.get("manufacturer_model"),
        "field_strength_t": summary.get("field_strength_t"),
        "repetition_time_ms": summary.get("repetition_time_ms"),
        "echo_time_ms": summary.get("echo_time_ms"),
        "inversion_time_ms": summary.get("inversion_time_ms"),
        "mr_acquisition_type": summary.get("mr_acquisition_type"),
        "voxel_size_i_mm": i,
        "voxel_size_j_mm": j,
        "voxel_size_k_mm": k,
        "model_name": model.get("name", rec.model_name),
        "model_version": model.get("version", rec.model_version),
        "lesion_volume_ml": volume_ml,
        "lesion_count": count,
        "intracranial_volume_ml": icv,
        "wmh_fraction_of_intracranial": fraction,
        # empty for models without a ventricle output; the split describes the automatic mask, so
        # it is left empty where a corrected mask replaces it
        "ventricle_volume_ml": summary.get("ventricle_volume_ml"),
        "periventricular_volume_ml": (
            None if correction is not None else summary.get("periventricular_volume_ml")
        ),
        "deep_volume_ml": None if correction is not None else summary.get("deep_volume_ml"),
        "automatic_lesion_volume_ml": auto_ml,
        "automatic_lesion_count": auto_n,
        "mask_source": "automatic" if correction is None else "corrected",
        "qc_status": rec.qc_status,
        "qc_note": rec.qc_note or None,
        "primary_flair": 0,
        "result_path": rec.result_path,
        "mask_path": rec.correction_path or str(Path(rec.result_path) / MASK_FILE),
        # the DICOM SEG and SR, where the result has them (summary.json lists what was written)
        "segmentation_path": _listed(rec, summary, "segmentation", SEG_FILE),
        "measurements_path": _listed(rec, summary, "measurements", SR_FILE),
    }


def _listed(rec: ResultRecord, summary: dict[str, Any], key: str, name: str) -> str | None:
    """The path of one result file when ``summary.json`` lists it, else None."""
    listed = (summary.get("files") or {}).get(key) == name
    return str(Path(rec.result_path) / name) if listed else None


def _primary_order(row: dict[str, Any]) -> tuple[Any, ...]:
    k = row.get("voxel_size_k_mm")
    number = row.get("series_number")
    return (
        _QC_RANK.get(row.get("qc_status") or "unreviewed", 1),
        0 if (row.get("mr_acquisition_type") or "").upper() == "3D" else 1,
        k if isinstance(k, int | float) and math.isfinite(k) else math.inf,
        -number if isinstance(number, int) else math.inf,
        row.get("series_key") or "",
    )


def mark_primary(rows: Sequence[dict[str, Any]]) -> list[dict[str, Any]]:
    """Copies of ``rows`` with ``primary_flair`` = 1 on the preferred series of each study."""
    out = [dict(r, primary_flair=0) for r in rows]
    best: dict[str, dict[str, Any]] = {}
    for row in out:
        study = str(row.get("study_instance_uid") or row.get("study_key"))
        if study not in best or _primary_order(row) < _primary_order(best[study]):
            best[study] = row
    for row in best.values():
        row["primary_flair"] = 1
    return out


def gather_rows(
    ledger: Ledger,
    *,
    ids: Identifiers,
    secret: Callable[[], bytes],
    connectivity: int,
    model_version: str | None = None,
) -> list[dict[str, Any]]:
    """Every reported series as an export row, primary FLAIR marked (reads result folders)."""
    rows = []
    for rec in reported_results(ledger, model_version):
        folder = Path(rec.result_path)
        summary: dict[str, Any] = {}
        if results.is_complete(folder):
            summary = results.read_summary(folder)
        else:
            log.warning("series %s: result folder %s is missing; ledger figures only",
                        rec.series_key, folder)  # fmt: skip
        correction = None
        if rec.correction_path:
            correction = corrected_measures(Path(rec.correction_path), connectivity)
        rows.append(build_row(rec, summary, correction, ids, secret))
    return mark_primary(rows)

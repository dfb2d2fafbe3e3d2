"""Change over time per participant: ``flairwatch export --longitudinal`` (pure, rows to rows).

Input: the rows of :func:`flairwatch.research.export.gather_rows` (one per series, corrected
masks already applied, primary FLAIR marked). Output: one row per participant (the subject key)
and study, in date order, from the study's **primary FLAIR** (``primary_flair`` = 1, the rule in
:mod:`flairwatch.research.export`: accepted before unreviewed before rejected, 3D before 2D,
thinner slices, higher series number). Columns:

- ``scan_date``: the series' acquisition date, or the study date when the series has none
  (ISO 8601, as the summary recorded it at processing time); empty when dates were dropped
  (``identifiers: {dates: drop}``), in which case the row is flagged ``flag_no_date``, sorted
  after the dated ones and takes no part in any change;
- ``lesion_volume_ml`` and ``wmh_fraction_of_intracranial`` as in the export;
- ``change_ml``: this volume minus the previous dated scan's (mL); ``days_since_previous``;
  ``change_ml_per_year``: ``change_ml / (days / 365.25)`` (empty for scans on the same day);
- ``flag_drop``: the volume fell by more than ``longitudinal.drop_percent`` % of the previous
  volume **and** by more than ``longitudinal.drop_ml`` mL (WMH rarely shrink that much: a
  segmentation or acquisition problem is likelier);
- ``flag_rejected``: this scan was rejected in QC (kept, so that its neighbours' changes stay
  visible; leave it out of an analysis as you see fit);
- ``flag_model_changed``: this scan and the previous one were measured with different model
  versions, so the change mixes two models (re-run the archive with one model).

Flags are 0/1 integers; research use only, not for diagnosis.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence
from typing import Any

from flairwatch.config import LongitudinalSettings

DAYS_PER_YEAR = 365.25  # the Julian year, common practice for annualised rates

LONGITUDINAL_COLUMNS: tuple[str, ...] = (
    "subject_key",
    "scan_index",
    "scan_date",
    "study_key",
    "series_key",
    "model_name",
    "model_version",
    "mask_source",
    "qc_status",
    "lesion_volume_ml",
    "intracranial_volume_ml",
    "wmh_fraction_of_intracranial",
    "days_since_previous",
    "change_ml",
    "change_ml_per_year",
    "flag_drop",
    "flag_rejected",
    "flag_model_changed",
    "flag_no_date",
)


def parse_date(value: Any) -> dt.date | None:
    """An ISO 8601 date (YYYY-MM-DD) or DICOM DA (YYYYMMDD), else None."""
    text = str(value or "").strip()
    for fmt in ("%Y-%m-%d", "%Y%m%d"):
        try:
            return dt.datetime.strptime(text, fmt).date()
        except ValueError:
            continue
    return None


def is_drop(previous_ml: float, current_ml: float, settings: LongitudinalSettings) -> bool:
    """True when the volume fell by more than both limits (strictly: equal does not flag)."""
    fall = previous_ml - current_ml
    if fall <= settings.drop_ml or previous_ml <= 0:
        return False
    return fall / previous_ml * 100.0 > settings.drop_percent


def _model(row: dict[str, Any]) -> tuple[Any, Any]:
    return row.get("model_name"), row.get("model_version")


def participant_rows(
    rows: Sequence[dict[str, Any]], settings: LongitudinalSettings
) -> list[dict[str, Any]]:
    """One participant's primary-FLAIR rows (any order) as longitudinal rows in date order."""
    dated = sorted(
        (r for r in rows if parse_date(r.get("acquisition_date")) is not None),
        key=lambda r: (parse_date(r.get("acquisition_date")), r.get("study_key") or ""),
    )
    undated = sorted(
        (r for r in rows if parse_date(r.get("acquisition_date")) is None),
        key=lambda r: r.get("study_key") or "",
    )
    out: list[dict[str, Any]] = []
    previous: dict[str, Any] | None = None
    for index, row in enumerate([*dated, *undated], start=1):
        when = parse_date(row.get("acquisition_date"))
        volume = row.get("lesion_volume_ml")
        item: dict[str, Any] = {
            "subject_key": row.get("subject_key"),
            "scan_index": index,
            "scan_date": when.isoformat() if when else None,
            **{k: row.get(k) for k in LONGITUDINAL_COLUMNS[3:12]},
            "days_since_previous": None,
            "change_ml": None,
            "change_ml_per_year": None,
            "flag_drop": 0,
            "flag_rejected": int(row.get("qc_status") == "rejected"),
            "flag_model_changed": 0,
            "flag_no_date": int(when is None),
        }
        if when is not None and previous is not None:
            days = (when - parse_date(previous["acquisition_date"])).days  # type: ignore[operator]
            item["days_since_previous"] = days
            item["flag_model_changed"] = int(_model(row) != _model(previous))
            before = previous.get("lesion_volume_ml")
            if volume is not None and before is not None:
                change = float(volume) - float(before)
                item["change_ml"] = round(change, 4)
                if days > 0:
                    item["change_ml_per_year"] = round(change / (days / DAYS_PER_YEAR), 4)
                item["flag_drop"] = int(is_drop(float(before), float(volume), settings))
        if when is not None:
            previous = row
        out.append(item)
    return out


def longitudinal_rows(
    export_rows: Sequence[dict[str, Any]], settings: LongitudinalSettings
) -> list[dict[str, Any]]:
    """Export rows -> longitudinal rows: primary FLAIR only, by participant, then date."""
    by_subject: dict[str, list[dict[str, Any]]] = {}
    for row in export_rows:
        if row.get("primary_flair") == 1:
            by_subject.setdefault(str(row.get("subject_key")), []).append(row)
    out: list[dict[str, Any]] = []
    for subject in sorted(by_subject):
        out.extend(participant_rows(by_subject[subject], settings))
    return out

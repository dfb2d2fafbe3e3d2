"""Ledger reads shared by the research-staff commands (export, qc, gallery, reprocess).

The ledger module owns the schema; the SQL that only these commands need lives here and goes
through :meth:`Ledger.query`. One :class:`ResultRecord` is what the ledger knows about one model
result of one series revision, with its latest QC mark and the latest corrected mask of that
revision (a correction belongs to the series grid, so it outlives the model result it was made
on and is reported beside any later model's result).
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

from flairwatch.errors import ConfigInvalid
from flairwatch.ledger.store import Ledger

log = logging.getLogger(__name__)

QC_UNREVIEWED = "unreviewed"
QC_MARKS = ("accepted", "rejected")

_RESULT_SELECT = """
SELECT r.id, r.series_id, s.study_uid, s.series_uid, s.revision, s.subject_key, s.study_key,
       s.series_key, r.model_name, r.model_version, r.result_path, r.lesion_volume_ml,
       r.lesion_count, r.current, r.created,
       (SELECT q.mark FROM qc_marks q WHERE q.result_id = r.id
            ORDER BY q.marked DESC, q.id DESC LIMIT 1),
       (SELECT q.note FROM qc_marks q WHERE q.result_id = r.id
            ORDER BY q.marked DESC, q.id DESC LIMIT 1),
       (SELECT c.path FROM corrected_masks c JOIN results rr ON rr.id = c.result_id
            WHERE rr.series_id = r.series_id ORDER BY c.added DESC, c.id DESC LIMIT 1)
FROM results r JOIN series s ON s.id = r.series_id
"""


@dataclass(frozen=True)
class ResultRecord:
    """One model result of one series revision, as the ledger records it.

    ``qc_mark`` is the latest mark on this very result (None: not reviewed);
    ``correction_path`` is the latest corrected mask of the series revision, whichever model
    result it was attached to (None: none).
    """

    result_id: int
    series_id: int
    study_uid: str
    series_uid: str
    revision: int
    subject_key: str | None
    study_key: str | None
    series_key: str | None
    model_name: str
    model_version: str
    result_path: str
    lesion_volume_ml: float | None
    lesion_count: int | None
    current: bool
    created: float
    qc_mark: str | None
    qc_note: str | None
    correction_path: str | None

    @property
    def qc_status(self) -> str:
        return self.qc_mark or QC_UNREVIEWED


def _record(row: tuple[object, ...]) -> ResultRecord:
    values = list(row)
    values[13] = bool(values[13])
    return ResultRecord(*values)  # type: ignore[arg-type]


def _latest_per_series(records: list[ResultRecord]) -> list[ResultRecord]:
    """Keep one record per (study, series): the latest revision, then the latest result."""
    best: dict[tuple[str, str], ResultRecord] = {}
    for rec in records:
        key = (rec.study_uid, rec.series_uid)
        old = best.get(key)
        if old is None or (rec.revision, rec.result_id) > (old.revision, old.result_id):
            best[key] = rec
    return sorted(best.values(), key=lambda r: (r.study_key or "", r.series_key or ""))


def reported_results(ledger: Ledger, model_version: str | None = None) -> list[ResultRecord]:
    """One result per series: the current one, or the latest of ``model_version`` when given.

    A series with several revisions (late instances) is reported by its latest revision that
    has a matching result.
    """
    if model_version is None:
        rows = ledger.query(_RESULT_SELECT + " WHERE r.current = 1")
    else:
        rows = ledger.query(_RESULT_SELECT + " WHERE r.model_version = ?", (model_version,))
    return _latest_per_series([_record(r) for r in rows])


def results_of_series(ledger: Ledger, series_id: int) -> list[ResultRecord]:
    """Every model result of one series revision, oldest first."""
    rows = ledger.query(_RESULT_SELECT + " WHERE r.series_id = ? ORDER BY r.id", (series_id,))
    return [_record(r) for r in rows]


def find_result(ledger: Ledger, series_key: str, model_version: str | None = None) -> ResultRecord:
    """The current result (or the latest of ``model_version``) of the series with this key.

    Raises ConfigInvalid with a hint when the key is unknown or has no such result.
    """
    rows = ledger.query(_RESULT_SELECT + " WHERE s.series_key = ?", (series_key,))
    records = [_record(r) for r in rows]
    if not records:
        raise ConfigInvalid(
            f"no result for series key {series_key!r}; list keys with 'flairwatch export'"
        )
    if model_version is not None:
        chosen = [r for r in records if r.model_version == model_version]
        if not chosen:
            have = ", ".join(sorted({r.model_version for r in records}))
            raise ConfigInvalid(
                f"series {series_key} has no result of model version {model_version}; it has {have}"
            )
        return max(chosen, key=lambda r: r.result_id)
    current = [r for r in records if r.current]
    return max(current or records, key=lambda r: r.result_id)

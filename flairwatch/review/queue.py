"""The review queue and a series' decision history: which series to show, in which order.

The selection is pure (records in, lists out); :func:`gather` and :func:`history` are the two
ledger reads. The queue holds one entry per series, the result every other command reports
(:func:`flairwatch.ledger.queries.reported_results`), ordered by study date, then study and
series key. Its status is the latest decision on that result, as in the gallery and the
export; every decision stays in the ledger's ``qc_marks`` table, with who and when.
"""

from __future__ import annotations

import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, replace

from flairwatch.errors import ConfigInvalid
from flairwatch.ledger.queries import ResultRecord, reported_results
from flairwatch.ledger.store import Ledger
from flairwatch.research.export import iso_date
from flairwatch.review.loading import summary_of

STATUSES = ("all", "unreviewed", "accepted", "rejected", "corrected")
_DATE = re.compile(r"\d{4}-\d{2}-\d{2}")


@dataclass(frozen=True)
class Decision:
    """One QC decision as the ledger keeps it; ``when`` in seconds since the epoch."""

    result_id: int
    mark: str
    note: str
    by: str
    when: float
    model: str


@dataclass(frozen=True)
class QueueItem:
    """One series in the queue; volumes in mL (the model's, not a correction's)."""

    series_key: str
    study_key: str
    date: str | None
    description: str | None
    model: str
    volume_ml: float | None
    lesion_count: int | None
    status: str
    corrected: bool
    disagreement: str | None = None


@dataclass(frozen=True)
class Filters:
    """What the queue shows: a status of :data:`STATUSES`, a study key, ISO dates (inclusive)."""

    status: str = "all"
    study: str = ""
    date_from: str = ""
    date_to: str = ""

    def query(self) -> dict[str, str]:
        """The filters as URL query arguments (the empty ones left out)."""
        pairs = {"status": self.status, "study": self.study}
        pairs.update({"from": self.date_from, "to": self.date_to})
        return {k: v for k, v in pairs.items() if v and not (k == "status" and v == "all")}


def parse_filters(args: Mapping[str, str]) -> Filters:
    """Filters from URL arguments ``status``, ``study``, ``from``, ``to``.

    Raises ConfigInvalid with what to type when a value cannot be a filter.
    """
    status = args.get("status") or "all"
    if status not in STATUSES:
        raise ConfigInvalid(f"status must be one of {', '.join(STATUSES)}")
    study = (args.get("study") or "").strip()
    if study and not re.fullmatch(r"[A-Za-z0-9_-]{1,64}", study):
        raise ConfigInvalid("study must be a study key as shown in the queue")
    dates = []
    for name in ("from", "to"):
        value = (args.get(name) or "").strip()
        if value and not _DATE.fullmatch(value):
            raise ConfigInvalid(f"'{name}' must be a date written YYYY-MM-DD")
        dates.append(value)
    return Filters(status, study, dates[0], dates[1])


def matches(item: QueueItem, f: Filters) -> bool:
    """Whether ``item`` passes the filters (a series without a date fails any date filter)."""
    if f.status == "corrected":
        if not item.corrected:
            return False
    elif f.status != "all" and item.status != f.status:
        return False
    if f.study and item.study_key != f.study:
        return False
    if f.date_from and (item.date is None or item.date < f.date_from):
        return False
    return not (f.date_to and (item.date is None or item.date > f.date_to))


def select(items: Sequence[QueueItem], f: Filters) -> list[QueueItem]:
    return [it for it in items if matches(it, f)]


def neighbours(
    items: Sequence[QueueItem], key: str, f: Filters
) -> tuple[QueueItem | None, QueueItem | None]:
    """The series before and after ``key`` in the queue order that pass the filters.

    ``key`` itself need not pass them: once a series is accepted it leaves the 'unreviewed'
    queue, and the next one is still the one after it.
    """
    keys = [it.series_key for it in items]
    if key not in keys:
        return None, None
    at = keys.index(key)
    before = [it for it in items[:at] if matches(it, f)]
    after = [it for it in items[at + 1 :] if matches(it, f)]
    return (before[-1] if before else None), (after[0] if after else None)


def latest_by_reviewer(decisions: Iterable[Decision], result_id: int) -> dict[str, Decision]:
    """Each reviewer's latest decision on one result (by time, then ledger order)."""
    latest: dict[str, Decision] = {}
    for d in sorted(decisions, key=lambda d: d.when):
        if d.result_id == result_id:
            latest[d.by] = d
    return latest


def disagreement(decisions: Iterable[Decision], result_id: int) -> str | None:
    """A line naming who decided what when reviewers' latest decisions on a result differ."""
    latest = latest_by_reviewer(decisions, result_id)
    if len({d.mark for d in latest.values()}) < 2:
        return None
    parts = [f"{by} {d.mark}" for by, d in sorted(latest.items())]
    return "reviewers disagree: " + ", ".join(parts)


def order(items: Iterable[QueueItem]) -> list[QueueItem]:
    """Queue order: by date (undated last), then study key, then series key."""
    return sorted(
        items, key=lambda it: (it.date is None, it.date or "", it.study_key, it.series_key)
    )


def item_of(rec: ResultRecord, summary: Mapping[str, object]) -> QueueItem:
    """A queue entry from a ledger record and its summary (may be empty)."""
    date = summary.get("acquisition_date")
    description = summary.get("series_description")
    return QueueItem(
        series_key=rec.series_key or "",
        study_key=rec.study_key or "unknown",
        date=iso_date(date) if isinstance(date, str) else None,
        description=description if isinstance(description, str) else None,
        model=f"{rec.model_name} {rec.model_version}",
        volume_ml=rec.lesion_volume_ml,
        lesion_count=rec.lesion_count,
        status=rec.qc_status,
        corrected=bool(rec.correction_path),
    )


_DECISIONS = """
SELECT q.result_id, q.mark, COALESCE(q.note, ''), COALESCE(q.marked_by, ''), q.marked,
       r.model_name || ' ' || r.model_version
FROM qc_marks q JOIN results r ON r.id = q.result_id
"""


def gather(ledger: Ledger) -> list[QueueItem]:
    """Every reported series as a queue entry, in queue order, disagreements marked."""
    records = [r for r in reported_results(ledger) if r.series_key]
    by_result: dict[int, list[Decision]] = {}
    for row in ledger.query(_DECISIONS + " ORDER BY q.marked, q.id"):
        d = Decision(*row)
        by_result.setdefault(d.result_id, []).append(d)
    items = []
    for rec in records:
        item = item_of(rec, summary_of(rec))
        dispute = disagreement(by_result.get(rec.result_id, []), rec.result_id)
        items.append(replace(item, disagreement=dispute))
    return order(items)


def history(ledger: Ledger, rec: ResultRecord) -> list[Decision]:
    """Every decision on any model result of ``rec``'s series revision, newest first."""
    rows = ledger.query(
        _DECISIONS + " WHERE r.series_id = ? ORDER BY q.marked DESC, q.id DESC", (rec.series_id,)
    )
    return [Decision(*row) for row in rows]

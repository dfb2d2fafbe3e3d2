"""Group file records into series (pure: no file access).

A series is the set of files that share (Study Instance UID, Series Instance UID). Whether the
series is complete and geometrically sound is decided later (the daemon's settle rule, then
:mod:`flairwatch.intake.load`); this stage only groups, removes duplicate copies of an instance, and
sets aside files that are not usable DICOM images.
"""

from __future__ import annotations

import logging
from collections import defaultdict
from collections.abc import Iterable

from flairwatch.records import FileRecord, Series

logger = logging.getLogger(__name__)


def _preference(record: FileRecord) -> tuple[int, str]:
    # The largest copy first (a smaller one may be cut short), then the path, so the choice
    # does not depend on the order the files were found in.
    return (-record.size, str(record.path))


def group_series(records: Iterable[FileRecord]) -> tuple[list[Series], list[FileRecord]]:
    """Group usable records by (Study Instance UID, Series Instance UID).

    Parameters
    ----------
    records : iterable of FileRecord
        Output of discovery, in any order.

    Returns
    -------
    series : list of Series
        One per (study, series) key, sorted by key; files sorted by path; the header is the
        first file's (by path).
    unusable : list of FileRecord
        Records without a header (their ``reason`` says why), and extra copies of an instance
        already kept (same SOP Instance UID; the largest copy, then the first path, is kept),
        each with a ``reason`` starting "duplicate". Sorted by path.
    """
    unusable: list[FileRecord] = []
    by_instance: dict[tuple[str, str, str], list[FileRecord]] = defaultdict(list)
    for record in records:
        header = record.header
        if header is None or not header.study_uid or not header.series_uid or not record.sop_uid:
            if record.reason is None:
                record = FileRecord(
                    record.path,
                    record.size,
                    record.mtime_ns,
                    record.sop_uid,
                    None,
                    "no usable DICOM header",
                )
            unusable.append(record)
            continue
        by_instance[(header.study_uid, header.series_uid, record.sop_uid)].append(record)

    by_series: dict[tuple[str, str], list[FileRecord]] = defaultdict(list)
    for (study_uid, series_uid, _sop), copies in by_instance.items():
        copies.sort(key=_preference)
        kept = copies[0]
        by_series[(study_uid, series_uid)].append(kept)
        for extra in copies[1:]:
            same = "same size" if extra.size == kept.size else f"{extra.size} vs {kept.size} bytes"
            # debug only: a rescan groups again; the daemon logs each duplicate once per change
            logger.debug("%s duplicates instance in %s (%s)", extra.path, kept.path, same)
            unusable.append(
                FileRecord(
                    extra.path,
                    extra.size,
                    extra.mtime_ns,
                    extra.sop_uid,
                    extra.header,
                    f"duplicate of SOP Instance UID in {kept.path.name} ({same}); kept that copy",
                )
            )

    series: list[Series] = []
    for key in sorted(by_series):
        files = tuple(sorted(by_series[key], key=lambda r: str(r.path)))
        header = files[0].header
        assert header is not None  # only records with headers were grouped
        series.append(Series(header=header, files=files))
    unusable.sort(key=lambda r: str(r.path))
    return series, unusable

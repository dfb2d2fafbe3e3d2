"""Grouping file records into series."""

from __future__ import annotations

import random
import shutil
from dataclasses import replace
from pathlib import Path

from flairwatch.intake.assemble import group_series
from flairwatch.intake.discover import discover, read_record
from flairwatch.records import FileRecord, SeriesHeader
from tests.dicom_fixtures import DICOMDIR_TESTS


def _record(path: str, study: str, series: str, sop: str, size: int = 100) -> FileRecord:
    header = SeriesHeader(study_uid=study, series_uid=series, modality="MR")
    return FileRecord(Path(path), size, 1, sop_uid=sop, header=header)


def test_mr2_holds_three_series() -> None:
    # pydicom dicomdirtests 98892003/MR2: 7 images of three localizer series (1 + 3 + 3 images)
    # from different studies (docs/sources.md)
    series, unusable = group_series(discover([DICOMDIR_TESTS / "98892003" / "MR2"]))
    assert unusable == []
    assert sorted(len(s.files) for s in series) == [1, 3, 3]
    assert len({s.header.study_uid for s in series}) == 3
    for s in series:
        assert all(f.header and f.header.series_uid == s.header.series_uid for f in s.files)
        assert list(s.files) == sorted(s.files, key=lambda r: str(r.path))


def test_key_is_study_and_series() -> None:
    # the same Series Instance UID in two studies is two series (a sender that reuses UIDs)
    records = [_record("a", "S1", "X", "1"), _record("b", "S2", "X", "2")]
    series, _ = group_series(records)
    assert [s.key for s in series] == [("S1", "X"), ("S2", "X")]


def test_grouping_ignores_input_order() -> None:
    records = [
        _record(f"/in/{i}", "S", "A" if i % 3 else "B", str(i), size=50 + i) for i in range(12)
    ]
    expected = group_series(records)
    shuffled = records[:]
    random.Random(5).shuffle(shuffled)
    assert group_series(shuffled) == expected


def test_duplicate_instances_keep_one(tmp_path: Path) -> None:
    src = sorted((DICOMDIR_TESTS / "98892001" / "CT5N").iterdir())
    for p in src:
        shutil.copy(p, tmp_path / f"a_{p.name}")
    shutil.copy(src[0], tmp_path / f"b_{src[0].name}")  # an exact second copy
    records = discover([tmp_path])
    for order in (records, records[::-1]):
        series, unusable = group_series(order)
        assert len(series) == 1 and len(series[0].files) == 5
        assert [r.path.name for r in unusable] == [f"b_{src[0].name}"]
        assert unusable[0].reason is not None and unusable[0].reason.startswith("duplicate")
        assert "same size" in unusable[0].reason


def test_duplicate_keeps_the_larger_copy() -> None:
    small = _record("/in/a", "S", "X", "1", size=10)
    large = _record("/in/b", "S", "X", "1", size=20)
    series, unusable = group_series([small, large])
    assert series[0].files == (large,)
    assert unusable[0].path == small.path and unusable[0].reason
    assert "10 vs 20 bytes" in unusable[0].reason


def test_unusable_records_pass_through(tmp_path: Path) -> None:
    (tmp_path / "notes.txt").write_text("hello")
    bad = read_record(tmp_path / "notes.txt")
    no_reason = FileRecord(Path("/in/x"), 5, 1)
    good = _record("/in/y", "S", "X", "1")
    no_uid = replace(good, path=Path("/in/z"), sop_uid=None)
    series, unusable = group_series([bad, good, no_reason, no_uid])
    assert [s.files for s in series] == [(good,)]
    assert [r.path for r in unusable] == sorted([bad.path, no_reason.path, no_uid.path], key=str)
    assert all(r.reason for r in unusable)
    assert bad in unusable


def test_header_comes_from_first_path() -> None:
    first = _record("/in/1", "S", "X", "a")
    second = FileRecord(
        Path("/in/2"),
        100,
        1,
        sop_uid="b",
        header=SeriesHeader(study_uid="S", series_uid="X", series_description="later"),
    )
    series, _ = group_series([second, first])
    assert series[0].header == first.header

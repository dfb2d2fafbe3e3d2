"""Change over time per participant (`export --longitudinal`) and its gallery page.

Oracles: the annualised change is worked out by hand below (days from Python's datetime, the
standard library's proleptic Gregorian calendar; a year of 365.25 days, the Julian year, common
practice); volumes of the end-to-end archive are the phantom's own lesion voxels (value 600 in
tests.series_fixtures.phantom_array) times the voxel volume, and the CSV is read back with
Python's csv module (RFC 4180).
"""

from __future__ import annotations

import csv
import io
from pathlib import Path
from typing import Any

import pydicom
import pytest

from flairwatch.cli import main
from flairwatch.config import LongitudinalSettings
from flairwatch.intake.assemble import group_series
from flairwatch.intake.discover import read_record
from flairwatch.research.longitudinal import LONGITUDINAL_COLUMNS, is_drop, longitudinal_rows
from tests.review_fixtures import Archive, make_archive
from tests.series_fixtures import SeriesSpec, phantom_array, write_series

DEFAULTS = LongitudinalSettings()  # drop_percent 20, drop_ml 1.0


def _row(subject: str, study: str, date: str | None, ml: float, **extra: Any) -> dict[str, Any]:
    row = {"subject_key": subject, "study_key": study, "series_key": f"{study}-s",
           "acquisition_date": date, "lesion_volume_ml": ml, "primary_flair": 1,
           "model_name": "m", "model_version": "1.0", "qc_status": "unreviewed"}  # fmt: skip
    return row | extra


def test_annualised_change_matches_hand_arithmetic_in_date_order() -> None:
    rows = [  # given out of order, plus a non-primary series that must be ignored
        _row("sA", "st3", "2022-07-02", 4.7),
        _row("sA", "st1", "2020-01-01", 5.0),
        _row("sA", "st2", "2021-01-01", 6.0),
        _row("sA", "st2", "2021-01-01", 99.0, primary_flair=0, series_key="other"),
    ]
    out = longitudinal_rows(rows, DEFAULTS)
    assert [r["study_key"] for r in out] == ["st1", "st2", "st3"]
    assert [r["scan_index"] for r in out] == [1, 2, 3]
    first, second, third = out
    assert first["change_ml"] is None and first["change_ml_per_year"] is None
    # 2020-01-01 -> 2021-01-01 is 366 days (2020 is a leap year); +1.0 mL:
    # 1.0 / (366 / 365.25) = 365.25 / 366 = 0.997951 mL per year
    assert second["days_since_previous"] == 366
    assert second["change_ml"] == pytest.approx(1.0)
    assert second["change_ml_per_year"] == pytest.approx(0.9980, abs=1e-4)
    # 2021-01-01 -> 2022-07-02 is 365 + 182 = 547 days; 4.7 - 6.0 = -1.3 mL:
    # -1.3 / (547 / 365.25) = -1.3 x 0.667733 = -0.868053 mL per year
    assert third["days_since_previous"] == 547
    assert third["change_ml"] == pytest.approx(-1.3)
    assert third["change_ml_per_year"] == pytest.approx(-0.8681, abs=1e-4)
    # a fall of 1.3 mL (> 1 mL) and 21.7 % (> 20 %): flagged
    assert third["flag_drop"] == 1 and second["flag_drop"] == 0


@pytest.mark.parametrize(
    ("before", "after", "flagged"),
    [
        (10.0, 7.99, 1),  # fell 2.01 mL, 20.1 %: both beyond
        (10.0, 8.01, 0),  # fell 1.99 mL, 19.9 %: percent just below
        (4.0, 2.99, 1),  # fell 1.01 mL, 25.25 %
        (4.0, 3.01, 0),  # fell 0.99 mL, 24.75 %: mL just below
        (10.0, 8.0, 0),  # exactly 20 % and 2 mL: "more than" does not fire
        (0.5, 0.0, 0),  # 100 % but only 0.5 mL
    ],
)
def test_drop_flag_fires_just_beyond_both_thresholds(
    before: float, after: float, flagged: int
) -> None:
    assert int(is_drop(before, after, DEFAULTS)) == flagged
    rows = [_row("s", "a", "2024-01-01", before), _row("s", "b", "2024-06-01", after)]
    assert longitudinal_rows(rows, DEFAULTS)[1]["flag_drop"] == flagged


def test_own_thresholds_rejected_model_and_undated_flags() -> None:
    rows = [
        _row("sB", "b1", "20230105", 3.0),  # DICOM DA dates are read too
        _row("sB", "b2", "2023-07-05", 2.0, qc_status="rejected", model_version="2.0"),
        _row("sB", "b3", None, 1.0),
        _row("sA", "a1", "2023-01-01", 1.0),
    ]
    out = longitudinal_rows(rows, LongitudinalSettings(drop_percent=30.0, drop_ml=0.5))
    assert [(r["subject_key"], r["study_key"]) for r in out] == [
        ("sA", "a1"), ("sB", "b1"), ("sB", "b2"), ("sB", "b3")
    ]  # fmt: skip
    b1, b2, b3 = out[1:]
    assert b1["scan_date"] == "2023-01-05"
    assert (b2["flag_drop"], b2["flag_rejected"], b2["flag_model_changed"]) == (1, 1, 1)
    assert b1["flag_model_changed"] == 0 and b1["flag_rejected"] == 0
    # the undated scan is last, flagged, and compared with nothing
    assert b3["flag_no_date"] == 1 and b3["change_ml"] is None and b3["scan_date"] is None


def _add_dated(arc: Archive, name: str, spec: SeriesSpec, date: str) -> None:
    paths = write_series(arc.root / "inbox" / name, spec)
    for p in paths:
        ds = pydicom.dcmread(p)
        ds.StudyDate = ds.AcquisitionDate = date
        ds.save_as(p)
    (series,), _ = group_series(read_record(p) for p in paths)
    arc.record(series, arc.engine)


def test_export_longitudinal_end_to_end(
    tmp_path: Path, tiny_model_manifest: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    arc = make_archive(tmp_path / "site", tiny_model_manifest)
    big = SeriesSpec(lesions=((20, 24, 5, 4), (40, 36, 7, 4)))
    small = SeriesSpec(lesions=((20, 24, 5, 3),))
    _add_dated(arc, "later", small, "20250301")
    _add_dated(arc, "earlier", big, "20240301")
    assert main(["export", "--config", str(arc.config_file), "--longitudinal"]) == 0
    rows = list(csv.DictReader(io.StringIO(capsys.readouterr().out)))
    assert list(rows[0]) == list(LONGITUDINAL_COLUMNS) and len(rows) == 2
    first, second = rows
    assert (first["scan_date"], second["scan_date"]) == ("2024-03-01", "2025-03-01")
    voxel_ml = 1.0 * 1.0 * 3.0 / 1000.0  # SeriesSpec: 1 mm pixels, 3 mm slices
    truth = [float((phantom_array(s) == 600).sum()) * voxel_ml for s in (big, small)]
    assert float(first["lesion_volume_ml"]) == pytest.approx(truth[0], rel=0.02)
    assert float(second["lesion_volume_ml"]) == pytest.approx(truth[1], rel=0.02)
    change = float(second["lesion_volume_ml"]) - float(first["lesion_volume_ml"])
    assert float(second["change_ml"]) == pytest.approx(change, abs=1e-3)
    # 2024-03-01 -> 2025-03-01 spans 365 days (no 29 February in between)
    assert int(second["days_since_previous"]) == 365
    assert float(second["change_ml_per_year"]) == pytest.approx(change * 365.25 / 365, abs=1e-3)
    fell = -change
    expect_drop = fell > 1.0 and fell / float(first["lesion_volume_ml"]) > 0.20
    assert int(second["flag_drop"]) == int(expect_drop)


def test_gallery_participant_page_plots_the_scans_and_is_linked(
    tmp_path: Path, tiny_model_manifest: Path
) -> None:
    from flairwatch.research.gallery import write_gallery

    arc = make_archive(tmp_path / "site", tiny_model_manifest)
    _add_dated(arc, "one", SeriesSpec(lesions=((20, 24, 5, 4), (40, 36, 7, 4))), "20240301")
    _add_dated(arc, "two", SeriesSpec(lesions=((20, 24, 5, 3),)), "20250301")
    out = tmp_path / "gallery"
    with arc.ledger() as ledger:
        write_gallery(ledger, out, now=2_000_000_000.0)
    subject = arc.entries[0].outcome.summary["subject_key"]
    page = (out / f"participant-{subject}.html").read_text(encoding="utf-8")
    assert "RESEARCH USE ONLY" in page and "<svg" in page
    assert page.count("<circle") + page.count("<rect x=") - 1 == 2  # two scans (+ the frame)
    assert page.index("2024-03-01") < page.index("2025-03-01")
    study = (out / f"study-{arc.entries[0].outcome.summary['study_key']}.html").read_text(
        encoding="utf-8"
    )
    assert f'href="participant-{subject}.html"' in study
    assert "http://www.w3.org/2000/svg" in page and "https://" not in page


def test_gallery_participant_page_uses_the_configured_drop_thresholds(
    tmp_path: Path, tiny_model_manifest: Path
) -> None:
    # the same two scans (the second has one lesion fewer, a fall of a few tenths of a mL) are
    # flagged with thresholds of 0 % and 0 mL and not with 99 % and 50 mL: the `longitudinal:`
    # setting reaches the gallery, not only the export
    from flairwatch.config import LongitudinalSettings
    from flairwatch.research.gallery import write_gallery

    arc = make_archive(tmp_path / "site", tiny_model_manifest)
    _add_dated(arc, "one", SeriesSpec(lesions=((20, 24, 5, 4), (40, 36, 7, 4))), "20240301")
    _add_dated(arc, "two", SeriesSpec(lesions=((20, 24, 5, 3),)), "20250301")
    subject = arc.entries[0].outcome.summary["subject_key"]
    pages = {}
    for name, settings in (
        ("strict", LongitudinalSettings(drop_percent=0.0, drop_ml=0.0)),
        ("loose", LongitudinalSettings(drop_percent=99.0, drop_ml=50.0)),
    ):
        with arc.ledger() as ledger:
            write_gallery(ledger, tmp_path / name, longitudinal=settings, now=2_000_000_000.0)
        pages[name] = (tmp_path / name / f"participant-{subject}.html").read_text(encoding="utf-8")
    assert "volume drop" in pages["strict"]
    assert "volume drop" not in pages["loose"]

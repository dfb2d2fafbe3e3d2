"""`flairwatch qc mark|correct`: marks and corrected masks on a real ledger and real results.

Oracles: the ledger file read with Python's sqlite3; SHA-256 of the stored copy against the
reviewer's file (byte-for-byte copy); SimpleITK's ConnectedComponentImageFilter
(FullyConnected = 26-neighbour, face-only = 6) for lesion counts; nibabel for writing masks.
"""

from __future__ import annotations

import csv
import hashlib
import json
import sqlite3
import stat
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
import SimpleITK as sitk

from flairwatch.cli import main
from flairwatch.engine.manifest import load_manifest
from flairwatch.engine.pipeline import Engine
from flairwatch.research.qc_marks import measure_mask
from tests.review_fixtures import Archive, Entry, make_archive, rerun, tiny_model_version
from tests.series_fixtures import SeriesSpec, phantom_array


@pytest.fixture
def archive(tmp_path: Path, tiny_model_manifest: Path) -> Archive:
    arc = make_archive(tmp_path / "site", tiny_model_manifest)
    arc.add("one")
    return arc


def _db(archive: Archive) -> sqlite3.Connection:
    assert archive.cfg.state is not None
    return sqlite3.connect(archive.cfg.state / "ledger.sqlite3")


def _edited_mask(entry: Entry, target: Path, *, shift_mm: float = 0.0, value: int = 1) -> Path:
    img = nib.load(entry.outcome.result_dir / "wmh_mask.nii.gz")
    data = np.asarray(img.dataobj).astype(np.uint8)  # type: ignore[attr-defined]
    data[5:8, 30:33, 1:3] = value
    affine = img.affine.copy()  # type: ignore[attr-defined]
    affine[0, 3] += shift_mm
    nib.save(nib.Nifti1Image(data, affine), target)
    return target


def _export_row(archive: Archive, tmp_path: Path) -> dict[str, str]:
    out = tmp_path / "export.csv"
    assert main(["export", "--config", str(archive.config_file), "--out", str(out)]) == 0
    with open(out, encoding="utf-8", newline="") as fh:
        (row,) = list(csv.DictReader(fh))
    return row


def test_marks_are_recorded_latest_wins(archive: Archive, tmp_path: Path) -> None:
    entry = archive.entries[0]
    cfg = str(archive.config_file)
    args = ["qc", "mark", "--config", cfg, entry.series_key]
    assert main([*args, "accepted", "--note", "clean", "--by", "reader1"]) == 0
    assert main([*args, "rejected", "--note", "motion", "--by", "reader2"]) == 0
    with _db(archive) as db:
        rows = db.execute(
            "SELECT result_id, mark, note, marked_by FROM qc_marks ORDER BY id"
        ).fetchall()
    assert rows == [
        (entry.result_id, "accepted", "clean", "reader1"),
        (entry.result_id, "rejected", "motion", "reader2"),
    ]
    row = _export_row(archive, tmp_path)
    assert (row["qc_status"], row["qc_note"]) == ("rejected", "motion")


def test_unknown_key_or_version_is_a_one_line_usage_error(
    archive: Archive, capsys: pytest.CaptureFixture[str]
) -> None:
    cfg = str(archive.config_file)
    assert main(["qc", "mark", "--config", cfg, "e000000000000", "accepted"]) == 2
    err = capsys.readouterr().err.strip()
    assert "no result for series key" in err and "\n" not in err
    key = archive.entries[0].series_key
    assert main(["qc", "mark", "--config", cfg, key, "accepted", "--model-version", "9.9"]) == 2
    assert "has no result of model version 9.9" in capsys.readouterr().err


def test_correction_is_copied_recorded_and_reported(archive: Archive, tmp_path: Path) -> None:
    entry = archive.entries[0]
    edited = _edited_mask(entry, tmp_path / "edited.nii.gz")
    cfg = str(archive.config_file)
    args = ["qc", "correct", "--config", cfg, entry.series_key, "--mask", str(edited)]
    assert main([*args, "--note", "added a lesion"]) == 0
    assert main(args) == 0  # a second one the same second: a new file, the first kept
    folder = entry.outcome.result_dir.parent / "corrections"
    stored = sorted(folder.iterdir())
    assert len(stored) == 2 and all(p.name.endswith("-wmh_mask.nii.gz") for p in stored)
    digest = hashlib.sha256(edited.read_bytes()).hexdigest()
    assert all(hashlib.sha256(p.read_bytes()).hexdigest() == digest for p in stored)
    assert all(not (p.stat().st_mode & stat.S_IROTH) for p in stored)
    with _db(archive) as db:
        rows = db.execute(
            "SELECT result_id, path, note FROM corrected_masks ORDER BY id"
        ).fetchall()
    assert [(r[0], Path(r[1]).parent, r[2]) for r in rows] == [
        (entry.result_id, folder, "added a lesion"),
        (entry.result_id, folder, ""),
    ]
    row = _export_row(archive, tmp_path)
    assert row["mask_source"] == "corrected"
    assert Path(row["mask_path"]) == Path(rows[-1][1])


@pytest.mark.parametrize(
    ("kind", "message"),
    [("shape", "differs from the series grid"), ("affine", "affine differs"), ("values", "only 0 and 1")],
)  # fmt: skip
def test_mask_off_the_series_grid_is_refused(
    archive: Archive, tmp_path: Path, kind: str, message: str, capsys: pytest.CaptureFixture[str]
) -> None:
    entry = archive.entries[0]
    target = tmp_path / "bad.nii.gz"
    if kind == "shape":
        nib.save(nib.Nifti1Image(np.zeros((64, 64, 11), np.uint8), np.eye(4)), target)
    elif kind == "affine":
        _edited_mask(entry, target, shift_mm=0.5)
    else:
        _edited_mask(entry, target, value=2)
    rc = main(["qc", "correct", "--config", str(archive.config_file), entry.series_key,
               "--mask", str(target)])  # fmt: skip
    assert rc == 1
    assert message in capsys.readouterr().err
    assert not (entry.outcome.result_dir.parent / "corrections").exists()
    with _db(archive) as db:
        assert db.execute("SELECT COUNT(*) FROM corrected_masks").fetchone() == (0,)


def test_float32_rounding_of_the_affine_is_accepted(archive: Archive, tmp_path: Path) -> None:
    entry = archive.entries[0]
    target = _edited_mask(entry, tmp_path / "edited.nii.gz", shift_mm=2e-5)
    rc = main(["qc", "correct", "--config", str(archive.config_file), entry.series_key,
               "--mask", str(target)])  # fmt: skip
    assert rc == 0


def test_correction_survives_a_new_model_version(
    archive: Archive, tmp_path: Path, tiny_model_manifest: Path
) -> None:
    entry = archive.entries[0]
    edited = _edited_mask(entry, tmp_path / "edited.nii.gz")
    cfg = str(archive.config_file)
    assert main(["qc", "correct", "--config", cfg, entry.series_key, "--mask", str(edited)]) == 0
    manifest2 = tiny_model_version(tmp_path / "v2", tiny_model_manifest, "0.0.2")
    rerun(archive, entry, Engine(archive.cfg, manifest=load_manifest(manifest2)))
    row = _export_row(archive, tmp_path)
    assert row["model_version"] == "0.0.2"
    assert row["mask_source"] == "corrected"  # beside the new model's figures, not replaced
    new_mask = Path(row["result_path"]) / "wmh_mask.nii.gz"
    auto = np.asarray(nib.load(new_mask).dataobj)  # type: ignore[attr-defined]
    assert float(row["automatic_lesion_volume_ml"]) == pytest.approx(
        auto.sum() * 3.0 / 1000, abs=1e-4
    )
    assert float(row["lesion_volume_ml"]) > float(row["automatic_lesion_volume_ml"])


@pytest.mark.parametrize(("connectivity", "fully"), [(6, False), (26, True)])
def test_measure_mask_against_simpleitk(connectivity: int, fully: bool) -> None:
    rng = np.random.default_rng(7)
    mask = (rng.random((20, 18, 9)) > 0.85).astype(np.uint8)
    affine = np.diag([0.9, 0.9, 3.0, 1.0])
    m = measure_mask(mask, affine, connectivity)
    # SimpleITK takes arrays as (k, j, i)
    cc = sitk.ConnectedComponentImageFilter()
    cc.SetFullyConnected(fully)
    cc.Execute(sitk.GetImageFromArray(mask.transpose(2, 1, 0)))
    assert m.lesion_count == cc.GetObjectCount()
    assert m.lesion_volume_ml == pytest.approx(mask.sum() * 0.9 * 0.9 * 3.0 / 1000.0)


def test_corrections_become_case_folders_that_validate_reads(
    archive: Archive, tmp_path: Path, tiny_model_manifest: Path
) -> None:
    from flairwatch.research.cases import read_case

    entry = archive.entries[0]
    edited = _edited_mask(entry, tmp_path / "edited.nii.gz")
    cfg = str(archive.config_file)
    args = ["qc", "correct", "--config", cfg, entry.series_key, "--mask", str(edited)]
    assert main([*args, "--note", "extra lesion"]) == 0
    cases = tmp_path / "cases"
    assert main(["qc", "cases", "--config", cfg, "--out", str(cases)]) == 0
    (case_dir,) = [p for p in cases.iterdir() if not p.name.startswith(".")]
    assert case_dir.name == entry.series_key
    # validate's own reader is the oracle for the case layout and the grid agreement
    case = read_case(case_dir)
    expected = np.asarray(nib.load(edited).dataobj)  # type: ignore[attr-defined]
    assert np.array_equal(case.reference, expected)
    # the image holds the pixel values written into the DICOM files (tests/series_fixtures.py)
    assert np.array_equal(case.image.data, phantom_array(SeriesSpec()).astype(np.float32))
    facts = json.loads((case_dir / "case.json").read_text(encoding="utf-8"))
    assert facts["correction"]["note"] == "extra lesion"
    assert "FW-0001" not in (case_dir / "case.json").read_text(encoding="utf-8"), (
        "no patient identifiers"
    )
    # a second run with nothing new leaves the folder alone
    before = (case_dir / "image.nii.gz").stat().st_mtime_ns
    assert main(["qc", "cases", "--config", cfg, "--out", str(cases)]) == 0
    assert (case_dir / "image.nii.gz").stat().st_mtime_ns == before
    # and validate scores the model against it end to end
    out = tmp_path / "validation"
    rc = main(["validate", "--model", str(tiny_model_manifest), "--cases", str(cases),
               "--out", str(out)])  # fmt: skip
    assert rc == 0
    with open(out / "cases.csv", encoding="utf-8", newline="") as fh:
        (row,) = list(csv.DictReader(fh))
    assert row["case"] == entry.series_key
    # the model on the exported image gives back the automatic result: the image is faithful
    assert float(row["segmented_ml"]) == pytest.approx(
        entry.outcome.summary["lesion_volume_ml"], abs=1e-3
    )
    assert (row["reference_lesions"], row["detected_lesions"]) == ("3", "2")  # +1 drawn lesion

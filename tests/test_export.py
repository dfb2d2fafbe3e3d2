"""`flairwatch export`: a ledger and result folders made by the real pipeline, read back with csv.

Oracles: Python's csv module reads the table (RFC 4180); nibabel reads the masks and
scipy.ndimage.label counts lesions (26-connectivity = generate_binary_structure(3, 3), scipy
docs); the subject pseudonym is HMAC-SHA256 recomputed with Python's hmac (RFC 2104); the
acquisition facts are the values the test wrote into the DICOM headers (PS3.3 attributes
Manufacturer, Manufacturer's Model Name, Magnetic Field Strength, Repetition/Echo/Inversion Time,
Pixel Spacing, Spacing Between Slices).
"""

from __future__ import annotations

import csv
import hashlib
import hmac
import io
import json
import shutil
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np
import pytest
from scipy import ndimage

from flairwatch.cli import main
from flairwatch.config import Identifiers
from flairwatch.engine.manifest import load_manifest
from flairwatch.engine.pipeline import Engine
from flairwatch.research.export import EXPORT_COLUMNS, identifier, iso_date, mark_primary
from tests.review_fixtures import Archive, make_archive, rerun, tiny_model_version
from tests.series_fixtures import SeriesSpec


def _read_csv(path: Path) -> tuple[list[str], list[dict[str, str]]]:
    with open(path, newline="", encoding="utf-8") as fh:
        reader = csv.DictReader(fh)
        return list(reader.fieldnames or []), list(reader)


def _mask_facts(mask_path: Path) -> tuple[float, int]:
    """(volume mL, 26-connected components) of a mask file, by nibabel and scipy alone."""
    img = nib.load(mask_path)
    data = np.asarray(img.dataobj) > 0  # type: ignore[attr-defined]
    voxel_mm3 = abs(np.linalg.det(img.affine[:3, :3]))  # type: ignore[attr-defined]
    _, n = ndimage.label(data, structure=ndimage.generate_binary_structure(3, 3))
    return float(data.sum() * voxel_mm3 / 1000.0), int(n)


@pytest.fixture
def archive(tmp_path: Path, tiny_model_manifest: Path) -> Archive:
    """Study A: two FLAIR series (3 mm and 2 mm slices); study B: one series, another subject."""
    arc = make_archive(tmp_path / "site", tiny_model_manifest)
    a = arc.add("a_thick", SeriesSpec(slice_spacing=3.0))
    arc.add("a_thin", SeriesSpec(slice_spacing=2.0, slices=16), study_uid=a.study_uid)
    arc.add("b", SeriesSpec(patient_id="FW-0002", lesions=((30, 30, 6, 3),)))
    return arc


def test_csv_rows_match_headers_masks_and_summaries(archive: Archive) -> None:
    out = archive.root / "exports" / "wmh.csv"
    out.parent.mkdir()
    out.write_text("stale content\n")  # replaced atomically, not appended to
    rc = main(["export", "--config", str(archive.config_file), "--out", str(out)])
    assert rc == 0
    header, rows = _read_csv(out)
    assert header == list(EXPORT_COLUMNS)
    assert len(rows) == 3
    assert sorted(p.name for p in out.parent.iterdir()) == ["wmh.csv", "wmh.csv.RESEARCH_ONLY.txt"]
    assert "RESEARCH USE ONLY" in (out.parent / "wmh.csv.RESEARCH_ONLY.txt").read_text(
        encoding="utf-8"
    )

    by_key = {r["series_key"]: r for r in rows}
    assert set(by_key) == {e.series_key for e in archive.entries}
    for entry in archive.entries:
        row = by_key[entry.series_key]
        summary = json.loads(
            (entry.outcome.result_dir / "summary.json").read_text(encoding="utf-8")
        )
        # values written into the DICOM headers by tests/series_fixtures.py
        assert row["manufacturer"] == "Example Imaging"
        assert row["manufacturer_model"] == "FW Test Scanner"
        assert float(row["field_strength_t"]) == 3.0
        assert float(row["repetition_time_ms"]) == 9000.0
        assert float(row["echo_time_ms"]) == 90.0
        assert float(row["inversion_time_ms"]) == 2500.0
        assert row["mr_acquisition_type"] == "2D"
        assert row["acquisition_date"] == "2026-03-15"  # DA 20260315 as ISO 8601
        assert row["study_instance_uid"] == entry.study_uid
        assert row["series_instance_uid"] == entry.series_uid
        # Pixel Spacing 1\1 mm and the slice spacing of each series
        assert float(row["voxel_size_i_mm"]) == pytest.approx(1.0)
        assert float(row["voxel_size_j_mm"]) == pytest.approx(1.0)
        assert float(row["voxel_size_k_mm"]) == pytest.approx(
            3.0 if row["series_key"] != by_key_thin(archive) else 2.0
        )
        # figures against the mask file itself (nibabel + scipy)
        volume_ml, count = _mask_facts(entry.outcome.result_dir / "wmh_mask.nii.gz")
        assert float(row["lesion_volume_ml"]) == pytest.approx(volume_ml, abs=1e-4)
        assert int(row["lesion_count"]) == count > 0
        assert row["automatic_lesion_volume_ml"] == row["lesion_volume_ml"]
        icv = float(row["intracranial_volume_ml"])
        assert icv == summary["intracranial_volume_ml"] > 0
        assert float(row["wmh_fraction_of_intracranial"]) == pytest.approx(volume_ml / icv, 1e-3)
        assert row["model_name"] == "tiny-threshold" and row["model_version"] == "0.0.1"
        assert row["mask_source"] == "automatic" and row["qc_status"] == "unreviewed"
        assert Path(row["result_path"]) == entry.outcome.result_dir
        assert Path(row["mask_path"]).is_file()
        # default identifiers: patient_id pseudonymised (HMAC-SHA256, RFC 2104), name dropped
        patient = (
            "FW-0002" if row["study_instance_uid"] != archive.entries[0].study_uid else "FW-0001"
        )
        mac = hmac.new(archive.secret, patient.encode(), hashlib.sha256).hexdigest()
        assert row["patient_id"] == "s" + mac[:12]
        assert row["patient_name"] == ""

    # one primary per study; in study A the thinner slices win (rule 3)
    primaries = [r for r in rows if r["primary_flair"] == "1"]
    assert len(primaries) == 2
    assert {r["study_instance_uid"] for r in primaries} == {e.study_uid for e in archive.entries}
    assert by_key[by_key_thin(archive)]["primary_flair"] == "1"


def by_key_thin(archive: Archive) -> str:
    return archive.entries[1].series_key


def test_accepted_qc_and_correction_change_what_is_reported(archive: Archive) -> None:
    thick = archive.entries[0]
    cfg = str(archive.config_file)
    assert main(["qc", "mark", "--config", cfg, thick.series_key, "accepted", "--note", "ok"]) == 0
    # a reviewer's correction: the automatic mask plus a 3 x 3 x 2 block elsewhere
    mask_file = thick.outcome.result_dir / "wmh_mask.nii.gz"
    img = nib.load(mask_file)
    data = np.asarray(img.dataobj).astype(np.uint8)  # type: ignore[attr-defined]
    assert data[10:13, 30:33, 2:4].sum() == 0
    data[10:13, 30:33, 2:4] = 1
    corrected = archive.root / "edited.nii.gz"
    nib.save(nib.Nifti1Image(data, img.affine, img.header), corrected)  # type: ignore[attr-defined]
    rc = main(["qc", "correct", "--config", cfg, thick.series_key, "--mask", str(corrected)])
    assert rc == 0

    out = archive.root / "wmh.csv"
    assert main(["export", "--config", cfg, "--out", str(out)]) == 0
    _, rows = _read_csv(out)
    row = next(r for r in rows if r["series_key"] == thick.series_key)
    volume_ml, count = _mask_facts(corrected)
    auto_ml, auto_n = _mask_facts(mask_file)
    assert row["mask_source"] == "corrected"
    assert float(row["lesion_volume_ml"]) == pytest.approx(volume_ml, abs=1e-4)
    assert int(row["lesion_count"]) == count == auto_n + 1
    assert float(row["automatic_lesion_volume_ml"]) == pytest.approx(auto_ml, abs=1e-4)
    assert volume_ml == pytest.approx(auto_ml + 18 * 3.0 / 1000.0)  # 18 voxels of 1 x 1 x 3 mm
    assert row["qc_status"] == "accepted" and row["qc_note"] == "ok"
    assert Path(row["mask_path"]).parent.name == "corrections"
    # rule 1: an accepted series is primary over the thinner unreviewed one
    assert row["primary_flair"] == "1"
    other = next(r for r in rows if r["series_key"] == archive.entries[1].series_key)
    assert other["primary_flair"] == "0"


def test_json_and_model_version_selection(
    archive: Archive, tmp_path: Path, tiny_model_manifest: Path
) -> None:
    manifest2 = tiny_model_version(tmp_path / "v2", tiny_model_manifest, "0.0.2")
    engine2 = Engine(archive.cfg, manifest=load_manifest(manifest2))
    rerun(archive, archive.entries[2], engine2)
    cfg = str(archive.config_file)

    def export(*extra: str) -> list[dict[str, Any]]:
        out = tmp_path / "out.json"
        assert main(["export", "--config", cfg, "--format", "json", "--out", str(out), *extra]) == 0
        data: list[dict[str, Any]] = json.loads(out.read_text(encoding="utf-8"))
        return data

    current = export()
    assert [list(r) for r in current] == [list(EXPORT_COLUMNS)] * 3
    versions = {r["series_key"]: r["model_version"] for r in current}
    assert versions[archive.entries[2].series_key] == "0.0.2"
    assert sum(v == "0.0.1" for v in versions.values()) == 2
    assert all(isinstance(r["lesion_count"], int) for r in current)
    assert all(r["patient_name"] is None for r in current)

    old = export("--model-version", "0.0.1")
    assert {r["model_version"] for r in old} == {"0.0.1"} and len(old) == 3
    new = export("--model-version", "0.0.2")
    assert [r["series_key"] for r in new] == [archive.entries[2].series_key]
    assert Path(new[0]["result_path"]).name == "tiny-threshold-0.0.2"


def test_stdout_and_dropped_identifiers(
    tmp_path: Path, tiny_model_manifest: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    arc = make_archive(
        tmp_path / "site", tiny_model_manifest, identifiers={"patient_id": "drop", "dates": "drop"}
    )
    arc.add("one")
    capsys.readouterr()
    assert main(["export", "--config", str(arc.config_file)]) == 0
    captured = capsys.readouterr()
    (row,) = list(csv.DictReader(io.StringIO(captured.out)))
    assert row["patient_id"] == "" and row["acquisition_date"] == ""
    assert row["primary_flair"] == "1"
    assert "RESEARCH USE ONLY" in captured.err


@pytest.mark.parametrize(
    ("value", "action", "expected"),
    [
        ("FW-0001", "drop", None),
        ("FW-0001", "keep", "FW-0001"),
        (None, "keep", None),
        ("s0123456789ab", "pseudonymise", "s0123456789ab"),  # already a pseudonym
    ],
)
def test_identifier_actions(value: str | None, action: str, expected: str | None) -> None:
    assert identifier(value, action, lambda: b"k" * 32) == expected


def test_identifier_pseudonymise_is_keyed_hash() -> None:
    secret = b"x" * 32
    expected = "s" + hmac.new(secret, b"FW-0001", hashlib.sha256).hexdigest()[:12]  # RFC 2104
    assert identifier("FW-0001", "pseudonymise", lambda: secret) == expected
    assert Identifiers().patient_id == "pseudonymise"


@pytest.mark.parametrize(
    ("value", "expected"), [("20260315", "2026-03-15"), ("", None), (None, None), ("2026", "2026")]
)
def test_iso_date(value: str | None, expected: str | None) -> None:
    assert iso_date(value) == expected


def _row(key: str, **kw: Any) -> dict[str, Any]:
    base: dict[str, Any] = {
        "series_key": key, "study_instance_uid": "1.2.3", "qc_status": "unreviewed",
        "mr_acquisition_type": "2D", "voxel_size_k_mm": 3.0, "series_number": 1,
    }  # fmt: skip
    return base | kw


@pytest.mark.parametrize(
    ("rows", "winner"),
    [
        # rule 1: accepted beats everything; rejected loses to unreviewed
        ([_row("a", qc_status="accepted", voxel_size_k_mm=5.0), _row("b", mr_acquisition_type="3D")], "a"),
        ([_row("a", qc_status="rejected", mr_acquisition_type="3D"), _row("b")], "b"),
        # rule 2: 3D before 2D even with thicker voxels
        ([_row("a", voxel_size_k_mm=1.0), _row("b", mr_acquisition_type="3D", voxel_size_k_mm=1.2)], "b"),
        # rule 3: thinner slices
        ([_row("a", voxel_size_k_mm=3.0), _row("b", voxel_size_k_mm=2.5)], "b"),
        ([_row("a", voxel_size_k_mm=None), _row("b", voxel_size_k_mm=6.0)], "b"),
        # rule 4: the later series number
        ([_row("a", series_number=7), _row("b", series_number=4)], "a"),
        # rule 5: key order when nothing else differs
        ([_row("b"), _row("a")], "a"),
    ],
)  # fmt: skip
def test_primary_rule(rows: list[dict[str, Any]], winner: str) -> None:
    marked = mark_primary(rows)
    assert [r["series_key"] for r in marked if r["primary_flair"] == 1] == [winner]
    assert all("primary_flair" not in r for r in rows), "input rows are not modified"


def test_one_primary_per_study() -> None:
    rows = [_row("a"), _row("b", study_instance_uid="9.9"), _row("c", series_number=2)]
    marked = mark_primary(rows)
    assert {r["series_key"] for r in marked if r["primary_flair"]} == {"b", "c"}


def test_missing_result_folder_still_gives_a_row_from_the_ledger(
    tmp_path: Path, tiny_model_manifest: Path, caplog: pytest.LogCaptureFixture
) -> None:
    arc = make_archive(tmp_path / "site", tiny_model_manifest)
    entry = arc.add("one")
    volume = entry.outcome.summary["lesion_volume_ml"]
    shutil.rmtree(entry.outcome.result_dir)
    out = tmp_path / "wmh.csv"
    assert main(["export", "--config", str(arc.config_file), "--out", str(out)]) == 0
    _, (row,) = _read_csv(out)
    assert float(row["lesion_volume_ml"]) == pytest.approx(volume)  # the ledger's figure
    assert row["manufacturer"] == "" and row["series_key"] == entry.series_key
    assert "is missing" in caplog.text

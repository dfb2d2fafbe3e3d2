"""Finding candidate files and reading their headers."""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import numpy as np
import pydicom
import pytest
from pydicom.dataset import Dataset, FileMetaDataset
from pydicom.uid import BasicTextSRStorage, ExplicitVRLittleEndian, generate_uid

from flairwatch.errors import InputRejected
from flairwatch.intake.discover import discover, is_ignored_name, iter_candidate_files, read_record
from tests.dicom_fixtures import DICOMDIR_TESTS, PYDICOM_FILES, read_mprage, slice_dataset


def _touch(path: Path, data: bytes = b"x") -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(data)
    return path


def test_walk_skips_temporary_and_hidden_names(tmp_path: Path) -> None:
    root = tmp_path / "inbox"
    keep = [
        _touch(root / "b" / "IM0002"),
        _touch(root / "a.dcm"),
        _touch(root / "b" / "IM0001"),
        _touch(root / "c" / "d" / "deep.dcm"),
    ]
    for name in (".hidden.dcm", "x.part", "y.tmp", "z.PARTIAL", "w.dcm~", ".git/objects/1"):
        _touch(root / name)
    _touch(root / ".staging" / "IM0003")
    found = list(iter_candidate_files([root]))
    assert found == sorted(keep, key=lambda p: p.relative_to(root).parts)
    assert found == list(iter_candidate_files([root])), "order is fixed"


@pytest.mark.parametrize(
    ("name", "ignored"),
    [(".DS_Store", True), ("IM1.part", True), ("IM1.tmp", True), ("IM1", False), ("a.dcm", False)],
)
def test_ignored_names(name: str, ignored: bool) -> None:
    assert is_ignored_name(name) is ignored


def test_symlinks_below_root_are_not_followed(tmp_path: Path) -> None:
    root = tmp_path / "inbox"
    outside = tmp_path / "elsewhere"
    secret = _touch(outside / "secret.dcm")
    _touch(outside / "sub" / "more.dcm")
    inside = _touch(root / "real" / "IM1")
    os.symlink(secret, root / "link_out.dcm")
    os.symlink(outside / "sub", root / "dir_out")
    os.symlink(inside, root / "link_in")  # would list IM1 twice
    os.symlink(root / "real", root / "a_dir_link")  # sorts before "real"
    os.symlink(root, root / "real" / "up")  # a loop back to the root
    os.symlink(tmp_path / "missing", root / "broken")
    assert list(iter_candidate_files([root])) == [inside]
    # a root given as a link is followed: the user named it
    os.symlink(root, tmp_path / "inbox_link")
    assert list(iter_candidate_files([tmp_path / "inbox_link"])) == [
        tmp_path / "inbox_link" / "real" / "IM1"
    ]


def test_root_can_be_a_file_and_missing_root_is_refused(tmp_path: Path) -> None:
    f = _touch(tmp_path / "x.part")
    assert list(iter_candidate_files([f])) == [f]
    with pytest.raises(InputRejected, match="no such file"):
        list(iter_candidate_files([tmp_path / "nope"]))


def test_hostile_filesystem_calls(tmp_path: Path) -> None:
    root = tmp_path / "inbox"
    a = _touch(root / "a")
    _touch(root / "gone")
    _touch(root / "locked" / "b")
    real_lstat = os.lstat

    def lstat(path: Path) -> os.stat_result:
        if Path(path).name == "gone":  # deleted between listing and stat
            raise FileNotFoundError(2, "No such file or directory")
        return real_lstat(path)

    def listdir(path: Path) -> list[str]:
        if Path(path).name == "locked":
            raise PermissionError(13, "Permission denied")
        return os.listdir(path)

    assert list(iter_candidate_files([root], listdir=listdir, lstat=lstat)) == [a]


def test_read_record_mr_small() -> None:
    # pydicom test_files README / docs/sources.md: MR_small is MR, 64x64, spacing 0.3125 mm,
    # slice thickness 0.8 mm.
    path = PYDICOM_FILES / "MR_small.dcm"
    record = read_record(path)
    st = path.stat()
    assert (record.size, record.mtime_ns) == (st.st_size, st.st_mtime_ns)
    assert record.reason is None and record.header is not None
    h = record.header
    assert (h.modality, h.rows, h.columns) == ("MR", 64, 64)
    assert h.pixel_spacing_mm == (0.3125, 0.3125)
    assert h.slice_thickness_mm == pytest.approx(0.8)
    assert record.sop_uid == str(pydicom.dcmread(path).SOPInstanceUID)


def test_read_record_enhanced_mr_header() -> None:
    # nibabel's philips_mprage: enhanced MR, 176 frames of 256x256, 1 mm pixels held in the
    # functional groups, 3D acquisition, gradient echo (values read from the file's groups).
    ds = read_mprage()
    from flairwatch.intake.discover import header_from_dataset

    h = header_from_dataset(ds)
    assert (h.number_of_frames, h.rows, h.columns) == (176, 256, 256)
    assert h.pixel_spacing_mm == (1.0, 1.0)
    assert h.mr_acquisition_type == "3D"
    assert "GR" in h.scanning_sequence
    assert h.repetition_time_ms == pytest.approx(7.5693, abs=1e-3)


def _sr_dataset() -> Dataset:
    ds = Dataset()
    ds.file_meta = FileMetaDataset()
    ds.file_meta.TransferSyntaxUID = ExplicitVRLittleEndian
    ds.file_meta.MediaStorageSOPClassUID = BasicTextSRStorage
    uid = generate_uid()
    ds.file_meta.MediaStorageSOPInstanceUID = uid
    ds.SOPClassUID = BasicTextSRStorage
    ds.SOPInstanceUID = uid
    ds.StudyInstanceUID = generate_uid()
    ds.SeriesInstanceUID = generate_uid()
    ds.Modality = "SR"
    return ds


@pytest.mark.parametrize(
    ("make", "reason"),
    [
        (lambda p: _touch(p, b""), "empty file"),
        (lambda p: _touch(p, b"patient notes\nnot an image\n" * 20), "not DICOM"),
        # junk that opens like a group 0008 element is parsed with force=True; the UID rule
        # rejects it (docs/architecture.md, failure modes: force=True "reads" any junk -> require the UIDs)
        (lambda p: _touch(p, b"\x08\x00" + bytes(range(256)) * 4), "no Study Instance UID"),
        (lambda p: shutil.copy(DICOMDIR_TESTS / "DICOMDIR", p), "no Study Instance UID"),
        (lambda p: shutil.copy(PYDICOM_FILES / "reportsi.dcm", p), "not an image"),
        (lambda p: _sr_dataset().save_as(p, enforce_file_format=True), "not an image"),
        (lambda p: shutil.copy(PYDICOM_FILES / "rtplan.dcm", p), "not an image"),
    ],
    ids=["empty", "text", "junk", "dicomdir", "sr-file", "sr-built", "rtplan"],
)
def test_read_record_rejects_with_reason(tmp_path: Path, make: object, reason: str) -> None:
    path = tmp_path / "candidate"
    make(path)  # type: ignore[operator]
    record = read_record(path)
    assert record.header is None
    assert record.reason is not None and record.reason.startswith(reason)
    assert record.size == path.stat().st_size


def test_read_record_missing_uid(tmp_path: Path) -> None:
    ds = slice_dataset((0, 0, 0))
    del ds.SeriesInstanceUID
    ds.save_as(tmp_path / "a", enforce_file_format=True)
    assert read_record(tmp_path / "a").reason == "no Series Instance UID"


@pytest.mark.filterwarnings("ignore:Invalid value for VR")
def test_read_record_bad_numbers_become_none(tmp_path: Path) -> None:
    ds = slice_dataset((0, 0, 0))
    # distinctive valid values, then overwritten in the file bytes with invalid text of the
    # same length (pydicom refuses to write invalid numbers itself)
    ds.InversionTime = "2468.5"
    ds.RepetitionTime = "9753.5"
    ds.SeriesNumber = "8642"
    ds.PixelSpacing = ["0.7531", "0.7531"]
    path = tmp_path / "bad"
    ds.save_as(path, enforce_file_format=True)
    raw = path.read_bytes()
    for good, bad in (
        (b"2468.5", b"abc.de"),
        (b"9753.5", b"      "),
        (b"8642", b"x1y2"),
        (b"0.7531\\0.7531", b"0.7531\\zzzzzz"),
    ):
        assert raw.count(good) == 1
        raw = raw.replace(good, bad)
    path.write_bytes(raw)
    record = read_record(path)
    assert record.header is not None, record.reason
    h = record.header
    assert h.inversion_time_ms is None and h.repetition_time_ms is None
    assert h.series_number is None and h.pixel_spacing_mm is None
    assert h.modality == "MR"


def test_read_record_vanished_file(tmp_path: Path) -> None:
    record = read_record(tmp_path / "gone")
    assert record.header is None and record.reason is not None
    assert record.reason.startswith("cannot read")


def test_discover_shuffled_names(tmp_path: Path) -> None:
    # pydicom dicomdirtests 98892001/CT5N: one series of 5 CT slices
    rng = np.random.default_rng(3)
    sources = sorted((DICOMDIR_TESTS / "98892001" / "CT5N").iterdir())
    names = [f"{n:03d}" for n in rng.permutation(len(sources))]
    for src, name in zip(sources, names, strict=True):
        (tmp_path / name[0]).mkdir(exist_ok=True)
        shutil.copy(src, tmp_path / name[0] / name)
    _touch(tmp_path / "readme.txt", b"hello")
    records = discover([tmp_path])
    usable = [r for r in records if r.header is not None]
    assert len(records) == 6 and len(usable) == 5
    assert len({(r.header.study_uid, r.header.series_uid) for r in usable if r.header}) == 1
    assert [r.path for r in records] == list(iter_candidate_files([tmp_path]))

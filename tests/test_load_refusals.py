"""Series that cannot be read as one volume are refused with one line naming the series."""

from __future__ import annotations

import shutil
from pathlib import Path

import highdicom
import numpy as np
import pydicom
import pytest
from pydicom.dataset import Dataset, FileMetaDataset
from pydicom.uid import (
    BasicTextSRStorage,
    ExplicitVRLittleEndian,
    GrayscaleSoftcopyPresentationStateStorage,
    generate_uid,
)

import flairwatch.intake.load
from flairwatch.errors import InputRejected
from flairwatch.intake.geometry import stack_geometry
from flairwatch.intake.load import load_series, series_label, volume_from_datasets
from flairwatch.records import FileRecord, Series, SeriesHeader
from tests.dicom_fixtures import (
    DICOMDIR_TESTS,
    PRIVATE_SYNTAX_FOR_JP2K,
    PYDICOM_FILES,
    patch_transfer_syntax,
    read_pydicom_file,
    series_in,
    shifted_copy,
    slice_dataset,
    with_geometry,
    write_datasets,
)


def _refusal(series: Series) -> str:
    with pytest.raises(InputRejected) as info:
        load_series(series)
    message = str(info.value)
    assert "\n" not in message
    assert message.startswith(series_label(series.header) + ": ")
    assert "; " in message, "the message says what to do"
    return message


def _one_file_series(path: Path) -> Series:
    header = SeriesHeader(study_uid="1.2.3", series_uid="1.2.3.4.5", series_description="x")
    st = path.stat()
    return Series(header, (FileRecord(path, st.st_size, st.st_mtime_ns, "1.2", header),))


def test_gap_is_refused() -> None:
    # pydicom dicomdirtests 77654033/CT2: 4 slices with a gap (docs/sources.md); highdicom's
    # get_volume_from_series refuses it too (a second validator)
    folder = DICOMDIR_TESTS / "77654033" / "CT2"
    (series,) = series_in(folder)
    assert "gap between slices 1 and 2 of 4" in _refusal(series)
    with pytest.raises(ValueError, match="regularly-spaced"):
        highdicom.get_volume_from_series([pydicom.dcmread(p) for p in sorted(folder.iterdir())])


def test_mr2_localizers_are_refused() -> None:
    # pydicom dicomdirtests 98892003/MR2: three localizer series, each mixing axial, coronal
    # and sagittal images (or holding a single image)
    series = series_in(DICOMDIR_TESTS / "98892003" / "MR2")
    reasons = sorted(_refusal(s).split(": ", 1)[1] for s in series)
    assert len(reasons) == 3
    assert sum("mixed orientations" in r for r in reasons) == 2
    assert sum("only one slice" in r for r in reasons) == 1


def test_mr700_projections_are_refused() -> None:
    # pydicom dicomdirtests 98892003/MR700: derived projections with differing orientations
    folder = DICOMDIR_TESTS / "98892003" / "MR700"
    (series,) = series_in(folder)
    assert "mixed orientations (7 different" in _refusal(series)
    with pytest.raises(ValueError, match="orientation"):
        highdicom.get_volume_from_series([pydicom.dcmread(p) for p in sorted(folder.iterdir())])


def test_truncated_file_is_refused(tmp_path: Path) -> None:
    # pydicom test file MR_truncated.dcm: pixel data 62 bytes short of 64 x 64 x 2 bytes
    path = shutil.copy(PYDICOM_FILES / "MR_truncated.dcm", tmp_path / "a")
    assert "8130 bytes, 8192 expected (file cut short)" in _refusal(_one_file_series(Path(path)))


@pytest.mark.parametrize(
    ("keep", "expected"),
    [
        (700, "MR Image Storage without Rows/Columns (file cut short or damaged); resend"),
        (-500, "expected (file cut short)"),
    ],
    ids=["in-header", "in-pixels"],
)
def test_file_cut_short_is_refused(tmp_path: Path, keep: int, expected: str) -> None:
    # a copy of MR_small.dcm cut inside its header (Rows/Columns lost) or inside its pixels
    # (its last 150 or so bytes are trailing padding after the pixel data)
    raw = (PYDICOM_FILES / "MR_small.dcm").read_bytes()
    (tmp_path / "a").write_bytes(raw[:keep])
    assert expected in _refusal(_one_file_series(tmp_path / "a"))


@pytest.mark.parametrize("content", [b"", b"just some text, not DICOM\n"], ids=["empty", "text"])
def test_empty_and_text_files_are_refused(tmp_path: Path, content: bytes) -> None:
    (tmp_path / "a").write_bytes(content)
    assert _refusal(_one_file_series(tmp_path / "a"))


def test_vanished_file_is_refused(tmp_path: Path) -> None:
    (tmp_path / "a").write_bytes(b"x")
    series = _one_file_series(tmp_path / "a")
    (tmp_path / "a").unlink()
    assert "cannot read a" in _refusal(series)


def test_unknown_transfer_syntax_is_refused(tmp_path: Path) -> None:
    # MR_small_jp2klossless.dcm with its Transfer Syntax UID replaced by a private one
    path = patch_transfer_syntax(
        PYDICOM_FILES / "MR_small_jp2klossless.dcm", tmp_path / "a", PRIVATE_SYNTAX_FOR_JP2K
    )
    message = _refusal(_one_file_series(path))
    assert f"unknown transfer syntax {PRIVATE_SYNTAX_FOR_JP2K}" in message


def test_missing_decoder_names_syntax_and_package(monkeypatch: pytest.MonkeyPatch) -> None:
    class Unavailable:
        is_available = False

    monkeypatch.setattr(flairwatch.intake.load, "get_decoder", lambda uid: Unavailable())
    ds = read_pydicom_file("MR_small_jp2klossless.dcm")
    with pytest.raises(InputRejected) as info:
        volume_from_datasets([ds, shifted_copy(ds, 0.8)], "series y")
    message = str(info.value)
    assert "JPEG 2000 Image Compression (Lossless Only) (1.2.840.10008.1.2.4.90)" in message
    assert "install pylibjpeg and pylibjpeg-openjpeg" in message


def test_syntax_without_any_decoder_is_refused() -> None:
    # MPEG2 is a video syntax pydicom has no pixel decoder for
    ds = read_pydicom_file("MR_small_jp2klossless.dcm")
    ds.file_meta.TransferSyntaxUID = pydicom.uid.MPEG2MPML
    with pytest.raises(InputRejected, match="no decoder for transfer syntax MPEG2"):
        volume_from_datasets([ds, shifted_copy(ds, 0.8)], "series z")


def test_single_slice_is_refused() -> None:
    (series,) = series_in(PYDICOM_FILES / "MR_small.dcm")
    assert "only one slice" in _refusal(series)


def test_duplicate_positions_are_refused() -> None:
    ds = read_pydicom_file("MR_small.dcm")
    with pytest.raises(InputRejected, match="1 duplicate slice position"):
        volume_from_datasets([ds, shifted_copy(ds, 0.0), shifted_copy(ds, 0.8)], "s")


def test_mixed_matrix_sizes_are_refused(tmp_path: Path) -> None:
    datasets = [
        slice_dataset((0, 0, 0), rows=4, columns=5),
        slice_dataset((0, 0, 1), rows=4, columns=5),
        slice_dataset((0, 0, 2), pixels=np.zeros((6, 5), np.uint16)),
    ]
    write_datasets(tmp_path, datasets, ["a", "b", "c"])
    (series,) = series_in(tmp_path)
    assert "mixed matrix sizes (4x5, 6x5)" in _refusal(series)


def test_uneven_spacing_is_refused() -> None:
    datasets = [slice_dataset((0, 0, z)) for z in (0.0, 1.0, 2.3, 3.0)]
    with pytest.raises(InputRejected, match=r"uneven slice spacing \(0\.700 to 1\.300 mm\)"):
        volume_from_datasets(datasets, "s")


def test_spacing_within_tolerance_is_accepted() -> None:
    # positions carry rounded decimals: steps within 1 % (or 0.01 mm) of each other are even
    datasets = [slice_dataset((0, 0, z)) for z in (0.0, 2.004, 4.0, 5.996, 8.0)]
    vol = volume_from_datasets(datasets, "s")
    assert vol.spacing[2] == pytest.approx(2.0)


def test_sheared_stack_is_refused() -> None:
    # positions step along the normal but also sideways (a tilted-gantry style stack)
    with pytest.raises(InputRejected, match="sideways"):
        stack_geometry(
            np.array([[0, 0, 0], [0.5, 0, 2], [1.0, 0, 4]]), (1, 0, 0, 0, 1, 0), (1, 1), "s"
        )


def test_bad_orientation_is_refused() -> None:
    with pytest.raises(InputRejected, match="not two unit perpendicular"):
        stack_geometry(np.array([[0, 0, 0], [0, 0, 1]]), (1, 0, 0, 1, 0, 0), (1, 1), "s")


def test_missing_geometry_is_refused() -> None:
    datasets = [slice_dataset((0, 0, z)) for z in (0.0, 1.0)]
    del datasets[1].ImageOrientationPatient
    with pytest.raises(InputRejected, match="lacks Image Position/Orientation"):
        volume_from_datasets(datasets, "s")


def test_missing_pixel_data_is_refused(tmp_path: Path) -> None:
    datasets = [slice_dataset((0, 0, z)) for z in (0.0, 1.0)]
    del datasets[0].PixelData
    write_datasets(tmp_path, datasets, ["a", "b"])
    (series,) = series_in(tmp_path)
    assert "an image without pixel data" in _refusal(series)


def _non_image(sop_class: str, modality: str) -> Dataset:
    ds = Dataset()
    ds.file_meta = FileMetaDataset()
    ds.file_meta.TransferSyntaxUID = ExplicitVRLittleEndian
    ds.SOPClassUID = sop_class
    ds.SOPInstanceUID = generate_uid()
    ds.Modality = modality
    return ds


@pytest.mark.parametrize(
    ("sop_class", "modality", "name"),
    [
        (BasicTextSRStorage, "SR", "Basic Text SR Storage"),
        (GrayscaleSoftcopyPresentationStateStorage, "PR", "Grayscale Softcopy Presentation"),
    ],
)
def test_non_image_objects_are_refused(sop_class: str, modality: str, name: str) -> None:
    image = slice_dataset((0, 0, 0))
    with pytest.raises(InputRejected, match=f"not an image \\({name}") as info:
        volume_from_datasets([image, _non_image(sop_class, modality)], "series w")
    assert str(info.value).startswith("series w: ")


def test_colour_images_are_refused() -> None:
    ds = with_geometry(read_pydicom_file("SC_rgb_small_odd.dcm"))
    with pytest.raises(InputRejected, match="colour"):
        volume_from_datasets([ds, shifted_copy(ds, 1.0)], "s")


def test_label_is_one_line_and_short() -> None:
    header = SeriesHeader(
        study_uid="1", series_uid="1.2.840.99999.123456789.987654321", series_description="a\nb"
    )
    label = series_label(header)
    assert label == "series ...89.987654321 'a b'"
    assert "\n" not in label and len(label) < 80

"""Volume geometry and voxel values against DICOM PS3.3, SimpleITK, nibabel and pydicom."""

from __future__ import annotations

import warnings
from pathlib import Path

import nibabel as nib
import numpy as np
import pydicom
import pytest
import SimpleITK as sitk
from nibabel.orientations import aff2axcodes
from nibabel.testing import data_path as nibabel_data_path
from pydicom.dataset import Dataset, FileMetaDataset
from pydicom.uid import EnhancedMRImageStorage, ExplicitVRLittleEndian, generate_uid

from flairwatch.errors import InputRejected
from flairwatch.intake.geometry import stack_geometry
from flairwatch.intake.load import load_nifti, load_series, volume_from_datasets
from flairwatch.volume import lps_to_ras
from tests.dicom_fixtures import (
    DICOMDIR_TESTS,
    MR_SMALL_ENCODINGS,
    oblique_stack,
    read_mprage,
    read_pydicom_file,
    series_in,
    shifted_copy,
    slice_dataset,
    with_geometry,
    write_datasets,
)


def ps33_position(
    ipp: np.ndarray, iop: np.ndarray, spacing: tuple[float, float], i: int, j: int
) -> np.ndarray:
    """DICOM PS3.3 C.7.6.2.1.1, equation C.7.6.2.1-1: P = S + i*dc*X + j*dr*Y.

    i = column index, j = row index, (dr, dc) = Pixel Spacing (row spacing, column spacing).
    """
    dr, dc = spacing
    return ipp + i * dc * iop[:3] + j * dr * iop[3:]


def _voxel_to_lps(affine: np.ndarray, i: float, j: float, k: float) -> np.ndarray:
    return (affine @ np.array([i, j, k, 1.0]))[:3]


def test_mr_small_matches_ps33_equation() -> None:
    # docs/sources.md: MR_small IPP [-83.9063, -91.2, 6.6406], spacing 0.3125, IOP [1,0,0,0,1,0];
    # two slices (the file and a copy 0.8 mm along the normal) make a volume
    ds = read_pydicom_file("MR_small.dcm")
    ipp = np.array([-83.9063, -91.2, 6.6406])
    iop = np.array([1.0, 0, 0, 0, 1, 0])
    vol = volume_from_datasets([shifted_copy(ds, 0.8), ds], "MR_small")
    assert vol.shape == (64, 64, 2)
    for i, j in [(0, 0), (63, 0), (0, 63), (17, 42)]:
        expected = ps33_position(ipp, iop, (0.3125, 0.3125), i, j)
        np.testing.assert_allclose(_voxel_to_lps(vol.affine_lps, i, j, 0), expected, atol=1e-6)
    np.testing.assert_allclose(vol.spacing, (0.3125, 0.3125, 0.8), atol=1e-6)
    # the pixel at (row j, column i) of the file is voxel (i, j, 0)
    pixels = ds.pixel_array
    assert vol.data[17, 42, 0] == pixels[42, 17]


def test_non_square_oblique_spacing_is_not_swapped() -> None:
    # Pixel Spacing is (row spacing, column spacing) per PS3.3 C.7.6.2.1.1: a column-index step
    # moves by the column spacing along the row cosine X.
    iop = np.array([0.8, 0.6, 0.0, 0.0, 0.0, -1.0])  # oblique axial-ish X, Y towards Inferior
    spacing = (0.5, 2.0)  # row spacing 0.5 mm, column spacing 2.0 mm
    rows, cols = 3, 5
    marked = np.zeros((rows, cols), dtype=np.uint16)
    marked[2, 4] = 1000  # row j = 2, column i = 4
    slices = [
        slice_dataset(
            np.array([10.0, 20.0, 30.0]) + k * 3.0 * np.cross(iop[:3], iop[3:]),
            iop,
            spacing,
            marked,
        )
        for k in (2, 0, 1)
    ]
    vol = volume_from_datasets(slices, "test")
    assert vol.shape == (cols, rows, 3)
    assert vol.data[4, 2, 0] == 1000 and vol.data.sum() == 3000
    expected = ps33_position(np.array([10.0, 20.0, 30.0]), iop, spacing, 4, 2)
    np.testing.assert_allclose(_voxel_to_lps(vol.affine_lps, 4, 2, 0), expected, atol=1e-9)
    np.testing.assert_allclose(vol.spacing, (2.0, 0.5, 3.0), atol=1e-9)


def _sitk_affine(image: sitk.Image) -> np.ndarray:
    """SimpleITK origin/spacing/direction (LPS, direction columns = axis directions) as 4x4."""
    direction = np.array(image.GetDirection()).reshape(3, 3)
    affine = np.eye(4)
    affine[:3, :3] = direction @ np.diag(image.GetSpacing())
    affine[:3, 3] = image.GetOrigin()
    return affine


def _sitk_read(folder: Path) -> sitk.Image:
    reader = sitk.ImageSeriesReader()
    reader.SetFileNames(sitk.ImageSeriesReader.GetGDCMSeriesFileNames(str(folder)))
    reader.SetOutputPixelType(sitk.sitkFloat32)
    return reader.Execute()


def _assert_matches_sitk(folder: Path) -> None:
    (series,) = series_in(folder)
    vol = load_series(series)
    image = _sitk_read(folder)
    np.testing.assert_allclose(vol.affine_lps, _sitk_affine(image), atol=1e-4)
    # SimpleITK's array is [k, j, i]; ours is [i, j, k]
    np.testing.assert_allclose(vol.data, sitk.GetArrayFromImage(image).transpose(2, 1, 0))


def test_ct5n_matches_simpleitk() -> None:
    # pydicom dicomdirtests 98892001/CT5N: clean 5-slice series, 2.5 mm apart
    _assert_matches_sitk(DICOMDIR_TESTS / "98892001" / "CT5N")
    (series,) = series_in(DICOMDIR_TESTS / "98892001" / "CT5N")
    assert load_series(series).spacing[2] == pytest.approx(2.5, abs=1e-4)


def test_oblique_shuffled_series_matches_simpleitk(tmp_path: Path) -> None:
    # constructed: oblique, non-square pixels (0.9 x 1.3 mm), written in shuffled order under
    # names that sort against the geometry, Instance Numbers scrambled
    datasets = oblique_stack(6)
    names = [f"z{9 - n}" for n in range(len(datasets))]
    write_datasets(tmp_path, datasets, names)
    _assert_matches_sitk(tmp_path)


def test_rescale_is_applied() -> None:
    # Rescale Slope/Intercept map stored values to output units (PS3.3 C.7.6.1.1 / C.11.1.1.2)
    a = slice_dataset((0, 0, 0), pixels=np.full((2, 2), 10, np.uint16), slope=2.5, intercept=-7)
    b = slice_dataset((0, 0, 1), pixels=np.full((2, 2), 4, np.uint16))
    vol = volume_from_datasets([b, a], "test")
    assert vol.data.dtype == np.float32
    np.testing.assert_array_equal(vol.data[:, :, 0], 18.0)
    np.testing.assert_array_equal(vol.data[:, :, 1], 4.0)


@pytest.mark.parametrize("name", MR_SMALL_ENCODINGS)
def test_every_mr_small_encoding_gives_the_same_pixels(name: str) -> None:
    # pydicom test_files README: these files are MR_small.dcm re-encoded (same pixels)
    reference = read_pydicom_file("MR_small.dcm").pixel_array.T.astype(np.float32)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # "_padded" warns about its excess padding
        ds = read_pydicom_file(name)
        vol = volume_from_datasets([ds, shifted_copy(ds, 0.8)], name)
    np.testing.assert_array_equal(vol.data[:, :, 0], reference)
    np.testing.assert_array_equal(vol.data[:, :, 1], reference)


def test_jpeg_extended_12_bit_decodes() -> None:
    # pydicom pixel reference for JPGExtended.dcm (JPEG Extended, 12-bit): arr[420, 140] == 244
    # and arr[230, 120] == 95, arr indexed [row, column]
    ds = with_geometry(read_pydicom_file("JPGExtended.dcm"))
    vol = volume_from_datasets([ds, shifted_copy(ds, 1.0)], "JPGExtended")
    assert vol.shape == (256, 1024, 2)
    assert vol.data[140, 420, 0] == 244
    assert vol.data[120, 230, 1] == 95


def test_jpeg_lossy_bad_codestream_is_refused_in_one_line() -> None:
    # pydicom's pixel reference marks JPEG-lossy.dcm "Bad JPEG codestream" (JPGExtended.dcm is
    # its fixed version): the shipped decoders cannot decode it, and we say so in one line
    ds = with_geometry(read_pydicom_file("JPEG-lossy.dcm"))
    with pytest.raises(InputRejected, match=r"cannot be decoded \(JPEG Extended") as info:
        volume_from_datasets([ds, shifted_copy(ds, 1.0)], "series x")
    assert "\n" not in str(info.value) and str(info.value).startswith("series x: ")


def test_nifti_affine_matches_nibabel() -> None:
    # nibabel testing data anatomical.nii is LAS (docs/sources.md); load_nifti stores LPS
    path = Path(str(nibabel_data_path)) / "anatomical.nii"
    img = nib.load(path)
    assert isinstance(img, nib.Nifti1Image)
    vol = load_nifti(path)
    np.testing.assert_allclose(lps_to_ras(vol.affine_lps), img.affine)
    assert aff2axcodes(vol.affine_ras) == ("L", "A", "S")
    # read with LPS axis labels (+x = Left, +y = Posterior) the LPS affine names the same
    # anatomical directions: the conversion moved the world, not the voxels
    lps_labels = (("R", "L"), ("A", "P"), ("I", "S"))
    assert aff2axcodes(vol.affine_lps, labels=lps_labels) == ("L", "A", "S")
    assert aff2axcodes(img.affine, labels=lps_labels) != ("L", "A", "S")
    np.testing.assert_array_equal(vol.data, img.get_fdata(dtype=np.float32))


def test_nifti_4d_with_one_volume_is_accepted(tmp_path: Path) -> None:
    rng = np.random.default_rng(0)
    data = rng.random((4, 5, 6, 1)).astype(np.float32)
    affine = np.diag([2.0, 3.0, 4.0, 1.0])
    nib.save(nib.Nifti1Image(data, affine), tmp_path / "one.nii.gz")
    vol = load_nifti(tmp_path / "one.nii.gz")
    assert vol.shape == (4, 5, 6)
    np.testing.assert_allclose(vol.affine_ras, affine)
    np.testing.assert_array_equal(vol.data, data[..., 0])


def test_nifti_true_4d_is_refused() -> None:
    # nibabel testing data example4d.nii.gz has several volumes
    with pytest.raises(InputRejected, match="3-D"):
        load_nifti(Path(str(nibabel_data_path)) / "example4d.nii.gz")


def test_enhanced_multiframe_geometry() -> None:
    # nibabel nicom test data philips_mprage.dcm.gz: enhanced MR, 176 frames with per-frame
    # Plane Position/Orientation and Pixel Measures (pixels are zero: geometry only)
    ds = read_mprage()
    vol = volume_from_datasets([ds], "mprage")
    assert vol.shape == (256, 256, 176)
    frames = ds.PerFrameFunctionalGroupsSequence
    iop = np.array(
        [float(v) for v in frames[0].PlaneOrientationSequence[0].ImageOrientationPatient]
    )
    dr, dc = (float(v) for v in frames[0].PixelMeasuresSequence[0].PixelSpacing)
    spacing = (dr, dc)
    positions = np.array(
        [[float(v) for v in f.PlanePositionSequence[0].ImagePositionPatient] for f in frames]
    )
    # every frame's position, through the PS3.3 equation, is one k-plane of the affine
    corners = np.array([_voxel_to_lps(vol.affine_lps, 0, 0, k) for k in range(176)])
    for p in positions:
        assert np.min(np.linalg.norm(corners - p, axis=1)) < 1e-3
    k = int(np.argmin(np.linalg.norm(corners - positions[7], axis=1)))
    np.testing.assert_allclose(
        _voxel_to_lps(vol.affine_lps, 200, 31, k),
        ps33_position(positions[7], iop, spacing, 200, 31),
        atol=1e-3,
    )
    # nibabel's MultiframeWrapper: its array axes are (row, column, slice) and it may stack
    # the slices the other way, so compare the grid's corner points as sets
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # nibabel warns that its DICOM readers are experimental
        from nibabel.nicom import dicomwrappers

        ref = dicomwrappers.wrapper_from_data(ds).affine
    ours = {
        tuple(np.round(_voxel_to_lps(vol.affine_lps, i, j, k), 2))
        for i in (0, 255)
        for j in (0, 255)
        for k in (0, 175)
    }
    theirs = {
        tuple(np.round(_voxel_to_lps(ref, j, i, k), 2))
        for i in (0, 255)
        for j in (0, 255)
        for k in (0, 175)
    }
    assert ours == theirs


def test_stack_geometry_orders_by_normal_not_input() -> None:
    # slices listed out of order; the normal of X=(0,1,0), Y=(0,0,-1) is X x Y = (-1,0,0)
    positions = [[-2.0, 0, 0], [0.0, 0, 0], [-4.0, 0, 0], [-6.0, 0, 0]]
    order, affine = stack_geometry(positions, (0, 1, 0, 0, 0, -1), (1.0, 1.0), "t")
    assert list(order) == [1, 0, 2, 3]
    np.testing.assert_allclose(affine[:3, 2], [-2.0, 0, 0])
    np.testing.assert_allclose(affine[:3, 3], [0.0, 0, 0])


def test_instance_numbers_do_not_decide_order() -> None:
    first = slice_dataset((0, 0, 5.0), instance_number=1, pixels=np.full((2, 2), 1, np.uint16))
    second = slice_dataset((0, 0, 0.0), instance_number=2, pixels=np.full((2, 2), 2, np.uint16))
    vol = volume_from_datasets([first, second], "t")
    assert vol.data[0, 0, 0] == 2 and vol.data[0, 0, 1] == 1
    assert vol.affine_lps[2, 3] == 0.0


def test_pydicom_reads_what_we_wrote(tmp_path: Path) -> None:
    # constructed series round-trips through files with the same volume as in memory
    datasets = oblique_stack(4, seed=11)
    write_datasets(tmp_path, datasets, [f"f{n}" for n in range(4)])
    (series,) = series_in(tmp_path)
    from_files = load_series(series)
    in_memory = volume_from_datasets([pydicom.dcmread(r.path) for r in series.files], "t")
    np.testing.assert_array_equal(from_files.data, in_memory.data)
    np.testing.assert_allclose(from_files.affine_lps, in_memory.affine_lps)


def test_jpeg_lossless_process_14_made_by_gdcm(tmp_path: Path) -> None:
    # No JPEG Lossless (Process 14) file ships with pydicom (docs/sources.md), so GDCM, inside
    # SimpleITK, writes one: three slices, lossless, so the decode must give back the input.
    rng = np.random.default_rng(1)
    stack = rng.integers(0, 3000, size=(3, 7, 5)).astype(np.int16)  # [k, j, i]
    for k in range(3):
        image = sitk.GetImageFromArray(stack[k])
        image.SetSpacing((1.3, 0.9))  # along i (column spacing), along j (row spacing)
        for tag, value in [
            ("0008|0016", "1.2.840.10008.5.1.4.1.1.4"),  # MR Image Storage
            ("0008|0060", "MR"),
            ("0020|000d", "1.2.826.0.1.3680043.8.498.78"),
            ("0020|000e", "1.2.826.0.1.3680043.8.498.77"),
            ("0008|0018", f"1.2.826.0.1.3680043.8.498.79.{k}"),
            ("0020|0032", f"1\\2\\{3 + 2.5 * k}"),
            ("0020|0037", "1\\0\\0\\0\\1\\0"),
            ("0028|0030", "0.9\\1.3"),
        ]:
            image.SetMetaData(tag, value)
        writer = sitk.ImageFileWriter()
        writer.KeepOriginalImageUIDOn()
        writer.SetImageIO("GDCMImageIO")
        writer.SetUseCompression(True)
        writer.SetCompressor("JPEG")  # GDCM's JPEG is lossless Process 14, Selection Value 1
        writer.SetFileName(str(tmp_path / f"s{2 - k}"))
        writer.Execute(image)
    syntax = pydicom.dcmread(tmp_path / "s0", stop_before_pixels=True).file_meta.TransferSyntaxUID
    assert syntax == pydicom.uid.JPEGLosslessSV1
    (series,) = series_in(tmp_path)
    vol = load_series(series)
    np.testing.assert_array_equal(vol.data, stack.transpose(2, 1, 0))
    np.testing.assert_allclose(vol.spacing, (1.3, 0.9, 2.5))


def _enhanced(frames: list[Dataset], *, shared_plane: bool) -> Dataset:
    """An enhanced MR object holding classic slices as frames (PS3.3 C.7.6.16)."""
    first = frames[0]
    ds = Dataset()
    ds.file_meta = FileMetaDataset()
    ds.file_meta.TransferSyntaxUID = ExplicitVRLittleEndian
    ds.SOPClassUID = EnhancedMRImageStorage
    ds.SOPInstanceUID = generate_uid()
    for keyword in (
        "StudyInstanceUID", "SeriesInstanceUID", "Modality", "Rows", "Columns",
        "SamplesPerPixel", "PhotometricInterpretation", "BitsAllocated", "BitsStored",
        "HighBit", "PixelRepresentation",
    ):  # fmt: skip
        setattr(ds, keyword, getattr(first, keyword))
    ds.NumberOfFrames = len(frames)
    shared = Dataset()
    per_frame = []
    for frame in frames:
        item = Dataset()
        position = Dataset()
        position.ImagePositionPatient = frame.ImagePositionPatient
        item.PlanePositionSequence = [position]
        transform = Dataset()
        transform.RescaleSlope = frame.get("RescaleSlope", 1)
        transform.RescaleIntercept = frame.get("RescaleIntercept", 0)
        transform.RescaleType = "US"
        item.PixelValueTransformationSequence = [transform]
        per_frame.append(item)
    orientation = Dataset()
    orientation.ImageOrientationPatient = first.ImageOrientationPatient
    measures = Dataset()
    measures.PixelSpacing = first.PixelSpacing
    measures.SliceThickness = 1.0
    if shared_plane:
        shared.PlaneOrientationSequence = [orientation]
        shared.PixelMeasuresSequence = [measures]
    else:
        for item in per_frame:
            item.PlaneOrientationSequence = [orientation]
            item.PixelMeasuresSequence = [measures]
    ds.SharedFunctionalGroupsSequence = [shared]
    ds.PerFrameFunctionalGroupsSequence = per_frame
    ds.PixelData = b"".join(bytes(f.PixelData) for f in frames)
    return ds


@pytest.mark.parametrize("shared_plane", [True, False], ids=["shared", "per-frame"])
def test_enhanced_matches_the_same_classic_slices(shared_plane: bool) -> None:
    # PS3.3 C.7.6.16: orientation and pixel measures may sit in the shared or per-frame
    # functional groups; either way the volume equals the one from classic images
    classic = oblique_stack(5, seed=3)
    classic[1].RescaleSlope, classic[1].RescaleIntercept = 2.0, -10.0
    enhanced = _enhanced(classic, shared_plane=shared_plane)
    expected = volume_from_datasets(classic, "classic")
    got = volume_from_datasets([enhanced], "enhanced")
    np.testing.assert_array_equal(got.data, expected.data)
    np.testing.assert_allclose(got.affine_lps, expected.affine_lps, atol=1e-9)

"""Phantom generator: geometry against SimpleITK and nibabel, determinism, truth masks, bank.

Small grids on the 2 mm template keep this file fast.
"""

from __future__ import annotations

import dataclasses
import json
from pathlib import Path

import highdicom as hd
import nibabel as nib
import numpy as np
import pydicom
import pytest
import SimpleITK as sitk

from flairwatch.phantom import (
    GENERATOR_VERSION,
    HELD_OUT_SEEDS,
    PhantomCase,
    PhantomParams,
    generate,
    make_bank,
    make_other_contrast,
    sample_params,
    write_case,
)
from flairwatch.volume import lps_to_ras


def small_params(seed: int, kind: str = "2d_axial", load_ml: float = 12.0) -> PhantomParams:
    """Random parameters shrunk to a coarse grid on the 2 mm template."""
    p = sample_params(seed, kind=kind, load_ml=load_ml)
    if kind == "2d_axial":
        acq = dataclasses.replace(
            p.acquisition,
            matrix=(64, 56),
            inplane_mm=3.6,
            slice_mm=4.0,
            gap_mm=1.0,
            n_slices=30,
            tilt_deg=12.0,
        )
    else:
        acq = dataclasses.replace(
            p.acquisition,
            matrix=(60, 64),
            inplane_mm=3.6,
            slice_mm=3.6,
            gap_mm=0.0,
            n_slices=42,
            tilt_deg=-6.0,
        )
    return dataclasses.replace(p, acquisition=acq, template_mm=2)


@pytest.fixture(scope="module")
def axial_case() -> PhantomCase:
    return generate(small_params(7))


def read_series(folder: Path) -> sitk.Image:
    reader = sitk.ImageSeriesReader()
    reader.SetFileNames(reader.GetGDCMSeriesFileNames(str(folder)))
    return reader.Execute()


def assert_same_grid(img: sitk.Image, affine_lps: np.ndarray, shape: tuple[int, int, int]) -> None:
    # SimpleITK (ITK) images live in LPS: direction columns times spacing, origin = first voxel.
    spacing = np.array(img.GetSpacing())
    direction = np.array(img.GetDirection()).reshape(3, 3)
    np.testing.assert_allclose(direction * spacing, affine_lps[:3, :3], atol=1e-4)
    np.testing.assert_allclose(img.GetOrigin(), affine_lps[:3, 3], atol=1e-3)
    assert img.GetSize() == shape


@pytest.mark.parametrize("kind", ["2d_axial", "3d_sagittal"])
def test_series_geometry_matches_volume(tmp_path: Path, kind: str, axial_case: PhantomCase) -> None:
    case = axial_case if kind == "2d_axial" else generate(small_params(8, kind=kind))
    write_case(case, tmp_path / "c", patient_id="INV-001", patient_name="Invented^Person")
    img = read_series(tmp_path / "c" / "image")
    assert_same_grid(img, case.image.affine_lps, case.image.shape)
    # Second oracle (docs/sources.md): highdicom builds the same volume from the datasets.
    datasets = [pydicom.dcmread(f) for f in (tmp_path / "c" / "image").glob("*.dcm")]
    hd_vol = hd.get_volume_from_series(datasets)
    assert hd_vol.spatial_shape[0] == case.image.shape[2]
    np.testing.assert_allclose(sorted(hd_vol.spacing), sorted(case.image.spacing), atol=1e-4)
    # Pixels: GetArrayFromImage gives (k, j, i); the Volume holds (i, j, k).
    pixels = sitk.GetArrayFromImage(img).transpose(2, 1, 0)
    np.testing.assert_array_equal(pixels, np.clip(np.rint(case.image.data), 0, 4095))

    # NIfTI references lie on the same grid: read by SimpleITK (LPS) and nibabel (RAS).
    for name, vol in (
        ("wmh_reference.nii.gz", case.wmh),
        ("intracranial_mask.nii.gz", case.intracranial),
    ):
        ref = sitk.ReadImage(str(tmp_path / "c" / name))
        assert_same_grid(ref, case.image.affine_lps, case.image.shape)
        nii = nib.nifti1.load(tmp_path / "c" / name)
        np.testing.assert_allclose(
            np.asarray(nii.affine, dtype=np.float64), lps_to_ras(case.image.affine_lps), atol=1e-4
        )
        assert nii.get_data_dtype() == np.uint8
        np.testing.assert_array_equal(np.asarray(nii.dataobj), vol.data)


def test_dicom_header(tmp_path: Path, axial_case: PhantomCase) -> None:
    write_case(axial_case, tmp_path / "c", patient_id="INV-002", patient_name="Invented^Two")
    files = sorted((tmp_path / "c" / "image").glob("*.dcm"))
    assert len(files) == axial_case.image.shape[2]
    ds = pydicom.dcmread(files[0])
    assert ds.file_meta.TransferSyntaxUID == pydicom.uid.ExplicitVRLittleEndian
    assert ds.SOPClassUID == pydicom.uid.MRImageStorage  # DICOM PS3.4 MR Image Storage
    assert ds.Modality == "MR" and ds.ScanningSequence == "IR" and ds.MRAcquisitionType == "2D"
    assert float(ds.InversionTime) == pytest.approx(axial_case.params.acquisition.ti_ms, abs=0.1)
    assert ds.PatientID == "INV-002" and ds.SeriesDescription == "AX T2 FLAIR"
    assert list(ds.ImageType) == ["ORIGINAL", "PRIMARY", "M"]
    # PS3.3 C.7.6.2.1.1: Pixel Spacing = row spacing \ column spacing; thickness + gap = spacing.
    assert float(ds.PixelSpacing[0]) == pytest.approx(3.6)
    assert float(ds.SliceThickness) == 4.0 and float(ds.SpacingBetweenSlices) == pytest.approx(5.0)
    uids = {pydicom.dcmread(f, stop_before_pixels=True).SOPInstanceUID for f in files}
    assert len(uids) == len(files)
    meta = json.loads((tmp_path / "c" / "case.json").read_text(encoding="utf-8"))
    assert meta["generator_version"] == GENERATOR_VERSION
    assert meta["truth"]["lesion_volume_ml"] == pytest.approx(axial_case.lesion_volume_ml, abs=1e-3)


def test_deterministic(axial_case: PhantomCase) -> None:
    again = generate(small_params(7))
    np.testing.assert_array_equal(again.image.data, axial_case.image.data)
    np.testing.assert_array_equal(again.wmh.data, axial_case.wmh.data)
    other = generate(small_params(9))
    assert not np.array_equal(other.image.data, axial_case.image.data)


def test_truth_masks_are_plausible(axial_case: PhantomCase) -> None:
    img, wmh, icv = (
        axial_case.image.data,
        axial_case.wmh.data.astype(bool),
        axial_case.intracranial.data.astype(bool),
    )
    assert wmh.any() and not (wmh & ~icv).any()  # lesions lie inside the skull
    # Intracranial volume of an adult, scaled template: roughly 1.0-2.0 L (from memory: ~1.2-1.8 L).
    assert 1000.0 < axial_case.intracranial_volume_ml < 2000.0
    # Lesions are bright on FLAIR: brighter than the typical intracranial voxel.
    assert np.median(img[wmh]) > 1.15 * np.median(img[icv & ~wmh])
    # The truth volume tracks the requested load (12 mL here) within the generator's design
    # tolerance (a calibration, so a loose band: 0.6x to 1.5x).
    assert 7.2 < axial_case.lesion_volume_ml < 18.0
    free = generate(small_params(7, load_ml=0.0))
    assert free.wmh.data.sum() == 0


def test_other_contrast_same_grid(axial_case: PhantomCase) -> None:
    t1 = make_other_contrast(axial_case, "t1")
    assert t1.shape == axial_case.image.shape
    np.testing.assert_array_equal(t1.affine_lps, axial_case.image.affine_lps)
    icv = axial_case.intracranial.data.astype(bool)
    wmh = axial_case.wmh.data.astype(bool)
    # Common practice: WMH are bright on FLAIR but iso- or hypointense on T1-weighted spin echo,
    # so on T1 they fall below the brightest tenth of the other intracranial voxels (mostly WM).
    rest = icv & ~wmh
    assert np.median(axial_case.image.data[wmh]) > np.percentile(axial_case.image.data[rest], 90)
    assert np.median(t1.data[wmh]) < np.percentile(t1.data[rest], 90)


def test_sample_params_cover_the_range() -> None:
    draws = [sample_params(s) for s in range(300)]
    assert {p.acquisition.kind for p in draws} == {"2d_axial", "3d_sagittal"}
    assert {p.acquisition.field_strength_t for p in draws} == {1.5, 3.0}
    loads = np.array([p.lesion_load_ml for p in draws])
    assert loads.min() == 0.0 and loads.max() <= 60.0 and loads.max() > 30.0
    assert np.mean(loads < 5.0) > 0.45  # skewed towards small loads
    for p in draws:
        a = p.acquisition
        if a.kind == "2d_axial":
            assert (
                0.4 <= a.inplane_mm <= 1.0 and 3.0 <= a.slice_mm <= 5.0 and abs(a.tilt_deg) <= 15.0
            )
        else:
            assert a.inplane_mm == 1.0 and a.slice_mm == 1.0 and a.gap_mm == 0.0
    assert sample_params(5) == sample_params(5)
    # Pinning one property leaves the other draws unchanged.
    assert sample_params(5, load_ml=3.0).acquisition.tr_ms == sample_params(5).acquisition.tr_ms
    assert min(HELD_OUT_SEEDS) >= 100000


def _tiny(seed: int) -> PhantomParams:
    return small_params(seed, load_ml=2.0)


def test_bank_resumes(tmp_path: Path) -> None:
    first = make_bank(tmp_path, [3], progress=False, params_fn=_tiny)
    assert [p.name for p in first] == ["case-00003"]
    stamp = (first[0] / "case.json").stat().st_mtime_ns
    (tmp_path / "case-00004" / "image").mkdir(parents=True)  # leftover of an interrupted run
    again = make_bank(tmp_path, [3, 4], progress=False, params_fn=_tiny)
    assert (again[0] / "case.json").stat().st_mtime_ns == stamp  # complete case kept
    assert (again[1] / "case.json").is_file()


def test_write_series_non_square_pixels(tmp_path: Path) -> None:
    # PS3.3 C.7.6.2.1.1: Pixel Spacing = row spacing (along j) \ column spacing (along i);
    # SimpleITK reports spacing in (i, j, k) order, so unequal i/j spacings catch a swap.
    from flairwatch.phantom.acquire import rotation
    from flairwatch.phantom.dicom_writer import write_series
    from flairwatch.volume import Volume

    affine = np.eye(4)
    affine[:3, :3] = rotation((11.0, -4.0, 7.0)) @ np.diag([0.5, 0.8, 3.0])
    affine[:3, 3] = [-60.0, -80.0, -40.0]
    data = np.arange(20 * 14 * 5, dtype=np.float32).reshape(20, 14, 5) % 4000
    vol = Volume(data, affine)
    header = {
        "PatientID": "INV-003",
        "PatientName": "Invented^Three",
        "StudyInstanceUID": "1.2.826.0.1.3680043.8.498.1",
        "SeriesInstanceUID": "1.2.826.0.1.3680043.8.498.2",
        "SeriesDescription": "AX T1 SE",
    }
    files = write_series(vol, tmp_path / "s", header=header)
    ds = pydicom.dcmread(files[0])
    assert [float(x) for x in ds.PixelSpacing] == [0.8, 0.5]
    assert (ds.Rows, ds.Columns) == (14, 20)
    img = read_series(tmp_path / "s")
    assert_same_grid(img, affine, (20, 14, 5))
    np.testing.assert_array_equal(sitk.GetArrayFromImage(img).transpose(2, 1, 0), data)


def test_other_contrast_case_folder(tmp_path: Path, axial_case: PhantomCase) -> None:
    write_case(
        axial_case,
        tmp_path / "t1",
        patient_id="INV-004",
        patient_name="Invented^Four",
        contrast="t1",
    )
    write_case(axial_case, tmp_path / "fl", patient_id="INV-004", patient_name="Invented^Four")
    t1 = pydicom.dcmread(next((tmp_path / "t1" / "image").glob("*.dcm")))
    fl = pydicom.dcmread(next((tmp_path / "fl" / "image").glob("*.dcm")))
    assert t1.ScanningSequence == "SE" and "InversionTime" not in t1
    assert t1.SeriesDescription == "AX T1 SE"
    assert t1.StudyInstanceUID == fl.StudyInstanceUID  # same seed, same study
    assert t1.SeriesInstanceUID != fl.SeriesInstanceUID
    assert t1.FrameOfReferenceUID == fl.FrameOfReferenceUID  # same grid, same frame
    assert (
        json.loads((tmp_path / "t1" / "case.json").read_text(encoding="utf-8"))["contrast"] == "t1"
    )

"""DICOM helpers shared by the discover/assemble/select/load tests.

Reference files are read from the packages that ship them (pydicom test files, nibabel test
data; see docs/sources.md); constructed datasets are built in memory with pydicom.
"""

from __future__ import annotations

import copy
import gzip
import io
from collections.abc import Sequence
from pathlib import Path

import nibabel
import numpy as np
import pydicom
from pydicom.dataset import Dataset, FileMetaDataset
from pydicom.uid import UID, ExplicitVRLittleEndian, MRImageStorage, generate_uid

from flairwatch.intake.assemble import group_series
from flairwatch.intake.discover import discover
from flairwatch.records import Series

PYDICOM_FILES = Path(pydicom.__file__).parent / "data" / "test_files"
DICOMDIR_TESTS = PYDICOM_FILES / "dicomdirtests"
NIBABEL_DICOM = Path(nibabel.__file__).parent / "nicom" / "tests" / "data"
NIBABEL_DATA = Path(nibabel.__file__).parent / "tests" / "data"

# pydicom test_files README: MR_small.dcm and its re-encodings hold the same 64x64 image.
MR_SMALL_ENCODINGS = (
    "MR_small_implicit.dcm",
    "MR_small_bigendian.dcm",
    "MR_small_expb.dcm",
    "MR_small_RLE.dcm",
    "MR_small_jp2klossless.dcm",
    "MR_small_jpeg_ls_lossless.dcm",
    "MR_small_padded.dcm",
)


def read_pydicom_file(name: str) -> Dataset:
    """A pydicom test file, read in full."""
    return pydicom.dcmread(PYDICOM_FILES / name)


def read_mprage() -> Dataset:
    """nibabel's enhanced multi-frame MR (176 frames, per-frame geometry, zero pixels)."""
    with gzip.open(NIBABEL_DICOM / "philips_mprage.dcm.gz") as fh:
        return pydicom.dcmread(io.BytesIO(fh.read()))


def series_in(*roots: Path) -> list[Series]:
    """Discover and group the series under ``roots`` (unusable files dropped)."""
    series, _ = group_series(discover(list(roots)))
    return series


def slice_dataset(
    position: Sequence[float] | np.ndarray,
    orientation: Sequence[float] | np.ndarray = (1, 0, 0, 0, 1, 0),
    pixel_spacing: tuple[float, float] = (1.0, 1.0),
    pixels: np.ndarray | None = None,
    *,
    rows: int = 4,
    columns: int = 5,
    series_uid: str = "1.2.826.0.1.3680043.8.498.1",
    study_uid: str = "1.2.826.0.1.3680043.8.498.2",
    instance_number: int = 1,
    description: str = "test stack",
    slope: float | None = None,
    intercept: float | None = None,
) -> Dataset:
    """A classic single-frame MR image built in memory (Explicit VR Little Endian, uint16).

    ``pixels`` has shape (rows, columns) as DICOM stores it ([row j, column i]).
    """
    if pixels is None:
        pixels = np.arange(rows * columns, dtype=np.uint16).reshape(rows, columns)
    ds = Dataset()
    ds.file_meta = FileMetaDataset()
    ds.file_meta.TransferSyntaxUID = ExplicitVRLittleEndian
    ds.file_meta.MediaStorageSOPClassUID = MRImageStorage
    sop_uid = generate_uid()
    ds.file_meta.MediaStorageSOPInstanceUID = sop_uid
    ds.SOPClassUID = MRImageStorage
    ds.SOPInstanceUID = sop_uid
    ds.StudyInstanceUID = study_uid
    ds.SeriesInstanceUID = series_uid
    ds.Modality = "MR"
    ds.SeriesDescription = description
    ds.InstanceNumber = instance_number
    ds.ImagePositionPatient = [float(v) for v in position]
    ds.ImageOrientationPatient = [float(v) for v in orientation]
    ds.PixelSpacing = [float(v) for v in pixel_spacing]
    ds.Rows, ds.Columns = pixels.shape
    ds.SamplesPerPixel = 1
    ds.PhotometricInterpretation = "MONOCHROME2"
    ds.BitsAllocated = 16
    ds.BitsStored = 16
    ds.HighBit = 15
    ds.PixelRepresentation = 0
    if slope is not None:
        ds.RescaleSlope = slope
    if intercept is not None:
        ds.RescaleIntercept = intercept
    ds.PixelData = np.ascontiguousarray(pixels, dtype="<u2").tobytes()
    return ds


def oblique_orientation(seed: int = 7) -> tuple[float, ...]:
    """Row and column direction cosines of a fixed random rotation (unit, perpendicular)."""
    rng = np.random.default_rng(seed)
    q, _ = np.linalg.qr(rng.normal(size=(3, 3)))
    return tuple(float(v) for v in (*q[:, 0], *q[:, 1]))


def oblique_stack(
    n: int = 6,
    *,
    spacing: float = 2.5,
    pixel_spacing: tuple[float, float] = (0.9, 1.3),
    rows: int = 7,
    columns: int = 5,
    seed: int = 7,
) -> list[Dataset]:
    """An oblique stack with non-square pixels, slices in shuffled order, scrambled numbers."""
    rng = np.random.default_rng(seed)
    iop = oblique_orientation(seed)
    normal = np.cross(iop[:3], iop[3:])
    origin = np.array([-20.5, 13.25, 40.0])
    datasets = []
    for k in rng.permutation(n):
        pixels = rng.integers(0, 4000, size=(rows, columns)).astype(np.uint16)
        datasets.append(
            slice_dataset(
                origin + k * spacing * normal,
                iop,
                pixel_spacing,
                pixels,
                instance_number=int(rng.integers(1, 1000)),
            )
        )
    return datasets


def write_datasets(folder: Path, datasets: Sequence[Dataset], names: Sequence[str]) -> list[Path]:
    """Write datasets as Part 10 files under ``folder`` with the given names."""
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for ds, name in zip(datasets, names, strict=True):
        path = folder / name
        path.parent.mkdir(parents=True, exist_ok=True)
        ds.save_as(path, enforce_file_format=True)
        paths.append(path)
    return paths


def shifted_copy(ds: Dataset, distance_mm: float) -> Dataset:
    """A copy of ``ds`` moved along its slice normal, with a new SOP Instance UID."""
    out = copy.deepcopy(ds)
    iop = np.array([float(v) for v in ds.ImageOrientationPatient])
    normal = np.cross(iop[:3], iop[3:])
    ipp = np.array([float(v) for v in ds.ImagePositionPatient]) + distance_mm * normal
    out.ImagePositionPatient = [float(v) for v in ipp]
    uid = generate_uid()
    out.SOPInstanceUID = uid
    if hasattr(out, "file_meta"):
        out.file_meta.MediaStorageSOPInstanceUID = uid
    return out


def with_geometry(ds: Dataset) -> Dataset:
    """A copy of a file without plane geometry (e.g. NM, SC) given an axial one."""
    out = copy.deepcopy(ds)
    out.ImagePositionPatient = [0.0, 0.0, 0.0]
    out.ImageOrientationPatient = [1.0, 0.0, 0.0, 0.0, 1.0, 0.0]
    if "PixelSpacing" not in out:
        out.PixelSpacing = [1.0, 1.0]
    return out


def patch_transfer_syntax(src: Path, dst: Path, new_uid: str) -> Path:
    """Copy ``src`` with its Transfer Syntax UID replaced by one of the same length."""
    raw = src.read_bytes()
    meta = pydicom.dcmread(src, stop_before_pixels=True).file_meta
    old = str(meta.TransferSyntaxUID).encode()
    if len(new_uid) != len(old) or raw.count(old) < 1:
        raise ValueError("replacement UID must have the same length as the original")
    dst.write_bytes(raw.replace(old, new_uid.encode(), 1))
    return dst


PRIVATE_SYNTAX_FOR_JP2K = UID("1.2.826.0.1.3680043.99")  # same length as 1.2.840.10008.1.2.4.90

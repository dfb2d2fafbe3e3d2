"""Write a :class:`~flairwatch.volume.Volume` as a DICOM MR Image Storage series.

One file per slice (axis k), Explicit VR Little Endian, uint16 pixels. Geometry follows DICOM
PS3.3 C.7.6.2.1.1: Image Orientation (Patient) holds the row direction (along i, the column
index) then the column direction (along j, the row index); Pixel Spacing is
row spacing (between rows, along j) \\ column spacing (along i); Image Position (Patient) is the
centre of the first pixel; all in patient LPS mm. File names are random-looking (a hash of the
SOP Instance UID) so that nothing may depend on their order.
"""

from __future__ import annotations

import hashlib
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import pydicom
from pydicom.dataset import Dataset, FileMetaDataset
from pydicom.uid import (
    PYDICOM_IMPLEMENTATION_UID,
    UID,
    ExplicitVRLittleEndian,
    MRImageStorage,
    generate_uid,
)
from pydicom.valuerep import format_number_as_ds

from flairwatch.volume import Volume

MANUFACTURER = "Example Imaging"  # invented, no real vendor
MODEL_NAME = "Model FW-1"  # invented
MAX_PIXEL = 4095  # 12-bit stored range, as many MR scanners use (common practice)

# Header keys a caller may set; anything else in ``header`` is set as a DICOM keyword too.
REQUIRED_KEYS = ("PatientID", "PatientName", "StudyInstanceUID", "SeriesInstanceUID")


def _ds(x: float, decimals: int | None = None) -> str:
    """Decimal String of at most 16 characters (DICOM PS3.5 DS), optionally rounded first."""
    value = float(x) if decimals is None else round(float(x), decimals)
    return format_number_as_ds(value)


def uid_from(*parts: object) -> UID:
    """Deterministic UID built from ``parts`` (pydicom's ``generate_uid`` entropy sources)."""
    return generate_uid(entropy_srcs=[str(p) for p in parts])


def _plane_geometry(volume: Volume) -> tuple[list[str], list[str], np.ndarray, float]:
    aff = volume.affine_lps
    di, dj, dk = volume.spacing
    row_cos = aff[:3, 0] / di
    col_cos = aff[:3, 1] / dj
    normal = np.cross(row_cos, col_cos)
    spacing_k = float(np.dot(aff[:3, 2], normal))
    if spacing_k <= 0 or not np.allclose(aff[:3, 2], normal * spacing_k, atol=1e-4 * dk):
        raise ValueError("the slice axis (k) must run along row x column for a DICOM series")
    iop = [_ds(x) for x in (*row_cos, *col_cos)]
    pixel_spacing = [_ds(dj, 9), _ds(di, 9)]  # row spacing \ column spacing
    return iop, pixel_spacing, normal, spacing_k


def write_series(
    volume: Volume,
    out_dir: Path,
    *,
    header: Mapping[str, Any],
    slice_thickness_mm: float | None = None,
    window: tuple[float, float] | None = None,
) -> list[Path]:
    """Write one DICOM file per slice of ``volume`` into ``out_dir`` (created if missing).

    Parameters
    ----------
    volume : Volume
        Voxel values (rounded and clipped to 0..4095) on an LPS grid; axes (i, j, k) =
        (column, row, slice).
    header : mapping
        DICOM keywords to set on every file. Must include PatientID, PatientName,
        StudyInstanceUID and SeriesInstanceUID; usual extras: SeriesDescription, SeriesNumber,
        ScanningSequence, SequenceVariant, RepetitionTime, EchoTime, InversionTime,
        MRAcquisitionType, MagneticFieldStrength, StudyDate. SOP Instance UIDs are derived from
        the Series Instance UID and the slice number.
    slice_thickness_mm : float, optional
        SliceThickness; defaults to the slice spacing (no gap).
    window : (center, width), optional
        Display window; defaults to one derived from the pixel values.

    Returns
    -------
    list of Path
        The files written, in slice order.
    """
    missing = [k for k in REQUIRED_KEYS if k not in header]
    if missing:
        raise ValueError(f"header lacks {', '.join(missing)}")
    out_dir.mkdir(parents=True, exist_ok=True)
    iop, pixel_spacing, normal, spacing_k = _plane_geometry(volume)
    pixels = np.clip(np.rint(volume.data), 0, MAX_PIXEL).astype(np.uint16)
    if window is None:
        hi = float(np.percentile(pixels, 99.5)) if pixels.size else 1.0
        window = (hi / 2.0, max(hi, 1.0))
    thickness = spacing_k if slice_thickness_mm is None else slice_thickness_mm
    series_uid = str(header["SeriesInstanceUID"])
    cols, rows, n_k = volume.shape
    paths: list[Path] = []
    for k in range(n_k):
        sop_uid = uid_from(series_uid, "instance", k)
        meta = FileMetaDataset()
        meta.MediaStorageSOPClassUID = MRImageStorage
        meta.MediaStorageSOPInstanceUID = sop_uid
        meta.TransferSyntaxUID = ExplicitVRLittleEndian
        meta.ImplementationClassUID = PYDICOM_IMPLEMENTATION_UID
        ds = Dataset()
        ds.file_meta = meta
        ds.SOPClassUID = MRImageStorage
        ds.SOPInstanceUID = sop_uid
        ds.Modality = "MR"
        ds.Manufacturer = MANUFACTURER
        ds.ManufacturerModelName = MODEL_NAME
        ds.ImageType = ["ORIGINAL", "PRIMARY", "M"]
        ds.SpecificCharacterSet = "ISO_IR 100"
        for key, value in header.items():
            setattr(ds, key, value)
        ds.FrameOfReferenceUID = header.get(
            "FrameOfReferenceUID", uid_from(header["StudyInstanceUID"], "frame")
        )
        ds.InstanceNumber = k + 1
        position = volume.affine_lps[:3, 3] + volume.affine_lps[:3, 2] * k
        ds.ImagePositionPatient = [_ds(x) for x in position]
        ds.ImageOrientationPatient = iop
        ds.SliceLocation = _ds(float(np.dot(position, normal)))
        ds.PixelSpacing = pixel_spacing
        ds.SliceThickness = _ds(thickness, 6)
        ds.SpacingBetweenSlices = _ds(spacing_k, 6)
        ds.PatientPosition = "HFS"
        ds.SamplesPerPixel = 1
        ds.PhotometricInterpretation = "MONOCHROME2"
        ds.Rows = rows
        ds.Columns = cols
        ds.BitsAllocated = 16
        ds.BitsStored = 12
        ds.HighBit = 11
        ds.PixelRepresentation = 0
        ds.WindowCenter = _ds(window[0], 1)
        ds.WindowWidth = _ds(window[1], 1)
        ds.PixelData = np.ascontiguousarray(pixels[:, :, k].T).tobytes()  # rows = j, columns = i
        name = hashlib.sha1(sop_uid.encode()).hexdigest()[:20] + ".dcm"
        path = out_dir / name
        pydicom.dcmwrite(path, ds, enforce_file_format=True)
        paths.append(path)
    return paths

"""Small synthetic DICOM series written with pydicom, for pipeline and daemon tests.

The image is a bright-edged "head" ellipsoid of tissue (value 300) with a few brighter "lesion"
blobs (value 600) at known places, so the tiny fixed-function test model marks exactly them.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from pydicom.uid import generate_uid

from tests.dicom_fixtures import slice_dataset, write_datasets


@dataclass(frozen=True)
class SeriesSpec:
    rows: int = 64
    columns: int = 64
    slices: int = 12
    pixel_spacing: tuple[float, float] = (1.0, 1.0)  # (row spacing, column spacing)
    slice_spacing: float = 3.0
    orientation: tuple[float, ...] = (1.0, 0.0, 0.0, 0.0, 1.0, 0.0)
    origin: tuple[float, float, float] = (-32.0, -32.0, -18.0)
    description: str = "AX FLAIR"
    scanning_sequence: str = "IR"
    inversion_time: float | None = 2500.0
    patient_id: str = "FW-0001"
    patient_name: str = "Demo^Participant"
    lesions: Sequence[tuple[int, int, int, int]] = ((20, 24, 5, 3), (40, 36, 7, 2))  # (i, j, k, r)
    # dark boxes (value 150, half of tissue) standing in for ventricles: (i0, i1, j0, j1, k0, k1)
    ventricles: Sequence[tuple[int, int, int, int, int, int]] = ()


def phantom_array(spec: SeriesSpec) -> np.ndarray:
    """(i, j, k) array: ellipsoid of tissue with lesion spheres (radius in voxels)."""
    i, j, k = np.meshgrid(
        np.arange(spec.columns), np.arange(spec.rows), np.arange(spec.slices), indexing="ij"
    )
    ci, cj, ck = (spec.columns - 1) / 2, (spec.rows - 1) / 2, (spec.slices - 1) / 2
    head = ((i - ci) / (0.42 * spec.columns)) ** 2 + ((j - cj) / (0.45 * spec.rows)) ** 2 + (
        (k - ck) / (0.6 * spec.slices)
    ) ** 2 <= 1
    data = np.where(head, 300, 0).astype(np.uint16)
    for i0, i1, j0, j1, k0, k1 in spec.ventricles:
        data[i0:i1, j0:j1, k0:k1] = 150
    for li, lj, lk, r in spec.lesions:
        blob = (i - li) ** 2 + (j - lj) ** 2 + ((k - lk) * 2) ** 2 <= r * r
        data[blob & head] = 600
    return data


def write_series(
    folder: Path,
    spec: SeriesSpec = SeriesSpec(),
    *,
    study_uid: str | None = None,
    series_uid: str | None = None,
    shuffle_seed: int | None = 0,
) -> list[Path]:
    """Write one file per slice in shuffled names/order; return the paths written."""
    folder.mkdir(parents=True, exist_ok=True)
    data = phantom_array(spec)
    study_uid = study_uid or generate_uid()
    series_uid = series_uid or generate_uid()
    row_cos = np.array(spec.orientation[:3])
    col_cos = np.array(spec.orientation[3:])
    normal = np.cross(row_cos, col_cos)
    order = list(range(spec.slices))
    if shuffle_seed is not None:
        np.random.default_rng(shuffle_seed).shuffle(order)
    datasets = []
    for n, k in enumerate(order):
        pos = np.array(spec.origin) + normal * spec.slice_spacing * k
        # DICOM pixel rows run along j (column cosine), columns along i (row cosine)
        ds = slice_dataset(
            [round(float(v), 4) for v in pos],
            spec.orientation,
            spec.pixel_spacing,
            np.ascontiguousarray(data[:, :, k].T),
            series_uid=series_uid,
            study_uid=study_uid,
            instance_number=n + 1,  # deliberately unrelated to position
            description=spec.description,
        )
        ds.PatientID = spec.patient_id
        ds.PatientName = spec.patient_name
        ds.StudyDate = ds.AcquisitionDate = "20260315"
        ds.SeriesNumber = 3
        ds.ImageType = ["ORIGINAL", "PRIMARY", "M"]
        ds.ScanningSequence = spec.scanning_sequence
        ds.SequenceVariant = "SK"
        ds.MRAcquisitionType = "2D"
        ds.RepetitionTime = 9000
        ds.EchoTime = 90
        if spec.inversion_time is not None:
            ds.InversionTime = spec.inversion_time
        ds.MagneticFieldStrength = 3
        ds.Manufacturer = "Example Imaging"
        ds.ManufacturerModelName = "FW Test Scanner"
        ds.SliceThickness = spec.slice_spacing
        ds.SpacingBetweenSlices = spec.slice_spacing
        datasets.append(ds)
    # shuffled, meaningless names, unique per series
    names = [f"img{abs(hash((series_uid, k))) % 10**9:09d}" for k in order]
    return write_datasets(folder, datasets, names)

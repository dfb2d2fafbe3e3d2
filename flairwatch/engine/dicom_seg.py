"""The DICOM Segmentation of one result: the final masks as a binary SEG over the source series.

:func:`build_segmentation` takes the source series' headers (pydicom datasets, pixel data not
needed) and the masks on the series' own grid, axes (i, j, k) as in :mod:`flairwatch.volume`,
and returns a :class:`highdicom.seg.Segmentation` (PS3.3 A.51, binary, PS3.3 C.8.20) that
references the source images frame by frame and shares their Frame of Reference. No file is
written here; :mod:`flairwatch.engine.outputs` writes ``segmentation.dcm``.

Segments are numbered in a fixed order and appear only when the model gives the output:
1 WMH (always), then the intracranial mask, then the ventricles. Codes come from DICOM PS3.16
(see docs/sources.md, "DICOM SEG and SR"): categories from CID 7150, types from CID 7151, the
WMH type from CID 7140 (CID 7151 is a baseline group, so other standard codes are allowed).
"""

from __future__ import annotations

import functools
import logging
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import highdicom as hd
import numpy as np
from pydicom.dataset import Dataset
from pydicom.sr.coding import Code
from pydicom.uid import generate_uid

from flairwatch.errors import InputRejected
from flairwatch.intake.geometry import frames_of

# highdicom logs each module it copies into a new instance at INFO, ten lines per result: noise
# in a daemon's log. Its warnings and errors still come through.
logging.getLogger("highdicom").setLevel(logging.WARNING)


def _remember_iod_lookups() -> None:
    """Cache highdicom's "is this attribute in that IOD?" answers (a pure function of its
    arguments, read from the standard's tables).

    highdicom (0.28) answers by a linear scan over every attribute of every module of the IOD,
    about 1 ms, and asks it once or more per source image when it builds a SEG or an SR: some
    50 to 100 scans per result. Skipped, and only slower, where a highdicom release lays its
    helpers out differently.
    """
    helpers = getattr(hd, "_standard_utils", None)
    scan = getattr(helpers, "is_attribute_in_iod", None)
    if scan is None or hasattr(scan, "cache_info"):
        return

    @functools.lru_cache(maxsize=256)
    def remembered(attribute: str, sop_class_uid: str, exclude: tuple[str, ...] | None) -> bool:
        return bool(scan(attribute, sop_class_uid, exclude))

    def is_attribute_in_iod(
        attribute: str, sop_class_uid: str, exclude_path_elements: Sequence[str] | None = None
    ) -> bool:
        exclude = None if exclude_path_elements is None else tuple(exclude_path_elements)
        return remembered(attribute, str(sop_class_uid), exclude)

    is_attribute_in_iod.cache_info = remembered.cache_info  # type: ignore[attr-defined]
    is_attribute_in_iod.__wrapped__ = scan  # type: ignore[attr-defined]
    helpers.is_attribute_in_iod = is_attribute_in_iod  # type: ignore[union-attr]


_remember_iod_lookups()

SEG_FILE = "segmentation.dcm"
# PS3.3 C.7.3.1 Series Description (LO, 64 chars) and C.10.9 Content Label (CS, 16 chars)
SERIES_DESCRIPTION = "WMH research mask - not for diagnosis"
CONTENT_LABEL = "WMH_RESEARCH"
CONTENT_DESCRIPTION = "Research use only, not for diagnosis; validate on your own scans"
SEG_SERIES_NUMBER = 9901
MANUFACTURER = "flairwatch (open source)"
# PS3.16 CID 7162 Algorithm Family: DCM 123110 "Artificial Intelligence"
ALGORITHM_FAMILY = Code("123110", "DCM", "Artificial Intelligence")
# a voxel's centre may lie this far from a source slice (in voxels) and still be that slice
_POSITION_TOLERANCE = 0.05


class NoSegmentation(Exception):
    """The source cannot carry a SEG (its one-line reason is the message)."""


@dataclass(frozen=True)
class SegmentKind:
    """One segment's label and its PS3.16 codes (category from CID 7150, type as noted)."""

    output: str  # the model output it shows: "wmh", "intracranial" or "ventricles"
    label: str
    category: Code
    kind: Code


# PS3.16 CID 7150: SCT 49755003 "Morphologically Abnormal Structure", SCT 91723000
# "Anatomical Structure"; CID 7140: DCM 110702 "White Matter T2 Hyperintensity"; CID 7151:
# SCT 1101003 "Intracranial", SCT 35764002 "Brain ventricle"
SEGMENT_KINDS: tuple[SegmentKind, ...] = (
    SegmentKind(
        "wmh",
        "WMH",
        Code("49755003", "SCT", "Morphologically Abnormal Structure"),
        Code("110702", "DCM", "White Matter T2 Hyperintensity"),
    ),
    SegmentKind(
        "intracranial",
        "Intracranial",
        Code("91723000", "SCT", "Anatomical Structure"),
        Code("1101003", "SCT", "Intracranial"),
    ),
    SegmentKind(
        "ventricles",
        "Ventricles",
        Code("91723000", "SCT", "Anatomical Structure"),
        Code("35764002", "SCT", "Brain ventricle"),
    ),
)


def segment_numbers(outputs: Sequence[str]) -> dict[str, int]:
    """Segment number (1, 2, ...) of each output present, in :data:`SEGMENT_KINDS` order."""
    present = [k.output for k in SEGMENT_KINDS if k.output in outputs]
    return {name: n for n, name in enumerate(present, start=1)}


def frame_slices(headers: Sequence[Dataset], affine_lps: np.ndarray) -> list[list[int]]:
    """The slice index k of every frame of every header, on the grid of ``affine_lps``.

    Returns one list per header (one entry per frame, in the header's frame order). Raises
    :class:`NoSegmentation` when a frame does not lie on a slice of the grid, i.e. the masks'
    grid is not the source grid.
    """
    inverse = np.linalg.inv(np.asarray(affine_lps, dtype=np.float64))
    out: list[list[int]] = []
    for index, ds in enumerate(headers):
        try:
            frames = frames_of(ds, index, "source series")
        except InputRejected as exc:
            raise NoSegmentation(f"source geometry unreadable: {exc}") from None
        ks = []
        for f in frames:
            ijk = inverse[:3, :3] @ np.asarray(f.position) + inverse[:3, 3]
            k = round(float(ijk[2]))
            if np.max(np.abs(ijk - [0.0, 0.0, k])) > _POSITION_TOLERANCE:
                raise NoSegmentation("the masks' grid is not the source images' grid")
            ks.append(k)
        out.append(ks)
    return out


# Type 2 attributes of the Patient and General Study modules (PS3.3 C.7.1.1, C.7.2.1) that
# highdicom copies from the first source image; a lax source that leaves one out gets it empty
_TYPE2_COPIED = (
    "PatientName",
    "PatientID",
    "PatientBirthDate",
    "PatientSex",
    "StudyDate",
    "StudyTime",
    "StudyID",
    "AccessionNumber",
    "ReferringPhysicianName",
)


def _complete(ds: Dataset, slice_mm: float) -> Dataset:
    """``ds``, or a copy with the missing :data:`_TYPE2_COPIED` attributes present and empty,
    and an empty or missing Slice Thickness set to ``slice_mm``."""
    missing = [k for k in _TYPE2_COPIED if k not in ds]
    thick = _positive(ds.get("SliceThickness"))
    if not missing and thick is not None:
        return ds
    out = Dataset()
    for element in ds:  # a new dataset holding the same elements: ``ds`` stays as it was
        out.add(element)
    for keyword in missing:
        setattr(out, keyword, "")
    if thick is None:
        out.SliceThickness = round(slice_mm, 6)
    return out


def _positive(value: object) -> float | None:
    """A DS value as a positive float, else None (empty, missing or unreadable)."""
    try:
        number = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return None
    return number if number > 0 else None


def _frames(mask: np.ndarray, ks: Sequence[int]) -> np.ndarray:
    """(frames, rows, columns) planes of an (i, j, k) mask; pixel arrays are [row j, column i]."""
    return np.ascontiguousarray(np.transpose(mask[:, :, list(ks)], (2, 1, 0)))


def build_segmentation(
    headers: Sequence[Dataset],
    masks: Mapping[str, np.ndarray],
    affine_lps: np.ndarray,
    *,
    algorithm_name: str,
    algorithm_version: str,
    software_version: str,
    device_serial: str,
) -> hd.seg.Segmentation:
    """A binary SEG of ``masks`` over the source images ``headers``.

    Parameters
    ----------
    headers : sequence of pydicom Dataset
        The source series: single-frame images in any order, or one multi-frame image; pixel
        data is not needed.
    masks : mapping of output name to ndarray
        ``"wmh"`` (required), ``"intracranial"`` and ``"ventricles"`` (optional); each
        (I, J, K) uint8/bool on the source grid, axes (i, j, k) = (column, row, slice).
    affine_lps : ndarray, shape (4, 4)
        The grid's voxel-to-patient (LPS mm) affine, as :class:`flairwatch.volume.Volume` has it.
    algorithm_name, algorithm_version
        The model's name and version (PS3.3 C.8.20.2 Segment Algorithm Name, and the
        Algorithm Identification macro, PS3.3 10.16).
    software_version, device_serial
        This program's version and a stable identifier of the model file (Enhanced General
        Equipment module, PS3.3 C.7.5.2, makes both Type 1).

    Raises
    ------
    NoSegmentation
        No headers, no Frame of Reference UID, several multi-frame images, or masks not on the
        source grid.
    """
    if not headers:
        raise NoSegmentation("no DICOM source images (NIfTI input)")
    if any("FrameOfReferenceUID" not in ds for ds in headers):
        raise NoSegmentation("the source images have no Frame of Reference UID")
    multi = [ds for ds in headers if int(ds.get("NumberOfFrames") or 1) > 1]
    if multi and len(headers) > 1:
        raise NoSegmentation("the source mixes multi-frame images or has several of them")
    ks = frame_slices(headers, affine_lps)
    if multi:
        sources = list(headers)
        order = ks[0]  # frame i of the SEG array is frame i of the source image
    else:
        pairs = sorted(zip((k[0] for k in ks), range(len(headers)), strict=True))
        sources = [headers[n] for _, n in pairs]
        order = [k for k, _ in pairs]
    # highdicom takes the SEG's Pixel Measures (PS3.3 C.7.6.16.2.1, Slice Thickness Type 1) of
    # single-frame images from the first one, where Slice Thickness is Type 2 (may be empty or
    # absent): the grid's slice spacing stands in for it then
    spacing = np.linalg.norm(np.asarray(affine_lps, dtype=np.float64)[:3, :3], axis=0)
    sources[0] = _complete(sources[0], float(spacing[2]))
    kinds = [k for k in SEGMENT_KINDS if k.output in masks]
    # segments last, as highdicom takes them, but each segment contiguous in memory: its sum
    # over segments (an overlap check) then adds whole planes, some ten times faster than
    # summing pairs of adjacent bytes
    planes = np.stack([_frames(np.asarray(masks[k.output]) != 0, order) for k in kinds])
    stacked = np.moveaxis(planes.view(np.uint8), 0, -1)
    algorithm = hd.AlgorithmIdentificationSequence(
        name=algorithm_name,
        family=ALGORITHM_FAMILY,
        version=algorithm_version,
    )
    descriptions = [
        hd.seg.SegmentDescription(
            segment_number=n,
            segment_label=kind.label,
            segmented_property_category=kind.category,
            segmented_property_type=kind.kind,
            algorithm_type=hd.seg.SegmentAlgorithmTypeValues.AUTOMATIC,
            algorithm_identification=algorithm,
        )
        for n, kind in enumerate(kinds, start=1)
    ]
    seg = hd.seg.Segmentation(
        source_images=sources,
        pixel_array=stacked,
        segmentation_type=hd.seg.SegmentationTypeValues.BINARY,
        segment_descriptions=descriptions,
        series_instance_uid=generate_uid(),
        series_number=SEG_SERIES_NUMBER,
        sop_instance_uid=generate_uid(),
        instance_number=1,
        manufacturer=MANUFACTURER,
        manufacturer_model_name="flairwatch",
        software_versions=software_version,
        device_serial_number=device_serial,
        content_label=CONTENT_LABEL,
        content_description=CONTENT_DESCRIPTION,
        series_description=SERIES_DESCRIPTION,
    )
    return seg

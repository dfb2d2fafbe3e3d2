"""Small immutable records that flow between the first stages (discover -> assemble -> select -> load)."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path


@dataclass(frozen=True)
class SeriesHeader:
    """Header facts about one series, read without pixel data.

    Values are copied from the first instance of the series; text values are stripped strings,
    missing values are None. Times are in ms, field strength in tesla, sizes in mm.
    """

    study_uid: str
    series_uid: str
    modality: str | None = None
    sop_class_uid: str | None = None
    patient_id: str | None = None
    patient_name: str | None = None
    patient_birth_date: str | None = None
    study_date: str | None = None
    acquisition_date: str | None = None
    series_description: str | None = None
    protocol_name: str | None = None
    series_number: int | None = None
    image_type: tuple[str, ...] = ()
    scanning_sequence: tuple[str, ...] = ()
    sequence_variant: tuple[str, ...] = ()
    mr_acquisition_type: str | None = None
    repetition_time_ms: float | None = None
    echo_time_ms: float | None = None
    inversion_time_ms: float | None = None
    field_strength_t: float | None = None
    manufacturer: str | None = None
    manufacturer_model: str | None = None
    slice_thickness_mm: float | None = None
    pixel_spacing_mm: tuple[float, float] | None = None  # (row spacing, column spacing)
    rows: int | None = None
    columns: int | None = None
    number_of_frames: int | None = None


@dataclass(frozen=True)
class FileRecord:
    """One file found in the inbox or on the command line, with what its header says.

    ``header`` is None for a file that is not a usable DICOM object (``reason`` says why).
    ``sop_uid`` identifies the instance; ``size`` and ``mtime_ns`` let a later scan tell
    whether the file changed.
    """

    path: Path
    size: int
    mtime_ns: int
    sop_uid: str | None = None
    header: SeriesHeader | None = None
    reason: str | None = None


@dataclass(frozen=True)
class Series:
    """The files of one (Study Instance UID, Series Instance UID), in no particular order."""

    header: SeriesHeader
    files: tuple[FileRecord, ...] = field(default_factory=tuple)

    @property
    def key(self) -> tuple[str, str]:
        return (self.header.study_uid, self.header.series_uid)

"""Find candidate files under the inputs and read their DICOM headers (the I/O edge of the flow).

Only headers are read here (no pixel data); a file that is not a usable DICOM image gives a
:class:`~flairwatch.records.FileRecord` with ``header=None`` and a ``reason``, never an exception.
The filesystem calls are parameters so tests can pass hostile fakes.
"""

from __future__ import annotations

import logging
import math
import os
import stat as stat_mod
from collections.abc import Callable, Iterable, Iterator, Sequence
from pathlib import Path
from typing import Any

import pydicom
from pydicom.dataset import Dataset
from pydicom.multival import MultiValue
from pydicom.uid import UID

from flairwatch.errors import InputRejected
from flairwatch.intake.fsafe import CappedReader, FileChanged, Note, Seen, log_note, open_file, walk
from flairwatch.intake.limits import file_size_problem, image_size_problem
from flairwatch.records import FileRecord, SeriesHeader

logger = logging.getLogger(__name__)

# Names that senders use while a file is still being written (renamed when complete).
IGNORED_SUFFIXES: tuple[str, ...] = (
    ".part",
    ".partial",
    ".tmp",
    ".temp",
    ".filepart",
    ".crdownload",
    ".swp",
    ".lock",
    "~",
)

NIFTI_SUFFIXES: tuple[str, ...] = (".nii", ".nii.gz")

ListDir = Callable[[Path], Iterable[str]]
Stat = Callable[[Path], os.stat_result]

# A file without the Part 10 preamble may still be DICOM if it opens with a group 0002 or 0008
# element (little or big endian); anything else is not worth a forced parse.
_RAW_DICOM_STARTS = (b"\x02\x00", b"\x08\x00", b"\x00\x02", b"\x00\x08")


def is_ignored_name(name: str) -> bool:
    """True for dotfiles and names of files still being written (:data:`IGNORED_SUFFIXES`)."""
    lower = name.lower()
    return name.startswith(".") or lower.endswith(IGNORED_SUFFIXES)


def is_nifti_path(path: Path) -> bool:
    """True when the file name says NIfTI-1/2 (``.nii`` or ``.nii.gz``)."""
    return path.name.lower().endswith(NIFTI_SUFFIXES)


def iter_candidate_files(
    roots: Sequence[Path],
    *,
    listdir: ListDir | None = None,
    lstat: Stat | None = None,
) -> Iterator[Path]:
    """Yield the files under ``roots`` that may hold DICOM or NIfTI data, in a fixed order.

    A root that is a file is yielded as given (whatever its name); a root may be a symbolic
    link. Folders are searched recursively, depth first, in sorted name order; dotfiles,
    dot-folders and names ending in :data:`IGNORED_SUFFIXES` are skipped. Symbolic links below
    a root are never followed: one pointing outside would read files the inbox does not own,
    and one pointing inside leads to files the walk reaches anyway (twice would make
    duplicates) or to a loop. Entries that vanish or cannot be read during the walk are
    skipped with a log line. Folders are opened through directory descriptors
    (:func:`flairwatch.intake.fsafe.walk`), so a folder swapped for a link during the walk is not
    entered either; ``listdir`` and ``lstat`` replace that with path-based calls (for tests
    that fake a hostile file system).

    Raises
    ------
    InputRejected
        When a root does not exist.
    """
    for root in roots:
        try:
            st = os.stat(root)
        except OSError:
            raise InputRejected(f"{root}: no such file or folder; check the path") from None
        if not stat_mod.S_ISDIR(st.st_mode):
            yield root
        elif listdir is None and lstat is None:
            yield from (seen.path for seen in walk_folder(root))
        else:
            yield from _walk(root, listdir or os.listdir, lstat or os.lstat)


def walk_folder(root: Path, note: Note = log_note) -> Iterator[Seen]:
    """Candidate files below the folder ``root`` with what a scan saw of each (no links followed).

    Raises
    ------
    InputRejected
        When ``root`` cannot be opened as a folder.
    """
    try:
        yield from walk(root, is_ignored_name, note)
    except OSError:
        raise InputRejected(f"{root}: no such folder, or not readable; check the path") from None


def _walk(folder: Path, listdir: ListDir, lstat: Stat) -> Iterator[Path]:
    try:
        names = sorted(listdir(folder))
    except OSError as exc:
        logger.warning("cannot list %s: %s", folder, exc)
        return
    for name in names:
        if is_ignored_name(name):
            continue
        path = folder / name
        try:
            mode = lstat(path).st_mode
        except OSError as exc:  # vanished between listing and stat
            logger.debug("skipping %s: %s", path, exc)
            continue
        if stat_mod.S_ISLNK(mode):
            logger.info("not following symbolic link %s", path)
        elif stat_mod.S_ISDIR(mode):
            yield from _walk(path, listdir, lstat)
        elif stat_mod.S_ISREG(mode):
            yield path


def _text(ds: Dataset, keyword: str) -> str | None:
    try:
        value = ds.get(keyword)
    except Exception:  # pydicom converts lazily; any failure means the value is unusable
        return None
    if value is None:
        return None
    text = str(value).strip().replace("\x00", "")
    return text or None


def _float(ds: Dataset, keyword: str) -> float | None:
    try:
        value = ds.get(keyword)
        if isinstance(value, MultiValue | list | tuple):
            value = value[0] if len(value) else None
        if value is None or value == "":
            return None
        number = float(value)
    except Exception:  # bad DS/IS text, wrong VR: pydicom converts lazily
        return None
    return number if math.isfinite(number) else None


def _int(ds: Dataset, keyword: str) -> int | None:
    number = _float(ds, keyword)
    if number is None or number != int(number):
        return None
    return int(number)


def _multi(ds: Dataset, keyword: str) -> tuple[str, ...]:
    try:
        value = ds.get(keyword)
    except Exception:  # unusable value
        return ()
    if value is None or value == "":
        return ()
    if isinstance(value, str):
        values: Iterable[Any] = value.split("\\")
    else:
        try:
            values = list(value)
        except TypeError:
            values = [value]
    return tuple(s for s in (str(v).strip().upper() for v in values) if s)


def _first_item(ds: Dataset, keyword: str) -> Dataset | None:
    try:
        seq = ds.get(keyword)
        return seq[0] if seq else None
    except Exception:  # malformed sequence
        return None


def functional_group(ds: Dataset, keyword: str, frame: int = 0) -> Dataset | None:
    """First item of a functional group macro for one frame: per-frame first, then shared."""
    per_frame = _first_item(ds, "PerFrameFunctionalGroupsSequence")
    if per_frame is not None:
        try:
            item = ds.PerFrameFunctionalGroupsSequence[frame]
        except Exception:  # fewer items than frames
            item = None
        if item is not None:
            found = _first_item(item, keyword)
            if found is not None:
                return found
    shared = _first_item(ds, "SharedFunctionalGroupsSequence")
    return _first_item(shared, keyword) if shared is not None else None


def _enhanced_mr_facts(ds: Dataset) -> dict[str, Any]:
    """Header facts that enhanced MR objects keep inside functional groups."""
    facts: dict[str, Any] = {}
    measures = functional_group(ds, "PixelMeasuresSequence")
    if measures is not None:
        facts["slice_thickness_mm"] = _float(measures, "SliceThickness")
        facts["pixel_spacing_mm"] = _spacing(measures)
    timing = functional_group(ds, "MRTimingAndRelatedParametersSequence")
    if timing is not None:
        facts["repetition_time_ms"] = _float(timing, "RepetitionTime")
    echo = functional_group(ds, "MREchoSequence")
    if echo is not None:
        facts["echo_time_ms"] = _float(echo, "EffectiveEchoTime")
    modifier = functional_group(ds, "MRModifierSequence")
    sequence: list[str] = []
    if modifier is not None:
        facts["inversion_time_ms"] = _float(modifier, "InversionTimes")
        if _text(modifier, "InversionRecovery") == "YES":
            sequence.append("IR")
    # Enhanced objects have no Scanning Sequence; map Echo Pulse Sequence onto its terms so one
    # rule set serves both kinds.
    pulse = _text(ds, "EchoPulseSequence")
    if pulse in ("SPIN", "BOTH"):
        sequence.append("SE")
    if pulse in ("GRADIENT", "BOTH"):
        sequence.append("GR")
    if sequence:
        facts["scanning_sequence"] = tuple(sequence)
    return {k: v for k, v in facts.items() if v is not None}


def _spacing(ds: Dataset) -> tuple[float, float] | None:
    try:
        value = ds.get("PixelSpacing")
        if value is None or len(value) != 2:
            return None
        row, col = float(value[0]), float(value[1])
    except Exception:  # malformed Pixel Spacing
        return None
    return (row, col) if row > 0 and col > 0 else None


def header_from_dataset(ds: Dataset) -> SeriesHeader:
    """Series facts from one instance's dataset (pure; bad numbers become None).

    Times are in ms, field strength in T, sizes in mm; Pixel Spacing is (row, column) spacing.
    """
    fields: dict[str, Any] = {
        "study_uid": _text(ds, "StudyInstanceUID") or "",
        "series_uid": _text(ds, "SeriesInstanceUID") or "",
        "modality": _text(ds, "Modality"),
        "sop_class_uid": _text(ds, "SOPClassUID"),
        "patient_id": _text(ds, "PatientID"),
        "patient_name": _text(ds, "PatientName"),
        "patient_birth_date": _text(ds, "PatientBirthDate"),
        "study_date": _text(ds, "StudyDate"),
        "acquisition_date": _text(ds, "AcquisitionDate") or _text(ds, "SeriesDate"),
        "series_description": _text(ds, "SeriesDescription"),
        "protocol_name": _text(ds, "ProtocolName"),
        "series_number": _int(ds, "SeriesNumber"),
        "image_type": _multi(ds, "ImageType"),
        "scanning_sequence": _multi(ds, "ScanningSequence"),
        "sequence_variant": _multi(ds, "SequenceVariant"),
        "mr_acquisition_type": _text(ds, "MRAcquisitionType"),
        "repetition_time_ms": _float(ds, "RepetitionTime"),
        "echo_time_ms": _float(ds, "EchoTime"),
        "inversion_time_ms": _float(ds, "InversionTime"),
        "field_strength_t": _float(ds, "MagneticFieldStrength"),
        "manufacturer": _text(ds, "Manufacturer"),
        "manufacturer_model": _text(ds, "ManufacturerModelName"),
        "slice_thickness_mm": _float(ds, "SliceThickness"),
        "pixel_spacing_mm": _spacing(ds),
        "rows": _int(ds, "Rows"),
        "columns": _int(ds, "Columns"),
        "number_of_frames": _int(ds, "NumberOfFrames"),
    }
    if "PerFrameFunctionalGroupsSequence" in ds or "SharedFunctionalGroupsSequence" in ds:
        for key, value in _enhanced_mr_facts(ds).items():
            if fields.get(key) in (None, ()):
                fields[key] = value
    return SeriesHeader(**fields)


def not_image_reason(ds: Dataset) -> str | None:
    """Why a dataset is not an image to segment, or None when it is one."""
    sop_class = _text(ds, "SOPClassUID")
    name = UID(sop_class).name if sop_class else ""
    # pydicom names unknown (private) classes by the UID itself: judge those by Rows/Columns.
    if sop_class and name != sop_class and "Image Storage" not in name:
        return f"not an image ({name})"
    if _int(ds, "Rows") is None or _int(ds, "Columns") is None:
        if "Image Storage" in name:
            return f"{name} without Rows/Columns (file cut short or damaged)"
        return "not an image (no Rows/Columns)"
    return None


def declared_size_problem(ds: Dataset) -> str | None:
    """Why the image size a header declares is over the caps, or None (no allocation)."""
    rows, cols = _int(ds, "Rows"), _int(ds, "Columns")
    if rows is None or cols is None:
        return None  # not an image: not_image_reason says so
    frames = _int(ds, "NumberOfFrames")
    bits = _int(ds, "BitsAllocated")
    return image_size_problem(
        rows, cols, 1 if frames is None else frames, 16 if bits is None else bits
    )


def _looks_like_dicom(head: bytes) -> bool:
    return head[128:132] == b"DICM" or head[:2] in _RAW_DICOM_STARTS


def read_record(
    path: Path, *, stat: Stat = os.stat, root: Path | None = None, expect: Seen | None = None
) -> FileRecord:
    """Read one file's header (never its pixel data) into a :class:`FileRecord`.

    Never raises for bad input: a file that is unreadable, not DICOM, too large, lacks the
    Study, Series or SOP Instance UID, declares an image size over the caps of
    :mod:`flairwatch.intake.limits`, or is not an image gets ``header=None`` and a ``reason``.
    Size (bytes) and mtime (ns) come from the same ``stat`` call.

    With ``root`` and ``expect`` (an inbox scan), the file is opened relative to directory
    descriptors without following links, and it must still be the file the scan saw; one that
    changed gets a reason starting "cannot read", so the next scan reads it again.
    """
    if expect is not None:
        size, mtime_ns = expect.size, expect.mtime_ns
    else:
        try:
            st = stat(path)
        except OSError as exc:
            return FileRecord(path, 0, 0, reason=f"cannot read: {exc.strerror or exc}")
        size, mtime_ns = int(st.st_size), int(st.st_mtime_ns)

    def rejected(reason: str, sop_uid: str | None = None) -> FileRecord:
        return FileRecord(path, size, mtime_ns, sop_uid=sop_uid, reason=reason)

    if size == 0:
        return rejected("empty file")
    too_big = file_size_problem(size)
    if too_big is not None:
        return rejected(too_big)
    try:
        if root is not None or expect is not None:
            fd = open_file(path, root=root, expect=expect)
        else:
            fd = os.open(path, os.O_RDONLY | getattr(os, "O_CLOEXEC", 0))
        with CappedReader(fd) as fh:
            head = fh.read(132)
            if not _looks_like_dicom(head):
                return rejected("NIfTI file, not DICOM" if is_nifti_path(path) else "not DICOM")
            fh.seek(0)
            ds = pydicom.dcmread(fh, stop_before_pixels=True, force=True)
            if expect is not None and not expect.same(os.fstat(fh.fileno())):
                raise FileChanged(f"{path} changed while being read")
    except FileChanged:
        return rejected("cannot read: changed while being read; read again at the next scan")
    except OSError as exc:
        return rejected(f"cannot read: {exc.strerror or exc}")
    except Exception as exc:  # pydicom raises many types on corrupt headers
        logger.debug("header of %s unreadable: %s", path, exc)
        return rejected("not DICOM (header unreadable)")
    sop_uid = _text(ds, "SOPInstanceUID")
    for keyword, label in (
        ("StudyInstanceUID", "Study"),
        ("SeriesInstanceUID", "Series"),
        ("SOPInstanceUID", "SOP"),
    ):
        if not _text(ds, keyword):
            return rejected(f"no {label} Instance UID", sop_uid)
    why = not_image_reason(ds) or declared_size_problem(ds)
    if why is not None:
        return rejected(why, sop_uid)
    try:
        header = header_from_dataset(ds)
    except Exception as exc:  # a header so odd that even the tolerant parsing fails
        return rejected(f"header unusable ({type(exc).__name__})", sop_uid)
    return FileRecord(path, size, mtime_ns, sop_uid=sop_uid, header=header)


def discover(roots: Sequence[Path]) -> list[FileRecord]:
    """Records of every candidate file under ``roots``, in :func:`iter_candidate_files` order."""
    return [read_record(path) for path in iter_candidate_files(roots)]

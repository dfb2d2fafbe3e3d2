"""Turn a series (or a NIfTI file) into a :class:`~flairwatch.volume.Volume` with its geometry.

Reading files (:func:`read_datasets`) is kept apart from interpreting datasets
(:func:`volume_from_datasets`), so tests can feed datasets built in memory. Where the slices lie
and the grid they form is :mod:`flairwatch.intake.geometry`'s part; this module checks and decodes
the pixel data and fills the volume. Every refusal raises
:class:`~flairwatch.errors.InputRejected` with one line: the series, what is wrong, what to do.
"""

from __future__ import annotations

import io
import logging
import math
import os
import types
from collections.abc import Sequence
from pathlib import Path

import nibabel as nib
import numpy as np
import numpy.typing as npt
import pydicom
from pydicom.dataset import Dataset
from pydicom.encaps import parse_basic_offsets, parse_fragments
from pydicom.pixels import get_decoder
from pydicom.uid import UID

from flairwatch.errors import InputRejected
from flairwatch.intake.discover import declared_size_problem, not_image_reason
from flairwatch.intake.fsafe import CappedReader
from flairwatch.intake.geometry import (
    ORIENTATION_TOLERANCE,
    Frame,
    frames_of,
    printable,
    reject,
    stack_geometry,
)
from flairwatch.intake.limits import file_size_problem, volume_size_problem
from flairwatch.records import Series, SeriesHeader
from flairwatch.volume import Volume, ras_to_lps

logger = logging.getLogger(__name__)

_DECODER_PACKAGES = types.MappingProxyType(
    {
        "1.2.840.10008.1.2.4.50": "pylibjpeg and pylibjpeg-libjpeg",
        "1.2.840.10008.1.2.4.51": "pylibjpeg and pylibjpeg-libjpeg",
        "1.2.840.10008.1.2.4.57": "pylibjpeg and pylibjpeg-libjpeg",
        "1.2.840.10008.1.2.4.70": "pylibjpeg and pylibjpeg-libjpeg",
        "1.2.840.10008.1.2.4.80": "pylibjpeg and pylibjpeg-libjpeg",
        "1.2.840.10008.1.2.4.81": "pylibjpeg and pylibjpeg-libjpeg",
        "1.2.840.10008.1.2.4.90": "pylibjpeg and pylibjpeg-openjpeg",
        "1.2.840.10008.1.2.4.91": "pylibjpeg and pylibjpeg-openjpeg",
        "1.2.840.10008.1.2.4.201": "pylibjpeg and pylibjpeg-openjpeg",
        "1.2.840.10008.1.2.4.202": "pylibjpeg and pylibjpeg-openjpeg",
        "1.2.840.10008.1.2.4.203": "pylibjpeg and pylibjpeg-openjpeg",
        "1.2.840.10008.1.2.5": "pylibjpeg and pylibjpeg-rle",
    }
)
_PIXEL_KEYWORDS = ("PixelData", "FloatPixelData", "DoubleFloatPixelData")


def series_label(header: SeriesHeader) -> str:
    """Short one-line name of a series for messages: the end of its UID and its description."""
    uid = printable(header.series_uid, 64)
    label = f"series ...{uid[-12:].lstrip('.')}" if len(uid) > 12 else f"series {uid or '(no UID)'}"
    if header.series_description:
        label += f" '{printable(header.series_description, 40)}'"
    return label


def _check_pixel_data(ds: Dataset, label: str) -> None:
    """Refuse pixel data that is missing, cut short or undecodable before decoding it."""
    if not any(k in ds for k in _PIXEL_KEYWORDS):
        raise reject(label, "an image without pixel data", "resend the series with its pixels")
    if int(ds.get("SamplesPerPixel") or 1) != 1:
        raise reject(label, "colour images", "send a greyscale series")
    meta = getattr(ds, "file_meta", None)
    ts_text = meta.get("TransferSyntaxUID") if meta is not None else None
    if not ts_text:
        raise reject(label, "no Transfer Syntax UID", "resend the series as DICOM files")
    ts = UID(str(ts_text))
    if not ts.is_transfer_syntax:
        raise reject(
            label,
            f"unknown transfer syntax {ts}",
            "no decoder is installed for it; ask the sender for Explicit VR Little Endian",
        )
    if ts.is_compressed:
        try:
            decoder = get_decoder(ts)
        except NotImplementedError:
            raise reject(
                label,
                f"no decoder for transfer syntax {ts.name} ({ts})",
                "ask the sender for Explicit VR Little Endian or a JPEG/JPEG 2000/RLE syntax",
            ) from None
        if not decoder.is_available:
            package = _DECODER_PACKAGES.get(str(ts), "a pydicom pixel data plugin")
            raise reject(
                label,
                f"transfer syntax {ts.name} ({ts}) needs a decoder that is not installed",
                f"install {package}",
            )
        _check_fragments(ds, label)
        return
    if "PixelData" in ds:
        rows, cols = int(ds.Rows), int(ds.Columns)
        frames = int(ds.get("NumberOfFrames") or 1)
        bits = int(ds.get("BitsAllocated") or 16)
        expected = math.ceil(rows * cols * frames * bits / 8)
        actual = len(ds.PixelData)
        if actual < expected:
            raise reject(
                label,
                f"pixel data is {actual} bytes, {expected} expected (file cut short)",
                "resend the series",
            )
        # PS3.5 8.1.1 pads the value to an even length; some writers add a little more (pydicom
        # ships such a file), but pixels far beyond what the header describes mean that Rows,
        # Columns or Bits Allocated are wrong and the image would be read garbled
        if actual - expected > max(1024, expected // 8):
            raise reject(
                label,
                f"pixel data is {actual} bytes, {expected} expected for {rows}x{cols}x{frames} "
                f"at {bits} bits (Rows, Columns or Bits Allocated do not match the pixels)",
                "the header is damaged; resend the series",
            )


def _check_fragments(ds: Dataset, label: str) -> None:
    """Refuse encapsulated pixel data whose item structure cannot hold the declared frames.

    Only the item tags and lengths are walked (no decoding, no copy): each frame needs at least
    one fragment, and a damaged item list fails to parse.
    """
    frames = int(ds.get("NumberOfFrames") or 1)
    try:
        buffer = io.BytesIO(ds.PixelData)
        offsets = parse_basic_offsets(buffer)
        fragments, _ = parse_fragments(buffer)
    except Exception as exc:  # a damaged item list: wrong tags or lengths past the end
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise reject(
            label,
            f"compressed pixel data is damaged ({printable(first, 100)})",
            "resend the series",
        ) from None
    if len(offsets) > 1 and len(offsets) != frames:
        raise reject(
            label,
            f"compressed pixel data indexes {len(offsets)} frames, the header {frames}",
            "resend the series",
        )
    if fragments < frames:
        raise reject(
            label,
            f"compressed pixel data holds {fragments} fragments for {frames} frames (cut short)",
            "resend the series",
        )


def _pixels(ds: Dataset, label: str) -> npt.NDArray[np.generic]:
    """Decoded pixel array; :func:`_check_pixel_data` must have passed."""
    # pydicom logs each failing decoder with a traceback; the refusal below says it in a line
    pydicom_log = logging.getLogger("pydicom")
    level = pydicom_log.level
    pydicom_log.setLevel(logging.CRITICAL)
    try:
        arr = ds.pixel_array
    except Exception as exc:  # decoders raise assorted types; all mean the same to the user
        lines = [line.strip() for line in str(exc).splitlines() if line.strip()]
        first = " ".join(lines[:2]) if lines else type(exc).__name__
        syntax = UID(str(ds.file_meta.TransferSyntaxUID)).name
        raise reject(
            label,
            f"pixel data cannot be decoded ({syntax}: {printable(first, 200)})",
            "the file is damaged or its compression unsupported; resend it uncompressed",
        ) from None
    finally:
        pydicom_log.setLevel(level)
    return np.asarray(arr)


def volume_from_datasets(datasets: Sequence[Dataset], label: str) -> Volume:
    """Build one volume from the datasets of a series (pure: no file access).

    Parameters
    ----------
    datasets : sequence of pydicom Dataset
        Every instance of the series, with pixel data, in any order. Single-frame images and
        enhanced multi-frame images (per-frame or shared functional groups) are accepted.
    label : str
        Series name for messages (see :func:`series_label`).

    Returns
    -------
    Volume
        float32 data, axes (i, j, k) = (column, row, slice along the normal), Rescale Slope and
        Intercept applied; ``affine_lps`` in LPS mm.
    """
    if not datasets:
        raise reject(label, "no images", "check the input")
    frames: list[Frame] = []
    for index, ds in enumerate(datasets):
        why = not_image_reason(ds)
        if why is not None:
            todo = "only image series can be processed"
            raise reject(label, why, todo if why.startswith("not an") else "resend the series")
        # Cheap checks of every file first: a series still arriving shows up here, and sizes
        # are checked on the header before anything is decoded or allocated.
        too_big = declared_size_problem(ds)
        if too_big is not None:
            raise reject(label, too_big, "only MR-sized images can be processed")
        _check_pixel_data(ds, label)
        frames.extend(frames_of(ds, index, label))
    shapes = sorted({f.shape for f in frames})
    if len(shapes) > 1:
        sizes = ", ".join(f"{r}x{c}" for r, c in shapes)
        raise reject(
            label,
            f"mixed matrix sizes ({sizes})",
            "export each stack as its own series",
        )
    orient = np.array([f.orientation for f in frames])
    if np.max(np.abs(orient - orient[0])) > ORIENTATION_TOLERANCE:
        count = len({tuple(np.round(o, 2)) for o in orient})
        raise reject(
            label,
            f"mixed orientations ({count} different; a localizer or a mix of stacks)",
            "such a series cannot be read as one volume; select a single-orientation series",
        )
    spacings = np.array([f.spacing for f in frames])
    if np.max(np.abs(spacings - spacings[0])) > 1e-4 * np.max(spacings[0]) + 1e-6:
        raise reject(label, "mixed pixel spacing", "export each stack as its own series")
    order, affine = stack_geometry(
        [f.position for f in frames],
        frames[0].orientation,
        frames[0].spacing,
        label,
    )
    rows, cols = frames[0].shape
    too_big = volume_size_problem(rows, cols, len(frames))
    if too_big is not None:
        raise reject(label, too_big, "split the series or send a smaller one")
    data = np.empty((cols, rows, len(frames)), dtype=np.float32)
    pixels: dict[int, npt.NDArray[np.generic]] = {}
    for k, idx in enumerate(order):
        frame = frames[int(idx)]
        if frame.dataset not in pixels:
            arr = _pixels(datasets[frame.dataset], label)
            if arr.ndim == 2:
                arr = arr[np.newaxis]
            if arr.shape[1:] != (rows, cols):
                raise reject(label, "pixel data shape disagrees with Rows/Columns", "resend")
            pixels[frame.dataset] = arr
        plane = pixels[frame.dataset][frame.frame].astype(np.float32)
        if frame.slope != 1.0 or frame.intercept != 0.0:
            plane = plane * np.float32(frame.slope) + np.float32(frame.intercept)
        data[:, :, k] = plane.T  # pixel arrays are [row j, column i]
    logger.debug(
        "%s: %d slices, spacing %s mm", label, len(frames), np.linalg.norm(affine[:3, :3], axis=0)
    )
    return Volume(data, affine)


def read_datasets(series: Series) -> list[Dataset]:
    """Read every file of a series in full (pixel data included); the I/O half of loading."""
    label = series_label(series.header)
    datasets: list[Dataset] = []
    for record in series.files:
        name = printable(record.path.name)
        try:
            fd = os.open(record.path, os.O_RDONLY | getattr(os, "O_CLOEXEC", 0))
            with CappedReader(fd) as fh:  # a damaged length never allocates what it declares
                st = os.fstat(fd)
                if (st.st_size, st.st_mtime_ns) != (record.size, record.mtime_ns):
                    raise reject(
                        label,
                        f"{name} changed since it was scanned",
                        "it is read again once it stops changing",
                    )
                too_big = file_size_problem(st.st_size)
                if too_big is not None:
                    raise reject(label, f"{name}: {too_big}", "resend the series")
                datasets.append(pydicom.dcmread(fh, force=True))
        except InputRejected:
            raise
        except OSError as exc:
            raise reject(
                label,
                f"cannot read {printable(record.path.name)} ({exc.strerror or exc})",
                "check that the file is still there and readable",
            ) from None
        except Exception as exc:  # pydicom raises many types on damaged files
            raise reject(
                label,
                f"{printable(record.path.name)} is not readable DICOM ({type(exc).__name__})",
                "resend the series",
            ) from None
    return datasets


def load_series(series: Series) -> Volume:
    """Read a series and return its volume on its own grid (see :func:`volume_from_datasets`)."""
    return volume_from_datasets(read_datasets(series), series_label(series.header))


def load_nifti(path: Path) -> Volume:
    """Read a NIfTI-1/2 image as a float32 volume with an LPS affine.

    The file's best affine (sform, else qform) maps (i, j, k) to RAS mm; it is converted to LPS.
    A 4-D image is accepted only when its fourth dimension has length 1.
    """
    label = f"file {printable(path.name)}"
    try:
        img = nib.load(path)
        affine = np.asarray(img.affine, dtype=np.float64)  # type: ignore[attr-defined]
        shape = tuple(int(s) for s in img.shape)  # type: ignore[attr-defined]
    except FileNotFoundError:
        raise reject(label, "not found", "check the path") from None
    except Exception as exc:  # nibabel raises several types for files it cannot parse
        raise reject(
            label, f"not a readable NIfTI image ({type(exc).__name__})", "check the file"
        ) from None
    if len(shape) == 4 and shape[3] == 1:
        shape = shape[:3]
    if len(shape) != 3:
        raise reject(label, f"image has shape {shape}", "give a 3-D image")
    try:
        data = np.asarray(img.get_fdata(dtype=np.float32)).reshape(shape)  # type: ignore[attr-defined]
    except Exception as exc:  # truncated or unreadable data block
        raise reject(
            label, f"image data unreadable ({type(exc).__name__})", "check the file"
        ) from None
    return Volume(np.ascontiguousarray(data), ras_to_lps(affine))

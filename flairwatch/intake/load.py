"""Turn a series (or a NIfTI file) into a :class:`~flairwatch.volume.Volume` with its geometry.

Reading files (:func:`read_datasets`) is kept apart from interpreting datasets
(:func:`volume_from_datasets`), so tests can feed datasets built in memory.

Geometry follows DICOM PS3.3 C.7.6.2.1.1: a pixel at column index i and row index j of a slice at
Image Position (Patient) P lies at ``P + i * dc * X + j * dr * Y``, where X and Y are the row and
column direction cosines of Image Orientation (Patient) and Pixel Spacing is ``(dr, dc)`` =
(row spacing, column spacing). Slices are ordered by the projection of P on the slice normal
``X x Y``, never by file name or Instance Number. Every refusal raises
:class:`~flairwatch.errors.InputRejected` with one line: the series, what is wrong, what to do.
"""

from __future__ import annotations

import logging
import math
import types
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import nibabel as nib
import numpy as np
import numpy.typing as npt
import pydicom
from pydicom.dataset import Dataset
from pydicom.pixels import get_decoder
from pydicom.uid import UID

from flairwatch.errors import InputRejected
from flairwatch.intake.discover import functional_group, not_image_reason
from flairwatch.records import Series, SeriesHeader
from flairwatch.volume import Volume, ras_to_lps

logger = logging.getLogger(__name__)

#: Largest allowed difference between slice steps: this fraction of the step, or
#: :data:`SPACING_TOLERANCE_MM`, whichever is larger (positions carry rounded decimals).
SPACING_TOLERANCE_FRACTION = 0.01
SPACING_TOLERANCE_MM = 0.01
#: Direction cosines that differ by more than this are different orientations.
ORIENTATION_TOLERANCE = 1e-3
#: Slices whose centres drift sideways from the normal by more than this fraction of the
#: smallest pixel spacing do not form a rectangular grid (gantry tilt, sheared stacks).
SHEAR_TOLERANCE_FRACTION = 0.1

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


def _printable(text: str, limit: int = 60) -> str:
    """Text safe for a one-line message (control characters, newlines in names, become spaces)."""
    return "".join(c if c.isprintable() else " " for c in text).strip()[:limit]


def series_label(header: SeriesHeader) -> str:
    """Short one-line name of a series for messages: the end of its UID and its description."""
    uid = _printable(header.series_uid, 64)
    label = f"series ...{uid[-12:].lstrip('.')}" if len(uid) > 12 else f"series {uid or '(no UID)'}"
    if header.series_description:
        label += f" '{_printable(header.series_description, 40)}'"
    return label


def _reject(label: str, reason: str, todo: str) -> InputRejected:
    return InputRejected(f"{label}: {reason}; {todo}")


@dataclass(frozen=True)
class _Frame:
    """One 2-D image of the stack: where it lies (LPS mm) and how to get its pixels."""

    position: tuple[float, float, float]
    orientation: tuple[float, float, float, float, float, float]
    spacing: tuple[float, float]  # (row spacing, column spacing) in mm
    shape: tuple[int, int]  # (rows, columns)
    dataset: int
    frame: int
    slope: float
    intercept: float


def _floats(value: object, n: int) -> tuple[float, ...] | None:
    try:
        numbers = tuple(float(v) for v in value)  # type: ignore[attr-defined]
    except Exception:  # missing, not a sequence, or bad DS text
        return None
    if len(numbers) != n or not all(math.isfinite(v) for v in numbers):
        return None
    return numbers


def _rescale(ds: Dataset | None) -> tuple[float, float]:
    if ds is None:
        return (1.0, 0.0)
    slope = _floats([ds.get("RescaleSlope", 1.0)], 1)
    intercept = _floats([ds.get("RescaleIntercept", 0.0)], 1)
    return (slope[0] if slope else 1.0, intercept[0] if intercept else 0.0)


def _frames_of(ds: Dataset, index: int, label: str) -> list[_Frame]:
    rows, cols = int(ds.Rows), int(ds.Columns)
    try:
        n_frames = int(ds.get("NumberOfFrames") or 1)
    except (TypeError, ValueError):
        raise _reject(label, "bad Number of Frames", "resend the series") from None
    no_geometry = (
        "the header lacks Image Position/Orientation (Patient) or Pixel Spacing",
        "send the series as the scanner made it",
    )
    if "PerFrameFunctionalGroupsSequence" in ds:
        if len(ds.PerFrameFunctionalGroupsSequence) != n_frames:
            raise _reject(
                label,
                f"{n_frames} frames but {len(ds.PerFrameFunctionalGroupsSequence)} per-frame "
                "descriptions",
                "resend the series",
            )
        frames = []
        for f in range(n_frames):
            position = functional_group(ds, "PlanePositionSequence", f)
            orientation = functional_group(ds, "PlaneOrientationSequence", f)
            measures = functional_group(ds, "PixelMeasuresSequence", f)
            ipp = _floats(position and position.get("ImagePositionPatient"), 3)
            iop = _floats(orientation and orientation.get("ImageOrientationPatient"), 6)
            ps = _floats(measures and measures.get("PixelSpacing"), 2)
            if ipp is None or iop is None or ps is None:
                raise _reject(label, f"frame {f + 1}: {no_geometry[0]}", no_geometry[1])
            slope, intercept = _rescale(functional_group(ds, "PixelValueTransformationSequence", f))
            frames.append(_Frame(ipp, iop, ps, (rows, cols), index, f, slope, intercept))  # type: ignore[arg-type]
        return frames
    if n_frames != 1:
        raise _reject(
            label,
            f"multi-frame image ({n_frames} frames) without per-frame positions",
            "send the series as single-frame or enhanced MR images",
        )
    ipp = _floats(ds.get("ImagePositionPatient"), 3)
    iop = _floats(ds.get("ImageOrientationPatient"), 6)
    ps = _floats(ds.get("PixelSpacing"), 2)
    if ipp is None or iop is None or ps is None:
        raise _reject(label, no_geometry[0], no_geometry[1])
    slope, intercept = _rescale(ds)
    return [_Frame(ipp, iop, ps, (rows, cols), index, 0, slope, intercept)]  # type: ignore[arg-type]


def stack_geometry(
    positions: npt.ArrayLike,
    orientation: Sequence[float],
    pixel_spacing: tuple[float, float],
    label: str,
) -> tuple[npt.NDArray[np.intp], npt.NDArray[np.float64]]:
    """Slice order and LPS affine of a stack of parallel slices (pure).

    Parameters
    ----------
    positions : array, shape (N, 3)
        Image Position (Patient) of each slice, LPS mm, in any order.
    orientation : sequence of 6 floats
        Image Orientation (Patient): row direction cosine X, then column direction cosine Y.
    pixel_spacing : (float, float)
        Pixel Spacing as in DICOM: (row spacing, column spacing) in mm.
    label : str
        Series name for messages.

    Returns
    -------
    order : array of int, shape (N,)
        Indices of ``positions`` sorted along the slice normal X x Y.
    affine : array, shape (4, 4)
        Maps (i, j, k, 1), i = column index, j = row index, k = position in ``order``, to LPS mm.

    Raises
    ------
    InputRejected
        Single slice, duplicate positions, gaps or uneven spacing, slices not stacked along the
        normal, or an invalid orientation.
    """
    pos = np.asarray(positions, dtype=np.float64).reshape(-1, 3)
    n = pos.shape[0]
    if n < 2:
        raise _reject(
            label,
            "only one slice",
            "a 3-D volume needs at least two; check that the whole series arrived",
        )
    x = np.asarray(orientation[:3], dtype=np.float64)
    y = np.asarray(orientation[3:], dtype=np.float64)
    nx, ny = np.linalg.norm(x), np.linalg.norm(y)
    if abs(nx - 1) > 0.01 or abs(ny - 1) > 0.01 or abs(float(x @ y)) > 0.01:
        raise _reject(
            label,
            "Image Orientation (Patient) is not two unit perpendicular vectors",
            "the header is damaged; send the series as the scanner made it",
        )
    x, y = x / nx, y / ny
    normal = np.cross(x, y)
    normal /= np.linalg.norm(normal)
    along = pos @ normal
    order = np.argsort(along, kind="stable")
    along = along[order]
    steps = np.diff(along)
    if np.any(steps < SPACING_TOLERANCE_MM):
        dup = int(np.sum(steps < SPACING_TOLERANCE_MM))
        raise _reject(
            label,
            f"{dup} duplicate slice position(s)",
            "the series holds several images per position (echoes, repeats or phases); "
            "export one image per position",
        )
    typical = float(np.median(steps))
    tolerance = max(SPACING_TOLERANCE_MM, SPACING_TOLERANCE_FRACTION * typical)
    if np.max(np.abs(steps - typical)) > tolerance:
        widest = int(np.argmax(steps))
        if steps[widest] > 1.5 * typical:
            raise _reject(
                label,
                f"gap between slices {widest + 1} and {widest + 2} of {n} "
                f"({steps[widest]:.2f} mm apart, the others {typical:.2f} mm)",
                "check that every slice arrived and resend the series",
            )
        raise _reject(
            label,
            f"uneven slice spacing ({steps.min():.3f} to {steps.max():.3f} mm)",
            "reconstruct or export the series with even spacing",
        )
    spacing_k = float((along[-1] - along[0]) / (n - 1))
    offsets = pos[order] - pos[order[0]]
    sideways = offsets - np.outer(offsets @ normal, normal)
    drift = float(np.max(np.linalg.norm(sideways, axis=1)))
    if drift > SHEAR_TOLERANCE_FRACTION * min(pixel_spacing):
        raise _reject(
            label,
            f"slices drift {drift:.2f} mm sideways from the slice normal (tilted or sheared stack)",
            "reconstruct the series on a rectangular grid",
        )
    row_spacing, col_spacing = pixel_spacing
    affine = np.eye(4)
    affine[:3, 0] = x * col_spacing
    affine[:3, 1] = y * row_spacing
    affine[:3, 2] = normal * spacing_k
    affine[:3, 3] = pos[order[0]]
    return order, affine


def _check_pixel_data(ds: Dataset, label: str) -> None:
    """Refuse pixel data that is missing, cut short or undecodable before decoding it."""
    if not any(k in ds for k in _PIXEL_KEYWORDS):
        raise _reject(label, "an image without pixel data", "resend the series with its pixels")
    if int(ds.get("SamplesPerPixel") or 1) != 1:
        raise _reject(label, "colour images", "send a greyscale series")
    meta = getattr(ds, "file_meta", None)
    ts_text = meta.get("TransferSyntaxUID") if meta is not None else None
    if not ts_text:
        raise _reject(label, "no Transfer Syntax UID", "resend the series as DICOM files")
    ts = UID(str(ts_text))
    if not ts.is_transfer_syntax:
        raise _reject(
            label,
            f"unknown transfer syntax {ts}",
            "no decoder is installed for it; ask the sender for Explicit VR Little Endian",
        )
    if ts.is_compressed:
        try:
            decoder = get_decoder(ts)
        except NotImplementedError:
            raise _reject(
                label,
                f"no decoder for transfer syntax {ts.name} ({ts})",
                "ask the sender for Explicit VR Little Endian or a JPEG/JPEG 2000/RLE syntax",
            ) from None
        if not decoder.is_available:
            package = _DECODER_PACKAGES.get(str(ts), "a pydicom pixel data plugin")
            raise _reject(
                label,
                f"transfer syntax {ts.name} ({ts}) needs a decoder that is not installed",
                f"install {package}",
            )
        return
    if "PixelData" in ds:
        rows, cols = int(ds.Rows), int(ds.Columns)
        frames = int(ds.get("NumberOfFrames") or 1)
        bits = int(ds.get("BitsAllocated") or 16)
        expected = math.ceil(rows * cols * frames * bits / 8)
        actual = len(ds.PixelData)
        if actual < expected:
            raise _reject(
                label,
                f"pixel data is {actual} bytes, {expected} expected (file cut short)",
                "resend the series",
            )


def _pixels(ds: Dataset, label: str) -> npt.NDArray[np.generic]:
    """Decoded pixel array; :func:`_check_pixel_data` must have passed."""
    try:
        arr = ds.pixel_array
    except Exception as exc:  # decoders raise assorted types; all mean the same to the user
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        syntax = UID(str(ds.file_meta.TransferSyntaxUID)).name
        raise _reject(
            label,
            f"pixel data cannot be decoded ({syntax}: {_printable(first, 120)})",
            "the file is damaged or its compression unsupported; resend it uncompressed",
        ) from None
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
        raise _reject(label, "no images", "check the input")
    frames: list[_Frame] = []
    for index, ds in enumerate(datasets):
        why = not_image_reason(ds)
        if why is not None:
            todo = "only image series can be processed"
            raise _reject(label, why, todo if why.startswith("not an") else "resend the series")
        # Cheap checks of every file first: a series still arriving shows up here.
        _check_pixel_data(ds, label)
        frames.extend(_frames_of(ds, index, label))
    shapes = sorted({f.shape for f in frames})
    if len(shapes) > 1:
        sizes = ", ".join(f"{r}x{c}" for r, c in shapes)
        raise _reject(
            label,
            f"mixed matrix sizes ({sizes})",
            "export each stack as its own series",
        )
    orient = np.array([f.orientation for f in frames])
    if np.max(np.abs(orient - orient[0])) > ORIENTATION_TOLERANCE:
        count = len({tuple(np.round(o, 2)) for o in orient})
        raise _reject(
            label,
            f"mixed orientations ({count} different; a localizer or a mix of stacks)",
            "such a series cannot be read as one volume; select a single-orientation series",
        )
    spacings = np.array([f.spacing for f in frames])
    if np.max(np.abs(spacings - spacings[0])) > 1e-4 * np.max(spacings[0]) + 1e-6:
        raise _reject(label, "mixed pixel spacing", "export each stack as its own series")
    order, affine = stack_geometry(
        [f.position for f in frames],
        frames[0].orientation,
        frames[0].spacing,
        label,
    )
    rows, cols = frames[0].shape
    data = np.empty((cols, rows, len(frames)), dtype=np.float32)
    pixels: dict[int, npt.NDArray[np.generic]] = {}
    for k, idx in enumerate(order):
        frame = frames[int(idx)]
        if frame.dataset not in pixels:
            arr = _pixels(datasets[frame.dataset], label)
            if arr.ndim == 2:
                arr = arr[np.newaxis]
            if arr.shape[1:] != (rows, cols):
                raise _reject(label, "pixel data shape disagrees with Rows/Columns", "resend")
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
        try:
            datasets.append(pydicom.dcmread(record.path, force=True))
        except OSError as exc:
            raise _reject(
                label,
                f"cannot read {_printable(record.path.name)} ({exc.strerror or exc})",
                "check that the file is still there and readable",
            ) from None
        except Exception as exc:  # pydicom raises many types on damaged files
            raise _reject(
                label,
                f"{_printable(record.path.name)} is not readable DICOM ({type(exc).__name__})",
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
    label = f"file {_printable(path.name)}"
    try:
        img = nib.load(path)
        affine = np.asarray(img.affine, dtype=np.float64)  # type: ignore[attr-defined]
        shape = tuple(int(s) for s in img.shape)  # type: ignore[attr-defined]
    except FileNotFoundError:
        raise _reject(label, "not found", "check the path") from None
    except Exception as exc:  # nibabel raises several types for files it cannot parse
        raise _reject(
            label, f"not a readable NIfTI image ({type(exc).__name__})", "check the file"
        ) from None
    if len(shape) == 4 and shape[3] == 1:
        shape = shape[:3]
    if len(shape) != 3:
        raise _reject(label, f"image has shape {shape}", "give a 3-D image")
    try:
        data = np.asarray(img.get_fdata(dtype=np.float32)).reshape(shape)  # type: ignore[attr-defined]
    except Exception as exc:  # truncated or unreadable data block
        raise _reject(
            label, f"image data unreadable ({type(exc).__name__})", "check the file"
        ) from None
    return Volume(np.ascontiguousarray(data), ras_to_lps(affine))
